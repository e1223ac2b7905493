"""Every sink through the same checks, against the real servers the fixtures start.

InfluxDB v1 API -> Debian's influxdb 1.6, v2 API -> VictoriaMetrics, MQTT -> Mosquitto. Each
batch is read back from the server and compared with what was sent.
"""

from __future__ import annotations

import json
import queue
import subprocess
import sys
import time
import uuid
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from influxhttp import create_database, export, rows

from gateway.alerts import Alert
from gateway.collarhealth import CollarStatus
from gateway.lineprotocol import points_for
from gateway.outbox import Record, fact_of
from gateway.sink_influx_v1 import InfluxV1Sink
from gateway.sink_influx_v2 import InfluxV2Sink
from gateway.sink_mqtt import CAUTION, MqttSink, Topics, animal_segment, messages_for
from gateway.types import BoutClosed, StateChanged

pytestmark = pytest.mark.integration

T = 1767225600.0
ANIMALS = ["cow 1", "Müller,Kuh=2", 'say "hi"/#+']


def facts() -> list[dict[str, Any]]:
    out: list[Any] = []
    for i, a in enumerate(ANIMALS):
        t = T + 1000 * i
        out += [
            BoutClosed(a, "grazing", t, t + 600.0, 0.8, 5.0),
            StateChanged(a, "ruminating", t + 600.0, 0.9, "grazing"),
            BoutClosed(a, "ruminating", t + 600.0, t + 900.0, 0.75),
            StateChanged(a, "walking", t + 900.0, 0.6, "ruminating"),
        ]
    out.append(Alert("a1", "rumination_drop", ANIMALS[0], "C1", "raised", T + 5000, T + 5000,
                     "Rumination down", "rumination 32 % under baseline",
                     {"value": 300.0, "baseline": 441.0, "z": -2.4}))  # fmt: skip
    out.append(CollarStatus("C1", ANIMALS[0], T, T - 60, T, 60, 0, 0, 1.0, 0.0, None, None,
                            None, 60))  # fmt: skip
    return [fact_of(f) for f in out]


def records(fs: list[dict[str, Any]]) -> list[Record]:
    return [Record(i + 1, f["kind"], T, f) for i, f in enumerate(fs)]


@dataclass
class Case:
    """A sink and how to read back, from its server, what it delivered."""

    sink: Any
    read: Any  # () -> set of delivered items, comparable with expect()
    expect: Any  # (facts) -> set of items
    done: Any = None


def _influx1_case(influxdb1, site: str) -> Case:
    db = f"sinks_{uuid.uuid4().hex[:8]}"
    create_database(influxdb1.url, db)
    sink = InfluxV1Sink(url=influxdb1.url, database=db, site=site)

    def read() -> set:
        return {(m, t, tuple(sorted(cols.items()))) for m, t, cols in rows(influxdb1.url, db)}

    def expect(fs) -> set:
        return {
            (p.measurement, p.time_ms, tuple(sorted({**p.tags, **p.fields}.items())))
            for f in fs
            for p in points_for(f, site)
        }

    return Case(sink, read, expect)


def _num(v: Any) -> float:
    # VictoriaMetrics keeps about 12 significant digits (its own compression); compare at 10
    return 0.0 if isinstance(v, str) else float(f"{float(v):.10g}")


def _victoria_case(victoria, site: str) -> Case:
    sink = InfluxV2Sink(url=victoria.url, org="home-farm", bucket="boutline", token="t", site=site)

    def read() -> set:
        got = set()
        for row in export(victoria.url, f'{{site="{site}"}}'):
            labels = row["metric"]
            name = labels.pop("__name__")
            for v, t in zip(row["values"], row["timestamps"], strict=True):
                got.add((name, t, tuple(sorted(labels.items())), _num(v)))
        return got

    def expect(fs) -> set:
        # VictoriaMetrics: one series per field, named <measurement>_<field>; a string
        # field's text is lost, its series holds 0 (seen on the server).
        return {
            (f"{p.measurement}_{k}", p.time_ms, tuple(sorted(p.tags.items())), _num(v))
            for f in fs
            for p in points_for(f, site)
            for k, v in p.fields.items()
        }

    return Case(sink, read, expect)


