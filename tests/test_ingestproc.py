"""The MQTT ingest in a process of its own (gateway/ingestproc.py): what only a child process
can get wrong. Its behaviour as an ingest (sessions, reconnects, credentials, TLS) is tested
with both kinds of ingest in test_ingest.py. Real Mosquitto throughout (conftest.py)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from polling import wait_for

from gateway.config import MqttSettings, Settings, load_settings
from gateway.errors import BrokerError, ConfigError
from gateway.ingest import Ingest
from gateway.ingestproc import ProcessIngest, open_ingest, use_process
from gateway.telemetry import Telemetry
from gateway.wire import Reason, decode

TOPIC = "barn/test-site/collars/{}/accel"
FILTER = "barn/test-site/collars/+/accel"


def _settings(srv, **kw) -> MqttSettings:
    base = {"host": srv.host, "port": srv.port, "reconnect_min_s": 0.2, "reconnect_max_s": 1.0}
    base.update(kw)
    return MqttSettings(**base)


def _publish(srv, items: list[tuple[str, bytes]]) -> None:
    pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="", protocol=mqtt.MQTTv311)
    pub.connect(srv.host, srv.port)
    pub.loop_start()
    try:
        for info in [pub.publish(t, p, qos=1) for t, p in items]:
            info.wait_for_publish(20)
    finally:
        pub.disconnect()
        pub.loop_stop()


def _drain_until(ing, n: int, timeout_s: float = 20.0) -> list:
    got: list = []
    deadline = time.monotonic() + timeout_s
    while len(got) < n and time.monotonic() < deadline:
        got.extend(ing.drain(1000, timeout_s=0.1))
        ing.check()
    return got


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    # a zombie is gone for our purposes; ps says Z
    state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    return state != "Z"


def _replaced(ing: ProcessIngest, pid: int) -> bool:
    """check() as the daemon calls it every loop, until the process ``pid`` was replaced.
    (A killed process is a zombie for a moment before waitpid reports it.)"""
    ing.check()
    return ing.pid != pid


def test_the_setting_picks_the_kind_of_ingest() -> None:
    assert use_process("process", {0}) and not use_process("thread", {0, 1, 2})
    assert use_process("auto", {0, 1}) and not use_process("auto", {3})
    s = Settings.model_validate({"process": {"ingest": "thread"}})
    assert isinstance(open_ingest(s, topic_filter=FILTER), Ingest)
    s = Settings.model_validate({"process": {"ingest": "process"}})
    assert isinstance(open_ingest(s, topic_filter=FILTER), ProcessIngest)


@pytest.mark.parametrize("bad", ['"fork"', '"Process"', '""', "1", "true", '"' + "p" * 5000 + '"'])
def test_config_refuses_other_ingest_values(tmp_path: Path, bad: str) -> None:
    p = tmp_path / "b.toml"
    p.write_text(f"[process]\ningest = {bad}\n")
    with pytest.raises(ConfigError, match="process.ingest"):
        load_settings(p, env={})
    assert load_settings(None, env={}).process.ingest == "auto"


@pytest.mark.integration
def test_a_dead_ingest_process_is_replaced_and_the_session_keeps_the_frames(mosquitto) -> None:
    tel = Telemetry()
    ing = ProcessIngest(
        _settings(mosquitto, client_id="proc-restart"), topic_filter=FILTER, telemetry=tel
    )
    ing.start()
    try:
        assert ing.wait_connected(15)
        _publish(mosquitto, [(TOPIC.format("C1"), b"before-%d" % i) for i in range(10)])
        got = _drain_until(ing, 10)
        first = ing.pid
        assert first is not None and first != os.getpid()
        os.kill(first, signal.SIGKILL)  # a process we started, by its id
        assert wait_for(lambda: not _alive(first), 10)
        # published while no ingest process runs: the broker queues them in the session
        _publish(mosquitto, [(TOPIC.format("C1"), b"while-%d" % i) for i in range(10)])
        assert wait_for(lambda: _replaced(ing, first), 15)  # check() starts a new one
        assert ing.restarts == 1 and ing.pid not in (None, first)
        want = [b"before-%d" % i for i in range(10)] + [b"while-%d" % i for i in range(10)]

        def complete() -> bool:
            got.extend(ing.drain(1000, timeout_s=0.1))
            return {p for _, p, _ in got} >= set(want)

        assert wait_for(complete, 20)
        # QoS 1 is at least once: what the killed process took but had not acknowledged comes
        # again (Windows drops such duplicates by seq and time); nothing is missing
        assert list(dict.fromkeys(p for _, p, _ in got)) == want
        assert ing.connects == 2 and tel.value("boutline_broker_reconnects_total") == 2.0
    finally:
        ing.stop()


@pytest.mark.integration
def test_an_ingest_process_that_keeps_dying_is_a_clear_error(mosquitto) -> None:
    ing = ProcessIngest(
        _settings(mosquitto, client_id="proc-dying"), topic_filter=FILTER, max_restarts=2
    )
    ing.start()
    try:
        with pytest.raises(BrokerError, match="ingest process died 3 times"):
            for _ in range(4):
                pid = ing.pid
                assert pid is not None
                os.kill(pid, signal.SIGKILL)
                assert wait_for(lambda p=pid: _replaced(ing, p), 15)
        with pytest.raises(BrokerError):  # and it stays an error
            ing.check()
    finally:
        ing.stop()


@pytest.mark.integration
def test_stop_hands_over_every_message_the_process_took(mosquitto) -> None:
    """Stop while frames stream in: what the child took is in drain(), the rest stays in the
    session for the next start; together everything that was published."""
    settings = _settings(mosquitto, client_id="proc-stop")
    n = 3000
    first = ProcessIngest(settings, topic_filter=FILTER, buffer_max=200)
    first.start()
    assert first.wait_connected(15)
    pub = threading.Thread(
        target=_publish, args=(mosquitto, [(TOPIC.format("C2"), b"m%05d" % i) for i in range(n)])
    )
    pub.start()
    got = _drain_until(first, n // 3)
    first.stop()
    while batch := first.drain(1000, timeout_s=0):
        got += batch
    pub.join(60)
    assert len(got) < n  # stopped mid-stream (the rest waits at the broker)
    second = ProcessIngest(settings, topic_filter=FILTER)
    second.start()
    try:

        def complete() -> bool:
            got.extend(second.drain(1000, timeout_s=0.1))
            return len({p for _, p, _ in got}) >= n

        wait_for(complete, 30)
    finally:
        second.stop()
        while batch := second.drain(1000, timeout_s=0):
            got += batch
    payloads = [p for _, p, _ in got]
    assert set(payloads) == {b"m%05d" % i for i in range(n)}  # none lost
    # QoS 1 is at least once: a message taken but not yet acknowledged when the client
    # disconnected comes again with the next session (Windows drops such duplicates by seq
    # and time: test_windows.py). At most the broker's in-flight window of them
    # (max_inflight_messages 100 in tests/servers/mosquitto.conf).
    assert len(payloads) - n <= 100
    first_seen = list(dict.fromkeys(payloads))
    assert first_seen == sorted(first_seen)  # in the order published (one publisher, QoS 1)


def _stalled(mosquitto, client_id: str, stall_s: float, n: int = 2000) -> tuple[list, float]:
    """Publish ``n`` frames to a process ingest nobody drains for ``stall_s``, then drain."""
    tel = Telemetry()
    ing = ProcessIngest(
        _settings(mosquitto, client_id=client_id, keepalive_s=5),
        topic_filter=FILTER,
        queue_max=50,
        buffer_max=50,
        telemetry=tel,
    )
    ing.start()
    got: list = []
    try:
        assert ing.wait_connected(15)
        _publish(mosquitto, [(TOPIC.format("C3"), b"d%d" % i) for i in range(n)])
        time.sleep(stall_s)  # nobody drains: the child's queue (50) and the socket fill up

        def settled() -> bool:
            got.extend(ing.drain(1000, timeout_s=0.05))
            return len(got) + tel.value("boutline_queue_dropped_total") >= n

        assert wait_for(settled, 30)
    finally:
        ing.stop()
    return got, tel.value("boutline_queue_dropped_total")


@pytest.mark.integration
def test_a_pipeline_stalled_for_less_than_the_keepalive_loses_nothing(mosquitto) -> None:
    """The child's network thread waits for room (the broker holds the rest: QoS 1)."""
    got, dropped = _stalled(mosquitto, "proc-stall-short", stall_s=3.0)
    assert dropped == 0 and [p for _, p, _ in got] == [b"d%d" % i for i in range(2000)]


