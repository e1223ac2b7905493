"""Forwarders: batching, retry and backoff, Retry-After, refused credentials, bisecting bad points.

Server answers that the real servers cannot give on demand (401, 429, 500, timeouts,
redirects) come from a scripted HTTP peer (tests/httppeer.py), a real HTTP server on
loopback; unknown databases and bad values go to the real InfluxDB 1.6.
"""

from __future__ import annotations

import logging
import urllib.parse
import urllib.request
import uuid

import pytest
from httppeer import Answer, ScriptedPeer
from influxhttp import create_database, rows
from polling import wait_for

from gateway.errors import SinkRejected, SinkUnavailable
from gateway.outbox import Forwarder, Outbox, Outputs, Record, fact_of
from gateway.servers import free_port
from gateway.sink_influx_v1 import InfluxV1Sink
from gateway.sink_influx_v2 import InfluxV2Sink
from gateway.store import Store
from gateway.types import BoutClosed, StateChanged

T = 1767225600.0


class Clock:
    def __init__(self, t: float = T) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def bouts(n: int, animal: str = "cow-1", t0: float = T) -> list[BoutClosed]:
    return [BoutClosed(animal, "grazing", t0 + 60 * i, t0 + 60 * i + 30, 0.9) for i in range(n)]


@pytest.fixture
def outbox(tmp_path):
    with Store.open(tmp_path / "boutline.db") as store:
        path = store.path
    clock = Clock()
    ob = Outbox(path, sinks=["influx"], clock=clock, site="s")
    ob.test_clock = clock  # type: ignore[attr-defined]
    yield ob
    ob.close()


def v1(url: str, **kw) -> InfluxV1Sink:
    return InfluxV1Sink(url=url, database="boutline", site="s", **kw)


def forwarder(outbox, sink, **kw) -> Forwarder:
    kw.setdefault("batch_size", 5)
    kw.setdefault("flush_interval_s", 10.0)
    return Forwarder(outbox, sink, **kw)


def lines(peer: ScriptedPeer) -> list[list[bytes]]:
    return [r.body.split(b"\n") for r in peer.writes()]


def test_batches_go_by_size_or_by_age(outbox):
    with ScriptedPeer() as peer:
        fw = forwarder(outbox, v1(peer.url))
        outbox.put(bouts(3))
        assert 0 < fw.step() <= 0.25  # young and small: wait
        assert peer.writes() == []
        outbox.test_clock.t += 10.0  # old enough now
        fw.step()
        assert [len(b) for b in lines(peer)] == [3]
        outbox.put(bouts(12, t0=T + 10_000))
        assert fw.step() == 0.0  # a full batch: more may be waiting
        fw.step()
        fw.step()  # 2 left, young: kept back
        assert [len(b) for b in lines(peer)] == [3, 5, 5]
        fw.step(flush=True)
        assert [len(b) for b in lines(peer)] == [3, 5, 5, 2]
        assert outbox.backlog("influx") == 0
        assert fw.status()["delivered"] == 15
        fw.stop()


def test_5xx_is_retried_with_backoff_and_the_batch_is_sent_once_acknowledged(outbox, caplog):
    answers = [Answer(204), Answer(500, body=b'{"error":"engine down"}'), Answer(503), Answer(204)]
    with ScriptedPeer(answers) as peer, caplog.at_level(logging.WARNING, "boutline.outbox"):
        fw = forwarder(outbox, v1(peer.url), flush_interval_s=0.0, retry_min_s=1.0)
        outbox.put(bouts(3))
        w1 = fw.step()
        assert 0.5 <= w1 <= 1.0 and fw.state == "failing"
        assert "engine down" in fw.last_error and outbox.backlog("influx") == 3
        w2 = fw.step()
        assert 1.0 <= w2 <= 2.0  # doubled, jittered
        fw.step()
        assert fw.state == "ok" and outbox.backlog("influx") == 0
        assert [len(b) for b in lines(peer)] == [3, 3, 3]  # the same batch three times
    errors = [r for r in caplog.records if r.levelno == logging.ERROR]
    assert len(errors) == 1  # one line per failure episode, not one per attempt
    assert "runs on its embedded store" in errors[0].getMessage()
    assert "delivering again" in caplog.text
    fw.stop()


def test_429_honours_retry_after(outbox):
    answers = [Answer(204), Answer(429, {"Retry-After": "7"}), Answer(204)]
    with ScriptedPeer(answers) as peer:
        fw = forwarder(outbox, v1(peer.url), flush_interval_s=0.0, retry_max_s=300.0)
        outbox.put(bouts(2))
        assert fw.step() == 7.0
        fw.step()
        assert outbox.backlog("influx") == 0 and len(peer.writes()) == 2
        fw.stop()


