"""The shipped Mosquitto config (deploy/mosquitto/) against a real Mosquitto on a loopback port.

Only the listener and the file paths are swapped for the test; the ACL file is the shipped one
and the password file is made by the shipped script with ``mosquitto_passwd``.
"""

from __future__ import annotations

import os
import queue
import re
import subprocess
import sys
import threading
from collections.abc import Callable, Iterator
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode

from gateway.servers import ServerProcess, start_mosquitto

pytestmark = pytest.mark.integration

DEPLOY = Path(__file__).resolve().parents[1] / "deploy" / "mosquitto"
SITE = "home-farm"
PASSWORDS = {"gateway": "gw-Secret 1", "display": "disp-lay2", "simulator": "sim-3"}
COLLARS = {"C-001": "collar one", "C-002": "c2-pass"}
# MQTT 5.0 spec, table 2.6: reason code 0x87 (135) "Not authorized"; 0x86 "Bad user name or password".
NOT_AUTHORIZED = 135
BAD_CREDENTIALS = 134
WAIT_S = 10.0


def collar_topic(collar: str) -> str:
    return f"barn/{SITE}/collars/{collar}/accel"


def make_passwd(
    out: Path, collars_file: Path | None, env: dict[str, str]
) -> subprocess.CompletedProcess:
    args = ["sh", str(DEPLOY / "make-passwd.sh"), str(out)]
    if collars_file is not None:
        args.append(str(collars_file))
    return subprocess.run(
        args, env={"PATH": os.environ["PATH"], **env}, capture_output=True, text=True, timeout=60
    )


def broker_template(workdir: Path) -> Path:
    """The shipped config with the test's listener and paths; every other line unchanged."""
    text = (DEPLOY / "mosquitto.conf").read_text()
    swaps = {
        r"^listener 1883$": "listener {port} 127.0.0.1",
        r"/mosquitto/auth/": f"{workdir}/",
        r"/mosquitto/config/acl": str(DEPLOY / "acl"),
        r"/mosquitto/data/": "{workdir}/",
    }
    for pattern, new in swaps.items():
        text, n = re.subn(pattern, new, text, flags=re.M)
        assert n == 1, f"the shipped mosquitto.conf no longer has {pattern!r}; update this test"
    if os.geteuid() == 0:
        # Started as root, Mosquitto drops to user mosquitto, which cannot enter pytest's
        # 0700 temporary directories; in the test it keeps the user that started it.
        text += "user root\n"
    template = workdir / "template.conf"
    template.write_text(text)
    return template


@pytest.fixture(scope="module")
def broker(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServerProcess]:
    work = tmp_path_factory.mktemp("secure-mosquitto")
    collars = work / "collars.txt"
    collars.write_text("# id password\n" + "".join(f"{k} {v}\n" for k, v in COLLARS.items()))
    env = {f"MQTT_{k.upper()}_PASSWORD": v for k, v in PASSWORDS.items()}
    done = make_passwd(work / "passwd", collars, env)
    assert done.returncode == 0, done.stderr
    srv = start_mosquitto(work, broker_template(work))
    yield srv
    srv.stop()