def _mqtt_case(mosquitto, site: str) -> Case:
    sink = MqttSink(host=mosquitto.host, port=mosquitto.port, site=site, client_id=f"t-{site}")
    got: queue.Queue = queue.Queue()
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"sub-{site}")
    sub.on_message = lambda c, u, m: got.put((m.topic, m.payload, m.qos))
    sub.connect(mosquitto.host, mosquitto.port)
    sub.subscribe(f"barn/{site}/#", qos=1)
    sub.loop_start()
    time.sleep(0.2)
    seen: list = []

    def read() -> set:
        deadline = time.monotonic() + 3
        while time.monotonic() < deadline:
            try:
                seen.append(got.get(timeout=0.2))
            except queue.Empty:
                if seen:
                    break
        return {(t, p) for t, p, _ in seen if not t.endswith("/gateway/status")}

    def expect(fs) -> set:
        tp = Topics("barn", site)
        return {(m.topic, m.payload) for f in fs for m in messages_for(f, tp)}

    def done() -> None:
        sub.loop_stop()
        sub.disconnect()

    return Case(sink, read, expect, done)


@pytest.fixture(params=["influx_v1", "influx_v2", "mqtt"])
def case(request):
    site = f"farm-{uuid.uuid4().hex[:8]}"
    server = request.getfixturevalue(
        {"influx_v1": "influxdb1", "influx_v2": "victoria", "mqtt": "mosquitto"}[request.param]
    )
    make = {"influx_v1": _influx1_case, "influx_v2": _victoria_case, "mqtt": _mqtt_case}
    c = make[request.param](server, site)
    yield c
    c.sink.close()
    if c.done:
        c.done()


def test_every_sink_delivers_what_it_was_given_and_the_server_holds_it(case):
    case.sink.close()  # safe without open()
    case.sink.close()
    case.sink.open()
    case.sink.open()  # twice is harmless too
    fs = facts()
    case.sink.write([])  # nothing to send is not an error
    case.sink.write(records(fs))
    want = case.expect(fs)
    assert want, "the case expects nothing: the check could not fail"
    assert case.read() == want
    case.sink.close()


def test_every_sink_stores_a_resent_batch_once(case):
    case.sink.open()
    fs = facts()
    case.sink.write(records(fs))
    first = case.read()
    case.sink.write(records(fs))  # at-least-once: the same batch again after a lost ack
    again = case.read()
    if isinstance(case.sink, InfluxV2Sink):
        # VictoriaMetrics keeps raw duplicate samples (without -dedup.minScrapeInterval);
        # the key (series + time) is still one per fact: nothing new appears.
        assert again == first
    elif isinstance(case.sink, MqttSink):
        assert again == first  # same topics, same payloads
    else:
        assert again == first  # InfluxDB overwrote the points


def test_bout_values_as_the_servers_hold_them(influxdb1, victoria):
    """One bout checked field by field against the raw server answers (no converter in the loop)."""
    site = f"farm-{uuid.uuid4().hex[:8]}"
    fact = fact_of(BoutClosed("cow 1", "grazing", T, T + 600.0, 0.8, 5.0))
    c1, c2 = _influx1_case(influxdb1, site), _victoria_case(victoria, site)
    for c in (c1, c2):
        c.sink.open()
        c.sink.write(records([fact]))
        c.sink.close()
    tags = (("animal", "cow 1"), ("behaviour", "grazing"), ("site", site))
    assert c1.read() == {
        ("bout", 1767225600000, tuple(sorted(
            {**dict(tags), "duration_s": 600, "mean_confidence": 0.8, "no_data_s": 5}.items()
        )))
    }  # fmt: skip
    assert c2.read() == {
        ("bout_duration_s", 1767225600000, tags, 600.0),
        ("bout_mean_confidence", 1767225600000, tags, 0.8),
        ("bout_no_data_s", 1767225600000, tags, 5.0),
    }


