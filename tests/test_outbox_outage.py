"""Store-and-forward through real outages: the database stops, the forwarder process dies.

The events come from a simulated herd (simulator.Herd behaviour intervals turned into state
changes and closed bouts). After each outage every event is in InfluxDB exactly once:
the set of (series, timestamp) keys read back equals the set of facts produced, and the
point counts equal the fact counts (nothing missing, nothing doubled).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from influxhttp import create_database, rows
from polling import wait_for

from gateway.outbox import Outbox, Outputs
from gateway.sink_influx_v1 import InfluxV1Sink
from gateway.store import Store
from gateway.types import BoutClosed, StateChanged
from simulator.herd import Herd

pytestmark = pytest.mark.integration

DB = "barn"


def herd_events(n_animals: int, hours: float, seed: int) -> list:
    """State changes and closed bouts of a simulated herd, in the order they happen."""
    herd = Herd(n_animals, seed=seed, days=hours / 24.0)
    timed = []
    last: dict[str, str | None] = {}
    for animal, _collar, start, end, behaviour in herd.observations():
        timed.append((start, StateChanged(animal, behaviour, start, 0.9, last.get(animal))))
        timed.append((end, BoutClosed(animal, behaviour, start, end, 0.85)))
        last[animal] = behaviour
    timed.sort(key=lambda x: x[0])
    return [e for _, e in timed]


def expected_keys(events) -> set:
    return {
        ("animal_state" if isinstance(e, StateChanged) else "bout", e.animal, e.behaviour,
         round((e.since if isinstance(e, StateChanged) else e.start) * 1000))
        for e in events
    }  # fmt: skip


def stored_keys(url: str) -> tuple[set, int]:
    """Keys read back and the number of points they came from."""
    got = rows(
        url, DB, 'SELECT "confidence", "duration_s", animal, behaviour FROM /^(animal_state|bout)$/'
    )
    return {(m, c["animal"], c["behaviour"], t) for m, t, c in got}, len(got)


def test_database_outage_while_the_herd_produces_loses_and_doubles_nothing(
    tmp_path, influxdb1_private
):
    db_url = influxdb1_private.url
    create_database(db_url, DB)
    events = herd_events(20, 12.0, seed=5)
    store = Store.open(tmp_path)
    sink = InfluxV1Sink(url=db_url, database=DB, site="home-farm", timeout_s=2.0)
    opts = {"batch_size": 40, "flush_interval_s": 0.1, "retry_min_s": 0.05, "retry_max_s": 0.5}
    outputs = Outputs(Outbox(store.path, sinks=["influx"]), [(sink, opts)])
    store.add_listener(outputs.listener)
    assert outputs.start() == []
    chunks = [events[i : i + 15] for i in range(0, len(events), 15)]
    stop_at, start_at = len(chunks) // 4, (3 * len(chunks)) // 4
    try:
        for k, chunk in enumerate(chunks):
            if k == stop_at:
                influxdb1_private.stop()  # the database goes away mid-stream
            if k == start_at:
                waiting = outputs.status()["influx"]["backlog"]
                influxdb1_private.start()
            store.write_events(chunk)
            threading.Event().wait(0.01)
        assert wait_for(lambda: outputs.status()["influx"]["backlog"] == 0, 60)
    finally:
        outputs.stop()
        store.close()
    assert waiting >= (start_at - stop_at) * 15 - 40  # what came during the outage had waited
    fw = outputs.forwarders[0]
    assert fw.metrics.failures.labels(sink="influx", cause="unavailable")._value.get() > 0
    keys, points = stored_keys(db_url)
    want = expected_keys(events)
    assert len(want) == len(events)  # one key per fact: the schema's promise
    assert keys == want
    assert points == len(events)


def _forwarder_process(db_path: Path, config: Path, log: Path) -> subprocess.Popen:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    with log.open("ab") as out:  # the child holds its own copy of the descriptor
        return subprocess.Popen(
            [sys.executable, "-m", "gateway.outbox", "--db", str(db_path), "--config", str(config)],
            stdout=out,
            stderr=subprocess.STDOUT,
            env=env,
        )


def test_forwarder_killed_while_the_database_is_down_delivers_the_backlog_after_both_return(
    tmp_path, influxdb1_private
):
    db_url = influxdb1_private.url
    create_database(db_url, DB)
    influxdb1_private.stop()
    config = tmp_path / "boutline.toml"
    config.write_text(
        '[influx]\nenabled = true\napi = "v1"\n'
        f'url = "{db_url}"\ndatabase = "{DB}"\nretry_max_s = 0.5\nflush_interval_s = 0.1\n'
        "timeout_s = 2.0\n[outputs]\nmqtt = false\n",
        encoding="utf-8",
    )
    events = herd_events(8, 4.0, seed=9)
    first, second = events[: len(events) // 2], events[len(events) // 2 :]
    store = Store.open(tmp_path)
    outbox = Outbox(store.path, sinks=["influx"])
    store.add_listener(outbox.listener)
    store.write_events(first)
    log = tmp_path / "forwarder.log"
    proc = _forwarder_process(store.path, config, log)
    try:
        assert wait_for(lambda: b"does not answer" in log.read_bytes(), 30), log.read_text()
        assert b"keeps retrying in the background" in log.read_bytes()
        proc.send_signal(signal.SIGKILL)  # the gateway dies while the database is down
        proc.wait(10)
        store.write_events(second)  # the next gateway run produced more before anything works
        assert outbox.backlog("influx") == len(events)
        influxdb1_private.start()
        proc = _forwarder_process(store.path, config, log)
        assert wait_for(lambda: outbox.backlog("influx") == 0, 60), log.read_text()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(20) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        outbox.close()
        store.close()
    keys, points = stored_keys(db_url)
    assert keys == expected_keys(events)
    assert points == len(events)
