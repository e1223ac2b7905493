"""MQTT out against real Mosquitto brokers: refused credentials, a broker that goes away."""

from __future__ import annotations

import json
import subprocess
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from polling import wait_for

from gateway.errors import SinkRejected, SinkUnavailable
from gateway.outbox import Outbox, Outputs, Record, fact_of
from gateway.servers import free_port, start_mosquitto
from gateway.sink_mqtt import MqttSink
from gateway.store import Store
from gateway.types import BoutClosed, StateChanged

pytestmark = pytest.mark.integration

SERVERS = Path(__file__).parent / "servers"
T = 1767225600.0


@pytest.fixture
def mosquitto_auth(tmp_path):
    """A broker of the test's own that only lets user ``barn`` / ``hay-bale`` in."""
    work = tmp_path / "mosquitto-auth"
    work.mkdir()
    subprocess.run(
        ["mosquitto_passwd", "-c", "-b", str(work / "passwd"), "barn", "hay-bale"],
        check=True,
        capture_output=True,
    )
    (work / "passwd").chmod(0o600)
    srv = start_mosquitto(work, SERVERS / "mosquitto-auth.conf")
    yield srv
    srv.stop()


def test_refused_credentials_are_a_rejection_and_good_ones_work(mosquitto_auth):
    bad = MqttSink(host=mosquitto_auth.host, port=mosquitto_auth.port, site="s",
                   username="barn", password="wrong")  # fmt: skip
    with pytest.raises(SinkRejected, match="refused the connection") as info:
        bad.open()
    assert info.value.cause == "auth" and "mqtt.password" in str(info.value)
    bad.close()
    anonymous = MqttSink(host=mosquitto_auth.host, port=mosquitto_auth.port, site="s")
    with pytest.raises(SinkRejected):
        anonymous.open()
    good = MqttSink(host=mosquitto_auth.host, port=mosquitto_auth.port, site="s",
                    username="barn", password="hay-bale")  # fmt: skip
    good.open()
    good.write([Record(1, "bout_closed", T, fact_of(BoutClosed("c", "walking", T, T + 9, 0.7)))])
    good.close()


def test_a_broker_that_does_not_answer():
    sink = MqttSink(host="127.0.0.1", port=free_port(), site="s", timeout_s=1.0)
    with pytest.raises(SinkUnavailable, match="does not answer"):
        sink.open()
    sink.close()
    with pytest.raises(SinkUnavailable, match="not connected"):
        sink.write([Record(1, "state_changed", T, fact_of(StateChanged("c", "walking", T, 1.0)))])


def test_broker_restart_facts_wait_in_the_outbox_and_arrive_after(tmp_path, mosquitto_private):
    with Store.open(tmp_path) as store:
        path = store.path
    sink = MqttSink(host=mosquitto_private.host, port=mosquitto_private.port, site="s",
                    client_id="out-restart", timeout_s=2.0)  # fmt: skip
    opts = {"batch_size": 50, "flush_interval_s": 0.0, "retry_min_s": 0.05, "retry_max_s": 0.3}
    outputs = Outputs(Outbox(path, sinks=["mqtt"]), [(sink, opts)])
    assert outputs.start() == []
    got: dict[str, bytes] = {}
    try:
        mosquitto_private.stop()
        facts = [StateChanged(f"cow-{i}", "ruminating", T + i, 0.8) for i in range(30)]
        outputs.outbox.put(facts)
        assert wait_for(lambda: outputs.status()["mqtt"]["state"] == "failing", 10)
        assert outputs.status()["mqtt"]["backlog"] == 30
        mosquitto_private.start()
        assert wait_for(lambda: outputs.status()["mqtt"]["backlog"] == 0, 30)
        sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="late-restart")
        sub.on_message = lambda c, u, m: got.__setitem__(m.topic, m.payload)
        sub.connect(mosquitto_private.host, mosquitto_private.port)
        sub.subscribe("barn/s/animals/+/state", qos=1)
        sub.loop_start()
        wait_for(lambda: len(got) == 30, 10)
        sub.loop_stop()
        sub.disconnect()
    finally:
        outputs.stop()
    assert len(got) == 30
    assert json.loads(got["barn/s/animals/cow-7/state"])["since"] == T + 7