class Client:
    """A paho MQTT 5 client that records CONNACK, SUBACK, PUBACK reason codes and messages."""

    def __init__(self, broker: ServerProcess, user: str | None, password: str | None = None):
        self.c = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=f"t-{user}-{id(self)}",
            protocol=mqtt.MQTTv5,
        )
        if user is not None:
            self.c.username_pw_set(user, password)
        self.broker = broker
        self.connack: queue.Queue[ReasonCode] = queue.Queue()
        self.subacks: queue.Queue[list[ReasonCode]] = queue.Queue()
        self.pubacks: dict[int, ReasonCode] = {}
        self.puback_event = threading.Condition()
        self.messages: queue.Queue[mqtt.MQTTMessage] = queue.Queue()
        self.c.on_connect = lambda c, u, f, rc, p: self.connack.put(rc)
        self.c.on_subscribe = lambda c, u, mid, rcs, p: self.subacks.put(rcs)
        self.c.on_message = lambda c, u, m: self.messages.put(m)
        self.c.on_publish = self._on_publish

    def _on_publish(self, c, u, mid: int, rc: ReasonCode, p) -> None:
        with self.puback_event:
            self.pubacks[mid] = rc
            self.puback_event.notify_all()

    def connect(self) -> ReasonCode:
        self.c.connect(self.broker.host, self.broker.port, keepalive=30)
        self.c.loop_start()
        return self.connack.get(timeout=WAIT_S)

    def subscribe(self, topic: str) -> ReasonCode:
        self.c.subscribe(topic, qos=1)
        return self.subacks.get(timeout=WAIT_S)[0]

    def publish(self, topic: str, payload: bytes, retain: bool = False) -> ReasonCode:
        info = self.c.publish(topic, payload, qos=1, retain=retain)
        with self.puback_event:
            assert self.puback_event.wait_for(lambda: info.mid in self.pubacks, WAIT_S)
            return self.pubacks[info.mid]

    def barrier(self) -> None:
        """A QoS 1 round trip: deliveries queued for this client before it have arrived."""
        self.publish("boutline-test/barrier", b"")

    def next_payload(self) -> tuple[str, bytes]:
        m = self.messages.get(timeout=WAIT_S)
        return m.topic, m.payload

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()
        # paho 2.x leaves loop_start's wake-up socket pair open until garbage collection,
        # where it may be finalized before the client closes it (a ResourceWarning).
        self.c._reset_sockets()


@pytest.fixture
def clients(broker: ServerProcess) -> Iterator[Callable[..., Client]]:
    made: list[Client] = []

    def connect(user: str | None, password: str | None = None) -> Client:
        client = Client(broker, user, password)
        made.append(client)
        rc = client.connect()
        assert rc.value == 0, f"{user} refused: {rc}"
        return client

    yield connect
    for client in made:
        client.close()


def refused(broker: ServerProcess, user: str | None, password: str | None = None) -> int:
    client = Client(broker, user, password)
    try:
        return client.connect().value
    finally:
        client.close()


def test_anonymous_and_wrong_passwords_are_refused(broker):
    assert refused(broker, None) == NOT_AUTHORIZED
    assert refused(broker, "gateway", "not the password") in (NOT_AUTHORIZED, BAD_CREDENTIALS)
    assert refused(broker, "C-001", COLLARS["C-002"]) in (NOT_AUTHORIZED, BAD_CREDENTIALS)
    assert refused(broker, "C-999", "unknown collar") in (NOT_AUTHORIZED, BAD_CREDENTIALS)


def test_collar_publishes_its_own_topic_only(broker, clients):
    gateway = clients("gateway", PASSWORDS["gateway"])
    assert gateway.subscribe("barn/+/collars/+/accel").value == 1  # granted QoS 1
    collar = clients("C-001", COLLARS["C-001"])

    assert collar.publish(collar_topic("C-001"), b"own-1").value == 0
    assert gateway.next_payload() == (collar_topic("C-001"), b"own-1")

    # Another collar's topic, outputs, and a topic outside the tree are all refused...
    for topic in (
        collar_topic("C-002"),
        f"barn/{SITE}/collars/C-001/other",
        f"barn/{SITE}/alerts",
        f"barn/{SITE}/animals/cow-1/state",
        "elsewhere/x",
    ):
        assert collar.publish(topic, b"forged").value == NOT_AUTHORIZED, topic
    # ...and never arrive: messages of one client arrive in order, so the marker sent after
    # the forged ones must be the very next message the gateway sees.
    assert collar.publish(collar_topic("C-001"), b"own-2").value == 0
    assert gateway.next_payload() == (collar_topic("C-001"), b"own-2")
    assert gateway.messages.empty()


