"""MQTT topics and payloads (no broker): names, encoding, the documented examples."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from gateway.alerts import Alert
from gateway.errors import SinkRejected
from gateway.outbox import GatewayAlert, Record, fact_of
from gateway.sink_mqtt import CAUTION, MqttSink, Topics, animal_segment, messages_for
from gateway.types import BoutClosed, StateChanged

DOC = Path(__file__).parent.parent / "docs" / "mqtt-topics.md"
T = 1767225600.0


def test_topics_and_payloads_without_a_broker():
    tp = Topics("barn", "home-farm", qos=0, state_retained=False)
    (m,) = messages_for(fact_of(StateChanged("cow 17/b", "resting", T, 0.5, "walking")), tp)
    assert m.topic == "barn/home-farm/animals/cow%2017%2Fb/state"
    assert (m.qos, m.retain) == (0, False)
    assert json.loads(m.payload) == {
        "site": "home-farm", "animal": "cow 17/b", "behaviour": "resting", "since": T,
        "since_utc": "2026-01-01T00:00:00.000Z", "confidence": 0.5, "previous": "walking",
    }  # fmt: skip
    (alert,) = messages_for({"kind": "gateway_alert", "cause": "outbox_full", "t": T,
                             "message": "dropped 3", "dropped": 3}, tp)  # fmt: skip
    body = json.loads(alert.payload)
    assert alert.qos == 1 and body["scope"] == "gateway" and "caution" not in body
    assert messages_for({"kind": "daily_budget"}, tp) == []  # not published over MQTT
    with pytest.raises(ValueError, match="empty"):
        animal_segment("")
    nan = fact_of(StateChanged("c", "resting", T, float("nan")))
    with pytest.raises(ValueError):
        messages_for(nan, tp)


def test_unpublishable_facts_are_rejected_for_bisecting():
    sink = MqttSink(host="127.0.0.1", port=1, site="s")
    nan = fact_of(StateChanged("c", "resting", T, float("nan")))
    with pytest.raises(SinkRejected) as info:
        sink.write([Record(7, "state_changed", T, nan)])
    assert info.value.cause == "unconvertible" and "fact 7" in str(info.value)


def test_the_documented_payloads_are_what_the_gateway_publishes():
    text = DOC.read_text(encoding="utf-8")
    blocks = [json.loads(b) for b in re.findall(r"```json\n(.*?)```", text, re.S)]
    tp = Topics("barn", "home-farm")
    facts = [
        StateChanged("cow-17", "ruminating", T + 3600, 0.91, "grazing"),
        BoutClosed("cow-17", "grazing", T, T + 3600, 0.84, 12.0),
        Alert("cow-17:rumination_drop:1767312000", "rumination_drop", "cow-17", "C0017",
              "raised", T + 86400, T + 86400, "Rumination down",
              "rumination 300 min in the last 24 h, 32 % under the cow's own 7-day baseline"
              " of 441 min", {"value": 300.0, "baseline": 441.0, "z": -2.4}),
        GatewayAlert("outbox_full", blocks[3]["message"], T + 7200, 1200),
    ]  # fmt: skip
    for block, fact in zip(blocks, facts, strict=False):
        (m,) = messages_for(fact_of(fact), tp)
        assert json.loads(m.payload) == block
        assert f"`{m.topic}`" in text
    assert blocks[2]["caution"] == CAUTION
    assert blocks[-1] == {"site": "home-farm", "status": "offline"}
    assert json.loads(MqttSink(host="h", port=1, site="home-farm")._status(False)) == blocks[-1]
    online = json.loads(MqttSink(host="h", port=1, site="home-farm")._status(True))
    assert set(online) == set(blocks[-2])


def test_unusable_tls_files_are_a_configuration_rejection(tmp_path):
    sink = MqttSink(host="127.0.0.1", port=1, site="s", tls=True, ca_file=str(tmp_path / "no.pem"))
    with pytest.raises(SinkRejected, match="mqtt TLS files cannot be used") as info:
        sink.open()
    assert info.value.cause == "config"
    sink.close()
