"""Outbox tables: atomic with the store, one cursor per sink, pruning, the disk cap, set-aside."""

from __future__ import annotations

import logging
import random
import sqlite3
from datetime import UTC, datetime
from email.utils import format_datetime

import numpy as np
import pytest

from gateway.errors import SinkRejected, SinkUnavailable, StoreError
from gateway.outbox import (
    Backoff,
    GatewayAlert,
    Outbox,
    Record,
    fact_of,
    http_failure,
    parse_retry_after,
)
from gateway.store import Store
from gateway.types import BoutClosed, StateChanged

T = 1767225600.0


def bouts(n: int, animal: str = "cow-1", t0: float = T) -> list[BoutClosed]:
    return [BoutClosed(animal, "grazing", t0 + 60 * i, t0 + 60 * i + 30, 0.9) for i in range(n)]


@pytest.fixture
def db(tmp_path):
    with Store.open(tmp_path / "boutline.db") as store:
        path = store.path
    return path


def test_outbox_needs_an_existing_store_file(tmp_path):
    with pytest.raises(StoreError, match="does not exist"):
        Outbox(tmp_path / "missing.db", sinks=["influx"])
    assert not (tmp_path / "missing.db").exists()


def test_facts_are_queued_in_the_store_transaction_or_not_at_all(tmp_path):
    store = Store.open(tmp_path)
    ob = Outbox(store.path, sinks=["influx"])
    store.add_listener(ob.listener)
    fail = {"now": True}

    def flaky(conn, events):
        if fail["now"]:
            raise RuntimeError("listener broke")

    store.add_listener(flaky)
    with pytest.raises(StoreError, match="listener"):
        store.write_events(bouts(3))
    assert ob.backlog("influx") == 0  # rolled back with the events
    fail["now"] = False
    store.write_events(bouts(2, t0=T + 3600))  # the kept batch goes first
    assert ob.backlog("influx") == 5
    with ob.connect() as c:
        kinds = [r.kind for r in ob.pending(c, "influx", 100)]
    assert kinds == ["bout_closed"] * 5
    ob.close()
    store.close()


def test_each_sink_has_its_own_cursor_and_rows_go_when_all_delivered(db):
    ob = Outbox(db, sinks=["influx", "mqtt"])
    ob.put(bouts(10))
    conn = ob.connect()
    first = ob.pending(conn, "influx", 4)
    assert [r.id for r in first] == [1, 2, 3, 4]
    ob.ack(conn, "influx", first)
    assert ob.backlog("influx") == 6 and ob.backlog("mqtt") == 10
    held = ob.held_bytes()
    assert held > 0
    ob.ack(conn, "mqtt", ob.pending(conn, "mqtt", 100))
    assert ob.backlog("mqtt") == 0
    assert conn.execute("SELECT MIN(id) FROM outbox").fetchone()[0] == 5  # delivered by both go
    ob.ack(conn, "influx", ob.pending(conn, "influx", 100))
    assert conn.execute("SELECT COUNT(*) FROM outbox").fetchone()[0] == 0
    assert ob.held_bytes() == 0
    assert ob.counts() == {("influx", "delivered", ""): 10, ("mqtt", "delivered", ""): 10}
    conn.close()
    ob.close()


def test_cursor_and_backlog_survive_reopening(db):
    ob = Outbox(db, sinks=["influx"])
    ob.put(bouts(5))
    with ob.connect() as c:
        ob.ack(c, "influx", ob.pending(c, "influx", 2))
    ob.close()
    ob = Outbox(db, sinks=["influx"])
    assert ob.backlog("influx") == 3
    with ob.connect() as c:
        assert [r.id for r in ob.pending(c, "influx", 10)] == [3, 4, 5]
    ob.close()


