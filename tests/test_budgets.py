"""Daily time budgets: local days, splitting at boundaries, coverage, replays, finality."""

from __future__ import annotations

import sqlite3
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from hypothesis import given
from hypothesis import strategies as st

from gateway.analytics import Analytics
from gateway.budgets import BudgetLedger, DayClock
from gateway.config import Settings
from gateway.store import Store
from gateway.types import NO_DATA, BoutClosed, StateChanged
from simulator.herd import Herd

H = 3600.0
T0 = 1772323200.0  # 2026-03-01T00:00Z


def ledger_db(tz: str = "UTC", hour: int = 0, final_after_h: float = 3.0):
    conn = sqlite3.connect(":memory:")
    led = BudgetLedger(DayClock(tz, hour), final_after_h=final_after_h)
    led.ensure_schema(conn)
    return led, conn


# ---------------------------------------------------------------------------------- days


@pytest.mark.parametrize(
    ("tz", "day", "hours"),
    [
        # EU summer time starts on the last Sunday of March at 01:00 UTC (Directive 2000/84/EC)
        ("Europe/Dublin", date(2026, 3, 29), 23.0),
        ("Europe/Dublin", date(2026, 10, 25), 25.0),
        ("Europe/Dublin", date(2026, 6, 1), 24.0),
        # US: second Sunday in March, first Sunday in November (Energy Policy Act of 2005)
        ("America/Chicago", date(2026, 3, 8), 23.0),
        ("America/Chicago", date(2026, 11, 1), 25.0),
        ("Asia/Kolkata", date(2026, 3, 8), 24.0),
    ],
)
def test_local_days_follow_daylight_saving(tz: str, day: date, hours: float) -> None:
    clock = DayClock(tz)
    s, e = clock.bounds(day)
    assert (e - s) / H == hours
    # the reference: local midnight as zoneinfo gives it
    zone = ZoneInfo(tz)
    assert s == datetime(day.year, day.month, day.day, tzinfo=zone).timestamp()
    assert clock.day_of(s) == day and clock.day_of(e - 0.001) == day
    assert clock.day_of(e) == day + timedelta(days=1)


def test_day_start_hour_moves_the_boundary() -> None:
    clock = DayClock("Europe/Dublin", day_start_hour=5)  # the morning milking
    s, e = clock.bounds(date(2026, 6, 1))
    # Irish summer time is UTC+1: 05:00 local is 04:00 UTC
    assert datetime.fromtimestamp(s, ZoneInfo("UTC")).hour == 4
    assert e - s == 24 * H
    assert clock.day_of(s - 1).isoformat() == "2026-05-31"
    assert [d.isoformat() for d in clock.days(s - 1, e + 1)] == [
        "2026-05-31",
        "2026-06-01",
        "2026-06-02",
    ]
    assert [(d.isoformat(), b - a) for d, a, b in clock.split(s - 60, s + 60)] == [
        ("2026-05-31", 60.0),
        ("2026-06-01", 60.0),
    ]


def test_day_start_hour_inside_the_spring_gap() -> None:
    # 01:00 local does not exist in Dublin on 2026-03-29; the day starts at the change itself
    clock = DayClock("Europe/Dublin", day_start_hour=1)
    s, e = clock.bounds(date(2026, 3, 29))
    assert s == datetime(2026, 3, 29, 1, tzinfo=ZoneInfo("UTC")).timestamp()
    prev_s, prev_e = clock.bounds(date(2026, 3, 28))
    assert prev_e == s and (prev_e - prev_s) / H == 24.0 and (e - s) / H == 23.0


def test_bad_day_start_hour() -> None:
    with pytest.raises(ValueError, match="0..23"):
        DayClock("UTC", 24)


# ---------------------------------------------------------------------------------- ledger


def test_a_bout_over_midnight_is_split_and_counted_once_where_it_starts() -> None:
    led, conn = ledger_db()
    led.listener(conn, [BoutClosed("cow-1", "resting", T0 - 1800, T0 + 3600, 0.9)])
    before, after = led.read(conn, animal="cow-1")
    assert (before.day, before.minutes, before.bouts) == (
        "2026-02-28",
        {"resting": 30.0},
        {"resting": 1},
    )
    assert (after.day, after.minutes, after.bouts) == ("2026-03-01", {"resting": 60.0}, {})
    assert before.mean_bout_min == {"resting": 90.0}  # the whole bout, not the day's part