def _retained(
    mosquitto, topic: str, n: int, timeout_s: float = 15.0, *, only_retained: bool = True
) -> dict[str, bytes]:
    """The latest message per topic a new subscriber gets; ``only_retained`` keeps just those
    the broker held before we subscribed (a message published meanwhile arrives unflagged)."""
    got: dict[str, bytes] = {}
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"late-{uuid.uuid4().hex[:6]}")

    def on_message(client, userdata, m) -> None:
        if m.retain or not only_retained:
            got[m.topic] = m.payload

    sub.on_message = on_message
    sub.connect(mosquitto.host, mosquitto.port)
    sub.subscribe(topic, qos=1)
    sub.loop_start()
    deadline = time.monotonic() + timeout_s
    while len(got) < n and time.monotonic() < deadline:
        time.sleep(0.05)
    sub.loop_stop()
    sub.disconnect()
    return got


def test_mqtt_state_is_retained_alerts_carry_the_caution_and_status_goes_offline(mosquitto):
    site = f"farm-{uuid.uuid4().hex[:8]}"
    sink = MqttSink(host=mosquitto.host, port=mosquitto.port, site=site, client_id=f"r-{site}")
    sink.open()
    # open() returns at CONNACK; "online" follows from paho's network thread
    status = _retained(mosquitto, f"barn/{site}/gateway/status", 1, only_retained=False)
    assert json.loads(status[f"barn/{site}/gateway/status"])["status"] == "online"
    sink.write(records(facts()))
    sink.close()
    states = _retained(mosquitto, f"barn/{site}/animals/+/state", len(ANIMALS))
    assert set(states) == {f"barn/{site}/animals/{animal_segment(a)}/state" for a in ANIMALS}
    for a in ANIMALS:
        payload = json.loads(states[f"barn/{site}/animals/{animal_segment(a)}/state"])
        assert payload["animal"] == a and payload["behaviour"] == "walking"  # the latest
        assert payload["since_utc"].endswith("Z") and payload["confidence"] == 0.6
    assert animal_segment('say "hi"/#+') == "say%20%22hi%22%2F%23%2B"  # one level, no wildcard
    status = _retained(mosquitto, f"barn/{site}/gateway/status", 1)
    assert json.loads(status[f"barn/{site}/gateway/status"]) == {"site": site, "status": "offline"}
    alert = [
        m for f in facts() for m in messages_for(f, Topics("barn", site)) if "alerts" in m.topic
    ]
    assert len(alert) == 1 and alert[0].qos == 1 and not alert[0].retain
    body = json.loads(alert[0].payload)
    assert body["caution"] == CAUTION and "veterinarian" in body["caution"]
    assert body["scope"] == "animal" and body["rule"] == "rumination_drop"


def test_mqtt_last_will_says_offline_when_the_gateway_dies(mosquitto, tmp_path):
    site = f"farm-{uuid.uuid4().hex[:8]}"
    script = (
        "import os, sys\n"
        "from gateway.sink_mqtt import MqttSink\n"
        f"s = MqttSink(host={mosquitto.host!r}, port={mosquitto.port}, site={site!r},"
        f" client_id='die-{site}', keepalive_s=5)\n"
        "s.open()\n"
        "print('up', flush=True)\n"
        "sys.stdin.readline()\n"
        "os._exit(9)  # no DISCONNECT: the broker must publish the will\n"
    )
    with subprocess.Popen(
        [sys.executable, "-c", script], stdin=subprocess.PIPE, stdout=subprocess.PIPE
    ) as p:
        try:
            assert p.stdout.readline().strip() == b"up"
            topic = f"barn/{site}/gateway/status"
            online = _retained(mosquitto, topic, 1, only_retained=False)[topic]
            assert json.loads(online)["status"] == "online"
            p.stdin.write(b"\n")
            p.stdin.flush()
            p.wait(10)
            deadline = time.monotonic() + 10
            while time.monotonic() < deadline:
                now = json.loads(_retained(mosquitto, topic, 1, 1.0)[topic])
                if now["status"] == "offline":
                    break
            assert now == {"site": site, "status": "offline"}
        finally:
            if p.poll() is None:
                p.kill()
