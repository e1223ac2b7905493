"""/healthz and /metrics: readiness, sink backlog while a sink fails, Prometheus text, bad requests."""

from __future__ import annotations

import json
import socket
import urllib.error
import urllib.request

import pytest
from httppeer import ScriptedPeer
from polling import wait_for
from prometheus_client.parser import text_string_to_metric_families

from gateway.config import HttpSettings
from gateway.errors import ConfigError
from gateway.http import Health, HttpEndpoint
from gateway.outbox import Outbox, Outputs
from gateway.servers import free_port
from gateway.sink_influx_v1 import InfluxV1Sink
from gateway.store import Store
from gateway.telemetry import Telemetry
from gateway.types import BoutClosed

T = 1767225600.0


def get(url: str) -> tuple[int, bytes, dict]:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.status, r.read(), dict(r.headers)
    except urllib.error.HTTPError as e:
        with e:
            return e.code, e.read(), dict(e.headers)


def bouts(n: int) -> list[BoutClosed]:
    return [BoutClosed("cow-1", "resting", T + 60 * i, T + 60 * i + 30, 0.9) for i in range(n)]


@pytest.fixture
def gateway(tmp_path):
    """Telemetry + outputs with one InfluxDB sink whose URL answers nothing, + the endpoint."""
    with Store.open(tmp_path) as store:
        path = store.path
    tel = Telemetry()
    sink = InfluxV1Sink(url=f"http://127.0.0.1:{free_port()}", database="d", site="s",
                        timeout_s=0.5)  # fmt: skip
    outputs = Outputs(Outbox(path, sinks=["influx"]), [(sink, {"retry_min_s": 0.05})], tel.registry)
    state = {"broker": True, "model": True}
    health = Health(lambda: state["broker"], lambda: state["model"], outputs)
    ep = HttpEndpoint(health, tel.registry, port=0).start()
    outputs.start(wait_s=5)
    yield ep, tel, outputs, state
    ep.stop()
    outputs.stop()


def test_healthz_ready_but_says_the_gateway_runs_on_its_store_while_a_sink_fails(gateway):
    ep, _, outputs, state = gateway
    outputs.outbox.put(bouts(3))
    code, body, headers = get(ep.url + "/healthz")
    h = json.loads(body)
    assert code == 200 and h["ready"] is True and headers["Content-Type"] == "application/json"
    assert h["sinks"]["influx"]["state"] == "failing"
    assert h["sinks"]["influx"]["backlog"] == 3
    assert "does not answer" in h["sinks"]["influx"]["last_error"]
    assert "runs on its embedded store" in h["message"] and "3 facts wait" in h["message"]
    state["broker"] = False
    code, body, _ = get(ep.url + "/healthz")
    assert code == 503 and json.loads(body)["ready"] is False
    assert "not connected to the MQTT broker" in json.loads(body)["message"]
    state["broker"], state["model"] = True, False
    code, body, _ = get(ep.url + "/healthz")
    assert code == 503 and "no model loaded" in json.loads(body)["message"]


def test_metrics_hold_pipeline_counters_and_sink_figures_in_valid_prometheus_text(gateway):
    ep, tel, outputs, _ = gateway
    tel.frames_in.inc(42)
    tel.reject("bad_json")
    outputs.outbox.put(bouts(5))
    code, body, headers = get(ep.url + "/metrics")
    assert code == 200 and headers["Content-Type"].startswith("text/plain")
    # prometheus_client's own parser is the reference for the exposition format
    fams = {f.name: f for f in text_string_to_metric_families(body.decode())}
    assert len(fams) == len(set(fams))
    sample = {
        (s.name, tuple(sorted(s.labels.items()))): s.value for f in fams.values() for s in f.samples
    }
    assert sample[("boutline_frames_in_total", ())] == 42
    assert sample[("boutline_rejects_total", (("reason", "bad_json"),))] == 1
    assert sample[("boutline_sink_backlog", (("sink", "influx"),))] == 5
    assert sample[("boutline_sink_up", (("sink", "influx"),))] == 0
    assert sample[("boutline_outbox_bytes", ())] > 0
    fails = sample[("boutline_sink_failures_total", (("cause", "unavailable"), ("sink", "influx")))]
    assert fails >= 1