def test_a_new_sink_starts_at_the_newest_fact_and_a_dropped_one_is_retired(db, caplog):
    ob = Outbox(db, sinks=["influx"])
    ob.put(bouts(4))
    ob.close()
    ob = Outbox(db, sinks=["influx", "mqtt"])
    assert ob.backlog("mqtt") == 0 and ob.backlog("influx") == 4
    ob.put(bouts(1, t0=T + 9999))
    assert ob.backlog("mqtt") == 1
    ob.close()
    with caplog.at_level(logging.WARNING, "boutline.outbox"):
        ob = Outbox(db, sinks=["mqtt"])
    assert "'influx' is no longer configured" in caplog.text
    with ob.connect() as c:  # influx no longer holds rows back
        assert c.execute("SELECT COUNT(*) FROM outbox").fetchone()[0] == 1
    ob.close()


def test_without_sinks_nothing_is_queued(db):
    ob = Outbox(db, sinks=[])
    assert ob.put(bouts(3)) == 0
    assert ob.held_bytes() == 0
    ob.close()


def test_disk_cap_drops_the_oldest_counts_them_and_raises_a_gateway_alert(db, caplog):
    cap_mb = 0.02  # 20 kB: a few hundred small facts
    ob = Outbox(db, sinks=["influx", "mqtt"], max_mb=cap_mb, site="s")
    conn = ob.connect()
    with caplog.at_level(logging.ERROR, "boutline.outbox"):
        for i in range(20):
            ob.put(bouts(20, t0=T + i * 10_000))
            if i == 0:  # mqtt keeps up for the first batch, influx never
                ob.ack(conn, "mqtt", ob.pending(conn, "mqtt", 1000))
    assert ob.held_bytes() <= ob.max_bytes
    rows = conn.execute("SELECT id, kind FROM outbox ORDER BY id").fetchall()
    ids = [r[0] for r in rows]
    assert ids == list(range(ids[0], ids[-1] + 1))  # what is left is the newest, in one run
    alerts = [
        fact
        for fact in (r.fact for r in ob.pending(conn, "influx", 10_000))
        if fact["kind"] == "gateway_alert"
    ]
    assert alerts and alerts[0]["cause"] == "outbox_full" and alerts[0]["dropped"] > 0
    raised = [r for r in caplog.records if "reached its cap" in r.getMessage()]
    total = 400 + len(raised)  # the bouts plus one gateway alert per cap event
    counts = ob.counts()
    # every fact is delivered, waiting, or counted as dropped: nothing goes silently
    assert counts[("influx", "dropped", "")] + ob.backlog("influx") == total
    assert 20 + counts[("mqtt", "dropped", "")] + ob.backlog("mqtt") == total
    assert counts[("mqtt", "dropped", "")] < counts[("influx", "dropped", "")]
    assert "in all so far" in raised[-1].getMessage()
    assert "cap of 0.02 MB" in caplog.text and "store.outbox_max_mb" in caplog.text
    # the sizes recorded add up to what the cap is measured on
    assert conn.execute("SELECT SUM(size) FROM outbox").fetchone()[0] == ob.held_bytes()
    conn.close()
    ob.close()


def test_set_aside_moves_on_keeps_the_fact_and_requeue_brings_it_back(db):
    ob = Outbox(db, sinks=["influx"])
    ob.put(bouts(3))
    conn = ob.connect()
    batch = ob.pending(conn, "influx", 10)
    ob.set_aside(conn, "influx", batch[0], "bad_point", "HTTP 400: unable to parse")
    assert ob.backlog("influx") == 2
    assert ob.rejected("influx") == [(1, "bout_closed", "bad_point", "HTTP 400: unable to parse")]
    assert ob.counts()[("influx", "rejected", "bad_point")] == 1
    assert ob.requeue("influx", "bad_point") == 1
    assert ob.rejected("influx") == [] and ob.backlog("influx") == 3
    again = ob.pending(conn, "influx", 10)
    assert again[-1].fact == batch[0].fact and again[-1].id == 4
    conn.close()
    ob.close()