def test_bridged_no_data_is_not_counted_as_behaviour() -> None:
    led, conn = ledger_db()
    led.listener(
        conn,
        [
            BoutClosed("cow-1", "ruminating", T0, T0 + H, 0.9, no_data_s=600.0),
            BoutClosed("cow-1", NO_DATA, T0 + H, T0 + 2 * H, 0.0, 3600.0),
        ],
    )
    (b,) = led.read(conn)
    assert b.minutes == {"ruminating": 50.0}
    assert b.no_data_min == 70.0
    assert b.pending_min == 1440.0 - 120.0
    assert b.coverage == pytest.approx(50.0 / 1440.0)
    hours, _ = led.hours(conn, "cow-1", T0, T0 + 2 * H)
    assert hours.sum(axis=1).tolist() == [3600.0, 3600.0]


def test_replayed_and_overlapping_events_count_once() -> None:
    led, conn = ledger_db()
    events = [
        BoutClosed("cow-1", "walking", T0 + i * 600, T0 + (i + 1) * 600, 0.8) for i in range(3)
    ]
    led.listener(conn, events)
    led.listener(conn, events)  # the same batch again (a retried write)
    led.listener(conn, [BoutClosed("cow-1", "resting", T0 + 1500, T0 + 2400, 0.8)])  # overlaps
    (b,) = led.read(conn)
    assert b.minutes == {"walking": 30.0, "resting": 10.0}
    assert b.bouts == {"walking": 3}  # a trimmed replay is not a new bout


def test_state_before_the_first_bout_does_not_hide_it() -> None:
    led, conn = ledger_db()
    led.listener(
        conn,
        [
            StateChanged("cow-1", "walking", T0 + H, 0.9),
            BoutClosed("cow-1", "resting", T0, T0 + H, 0.9),
        ],
    )
    (b,) = led.read(conn)
    assert b.minutes == {"resting": 60.0}
    assert led.cursor(conn, "cow-1")["state"] == "walking"


def test_days_become_final_when_accounted_or_after_the_grace() -> None:
    led, conn = ledger_db(final_after_h=3.0)
    led.listener(
        conn,
        [
            BoutClosed("cow-1", "resting", T0, T0 + 24 * H + 60, 0.9),  # runs past midnight
            BoutClosed("cow-2", "resting", T0, T0 + 20 * H, 0.9),  # then the collar went quiet
        ],
    )
    assert led.finalize(conn, T0 + 23 * H) == []  # not over yet
    done = led.finalize(conn, T0 + 24 * H + 120)
    assert [(b.animal, b.day, b.final) for b in done] == [("cow-1", "2026-03-01", True)]
    assert led.finalize(conn, T0 + 26 * H) == []  # cow-2: still within the grace
    (late,) = led.finalize(conn, T0 + 27 * H)
    assert late.animal == "cow-2" and late.final
    # the unaccounted 4 h count as no data once final; nothing is scaled up
    assert late.minutes == {"resting": 1200.0} and late.no_data_min == 240.0
    assert late.coverage == pytest.approx(20 / 24)


def test_changed_sends_each_update_once() -> None:
    led, conn = ledger_db()
    led.listener(conn, [BoutClosed("cow-1", "resting", T0, T0 + H, 0.9)])
    assert [b.minutes for b in led.changed(conn, T0 + H)] == [{"resting": 60.0}]
    assert led.changed(conn, T0 + H + 1) == []
    led.listener(conn, [BoutClosed("cow-1", "walking", T0 + H, T0 + H + 60, 0.9)])
    assert [b.minutes for b in led.changed(conn, T0 + H + 120)] == [
        {"resting": 60.0, "walking": 1.0}
    ]