def test_refused_credentials_are_reported_once_and_retried_without_losing_anything(outbox, caplog):
    answers = [Answer(401, body=b'{"error":"authorization failed"}')] * 4
    with ScriptedPeer(answers) as peer, caplog.at_level(logging.ERROR, "boutline.outbox"):
        sink = v1(peer.url, username="barn", password="s3cret")
        fw = forwarder(outbox, sink, flush_interval_s=0.0)
        outbox.put(bouts(4))
        for _ in range(4):
            fw.step()
        assert fw.state == "failing" and fw.fail_cause == "auth"
        assert "refused the credentials" in fw.last_error and "influx.password" in fw.last_error
        assert len(caplog.records) == 1
        assert outbox.backlog("influx") == 4  # kept, not set aside
        fw.step()  # the operator fixed the password: the peer now answers 204
        fw.step()
        assert fw.state == "ok" and outbox.backlog("influx") == 0
        auth = peer.requests[0].headers["Authorization"]
        assert auth == "Basic YmFybjpzM2NyZXQ="  # base64("barn:s3cret"), RFC 7617
        assert "s3cret" not in peer.requests[0].path  # never in the URL
        fw.stop()


def test_v2_token_is_sent_and_its_refusal_reported(outbox):
    answers = [Answer(401, body=b'{"code":"unauthorized","message":"unauthorized access"}')]
    with ScriptedPeer(answers) as peer:
        sink = InfluxV2Sink(url=peer.url, org="farm", bucket="b", token="tok-1", site="s")
        fw = forwarder(outbox, sink, flush_interval_s=0.0)
        outbox.put(bouts(2))
        fw.step()
        assert fw.fail_cause == "auth" and "unauthorized access" in fw.last_error
        assert "influx.token" in fw.last_error
        fw.step()
        fw.step()
        assert outbox.backlog("influx") == 0
        assert peer.requests[0].headers["Authorization"] == "Token tok-1"
        q = urllib.parse.parse_qs(urllib.parse.urlsplit(peer.writes()[0].path).query)
        assert q == {"org": ["farm"], "bucket": ["b"], "precision": ["ms"]}
        fw.stop()


@pytest.mark.parametrize("make", ["v1", "v2"])
@pytest.mark.parametrize(
    ("answer", "error", "cause"),
    [
        (Answer(404, body=b'{"message":"bucket \\"b\\" not found"}'), SinkRejected, "not_found"),
        (Answer(400, body=b'{"error":"unable to parse"}'), SinkRejected, "bad_point"),
        (Answer(413), SinkRejected, "too_large"),
        (Answer(302, {"Location": "http://127.0.0.1:9/login"}), SinkRejected, "http_302"),
        (Answer(500), SinkUnavailable, None),
        (Answer(999), SinkUnavailable, None),
        (Answer(429, {"Retry-After": "12"}), SinkUnavailable, None),
    ],
)
def test_each_http_answer_becomes_the_right_error(make, answer, error, cause):
    facts = [Record(1, "bout_closed", T, fact_of(bouts(1)[0]))]
    with ScriptedPeer([Answer(204), answer]) as peer:
        if make == "v1":
            sink = v1(peer.url)
        else:
            sink = InfluxV2Sink(url=peer.url, org="o", bucket="b", token="t", site="s")
        sink.open()
        with pytest.raises(error) as info:
            sink.write(facts)
        sink.close()
    if cause:
        assert info.value.cause == cause
    if answer.status == 429:
        assert info.value.retry_after == 12.0


def test_a_url_that_does_not_answer_is_one_clear_line_at_start_and_retried(tmp_path, caplog):
    with Store.open(tmp_path) as store:
        path = store.path
    url = f"http://127.0.0.1:{free_port()}"
    sink = v1(url, timeout_s=1.0)
    with caplog.at_level(logging.ERROR, "boutline.outbox"):
        outputs = Outputs(Outbox(path, sinks=["influx"]), [(sink, {"retry_min_s": 0.05})])
        problems = outputs.start(wait_s=5.0)
        outputs.outbox.put(bouts(2))
        outputs.forwarders[0].first_result.wait(5)
        status = outputs.status()["influx"]
        outputs.stop()
    assert len(problems) == 1 and "does not answer" in problems[0] and url in problems[0]
    assert status["state"] == "failing" and status["backlog"] == 2
    assert len([r for r in caplog.records if "does not answer" in r.getMessage()]) == 1
    assert (
        outputs.forwarders[0]
        .metrics.failures.labels(sink="influx", cause="unavailable")
        ._value.get()
        >= 1
    )


def test_a_server_that_answers_too_late_is_a_timeout(outbox):
    with ScriptedPeer([Answer(204), Answer(204, delay_s=2.0)]) as peer:
        sink = v1(peer.url, timeout_s=0.3)
        sink.open()
        with pytest.raises(SinkUnavailable, match="does not answer"):
            sink.write([Record(1, "bout_closed", T, fact_of(bouts(1)[0]))])


