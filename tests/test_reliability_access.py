"""Access: TLS with passwords, refused logins, the shipped broker config with the daemon, and
the HTTP endpoint's address (secrets: tests/test_reliability_secrets.py).

``boutline run`` runs as its own process throughout (tests/daemonproc.py). What the shipped
Mosquitto config refuses to raw clients (anonymous logins, collars writing others' topics) is
proven in tests/test_deploy_mosquitto.py; here the gateway itself works through it.
"""

from __future__ import annotations

import json
import subprocess
import time
from pathlib import Path

import pytest
from daemonproc import Daemon, write_assignments
from mqttpeers import Subscriber, client, publish_all

from gateway.servers import ServerProcess, start_mosquitto
from gateway.wire import collar_topic, encode_binary
from simulator.herd import Herd

pytestmark = pytest.mark.integration

SERVERS = Path(__file__).parent / "servers"
GATEWAY_PW = "gw-pass-Qz81"
COLLAR_PW = "collar-pass-7Lk"


def _openssl(cwd: Path, *args: str) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def passwd_file(path: Path, users: dict[str, str]) -> None:
    for i, (user, pw) in enumerate(users.items()):
        create = ["-c"] if i == 0 else []
        subprocess.run(["mosquitto_passwd", *create, "-b", str(path), user, pw],
                       check=True, capture_output=True, timeout=30)  # fmt: skip
    path.chmod(0o600)


@pytest.fixture
def tls_auth_broker(tmp_path: Path) -> ServerProcess:
    """Mosquitto on TLS only, passwords only; a CA and a server certificate made here."""
    work = tmp_path / "tls-auth"
    work.mkdir()
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    _openssl(work, "req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.crt", "-days", "1",
             "-subj", "/CN=Boutline test barn CA")  # fmt: skip
    _openssl(work, "req", *ec, "-keyout", "server.key", "-out", "server.csr",
             "-subj", "/CN=barn-broker")  # fmt: skip
    (work / "ext.cnf").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    _openssl(work, "x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
             "-CAcreateserial", "-days", "1", "-extfile", "ext.cnf", "-out", "server.crt")  # fmt: skip
    passwd_file(work / "passwd", {"gateway": GATEWAY_PW, "C0001": COLLAR_PW, "C0002": COLLAR_PW})
    srv = start_mosquitto(work, SERVERS / "mosquitto-tls-auth.conf")
    yield srv
    srv.stop()


def herd_frames(n_collars: int, minutes: float, start: float) -> list:
    return list(Herd(n_collars, seed=91, start=start, frame_s=10.0, days=minutes / 1440.0,
                     loss=0.0, silence_per_day=0.0))  # fmt: skip


def _tls_gateway(tmp_path: Path, broker: ServerProcess, password: str) -> Daemon:
    work = broker.workdir
    (tmp_path / "mqtt-password").write_text(password + "\n")
    return Daemon(
        tmp_path / "gw",
        {
            "site": {
                "id": "tls-farm",
                "assignments": str(write_assignments(tmp_path / "a.csv", 2)),
            },  # fmt: skip
            "mqtt": {
                "host": "127.0.0.1",
                "port": broker.port,
                "client_id": "gw-tls",
                "tls": True,
                "ca_file": str(work / "ca.crt"),
                "username": "gateway",
                "password_file": str(tmp_path / "mqtt-password"),
            },  # fmt: skip
            "model": {"watch": False},
            "limits": {"max_frame_rate_hz": 1000.0},
        },
    )


def test_tls_with_passwords_end_to_end(tmp_path: Path, tls_auth_broker: ServerProcess) -> None:
    ca = str(tls_auth_broker.workdir / "ca.crt")
    gw = _tls_gateway(tmp_path, tls_auth_broker, GATEWAY_PW).start()
    status = Subscriber("127.0.0.1", tls_auth_broker.port, "barn/tls-farm/gateway/status",
                        username="gateway", password=GATEWAY_PW, ca_file=ca)  # fmt: skip
    try:
        frames = herd_frames(2, 10, float(int(time.time())) - 900)
        for collar in ("C0001", "C0002"):  # each collar logs in with its own password, on TLS
            pub = client("127.0.0.1", tls_auth_broker.port, username=collar, password=COLLAR_PW,
                         ca_file=ca)  # fmt: skip
            publish_all(pub, [(collar_topic("barn", "tls-farm", f.collar_id), encode_binary(f))
                              for f in frames if f.collar_id == collar])  # fmt: skip
            pub.disconnect()
            pub.loop_stop()
        gw.wait_quiet("boutline_frames_in_total", len(frames))
        windows = gw.value("boutline_windows_classified_total")
        online = [json.loads(p) for _, p, _ in status.collect(quiet_s=1.0)]
    finally:
        status.close()
        assert gw.stop() == 0
    assert windows >= 2 * 100  # ten minutes of two collars, a window every 5 s each
    assert any(m["status"] == "online" for m in online)  # the outputs went over TLS too
    assert GATEWAY_PW not in gw.log