def test_read_filters() -> None:
    led, conn = ledger_db()
    led.listener(conn, [BoutClosed(a, "resting", T0, T0 + 3 * 24 * H, 0.9) for a in ("a", "b")])
    assert {b.animal for b in led.read(conn, animal=["b"])} == {"b"}
    assert [b.day for b in led.read(conn, animal="a", day_from="2026-03-02")] == [
        "2026-03-02",
        "2026-03-03",
    ]
    assert led.read(conn, animal=[]) == []
    assert led.animals(conn) == ["a", "b"]


# ---------------------------------------------------------------------------------- truth


def test_budgets_match_the_simulators_truth_and_partial_days_are_not_extrapolated(
    tmp_path: Path,
) -> None:
    """Ground-truth intervals of a simulated herd through the real store and ledger.

    The simulator's own per-day minutes (Herd.budgets, computed from its schedule) are the
    reference; a stretch of no data must lower coverage and leave the other minutes as seen.
    """
    herd = Herd(4, seed=5, days=3)
    obs = sorted(herd.observations(), key=lambda o: o[3])
    gap = (herd.start + 30 * H, herd.start + 36 * H)  # six hours without data on day 2
    events = []
    for animal, _collar, s, e, b in obs:
        if animal == "cow-002" and s < gap[1] and e > gap[0]:
            if s < gap[0]:
                events.append(BoutClosed(animal, b, s, gap[0], 0.9))
            if e > gap[1]:
                events.append(BoutClosed(animal, b, gap[1], e, 0.9))
            continue
        events.append(BoutClosed(animal, b, s, e, 0.9))
    events.append(BoutClosed("cow-002", NO_DATA, gap[0], gap[1], 0.0, gap[1] - gap[0]))
    events.sort(key=lambda ev: ev.end)
    an = Analytics(Settings(), speed=None)
    with Store.open(tmp_path) as store:
        an.attach(store)
        for i in range(0, len(events), 50):
            store.write_events(events[i : i + 50])
        an.tick(herd.end + 4 * H)
        got = {(b.animal, b.day): b for b in an.ledger.read(an._conn)}
        an.close()
    truth = {}
    for animal, day, behaviour, minutes in herd.budgets():
        truth.setdefault((animal, day), {})[behaviour] = minutes
    assert set(got) == set(truth)
    gap_day = ("cow-002", "2026-03-02")
    for key, want in truth.items():
        b = got[key]
        assert b.final
        if key == gap_day:
            continue
        for behaviour, minutes in want.items():
            assert b.minutes.get(behaviour, 0.0) == pytest.approx(minutes, abs=0.01), key
        assert b.coverage == pytest.approx(1.0)
    b = got[gap_day]
    assert b.coverage == pytest.approx(18 / 24)
    assert b.no_data_min == pytest.approx(360.0)
    assert b.classified_min == pytest.approx(1080.0)
    assert all(b.minutes.get(k, 0.0) <= v + 0.01 for k, v in truth[gap_day].items())


_ANY = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.integers(min_value=-(2**70), max_value=2**70),
    st.none(),
    st.text(max_size=5),
)


@given(
    st.lists(
        st.tuples(st.sampled_from(["a", "b", ""]), st.sampled_from(["resting", NO_DATA, "x" * 300]),
                  _ANY, _ANY, _ANY),
        max_size=20,
    )
)  # fmt: skip
def test_hostile_events_never_fail_the_store_batch(rows) -> None:
    # the store refuses bad bouts but hands every event to its listeners: none may raise
    led, conn = ledger_db()
    events = [BoutClosed(a, b, s, e, 0.9, nd) for a, b, s, e, nd in rows]
    events.append(StateChanged("a", "resting", float("nan"), 0.9))
    led.listener(conn, events)
    for b in led.read(conn):
        assert 0.0 <= b.classified_min <= b.length_min + 1e-6
        assert 0.0 <= b.coverage <= 1.0


def test_a_bout_with_an_absurd_length_is_ignored() -> None:
    led, conn = ledger_db()
    led.listener(conn, [BoutClosed("cow-1", "resting", T0, T0 + 400 * 86400.0, 0.9)])
    assert led.read(conn) == [] and led.animals(conn) == []