def test_delivery_latency_and_totals_after_a_delivery(tmp_path):
    with Store.open(tmp_path) as store:
        path = store.path
    tel = Telemetry()
    with ScriptedPeer() as peer:
        sink = InfluxV1Sink(url=peer.url, database="d", site="s")
        opts = {"flush_interval_s": 0.0}
        outputs = Outputs(Outbox(path, sinks=["influx"]), [(sink, opts)], tel.registry)
        outputs.start()
        outputs.outbox.put(bouts(4))
        wait_for(lambda: outputs.status()["influx"]["backlog"] == 0, 10)
        status = outputs.status()
        ep = HttpEndpoint(Health(lambda: True, lambda: True, outputs), tel.registry, port=0)
        ep.start()
        _, body, _ = get(ep.url + "/metrics")
        ep.stop()
        outputs.stop()
    text = body.decode()
    assert status["influx"]["backlog"] == 0, status
    assert 'boutline_sink_delivery_seconds_count{sink="influx"} 4.0' in text
    assert 'boutline_sink_delivered_total{sink="influx"} 4.0' in text
    assert 'boutline_sink_up{sink="influx"} 1.0' in text
    # stopping unregistered the outputs: a second gateway in this process can register
    Outputs(Outbox(path, sinks=["influx"]), [], tel.registry).stop()


def test_unknown_paths_and_methods(gateway):
    ep = gateway[0]
    assert get(ep.url + "/nope")[0] == 404
    assert get(ep.url + "/healthz?verbose=1")[0] == 200  # a query string is ignored
    req = urllib.request.Request(ep.url + "/healthz", data=b"x", method="POST")
    with pytest.raises(urllib.error.HTTPError) as info:
        urllib.request.urlopen(req, timeout=5)
    info.value.close()
    assert info.value.code == 405 and info.value.headers["Allow"] == "GET"


def _raw(ep, data: bytes) -> bytes:
    with socket.create_connection(("127.0.0.1", ep.port), timeout=5) as s:
        s.sendall(data)
        chunks = []
        while chunk := s.recv(65536):
            chunks.append(chunk)
    return b"".join(chunks)


def test_garbage_and_oversized_requests_get_an_error_and_the_endpoint_keeps_serving(gateway):
    ep = gateway[0]
    # a line that is not HTTP gets http.server's 400 page (no status line: it cannot tell
    # which HTTP version the peer speaks)
    assert b"400 - Bad request" in _raw(ep, b"\x00\xff\xfe garbage\r\n\r\n")
    huge_header = b"GET /healthz HTTP/1.1\r\nX-A: " + b"a" * 70_000 + b"\r\n\r\n"
    assert _raw(ep, huge_header).startswith(b"HTTP/1.0 431")
    assert _raw(ep, b"GET /" + b"a" * 70_000 + b" HTTP/1.1\r\n\r\n").startswith(b"HTTP/1.0 414")
    silent = socket.create_connection(("127.0.0.1", ep.port), timeout=5)  # says nothing
    try:
        assert get(ep.url + "/healthz")[0] == 200  # others are still served
    finally:
        silent.close()


def test_binds_loopback_by_default_and_a_busy_port_is_a_clear_error(gateway):
    assert HttpSettings().bind == "127.0.0.1"
    ep = gateway[0]
    assert ep._server.server_address[0] == "127.0.0.1"
    other = HttpEndpoint(ep.health, ep.registry, port=ep.port)
    with pytest.raises(ConfigError, match="cannot listen on 127.0.0.1"):
        other.start()


def test_health_without_outputs():
    code, body = Health(lambda: True, lambda: True).check()
    assert code == 200 and body["sinks"] == {} and body["message"] == "ready"


def test_gateway_stats_from_the_pipeline_counters_reach_the_sink(tmp_path):
    with Store.open(tmp_path) as store:
        path = store.path
    tel = Telemetry()
    tel.frames_in.inc(42)
    tel.reject("bad_json", 3)
    tel.windows_classified.inc(7)
    tel.event("bout_closed", 2)
    tel.inference_seconds.observe(0.25)
    with ScriptedPeer() as peer:
        sink = InfluxV1Sink(url=peer.url, database="d", site="s")
        outbox = Outbox(path, sinks=["influx"], site="s")
        outputs = Outputs(outbox, [(sink, {"flush_interval_s": 0.0})], tel.registry,
                          stats_every_s=0.1)  # fmt: skip
        outputs.start()
        assert wait_for(lambda: any(b"gateway_stats" in r.body for r in peer.writes()), 10)
        outputs.stop()
    line = next(ln for r in peer.writes() for ln in r.body.split(b"\n") if b"gateway_stats" in ln)
    assert line.startswith(b"gateway_stats,site=s ")
    for part in (b"frames_in=42i", b"rejects=3i", b"windows=7i", b"events=2i", b"inference_s=0.25"):
        assert part in line