@pytest.mark.integration
def test_drops_in_the_process_are_counted_in_the_gateways_telemetry(mosquitto) -> None:
    """Stalled longer than the keep-alive (5 s): the child drops one message per keep-alive
    period rather than let the connection die; the parent's counter says how many, and
    received + dropped = published."""
    got, dropped = _stalled(mosquitto, "proc-stall-long", stall_s=8.0)
    assert dropped >= 1 and len(got) + dropped == 2000


@pytest.mark.integration
def test_an_oversize_payload_crosses_as_a_stub_the_decoder_refuses(mosquitto) -> None:
    ing = ProcessIngest(_settings(mosquitto, client_id="proc-huge"), topic_filter=FILTER)
    ing.start()
    try:
        assert ing.wait_connected(15)
        _publish(mosquitto, [(TOPIC.format("C4"), b"[" * (3 * 2**20)), (TOPIC.format("C4"), b"ok")])
        got = _drain_until(ing, 2)
        assert [len(p) for _, p, _ in got] == [2**20 + 1, 2]
        assert decode(got[0][1], "C4").reason == Reason.OVERSIZE
    finally:
        ing.stop()


@pytest.mark.integration
def test_the_ingest_process_ends_when_the_gateway_is_killed(mosquitto, tmp_path: Path) -> None:
    """SIGKILL of the gateway leaves no orphan MQTT client holding the session."""
    script = tmp_path / "gw.py"
    script.write_text(
        textwrap.dedent(
            f"""
            from gateway.config import MqttSettings
            from gateway.ingestproc import ProcessIngest

            def main():  # the guard a spawned child needs (multiprocessing, "spawn")
                ing = ProcessIngest(MqttSettings(host={mosquitto.host!r}, port={mosquitto.port},
                                                 client_id="proc-orphan"),
                                    topic_filter={FILTER!r})
                ing.start()
                assert ing.wait_connected(15)
                print(ing.pid, flush=True)
                for _ in range(600):  # bounded: ten minutes at most
                    ing.drain(100, timeout_s=1.0)

            if __name__ == "__main__":
                main()
            """
        )
    )
    gw = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True)
    try:
        assert gw.stdout is not None
        child = int(gw.stdout.readline())
        assert _alive(child)
        gw.kill()  # the process we started, by its handle
        gw.wait(10)
        assert wait_for(lambda: not _alive(child), 15)
    finally:
        if gw.poll() is None:
            gw.kill()
            gw.wait(10)
        if gw.stdout is not None:
            gw.stdout.close()