def test_facts_are_plain_json_whatever_the_producer_used(db):
    ob = Outbox(db, sinks=["x"])
    ob.put([StateChanged("cow-1", "walking", np.float64(T), np.float32(0.5), None)])
    ob.put([{"kind": "alert", "animal": "cow-1", "value": np.int64(3), "t": T}])
    with ob.connect() as c:
        a, b = (r.fact for r in ob.pending(c, "x", 10))
    assert a == {"animal": "cow-1", "behaviour": "walking", "since": T, "confidence": 0.5,
                 "previous": None, "kind": "state_changed"}  # fmt: skip
    assert b["value"] == 3
    with pytest.raises(TypeError, match="kind"):
        ob.put([{"animal": "x"}])
    with pytest.raises(TypeError, match="dataclass"):
        fact_of(42)
    assert fact_of(GatewayAlert("c", "m", 1.0))["kind"] == "gateway_alert"
    ob.close()


def test_a_locked_store_is_reported_not_lost(db):
    ob = Outbox(db, sinks=["x"])
    blocker = sqlite3.connect(db, timeout=0)
    blocker.execute("BEGIN EXCLUSIVE")
    ob._conn.execute("PRAGMA busy_timeout = 50")
    with pytest.raises(StoreError, match="cannot queue"):
        ob.put(bouts(1))
    blocker.rollback()
    blocker.close()
    assert ob.put(bouts(1)) == 1
    ob.close()


def test_backoff_is_capped_exponential_with_jitter():
    b = Backoff(1.0, 60.0, random.Random(7))
    waits = [b.next() for _ in range(10)]
    for n, w in enumerate(waits):
        d = min(60.0, 2.0**n)
        assert d / 2 <= w <= d
    assert max(waits) <= 60.0 and waits[-1] >= 30.0
    assert len({round(w, 6) for w in waits[6:]}) > 1  # jittered, not in lockstep
    assert b.next(retry_after=7.0) == 7.0
    assert b.next(retry_after=10**9) == 60.0  # a server cannot park us for a year
    b.reset()
    assert b.next() <= 1.0


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        ("120", 120.0),
        ("0", 0.0),
        ("-5", 0.0),
        ("1.5", 1.5),
        ("soon", None),
        ("", None),
        (None, None),
        ("1e999", None),
        ("nan", None),
        ("9" * 5000, None),
    ],
)
def test_retry_after_values(value, expected):
    assert parse_retry_after(value) == expected


def test_retry_after_as_http_date():
    # RFC 9110 10.2.3: Retry-After may be an HTTP-date
    now = 1_767_225_600.0
    date = format_datetime(datetime.fromtimestamp(now + 90, UTC), usegmt=True)
    assert parse_retry_after(date, now=now) == pytest.approx(90.0)
    past = format_datetime(datetime.fromtimestamp(now - 90, UTC), usegmt=True)
    assert parse_retry_after(past, now=now) == 0.0


@pytest.mark.parametrize(
    ("status", "kind", "cause"),
    [
        (401, SinkRejected, "auth"),
        (403, SinkRejected, "auth"),
        (404, SinkRejected, "not_found"),
        (400, SinkRejected, "bad_point"),
        (422, SinkRejected, "bad_point"),
        (413, SinkRejected, "too_large"),
        (409, SinkRejected, "http_409"),
        (302, SinkRejected, "http_302"),
        (429, SinkUnavailable, None),
        (500, SinkUnavailable, None),
        (503, SinkUnavailable, None),
        (0, SinkUnavailable, None),
    ],
)
def test_http_answers_are_classified(status, kind, cause):
    err = http_failure(status, b"", "3", where="X", auth_hint="fix token", missing_hint="create")
    assert type(err) is kind
    if cause:
        assert err.cause == cause
    else:
        assert err.retry_after == 3.0
    if status in (401, 403):
        assert "fix token" in str(err)
    if status == 404:
        assert "create" in str(err)


