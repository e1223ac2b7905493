"""The analytics facade: store listener, the collars' clock, timed work, outbox atomicity."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np
import pytest

from gateway.analytics import Analytics
from gateway.config import Settings
from gateway.errors import StoreError
from gateway.lineprotocol import points_for
from gateway.outbox import Outbox
from gateway.store import Store
from gateway.types import BoutClosed, Frame

H = 3600.0
T0 = 1772323200.0
ACC = np.zeros((10, 3), np.float32)


def settings(**alerts) -> Settings:
    return Settings.model_validate({"site": {"id": "farm"}, "alerts": alerts})


def test_facts_reach_the_outbox_and_convert_to_line_protocol(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        outbox = Outbox(store.path, sinks=["influx"], site="farm")
        an = Analytics(settings(), speed=None)
        an.attach(store)
        an.add_fact_listener(outbox.listener)
        store.write_events([BoutClosed("cow-1", "resting", T0, T0 + 25 * H, 0.9)])
        an.frame(Frame("C1", 1, T0, 10.0, ACC, 3.3, T0), "cow-1")
        facts = an.tick(T0 + 25 * H)
        kinds = sorted({type(f).__name__ for f in facts})
        assert kinds == ["Alert", "CollarStatus", "DailyBudget"]
        conn = outbox.connect()
        records = outbox.pending(conn, "influx", 100)
        assert len(records) == len(facts)
        for r in records:  # every fact the analytics send is something the sinks can write
            assert points_for(r.fact, "farm")
        final = [r.fact for r in records if r.kind == "daily_budget" and r.fact["final"]]
        assert [f["day"] for f in final] == ["2026-03-01"]
        conn.close()
        outbox.close()
        an.close()


def test_a_failing_fact_listener_rolls_everything_back(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        an = Analytics(settings(), speed=None)
        an.attach(store)
        store.write_events([BoutClosed("cow-1", "resting", T0, T0 + 25 * H, 0.9)])
        an.frame(Frame("C1", 1, T0, 10.0, ACC, 3.3, T0), "cow-1")

        def broken(conn: sqlite3.Connection, facts: list) -> None:
            conn.execute("INSERT INTO no_such_table VALUES (1)")

        an.add_fact_listener(broken)
        with pytest.raises(StoreError, match="retried at the next tick"):
            an.tick(T0 + 25 * H)
        # nothing half-written: no final day, no alert; the engine starts from the database
        assert not any(b.final for b in an.ledger.read(an._conn))
        assert an.open_alerts() == []
        an._listeners.clear()
        an._next = dict.fromkeys(an._next, 0.0)
        facts = an.tick(T0 + 25 * H)
        assert any(getattr(f, "rule", None) == "battery_low" for f in facts)
        assert an.open_alerts()[0]["rule"] == "battery_low"
        an.close()


def test_the_collars_clock_drives_the_analytics() -> None:
    an = Analytics(settings(), speed=60.0)  # a demo at 60x: a simulated hour per minute
    assert an.now() == 0.0
    an.frame(Frame("C1", 1, T0, 10.0, ACC, None, T0), "cow-1")
    t = an.now()
    assert T0 + 1.0 <= t < T0 + 1.0 + 60.0 * 5  # newest collar time, advanced at 60x
    an.frame(Frame("C1", 2, T0 + 10 * 86400, 10.0, ACC, None, T0), "cow-1")  # clock far ahead
    assert an.now() < T0 + 3600.0  # not believed
    flat = Analytics(settings(), speed=None)
    flat.frame(Frame("C1", 1, T0, 10.0, ACC, None, T0), "cow-1")
    assert flat.now() == T0 + 1.0
    assert flat.tick() == []  # not attached: nothing to do, nothing raised


def test_timed_work_runs_when_due(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        an = Analytics(settings(), speed=None)
        an.attach(store)
        store.write_events([BoutClosed("cow-1", "resting", T0, T0 + H, 0.9)])
        first = an.tick(T0 + H)
        assert [type(f).__name__ for f in first] == ["DailyBudget"]  # provisional
        store.write_events([BoutClosed("cow-1", "walking", T0 + H, T0 + H + 60, 0.9)])
        assert an.tick(T0 + H + 30) == []  # nothing due yet
        later = an.tick(T0 + H + 900)  # budgets.emit_interval_s later
        assert [f.minutes for f in later if type(f).__name__ == "DailyBudget"] == [
            {"resting": 60.0, "walking": 1.0}
        ]
        an.close()
        an.close()  # twice is fine
