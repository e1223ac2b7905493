"""MQTT ingest: queueing off the network thread, persistent sessions, reconnects, refused
credentials. The broker tests run against a real Mosquitto (fixtures in conftest.py)."""

from __future__ import annotations

import gc
import subprocess
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from gateway.config import MqttSettings
from gateway.errors import BrokerAuthError, ConfigError
from gateway.ingest import Ingest, collar_filter, validate_filter
from gateway.ingestproc import ProcessIngest
from gateway.servers import start_mosquitto
from gateway.telemetry import Telemetry

SERVERS = Path(__file__).parent / "servers"
TOPIC = "barn/test-site/collars/{}/accel"


def _settings(srv, **kw) -> MqttSettings:
    base = {"host": srv.host, "port": srv.port, "reconnect_min_s": 0.2, "reconnect_max_s": 1.0}
    base.update(kw)
    return MqttSettings(**base)


def _publish(srv, items: list[tuple[str, bytes]], qos: int = 1) -> None:
    pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="", protocol=mqtt.MQTTv311)
    pub.connect(srv.host, srv.port)
    pub.loop_start()
    try:
        infos = [pub.publish(t, p, qos=qos) for t, p in items]
        for info in infos:
            info.wait_for_publish(10)
    finally:
        pub.disconnect()
        pub.loop_stop()


@pytest.fixture(params=["thread", "process"])
def ingest_cls(request):
    """Every broker test runs with the MQTT client in a thread and in a process of its own
    (``[process] ingest``, gateway/ingestproc.py): the same interface, the same behaviour."""
    return Ingest if request.param == "thread" else ProcessIngest


def _drain_until(ing: Ingest, n: int, timeout_s: float = 10.0) -> list:
    got: list = []
    deadline = time.monotonic() + timeout_s
    while len(got) < n and time.monotonic() < deadline:
        got.extend(ing.drain(1000, timeout_s=0.1))
    return got


def test_on_message_only_enqueues_with_receive_time() -> None:
    ing = Ingest(MqttSettings(), topic_filter=collar_filter("barn", "x"))
    msg = mqtt.MQTTMessage(topic=b"barn/x/collars/C1/accel")
    msg.payload = b'{"seq": 1}'
    before = time.time()
    ing.on_message(None, None, msg)
    [(topic, payload, rx)] = ing.drain(timeout_s=0)
    assert topic == "barn/x/collars/C1/accel" and payload == b'{"seq": 1}'
    assert before <= rx <= time.time()
    assert ing.drain(timeout_s=0) == []


def test_full_queue_drops_and_counts() -> None:
    tel = Telemetry()
    ing = Ingest(MqttSettings(), topic_filter="barn/+/collars/+/accel", queue_max=3, telemetry=tel)
    ing.put_timeout_s = 0.01
    msg = mqtt.MQTTMessage(topic=b"barn/x/collars/C1/accel")
    for _ in range(5):
        ing.on_message(None, None, msg)
    assert len(ing.drain(timeout_s=0)) == 3
    assert tel.value("boutline_queue_dropped_total") == 2.0


def test_queue_is_bounded_in_bytes_and_huge_payloads_are_cut_to_an_oversize_stub() -> None:
    from gateway.wire import Reason, decode

    tel = Telemetry()
    ing = Ingest(
        MqttSettings(),
        topic_filter="barn/+/collars/+/accel",
        queue_max_bytes=3 * 2**20,
        telemetry=tel,
    )
    huge = mqtt.MQTTMessage(topic=b"barn/x/collars/C1/accel")
    huge.payload = b"{" + b" " * (8 * 2**20)  # 8 MiB: more than any allowed payload
    for _ in range(5):
        ing.on_message(None, None, huge)
    got = ing.drain(timeout_s=0)
    # Each kept copy is cut to the largest allowed size + 1; only two fit in 3 MiB.
    assert [len(m[1]) for m in got] == [2**20 + 1, 2**20 + 1]
    assert tel.value("boutline_queue_dropped_total") == 3.0
    assert decode(got[0][1], "C1").reason == Reason.OVERSIZE
    # Draining gives the budget back: the next message fits again.
    ing.on_message(None, None, huge)
    assert len(ing.drain(timeout_s=0)) == 1


@pytest.mark.parametrize("bad", ["", "barn//x", "barn/#/x", "barn/x y", "barn/+x/a", "a" * 70000])
def test_malformed_topic_filters_are_refused_at_start(bad: str) -> None:
    with pytest.raises(ConfigError, match="topic filter"):
        validate_filter(bad)
    assert validate_filter("barn/+/collars/+/accel") and validate_filter("#")


@pytest.mark.integration
@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_receives_qos1_frames_from_a_real_broker(mosquitto, protocol: str, ingest_cls) -> None:
    ing = ingest_cls(
        _settings(mosquitto, protocol=protocol),
        topic_filter="barn/test-site/collars/+/accel",
        client_id=f"recv-{protocol}-{ingest_cls.__name__}",
    )
    ing.start()
    try:
        assert ing.wait_connected(10)
        _publish(mosquitto, [(TOPIC.format(f"C{i}"), b"x%d" % i) for i in range(20)])
        got = _drain_until(ing, 20)
        assert sorted(p for _, p, _ in got) == sorted(b"x%d" % i for i in range(20))
        assert {t for t, _, _ in got} == {TOPIC.format(f"C{i}") for i in range(20)}
    finally:
        ing.stop()


