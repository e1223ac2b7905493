"""Smoke tests: each server fixture really runs (round trips through the real servers)."""

from __future__ import annotations

import json
import queue
import time
import urllib.parse
import urllib.request

import paho.mqtt.client as mqtt
import pytest

pytestmark = pytest.mark.integration


def _http(url: str, data: bytes | None = None) -> tuple[int, bytes]:
    req = urllib.request.Request(url, data=data, method="POST" if data is not None else "GET")
    with urllib.request.urlopen(req, timeout=10) as r:
        return r.status, r.read()


def test_mosquitto_publish_subscribe_round_trip(mosquitto):
    got: queue.Queue[bytes] = queue.Queue()
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="smoke-sub")
    sub.on_message = lambda c, u, m: got.put(m.payload)
    sub.connect(mosquitto.host, mosquitto.port)
    sub.subscribe("smoke/#", qos=1)
    sub.loop_start()
    try:
        time.sleep(0.2)
        pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="smoke-pub")
        pub.connect(mosquitto.host, mosquitto.port)
        pub.loop_start()
        pub.publish("smoke/x", b"hello barn", qos=1).wait_for_publish(5)
        pub.loop_stop()
        pub.disconnect()
        assert got.get(timeout=5) == b"hello barn"
    finally:
        sub.loop_stop()
        sub.disconnect()


def test_influxdb1_write_then_read_back(influxdb1):
    _http(f"{influxdb1.url}/query", urllib.parse.urlencode({"q": "CREATE DATABASE smoke"}).encode())
    status, _ = _http(f"{influxdb1.url}/write?db=smoke&precision=s", b"m,tag=a v=1.5 1767225600")
    assert status == 204
    q = urllib.parse.urlencode({"db": "smoke", "q": "SELECT v FROM m"})
    _, body = _http(f"{influxdb1.url}/query?{q}")
    series = json.loads(body)["results"][0]["series"][0]
    assert series["values"] == [["2026-01-01T00:00:00Z", 1.5]]


def test_victoria_v2_write_then_read_back(victoria):
    from influxdb_client import InfluxDBClient
    from influxdb_client.client.write_api import SYNCHRONOUS

    with InfluxDBClient(url=victoria.url, token="unused", org="smoke") as client:
        client.write_api(write_options=SYNCHRONOUS).write(
            bucket="smoke", record="m,tag=a v=2.5 1767225600", write_precision="s"
        )
    _http(f"{victoria.url}/internal/force_flush")
    q = urllib.parse.urlencode({"match[]": '{__name__="m_v"}'})
    _, body = _http(f"{victoria.url}/api/v1/export?{q}")
    row = json.loads(body.splitlines()[0])
    assert row["metric"]["tag"] == "a"
    assert row["values"] == [2.5]
    assert row["timestamps"] == [1767225600000]