def test_influxdb1_unknown_retention_policy_is_a_missing_target():
    # InfluxDB 1.6 answers 500 {"error":"retention policy not found: zz"} (seen on the server)
    err = http_failure(500, b'{"error":"retention policy not found: zz"}', None,
                       where="X", auth_hint="", missing_hint="fix rp")  # fmt: skip
    assert isinstance(err, SinkRejected) and err.cause == "not_found"


def test_hostile_error_bodies_are_cleaned_and_cut():
    body = b"\x1b[31m" + "\u202e".encode() + b"A" * 100_000 + b"\n\r\x00"
    err = http_failure(400, body, None, where="X", auth_hint="", missing_hint="")
    text = str(err)
    assert len(text) < 400 and "\x1b" not in text and "\n" not in text and "\x00" not in text
    assert "A" * 50 in text and text.endswith("...)")


def test_records_are_what_sinks_get():
    r = Record(1, "bout_closed", 0.0, {"kind": "bout_closed"})
    with pytest.raises(AttributeError):
        r.id = 2  # type: ignore[misc]


def test_sinks_follow_the_settings(db):
    from gateway.config import Settings
    from gateway.outbox import Outputs, sinks_from_settings
    from gateway.sink_influx_v1 import InfluxV1Sink
    from gateway.sink_influx_v2 import InfluxV2Sink
    from gateway.sink_mqtt import MqttSink

    (only,) = sinks_from_settings(Settings())  # defaults: MQTT out on, InfluxDB off
    assert isinstance(only[0], MqttSink) and only[1]["flush_interval_s"] == 0.0
    s = Settings.model_validate(
        {"influx": {"enabled": True, "api": "v1", "batch_size": 7, "flush_interval_s": 2.0},
         "outputs": {"mqtt": False}}
    )  # fmt: skip
    ((sink, opts),) = sinks_from_settings(s)
    assert isinstance(sink, InfluxV1Sink) and opts["batch_size"] == 7
    assert opts["flush_interval_s"] == 2.0 and opts["retry_max_s"] == 300.0
    s2 = Settings.model_validate({"influx": {"enabled": True}, "outputs": {"mqtt": False}})
    assert isinstance(sinks_from_settings(s2)[0][0], InfluxV2Sink)
    outputs = Outputs.from_settings(s2, db)
    assert outputs.outbox.sinks == ("influx",) and [f.name for f in outputs.forwarders] == [
        "influx"
    ]
    outputs.stop()


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"url": "ftp://db:21"}, "not an http"),
        ({"url": "http://"}, "not an http"),
        ({"database": ""}, "influx.database is empty"),
    ],
)
def test_bad_sink_settings_are_config_errors(kwargs, message):
    from gateway.errors import ConfigError
    from gateway.sink_influx_v1 import InfluxV1Sink

    with pytest.raises(ConfigError, match=message):
        InfluxV1Sink(**{"url": "http://127.0.0.1:8086", "database": "d", "site": "s", **kwargs})


def test_standalone_forwarder_refuses_a_missing_store(tmp_path, capsys):
    from gateway.outbox import main

    assert main(["--db", str(tmp_path / "none.db")]) == 1
    out = capsys.readouterr().err
    assert out.startswith("Error: store") and "does not exist" in out


def test_a_damaged_row_becomes_a_fact_that_is_set_aside_not_a_stuck_forwarder(db):
    from gateway.lineprotocol import points_for

    ob = Outbox(db, sinks=["influx"])
    ob.put(bouts(2))
    with ob.connect() as c:
        c.execute("UPDATE outbox SET body = '{not json' WHERE id = 1")
        c.execute("UPDATE outbox SET body = '[1, 2]' WHERE id = 2")
        first, second = ob.pending(c, "influx", 10)
    assert first.fact == {"kind": "damaged", "stored_kind": "bout_closed", "body": "{not json"}
    assert second.fact["kind"] == "damaged"
    with pytest.raises(LookupError):  # no converter: the forwarder sets it aside
        points_for(first.fact, "s")
    ob.close()