@pytest.mark.integration
@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_persistent_session_delivers_frames_queued_while_away(
    mosquitto, protocol: str, ingest_cls
) -> None:
    settings = _settings(
        mosquitto,
        protocol=protocol,
        client_id=f"persist-{protocol.replace('.', '')}-{ingest_cls.__name__}",
    )
    topic_filter = "barn/test-site/collars/+/accel"
    first = ingest_cls(settings, topic_filter=topic_filter)
    first.start()
    assert first.wait_connected(10)
    first.stop()  # the gateway goes away; its session stays on the broker
    _publish(mosquitto, [(TOPIC.format("C7"), b"away-%d" % i) for i in range(50)])
    second = ingest_cls(settings, topic_filter=topic_filter)
    second.start()
    try:
        got = _drain_until(second, 50)
        assert [p for _, p, _ in got] == [b"away-%d" % i for i in range(50)]
    finally:
        second.stop()


@pytest.mark.integration
def test_reconnects_after_the_broker_restarts(mosquitto_private, ingest_cls) -> None:
    tel = Telemetry()
    ing = ingest_cls(
        _settings(mosquitto_private, client_id="reconnect"),
        topic_filter="barn/test-site/collars/+/accel",
        telemetry=tel,
    )
    ing.start()
    try:
        assert ing.wait_connected(10)
        mosquitto_private.restart()
        deadline = time.monotonic() + 15
        while ing.connects < 2 and time.monotonic() < deadline:
            ing.drain(100, timeout_s=0.05)  # a process ingest reports its state through drain
        assert ing.connects == 2 and ing.wait_connected(5)
        _publish(mosquitto_private, [(TOPIC.format("C1"), b"after")])
        assert [p for _, p, _ in _drain_until(ing, 1)] == [b"after"]
        assert tel.value("boutline_broker_reconnects_total") == 2.0
    finally:
        ing.stop()


@pytest.fixture
def auth_broker(tmp_path: Path):
    work = tmp_path / "auth"
    work.mkdir()
    subprocess.run(
        ["mosquitto_passwd", "-b", "-c", str(work / "passwd"), "gateway", "right-password"],
        check=True,
        capture_output=True,
    )
    (work / "passwd").chmod(0o600)
    srv = start_mosquitto(work, SERVERS / "mosquitto-auth.conf")
    yield srv
    srv.stop()


@pytest.mark.integration
@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_refused_credentials_stop_with_a_clear_error(
    auth_broker, protocol: str, ingest_cls
) -> None:
    ing = ingest_cls(
        _settings(auth_broker, protocol=protocol, username="gateway", password="wrong"),
        topic_filter="barn/+/collars/+/accel",
    )
    ing.start()
    try:
        with pytest.raises(BrokerAuthError, match="refused the connection .*mqtt.username"):
            ing.wait_connected(10)
        time.sleep(1.5)  # longer than the reconnect backoff: no further attempt is made
        assert ing.connects == 0
        with pytest.raises(BrokerAuthError):
            ing.check()
    finally:
        ing.stop()
    ok = ingest_cls(
        _settings(auth_broker, protocol=protocol, username="gateway", password="right-password"),
        topic_filter="barn/+/collars/+/accel",
    )
    ok.start()
    try:
        assert ok.wait_connected(10)
    finally:
        ok.stop()


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


@pytest.fixture
def tls_broker(tmp_path: Path):
    """Mosquitto behind TLS, with a throwaway CA and a server certificate for 127.0.0.1."""
    work = tmp_path / "tls"
    work.mkdir()
    _openssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", "ca.key", "-out",
             "ca.crt", "-days", "2", "-subj", "/CN=boutline-test-ca", cwd=work)  # fmt: skip
    _openssl("req", "-newkey", "rsa:2048", "-nodes", "-keyout", "server.key", "-out",
             "server.csr", "-subj", "/CN=127.0.0.1", cwd=work)  # fmt: skip
    (work / "san.ext").write_text("subjectAltName=IP:127.0.0.1\n")
    _openssl("x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
             "-CAcreateserial", "-out", "server.crt", "-days", "2", "-extfile", "san.ext",
             cwd=work)  # fmt: skip
    _openssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", "other.key", "-out",
             "other-ca.crt", "-days", "2", "-subj", "/CN=someone-else", cwd=work)  # fmt: skip
    srv = start_mosquitto(work, SERVERS / "mosquitto-tls.conf")
    yield srv
    srv.stop()


@pytest.mark.integration
# paho-mqtt 2.2 leaves the socket of a failed TLS handshake for the garbage collector
# (client._ssl_wrap_socket does not close it); the resulting ResourceWarning is paho's
@pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning")
def test_tls_with_the_right_ca_connects_and_a_wrong_ca_does_not(
    tls_broker, caplog: pytest.LogCaptureFixture, ingest_cls
) -> None:
    work = tls_broker.workdir
    good = ingest_cls(
        _settings(tls_broker, tls=True, ca_file=str(work / "ca.crt"), client_id="tls-good"),
        topic_filter="barn/test-site/collars/+/accel",
    )
    good.start()
    try:
        assert good.wait_connected(10)
    finally:
        good.stop()
    bad = ingest_cls(
        _settings(tls_broker, tls=True, ca_file=str(work / "other-ca.crt"), client_id="tls-bad"),
        topic_filter="barn/test-site/collars/+/accel",
    )
    bad.start()
    try:
        assert not bad.wait_connected(2)  # certificate not trusted: no session, keeps retrying
        assert bad.connects == 0
        assert "TLS certificate is not trusted" in caplog.text
    finally:
        bad.stop()
        gc.collect()  # collect paho's leaked sockets here, under this test's warning filter


def test_unreadable_tls_files_are_a_config_error(tmp_path: Path, ingest_cls) -> None:
    ing = ingest_cls(
        MqttSettings(tls=True, ca_file=str(tmp_path / "missing-ca.crt")),
        topic_filter="barn/+/collars/+/accel",
    )
    with pytest.raises(ConfigError, match="mqtt TLS files cannot be used"):
        ing.start()