def test_the_ingest_process_imports_paho_and_little_else() -> None:
    """Every import in the child is resident memory (~25 MB now): no pydantic, numpy,
    onnxruntime or prometheus-client there."""
    code = (
        "import sys, gateway.ingestchild\n"
        "heavy = {'pydantic', 'numpy', 'onnxruntime', 'prometheus_client', 'typer'}\n"
        "print(sorted(heavy & {m.split('.')[0] for m in sys.modules}))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_the_ingest_process_refuses_a_bad_command_line() -> None:
    out = subprocess.run(
        [sys.executable, "-m", "gateway.ingestchild", "not-a-fd"], capture_output=True, text=True
    )
    assert out.returncode == 2 and "started by the gateway" in out.stderr


@pytest.mark.integration
def test_the_password_reaches_the_process_through_the_pipe_not_its_command_line(
    mosquitto,
) -> None:
    secret = "s3cret-ingest-pass"  # an anonymous broker ignores it
    ing = ProcessIngest(
        _settings(mosquitto, client_id="proc-secret", username="gw", password=secret),
        topic_filter=FILTER,
    )
    ing.start()
    try:
        assert ing.wait_connected(15)
        assert ing.pid is not None
        cmdline = Path(f"/proc/{ing.pid}/cmdline").read_bytes()
        environ = Path(f"/proc/{ing.pid}/environ").read_bytes()
        assert secret.encode() not in cmdline and secret.encode() not in environ
    finally:
        ing.stop()