def test_collar_cannot_read_other_collars(broker, clients):
    gateway = clients("gateway", PASSWORDS["gateway"])
    assert gateway.subscribe("barn/+/collars/+/accel").value == 1
    spy = clients("C-002", COLLARS["C-002"])
    # Mosquitto 2.0 may grant a wildcard subscription and filter each message by the ACL's
    # read rights on delivery; either way nothing may reach the collar.
    for topic in ("barn/+/collars/+/accel", f"barn/{SITE}/alerts", "#"):
        assert spy.subscribe(topic).value in (1, NOT_AUTHORIZED), topic
    other = clients("C-001", COLLARS["C-001"])
    assert other.publish(collar_topic("C-001"), b"private").value == 0
    assert gateway.next_payload() == (collar_topic("C-001"), b"private")
    # The broker queues a delivery to the spy before the PUBACK of the spy's own later
    # publish, and paho handles packets in order: after this PUBACK nothing more can come.
    spy.barrier()
    assert spy.messages.empty()


def test_gateway_publishes_outputs_with_last_will(broker, clients):
    display = clients("display", PASSWORDS["display"])
    for topic in (f"barn/{SITE}/animals/+/state", f"barn/{SITE}/events/#", f"barn/{SITE}/alerts"):
        assert display.subscribe(topic).value == 1, topic
    assert display.subscribe(f"barn/{SITE}/gateway/status").value == 1

    gateway = Client(broker, "gateway", PASSWORDS["gateway"])
    gateway.c.will_set(f"barn/{SITE}/gateway/status", b"offline", qos=1, retain=True)
    assert gateway.connect().value == 0  # a will on a topic it may not write is refused
    outputs = [
        (f"barn/{SITE}/gateway/status", b"online"),
        (f"barn/{SITE}/animals/cow-1/state", b'{"behaviour":"ruminating"}'),
        (f"barn/{SITE}/events/bouts", b'{"bout":1}'),
        (f"barn/{SITE}/alerts", b'{"alert":"rumination_drop"}'),
    ]
    try:
        for topic, payload in outputs:
            assert gateway.publish(topic, payload, retain=True).value == 0, topic
            assert display.next_payload() == (topic, payload)
        # Gateway gone without a clean goodbye (MQTT 5 reason 4): the broker sends its will.
        props = Properties(PacketTypes.DISCONNECT)
        gateway.c.disconnect(
            reasoncode=ReasonCode(PacketTypes.DISCONNECT, identifier=4), properties=props
        )
        assert display.next_payload() == (f"barn/{SITE}/gateway/status", b"offline")
    finally:
        gateway.c.loop_stop()
        gateway.c._reset_sockets()


def test_display_and_simulator_rights(broker, clients):
    display = clients("display", PASSWORDS["display"])
    for topic in (f"barn/{SITE}/alerts", collar_topic("C-001"), collar_topic("display")):
        assert display.publish(topic, b"forged").value == NOT_AUTHORIZED, topic
    assert display.subscribe("barn/+/collars/+/accel").value in (1, NOT_AUTHORIZED)

    gateway = clients("gateway", PASSWORDS["gateway"])
    assert gateway.subscribe("barn/+/collars/+/accel").value == 1
    sim = clients("simulator", PASSWORDS["simulator"])
    assert sim.publish(collar_topic("demo-cow-07"), b"sim").value == 0
    assert gateway.next_payload() == (collar_topic("demo-cow-07"), b"sim")
    display.barrier()
    assert display.messages.empty()  # displays see outputs, never raw collar frames
    for topic in (f"barn/{SITE}/alerts", collar_topic("simulator")):
        assert sim.publish(topic, b"forged").value == NOT_AUTHORIZED, topic


def test_service_users_cannot_pose_as_collars(broker, clients):
    gateway = clients("gateway", PASSWORDS["gateway"])
    for collar in ("C-001", "gateway"):
        assert gateway.publish(collar_topic(collar), b"forged").value == NOT_AUTHORIZED