@pytest.mark.parametrize("password", ["wrong-pass-Xy", ""])
def test_a_wrong_password_stops_the_daemon_with_one_clear_line(
    tmp_path: Path, tls_auth_broker: ServerProcess, password: str
) -> None:
    gw = _tls_gateway(tmp_path, tls_auth_broker, password or " ")
    gw.start(ready=False)
    assert gw.wait_exit(60) == 1
    errors = [ln for ln in gw.log.splitlines() if ln.startswith("Error:")]
    assert len(errors) == 1, gw.log
    assert "refused the connection" in errors[0] and "mqtt.username" in errors[0]
    assert "Traceback" not in gw.log
    if password:
        assert password not in gw.log


def test_the_shipped_broker_config_carries_the_gateway_and_stops_forgeries(
    tmp_path: Path,
) -> None:
    # the shipped config, ACL and password script, as tests/test_deploy_mosquitto.py runs them
    from test_deploy_mosquitto import broker_template, make_passwd

    work = tmp_path / "shipped"
    work.mkdir()
    (work / "collars.txt").write_text(f"C0001 {COLLAR_PW}\nC0002 {COLLAR_PW}\n")
    made = make_passwd(work / "passwd", work / "collars.txt",
                       {"MQTT_GATEWAY_PASSWORD": GATEWAY_PW, "MQTT_DISPLAY_PASSWORD": "disp-1"})  # fmt: skip
    assert made.returncode == 0, made.stderr
    broker = start_mosquitto(work, broker_template(work))
    site = "home-farm"
    gw = Daemon(
        tmp_path / "gw",
        {
            "site": {
                "id": site,
                "assignments": str(write_assignments(tmp_path / "a.csv", 2)),
                "unknown_collars": "refuse",
            },  # fmt: skip
            "mqtt": {"host": broker.host, "port": broker.port, "username": "gateway"},
            "model": {"watch": False},
            "limits": {"max_frame_rate_hz": 1000.0},
        },
        env={"BOUTLINE_MQTT_PASSWORD": GATEWAY_PW},
    )
    try:
        gw.start()
        display = Subscriber(broker.host, broker.port, f"barn/{site}/gateway/status",
                             username="display", password="disp-1")  # fmt: skip
        frames = herd_frames(2, 5, float(int(time.time())) - 600)
        own = [f for f in frames if f.collar_id == "C0001"]
        forged = [f for f in frames if f.collar_id == "C0002"]
        collar = client(broker.host, broker.port, username="C0001", password=COLLAR_PW)
        mine = [(collar_topic("barn", site, "C0001"), encode_binary(f)) for f in own]
        # its own frames, frames posing as C0002 (refused by the ACL: MQTT 3.1.1 drops them
        # silently), then its last own frame: one client's messages arrive in order
        publish_all(collar, mine[:-1])
        publish_all(collar, [(collar_topic("barn", site, "C0002"), encode_binary(f))
                             for f in forged[:3]], qos=0)  # fmt: skip
        publish_all(collar, mine[-1:])
        collar.disconnect()
        collar.loop_stop()
        gw.wait_quiet("boutline_messages_in_total", len(own))
        messages = gw.value("boutline_messages_in_total")
        statuses = [json.loads(p) for _, p, _ in display.collect(quiet_s=1.0)]
        display.close()
        assert gw.alive()
    finally:
        rc = gw.stop()
        broker.stop()
    assert rc == 0
    assert messages == len(own)  # the forged frames never reached the gateway
    assert any(s["status"] == "online" for s in statuses)  # its outputs pass the ACL
    assert "Error" not in gw.log and "refused the connection" not in gw.log


def _listen_addresses(pid: int, port: int) -> set[str]:
    """Local addresses of the TCP sockets in LISTEN on ``port`` in the process's namespace."""
    out = set()
    for table in ("tcp", "tcp6"):
        for line in Path(f"/proc/{pid}/net/{table}").read_text().splitlines()[1:]:
            local, state = line.split()[1], line.split()[3]
            addr, p = local.split(":")
            if state == "0A" and int(p, 16) == port:  # 0A: TCP_LISTEN (include/net/tcp_states.h)
                out.add(addr)
    return out


def test_http_listens_on_loopback_unless_configured(tmp_path: Path, mosquitto) -> None:
    base = {"mqtt": {"host": mosquitto.host, "port": mosquitto.port, "client_id": "gw-http"},
            "model": {"watch": False}}  # fmt: skip
    gw = Daemon(tmp_path / "default", base).start()
    try:
        loopback = _listen_addresses(gw.pid, gw.http_port)
    finally:
        gw.stop()
    assert loopback == {"0100007F"}  # 127.0.0.1, little-endian hex (proc(5))
    wide = Daemon(tmp_path / "wide", {**base, "http": {"bind": "0.0.0.0"}}).start()
    try:
        everywhere = _listen_addresses(wide.pid, wide.http_port)
    finally:
        wide.stop()
    assert everywhere == {"00000000"}
    assert "reachable from the network" in wide.log