def test_bad_points_are_bisected_out_and_the_rest_delivered(outbox, caplog):
    def rule(req):
        return (
            Answer(400, body=b'{"error":"partial write: unable to parse"}')
            if b"poison" in req.body
            else None
        )

    facts = bouts(20)
    facts[5] = BoutClosed("poison-1", "grazing", T + 5, T + 6, 0.5)
    facts[13] = BoutClosed("poison-2", "walking", T + 7, T + 8, 0.5)
    with ScriptedPeer(rule=rule) as peer, caplog.at_level(logging.WARNING, "boutline.outbox"):
        fw = forwarder(outbox, v1(peer.url), batch_size=20, flush_interval_s=0.0)
        outbox.put(facts)
        fw.step()
        ok = [r for r in peer.writes() if b"poison" not in r.body]
        delivered = {ln for r in ok for ln in r.body.split(b"\n")}
        assert len(delivered) == 18 and not any(b"poison" in ln for ln in delivered)
        assert outbox.backlog("influx") == 0 and fw.state == "ok"
        assert [(k, c) for _, k, c, _ in outbox.rejected("influx")] == [
            ("bout_closed", "bad_point")
        ] * 2
        assert fw.status()["rejected"] == 2 and fw.status()["delivered"] == 18
        # log2(20) rounds of halving per bad point, not one request per fact
        assert len(peer.writes()) <= 2 * 2 * 5 + 1
    warnings = [r for r in caplog.records if "set aside" in r.getMessage()]
    assert len(warnings) == 1  # reported once per cause, the second only counted
    fw.stop()


@pytest.mark.integration
def test_unwritable_facts_are_set_aside_and_the_rest_reaches_influxdb(outbox, influxdb1):
    db = f"bis_{uuid.uuid4().hex[:8]}"
    create_database(influxdb1.url, db)
    facts = [
        StateChanged("cow-1", "grazing", T, 0.9),
        StateChanged("cow-2", "grazing", T, float("nan")),  # NaN cannot be written
        StateChanged("cow-3", "walking", T, 0.7),
        {"kind": "unknown_kind", "t": T},  # no converter for it
        StateChanged("cow-4", "resting", T, 0.8),
    ]
    fw = forwarder(outbox, InfluxV1Sink(url=influxdb1.url, database=db, site="s"),
                   flush_interval_s=0.0)  # fmt: skip
    outbox.put(facts)
    fw.step()
    got = rows(influxdb1.url, db, "SELECT confidence, animal FROM animal_state")
    assert sorted((c["animal"], c["confidence"]) for _, _, c in got) == [
        ("cow-1", 0.9), ("cow-3", 0.7), ("cow-4", 0.8),
    ]  # fmt: skip
    rejected = outbox.rejected("influx")
    assert [(k, c) for _, k, c, _ in rejected] == [
        ("state_changed", "unconvertible"),
        ("unknown_kind", "unconvertible"),
    ]
    assert "not finite" in rejected[0][3] and "no line-protocol converter" in rejected[1][3]
    fw.stop()


@pytest.mark.integration
def test_unknown_database_is_one_line_at_start_and_delivery_follows_its_creation(
    tmp_path, influxdb1, caplog
):
    with Store.open(tmp_path) as store:
        path = store.path
    db = f"later_{uuid.uuid4().hex[:8]}"
    sink = InfluxV1Sink(url=influxdb1.url, database=db, site="s")
    with caplog.at_level(logging.ERROR, "boutline.outbox"):
        outputs = Outputs(
            Outbox(path, sinks=["influx"]),
            [(sink, {"retry_min_s": 0.05, "retry_max_s": 0.2, "flush_interval_s": 0.0})],
        )
        problems = outputs.start(wait_s=5.0)
    try:
        assert len(problems) == 1
        assert "database not found" in problems[0] and f'CREATE DATABASE "{db}"' in problems[0]
        outputs.outbox.put(bouts(7))
        assert outputs.status()["influx"]["backlog"] == 7
        create_database(influxdb1.url, db)
        # the background retry (at most 0.2 s apart here) finds it
        assert wait_for(lambda: outputs.status()["influx"]["backlog"] == 0, 10)
        assert outputs.status()["influx"]["state"] == "ok"
    finally:
        outputs.stop()
    assert len([r for r in caplog.records if r.levelno >= logging.ERROR]) == 1


def test_large_batches_are_gzipped(outbox):
    with ScriptedPeer() as peer:
        fw = forwarder(outbox, v1(peer.url), batch_size=500, flush_interval_s=0.0)
        outbox.put(bouts(200))
        fw.step()
        (req,) = peer.writes()
        assert req.headers.get("Content-Encoding") == "gzip"
        assert len(req.body.split(b"\n")) == 200  # the peer un-gzipped it
        fw.stop()