@pytest.mark.parametrize(
    ("collars", "env", "message"),
    [
        ("C-1 pw\n", {}, "MQTT_GATEWAY_PASSWORD is empty"),
        ("bad/id pw\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "line 1: collar id must match"),
        ("# c\nC-1\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "line 2: collar 'C-1' has no password"),
        ("C-1 a\nC-1 b\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "user 'C-1' appears twice"),
        ("gateway x\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "'gateway' is a service user"),
        ("C:1 pw\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "collar id must match"),
        ("C-1 pw\r\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "carriage return"),
        ("C-1 p:w\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "password of 'C-1' contains ':'"),
        ("", {"MQTT_GATEWAY_PASSWORD": "g:w"}, "password of 'gateway' contains ':'"),
        ("x" * 65 + " pw\n", {"MQTT_GATEWAY_PASSWORD": "g"}, "longer than 64"),
    ],
)
def test_make_passwd_refuses_bad_input(tmp_path, collars, env, message):
    (tmp_path / "passwd").write_text("previous file\n")
    f = tmp_path / "collars.txt"
    f.write_text(collars)
    done = make_passwd(tmp_path / "passwd", f, env)
    assert done.returncode == 1
    assert done.stderr.startswith("Error: ") and message in done.stderr, done.stderr
    # A refused run leaves the previous file alone and no plain-text passwords behind.
    assert (tmp_path / "passwd").read_text() == "previous file\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["collars.txt", "passwd"]


def test_make_passwd_hashes_and_keeps_secrets_off_disk(tmp_path):
    f = tmp_path / "collars.txt"
    f.write_text("C-1   spaced pass  \n\n# comment\nC-2\tp2\n")
    done = make_passwd(tmp_path / "passwd", f, {"MQTT_GATEWAY_PASSWORD": "gw"})
    assert done.returncode == 0, done.stderr
    lines = (tmp_path / "passwd").read_text().splitlines()
    assert [line.split(":", 1)[0] for line in lines] == ["gateway", "C-1", "C-2"]
    # mosquitto_passwd's PBKDF2-SHA512 format, "$7$<iterations>$<salt>$<hash>" (Mosquitto 2.0).
    assert all(re.fullmatch(r"[^:]+:\$7\$\d+\$[A-Za-z0-9+/=]+\$[A-Za-z0-9+/=]+", x) for x in lines)
    text = (tmp_path / "passwd").read_text()
    assert "spaced pass" not in text  # a space never appears in the hash's base64
    assert (tmp_path / "passwd").stat().st_mode & 0o077 == 0


def _simulate(broker: ServerProcess, env: dict[str, str]) -> subprocess.CompletedProcess:
    argv = [sys.executable, "-m", "gateway.cli", "simulate", "publish", "--host", broker.host]
    argv += ["--port", str(broker.port), "--site", SITE, "--herd", "2", "--flat-out"]
    argv += ["--duration", "5", "--qos", "1", "--seed", "3"]
    base = {k: v for k, v in os.environ.items() if not k.startswith("BOUTLINE_")}
    return subprocess.run(argv, env=base | env, capture_output=True, text=True, timeout=120)


def test_demo_herd_logs_in_as_simulator(broker, clients):
    # The compose profile "demo": the publisher takes the ACL's simulator login from the env.
    gateway = clients("gateway", PASSWORDS["gateway"])
    assert gateway.subscribe("barn/+/collars/+/accel").value == 1
    env = {"BOUTLINE_MQTT_USERNAME": "simulator", "BOUTLINE_MQTT_PASSWORD": PASSWORDS["simulator"]}
    done = _simulate(broker, env)
    assert done.returncode == 0, done.stderr
    topics = set()
    while not gateway.messages.empty() or len(topics) < 2:
        topics.add(gateway.next_payload()[0])
    assert len(topics) == 2 and all(t.startswith(f"barn/{SITE}/collars/") for t in topics)


def test_demo_herd_without_login_is_refused_with_a_clear_error(broker):
    done = _simulate(broker, {})
    assert done.returncode == 1
    assert done.stderr.startswith("Error: ") and "refused" in done.stderr, done.stderr
