"""The embedded store: round trips, atomic listeners, WAL readers, full disk, damage, restarts."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from gateway.bouts import HerdTracker
from gateway.errors import StoreError, StoreFullError
from gateway.store import SCHEMA_VERSION, STORE_FILE, Store
from gateway.types import NO_DATA, BoutClosed, Posteriors, StateChanged

CLASSES = ("grazing", "feeding", "ruminating", "resting", "walking")


def day_of_events(animal: str, t0: float = 0.0) -> list:
    return [
        StateChanged(animal, "resting", t0, 0.9),
        BoutClosed(animal, "resting", t0, t0 + 3600, 0.9, 30.0),
        StateChanged(animal, "ruminating", t0 + 3600, 0.8, "resting"),
        BoutClosed(animal, "ruminating", t0 + 3600, t0 + 5400, 0.8),
        StateChanged(animal, NO_DATA, t0 + 5400, 0.0, "ruminating"),
        BoutClosed(animal, NO_DATA, t0 + 5400, t0 + 9000, 0.0, 3600.0),
        StateChanged(animal, "walking", t0 + 9000, 0.7, NO_DATA),
    ]


def test_round_trip_and_queries(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:  # a data directory gets the standard file name
        assert store.path == tmp_path / STORE_FILE
        store.write_events(day_of_events("cow1") + day_of_events("cow2", 100.0))
        assert [(b.animal, b.behaviour, b.start) for b in store.bouts()] == [
            ("cow1", "resting", 0.0),
            ("cow1", "ruminating", 3600.0),
            ("cow2", "resting", 100.0),
            ("cow2", "ruminating", 3700.0),
        ]
        # Time ranges select bouts that overlap [start, end).
        assert [b.behaviour for b in store.bouts("cow1", start=3599.0, end=3601.0)] == [
            "resting",
            "ruminating",
        ]
        assert store.bouts("cow1", start=5400.0) == []
        assert [b.start for b in store.bouts(behaviour="ruminating")] == [3600.0, 3700.0]
        (gap,) = store.no_data("cow1")
        assert (gap.behaviour, gap.start, gap.end, gap.no_data_s) == (NO_DATA, 5400, 9000, 3600)
        first = store.bouts("cow1")[0]
        assert first == BoutClosed("cow1", "resting", 0.0, 3600.0, 0.9, 30.0)
        states = store.current_states()
        assert [(s.animal, s.behaviour, s.since, s.previous) for s in states] == [
            ("cow1", "walking", 9000.0, NO_DATA),
            ("cow2", "walking", 9100.0, NO_DATA),
        ]
        assert store.animals() == [("cow1", 0.0, 9000.0), ("cow2", 100.0, 9100.0)]
        assert store.schema_version() == SCHEMA_VERSION


def test_file_is_in_wal_mode(tmp_path: Path) -> None:
    Store.open(tmp_path).close()
    # Checked with the sqlite3 module directly, not through our code.
    conn = sqlite3.connect(tmp_path / STORE_FILE)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    conn.close()


def test_rewriting_a_batch_does_not_double_count(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        store.write_events(day_of_events("cow1"))
        store.write_events(day_of_events("cow1"))
        assert len(store.bouts()) == 2 and len(store.no_data()) == 1


def test_listener_runs_inside_the_same_transaction(tmp_path: Path) -> None:
    seen = []

    def outbox(conn: sqlite3.Connection, events: list) -> None:
        conn.execute("CREATE TABLE IF NOT EXISTS outbox (line TEXT)")
        conn.executemany("INSERT INTO outbox VALUES (?)", [(e.kind,) for e in events])
        seen.append(len(events))

    def broken(conn: sqlite3.Connection, events: list) -> None:
        if fail:
            raise RuntimeError("sink formatter bug")

    fail = True
    with Store.open(tmp_path) as store:
        store.add_listener(outbox)
        store.add_listener(broken)
        with pytest.raises(StoreError, match="listener failed.*RuntimeError"):
            store.write_events(day_of_events("cow1"))
        assert store.bouts() == [] and store.pending == 7  # nothing half-written, nothing lost
        fail = False
        store.write_events(day_of_events("cow2"))
        assert [b.animal for b in store.bouts()] == ["cow1", "cow1", "cow2", "cow2"]
        assert seen == [7, 14]  # the failed batch's outbox rows were rolled back with it
        rows = sqlite3.connect(store.path).execute("SELECT count(*) FROM outbox").fetchone()
        assert rows == (14,) and store.pending == 0


def test_reader_is_not_blocked_by_an_open_write(tmp_path: Path) -> None:
    views = []

    def peek(conn: sqlite3.Connection, events: list) -> None:
        # Still inside the writer's transaction: a second process-like reader sees the last
        # committed state, without waiting for the writer (WAL).
        with Store.open(tmp_path, readonly=True, check=False) as reader:
            views.append(len(reader.bouts()))

    with Store.open(tmp_path) as store:
        store.write_events(day_of_events("cow1"))
        store.add_listener(peek)
        store.write_events(day_of_events("cow2"))
        with Store.open(tmp_path, readonly=True) as reader:
            assert len(reader.bouts()) == 4
            with pytest.raises(StoreError, match="read-only"):
                reader.write_events(day_of_events("cow3"))
    assert views == [2]


def bout_stream(animal: str, n: int, t0: float = 0.0) -> list:
    return [BoutClosed(animal, "walking", t0 + 60.0 * i, t0 + 60.0 * i + 30, 0.5) for i in range(n)]


def test_full_disk_raises_keeps_the_batch_and_resumes(tmp_path: Path) -> None:
    # A full disk is forced with SQLite's page cap (PRAGMA max_page_count): SQLITE_FULL.
    store = Store.open(tmp_path, max_mb=0.1)
    store.write_events(bout_stream("cow1", 100))
    with pytest.raises(StoreFullError, match="full.*classification goes on"):
        for k in range(1, 200):
            store.write_events(bout_stream("cow1", 200, t0=1e6 * k))
    kept = store.pending
    assert kept > 0
    assert len(store.bouts()) >= 100  # what was committed before is intact
    with pytest.raises(StoreFullError):
        store.write_events([])  # still full: the backlog stays
    store.set_max_mb(None)  # space comes back (disk cleaned, cap raised)
    store.write_events(bout_stream("cow2", 5))
    assert store.pending == 0
    assert len(store.bouts("cow2")) == 5
    assert len(store.bouts("cow1")) == 100 + 200 * k  # every batch made it, none twice
    store.close()


def test_backlog_is_bounded(tmp_path: Path) -> None:
    store = Store.open(tmp_path, max_mb=0.05, backlog_max=500)
    with pytest.raises(StoreFullError):
        for k in range(100):
            store.write_events(bout_stream("cow1", 400, t0=1e6 * k))
    for k in range(3):
        with pytest.raises(StoreFullError):
            store.write_events(bout_stream("cow9", 400, t0=1e9 + 1e6 * k))
    assert store.pending == 500 and store.dropped > 0
    store.close()


def test_garbage_file_is_a_clear_error(tmp_path: Path) -> None:
    path = tmp_path / STORE_FILE
    path.write_bytes(b"\x00garbage, not sqlite" * 500)
    with pytest.raises(StoreError, match="damaged or not a Boutline store.*move the file aside"):
        Store.open(path)


def test_damaged_pages_are_found_at_open(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        for k in range(20):
            store.write_events(bout_stream(f"cow{k}", 200))
    path = tmp_path / STORE_FILE
    raw = bytearray(path.read_bytes())
    assert len(raw) > 20 * 4096
    rng = np.random.default_rng(0)
    raw[8192 : 8192 + 4096 * 6] = rng.integers(0, 256, 4096 * 6, dtype=np.uint8).tobytes()
    path.write_bytes(bytes(raw))
    with pytest.raises(StoreError, match="damaged"):
        Store.open(path)


def test_foreign_sqlite_file_and_newer_schema_are_refused(tmp_path: Path) -> None:
    other = tmp_path / "other.db"
    conn = sqlite3.connect(other)
    conn.execute("CREATE TABLE photos (id INTEGER)")
    conn.commit()
    conn.close()
    with pytest.raises(StoreError, match="not a Boutline store"):
        Store.open(other)
    Store.open(tmp_path).close()
    conn = sqlite3.connect(tmp_path / STORE_FILE)
    conn.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    conn.commit()
    conn.close()
    with pytest.raises(StoreError, match="schema 99, newer"):
        Store.open(tmp_path)


def test_unusable_locations(tmp_path: Path) -> None:
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(StoreError, match="cannot create data directory"):
        Store.open(blocker / "sub" / STORE_FILE)
    with pytest.raises(StoreError, match="does not exist"):
        Store.open(tmp_path / "missing.db", readonly=True)


def test_impossible_values_are_not_stored(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        store.write_events(
            [
                BoutClosed("cow1", "resting", float("nan"), 10.0, 0.5),
                BoutClosed("cow1", "resting", 20.0, 10.0, 0.5),  # ends before it starts
                StateChanged("cow1", "resting", float("inf"), 0.5),
                BoutClosed("cow1", "resting", 0.0, 10.0, 0.5),
            ]
        )
        assert [b.start for b in store.bouts()] == [0.0]
        assert store.current_states() == []


def test_assignments_and_prune(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        store.replace_assignments([("c1", "cow1", 0.0, 86400.0), ("c1", "cow2", 86400.0, None)])
        store.replace_assignments(
            [("c1", "cow1", 0.0, 86400.0), ("c1", "cow2", 86400.0, None), ("c2", "cow3", 0, None)]
        )
        assert store.assignments()[1] == ("c1", "cow2", 86400.0, None)
        assert [a[0] for a in store.animals()] == ["cow1", "cow2", "cow3"]
        store.write_events(day_of_events("cow1") + day_of_events("cow1", 86400.0))
        assert store.prune(before=86400.0) == 3
        assert [b.start for b in store.bouts()] == [86400.0, 90000.0]


# -- restarts with the tracker ------------------------------------------------------------


def stream(n: int, seed: int) -> list[Posteriors]:
    """Three cows; each holds a behaviour for 20-60 min, classifier right ~85 % of windows."""
    rng = np.random.default_rng(seed)
    items = []
    for cow in ("a", "b", "c"):
        k, t = 0, 0
        while k < n:
            b = rng.integers(5)
            for _ in range(int(rng.integers(240, 720))):
                p = rng.dirichlet(np.ones(5)) * 0.5
                p[b if rng.random() < 0.85 else rng.integers(5)] += 1.0
                items.append(Posteriors(cow, 5.0 * t, p / p.sum()))
                k, t = k + 1, t + 1
                if k >= n:
                    break
    items.sort(key=lambda x: x.t_start)
    return items


def run_with_store(
    tmp: Path, items: list, *, crash_at: int | None, resume_at: int, full: bool, refresh: int = 1
):
    store = Store.open(tmp)
    herd = HerdTracker(CLASSES, None, 5.0)
    cut = len(items) if crash_at is None else crash_at
    for i in range(0, cut, 300):  # one commit per 300 windows (100 per cow)
        ev = herd.push_many(items[i : min(i + 300, cut)])
        store.write_events(ev, herd.commit_snapshot(refresh_every=refresh))
    if crash_at is not None:
        if full:  # clean shutdown
            store.write_states(herd.snapshot(full=True))
            store.close()
        # else: the process dies here; nothing else is written
        store = Store.open(tmp)
        herd = HerdTracker(CLASSES, None, 5.0)
        assert herd.restore(store.load_states()) == []
        rest = items[resume_at:]
        for i in range(0, len(rest), 300):
            ev = herd.push_many(rest[i : i + 300])
            store.write_events(ev, herd.commit_snapshot(refresh_every=refresh))
    store.write_events(herd.close_all())
    bouts = store.bouts()
    store.close()
    return bouts


def test_clean_restart_mid_bout_matches_an_uninterrupted_run(tmp_path: Path) -> None:
    items = stream(3000, seed=1)
    ref = run_with_store(tmp_path / "ref", items, crash_at=None, resume_at=0, full=False)
    got = run_with_store(tmp_path / "got", items, crash_at=4500, resume_at=4500, full=True)
    assert got == ref


@pytest.mark.parametrize("refresh", [1, 4])
def test_crash_mid_bout_loses_no_bout_and_counts_none_twice(tmp_path: Path, refresh: int) -> None:
    items = stream(3000, seed=2)
    ref = run_with_store(tmp_path / "ref", items, crash_at=None, resume_at=0, full=False)
    # Crash after 4500 windows; the gateway is back 2 minutes (24 windows per cow) later.
    got = run_with_store(
        tmp_path / "got", items, crash_at=4500, resume_at=4500 + 72, full=False, refresh=refresh
    )
    for animal in "abc":
        mine = [b for b in got if b.animal == animal]
        for x, y in zip(mine, mine[1:], strict=False):
            assert x.end <= y.start  # no overlap, so no time counted twice
        theirs = [b for b in ref if b.animal == animal]
        total = sum(b.duration_s for b in mine)
        # Missing at most: the outage, the lag window (60 s), and the windows since the animal's
        # last snapshot (up to `refresh` commits of 100 windows each).
        lost = 24 * 5.0 + 60.0 + refresh * 100 * 5.0
        assert sum(b.duration_s for b in theirs) - total <= lost + 1e-6
        assert abs(len(mine) - len(theirs)) <= 1  # the bout in progress survived the crash


def test_load_states_skips_unreadable_rows(tmp_path: Path) -> None:
    with Store.open(tmp_path) as store:
        store.write_states({"cow1": {"v": 1}, "cow2": {"v": 1}})
    conn = sqlite3.connect(tmp_path / STORE_FILE)
    conn.execute("UPDATE current_state SET tracker = '{broken' WHERE animal = 2")
    conn.commit()
    conn.close()
    with Store.open(tmp_path) as store:
        assert store.load_states() == {"cow1": {"v": 1}}


# -- growth -------------------------------------------------------------------------------

# Bouts per animal per day, from FIELD.md where it has them: lying 9 +/- 3 (Ito et al. 2009),
# meals 7-14 (Heinrichs & Conrad 1987; DeVries et al. 2003); rumination ~15 and walking ~60
# bouts are from memory; plus two no-data stretches. Upper ends taken: 12+14+16+10+60+2.
BOUTS_PER_DAY = {"resting": 12, "feeding": 14, "ruminating": 16, "grazing": 10, "walking": 60}
NO_DATA_PER_DAY = 2


def test_storage_for_100_animals_for_30_days_is_well_under_200_mb(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    per_day = sum(BOUTS_PER_DAY.values()) + NO_DATA_PER_DAY
    kinds = [b for b, n in BOUTS_PER_DAY.items() for _ in range(n)] + [NO_DATA] * NO_DATA_PER_DAY
    store = Store.open(tmp_path)
    herd = HerdTracker(CLASSES, None, 5.0)
    herd.push_many(Posteriors("x", 5.0 * i, np.full(5, 0.2)) for i in range(30))
    snapshot = herd.snapshot(["x"])["x"]  # a real tracker state, written with every batch
    t0 = 1.7e9
    slot = 86400 / per_day
    for day in range(30):  # one transaction per simulated day for the whole herd
        start = t0 + day * 86400 + np.arange(per_day) * slot + rng.uniform(0, 60, (100, per_day))
        end = start + rng.uniform(30, slot - 61, (100, per_day))
        conf = rng.uniform(0.5, 1.0, (100, per_day)).round(4)
        nd = rng.uniform(0, 60, (100, per_day)).round(1)
        events = []
        for cow in range(100):
            name = f"cow{cow:03d}"
            for j, b in enumerate(kinds):
                s, e = float(start[cow, j]), float(end[cow, j])
                no_data = e - s if b == NO_DATA else float(nd[cow, j])
                events.append(BoutClosed(name, b, s, e, float(conf[cow, j]), no_data))
            events.append(StateChanged(name, kinds[-1], s, float(conf[cow, -1])))
        store.write_events(events, {f"cow{c:03d}": snapshot for c in range(100)})
    n_bouts = len(store.bouts())
    store.close()  # checkpoints the WAL into the file
    size = (tmp_path / STORE_FILE).stat().st_size
    assert n_bouts == 100 * 30 * sum(BOUTS_PER_DAY.values())
    per_animal_day = size / (100 * 30)
    # Measured: 16.6 MB in all, ~5.5 kB per animal per day (docs/store.md).
    assert size < 50e6, size
    assert per_animal_day < 16_000, per_animal_day
    assert json.dumps(snapshot)  # the snapshot is plain JSON


def test_retention_prunes_by_the_data_clock_once_a_day(tmp_path: Path) -> None:
    day = 86400.0
    with Store.open(tmp_path, retention_days=10) as store:
        # Old data replayed: nothing is pruned against the wall clock.
        store.write_events(day_of_events("cow1", 1e6))
        assert store.counts() == {"animals": 1, "bouts": 2, "no_data": 1}
        store.write_events(day_of_events("cow1", 1e6 + 5 * day))
        assert store.counts()["bouts"] == 4
        # Eleven days of data later, the first day is past retention and goes.
        store.write_events(day_of_events("cow1", 1e6 + 11 * day))
        assert [b.start for b in store.bouts()][0] == 1e6 + 5 * day
        assert store.counts() == {"animals": 1, "bouts": 4, "no_data": 2}
    with pytest.raises(StoreError, match="retention_days"):
        Store.open(tmp_path, retention_days=0)


def test_other_objects_reach_listeners_and_are_not_stored(tmp_path: Path) -> None:
    got = []
    alert = {"kind": "alert", "animal": "cow1"}  # what another part may pass along
    with Store.open(tmp_path) as store:
        store.add_listener(lambda conn, events: got.extend(events))
        store.write_events([alert, *day_of_events("cow1")])
        assert got[0] is alert and len(got) == 8
        assert store.counts() == {"animals": 1, "bouts": 2, "no_data": 1}
