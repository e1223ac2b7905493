"""Daily time budgets per animal, kept up to date as bouts close.

A budget day starts at local midnight in the site's time zone, or at ``day_start_hour``
(e.g. the morning milking), so it is 23, 24 or 25 hours long across daylight-saving changes.
A day is named by the local date it starts on. For each animal and day the ledger holds:

- minutes per behaviour (classified time only: no-data bridged inside a bout is taken out),
- no-data minutes and coverage (classified minutes / the day's length),
- bouts per behaviour and their mean length (a bout counts to the day it starts in; its
  minutes are split at the day boundary),
- whether the day is final: the day is over and every minute of it is accounted for, or it
  ended ``final_after_h`` ago (time still unaccounted then counts as no data).

Nothing is extrapolated: a day with 60 % coverage reports the minutes that were seen, and
says 60 %.

The ledger lives in the store's SQLite database, in its own tables, and is updated inside
the same transaction that writes the bouts (``BudgetLedger.listener``), so a budget can never
disagree with the bouts after a crash. Events of one animal arrive in time order (the bout
segmenter emits them so); an interval that ends before the animal's cursor is a replay and is
skipped, one that overlaps it is trimmed. So writing the same events twice counts them once.

Hourly bins (seconds per behaviour per UTC hour) are kept beside the days for the alerts,
which compare rolling windows against the same hours on earlier days.

>>> clock = DayClock("Europe/Dublin", day_start_hour=5)
>>> from datetime import date
>>> s, e = clock.bounds(date(2024, 3, 30))  # clocks go forward at 01:00 on the 31st
>>> (e - s) / 3600
23.0
>>> clock.day_of(s - 1).isoformat(), clock.day_of(s).isoformat()
('2024-03-29', '2024-03-30')
"""

from __future__ import annotations

import math
import sqlite3
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from functools import lru_cache
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from .analyticsdb import animal_clause, create_tables
from .types import BEHAVIOURS, NO_DATA

__all__ = [
    "ACTIVE_BEHAVIOURS",
    "DAY_S",
    "HOUR_S",
    "BudgetLedger",
    "DailyBudget",
    "DayClock",
    "HOUR_COLUMNS",
    "Interval",
    "interval_of",
]

HOUR_S = 3600.0
DAY_S = 86400.0
# Behaviours that end a stretch of inactivity (the animal is up and doing something).
ACTIVE_BEHAVIOURS = frozenset({"grazing", "feeding", "walking"})
# Columns of the hourly bins: the five behaviours, any other model class, and no-data.
HOUR_COLUMNS: tuple[str, ...] = (*BEHAVIOURS, "other", NO_DATA)
_EPS = 1e-6


class DayClock:
    """Local budget days: which day holds an instant, and where a day starts and ends."""

    def __init__(self, timezone: str = "UTC", day_start_hour: int = 0) -> None:
        if not 0 <= int(day_start_hour) <= 23:
            raise ValueError("day_start_hour must be 0..23")
        self.timezone = timezone
        self.zone = ZoneInfo(timezone)
        self.day_start_hour = int(day_start_hour)
        self._bounds = lru_cache(maxsize=4096)(self._bounds_uncached)

    @classmethod
    def from_settings(cls, site: Any) -> DayClock:
        """From a ``SiteSettings`` (timezone, day_start_hour)."""
        return cls(site.timezone, site.day_start_hour)

    def _start(self, d: date) -> float:
        # fold=0: a start hour that does not exist (spring change) maps to the change itself
        return datetime(d.year, d.month, d.day, self.day_start_hour, tzinfo=self.zone).timestamp()

    def _bounds_uncached(self, d: date) -> tuple[float, float]:
        return self._start(d), self._start(d + timedelta(days=1))

    def bounds(self, d: date) -> tuple[float, float]:
        """``(start, end)`` of day ``d`` in unix seconds."""
        return self._bounds(d)

    def day_of(self, t: float) -> date:
        """The budget day holding instant ``t`` (unix seconds)."""
        local = datetime.fromtimestamp(t, self.zone)
        d = local.date()
        if local.hour < self.day_start_hour:
            d -= timedelta(days=1)
        # wall-clock hour can mislead right at a change; the bounds decide
        while t < self.bounds(d)[0]:
            d -= timedelta(days=1)
        while t >= self.bounds(d)[1]:
            d += timedelta(days=1)
        return d

    def days(self, t0: float, t1: float) -> list[date]:
        """Days overlapping ``[t0, t1)``, in order."""
        if t1 <= t0:
            return []
        out, d = [], self.day_of(t0)
        while self.bounds(d)[0] < t1:
            out.append(d)
            d += timedelta(days=1)
        return out

    def split(self, t0: float, t1: float) -> Iterator[tuple[date, float, float]]:
        """``[t0, t1)`` cut at day boundaries: ``(day, start, end)`` pieces."""
        for d in self.days(t0, t1):
            s, e = self.bounds(d)
            yield d, max(s, t0), min(e, t1)

    def same_time_days_before(self, t: float, k: int) -> float:
        """The instant with the same local wall-clock time ``k`` days before ``t``."""
        local = datetime.fromtimestamp(t, self.zone)
        earlier = (local.replace(tzinfo=None) - timedelta(days=k)).replace(tzinfo=self.zone)
        return earlier.timestamp()


@dataclass(frozen=True, slots=True)
class Interval:
    """A stretch of one animal's time with one label (a behaviour or NO_DATA)."""

    animal: str
    label: str
    start: float
    end: float
    no_data_s: float = 0.0  # unclassified seconds bridged inside (bouts only)

    @property
    def duration_s(self) -> float:
        return self.end - self.start


def interval_of(event: Any) -> Interval | None:
    """The interval an event closes: a closed bout, or a no-data stretch; else None.

    Accepts ``BoutClosed`` (whose behaviour may be NO_DATA) and any event with ``kind``
    ``"no_data"`` and ``animal``/``start``/``end``; everything else (state changes) is None.
    """
    kind = getattr(event, "kind", None)
    try:
        if kind == "bout_closed":
            return Interval(
                str(event.animal),
                str(event.behaviour),
                float(event.start),
                float(event.end),
                float(event.no_data_s),
            )
        if kind in ("no_data", "no_data_closed"):
            return Interval(str(event.animal), NO_DATA, float(event.start), float(event.end))
    except (AttributeError, TypeError, ValueError):
        return None  # not an interval we can read; the store has already refused it
    return None


@dataclass(slots=True)
class DailyBudget:
    """One animal's time budget for one day (a fact for the sinks and the reports).

    ``minutes``, ``bouts`` and ``mean_bout_min`` are keyed by behaviour. ``no_data_min``
    is time known to be unclassified; on a final day it is everything not classified.
    ``pending_min`` is time of an open day not accounted for yet (no bout has closed over it).
    """

    animal: str
    day: str  # local date the day starts on, ISO format
    start: float
    end: float
    minutes: dict[str, float]
    bouts: dict[str, int]
    mean_bout_min: dict[str, float]
    no_data_min: float
    final: bool
    updated_at: float = 0.0
    kind: str = field(default="daily_budget", init=False)

    @property
    def length_min(self) -> float:
        return (self.end - self.start) / 60.0

    @property
    def classified_min(self) -> float:
        return float(sum(self.minutes.values()))

    @property
    def coverage(self) -> float:
        """Classified share of the whole day (0..1)."""
        return min(self.classified_min / self.length_min, 1.0) if self.length_min > 0 else 0.0

    @property
    def pending_min(self) -> float:
        if self.final:
            return 0.0
        return max(self.length_min - self.classified_min - self.no_data_min, 0.0)

    def to_json(self) -> dict[str, Any]:
        return {
            "animal": self.animal,
            "day": self.day,
            "start": self.start,
            "end": self.end,
            "length_min": round(self.length_min, 3),
            "minutes": {k: round(v, 3) for k, v in self.minutes.items()},
            "bouts": dict(self.bouts),
            "mean_bout_min": {k: round(v, 3) for k, v in self.mean_bout_min.items()},
            "no_data_min": round(self.no_data_min, 3),
            "pending_min": round(self.pending_min, 3),
            "coverage": round(self.coverage, 4),
            "final": self.final,
        }


_SCHEMA = f"""
CREATE TABLE IF NOT EXISTS budget_days (
    animal TEXT NOT NULL,
    day TEXT NOT NULL,
    start REAL NOT NULL,
    end REAL NOT NULL,
    no_data_s REAL NOT NULL DEFAULT 0,
    final INTEGER NOT NULL DEFAULT 0,
    updated_at REAL NOT NULL DEFAULT 0,
    unsent INTEGER NOT NULL DEFAULT 1,
    PRIMARY KEY (animal, day)
) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS budget_days_open ON budget_days (final, end);
CREATE INDEX IF NOT EXISTS budget_days_day ON budget_days (day);
CREATE INDEX IF NOT EXISTS budget_days_unsent ON budget_days (animal, day) WHERE unsent = 1;
CREATE TABLE IF NOT EXISTS budget_behaviours (
    animal TEXT NOT NULL,
    day TEXT NOT NULL,
    behaviour TEXT NOT NULL,
    seconds REAL NOT NULL DEFAULT 0,
    bouts INTEGER NOT NULL DEFAULT 0,
    bout_seconds REAL NOT NULL DEFAULT 0,
    PRIMARY KEY (animal, day, behaviour)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS budget_cursor (
    animal TEXT PRIMARY KEY,
    through REAL,
    inactive_since REAL,
    state TEXT,
    state_since REAL
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS activity_hours (
    animal TEXT NOT NULL,
    hour INTEGER NOT NULL,
    {", ".join(f"{c} REAL NOT NULL DEFAULT 0" for c in HOUR_COLUMNS)},
    walk_bouts INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (animal, hour)
) WITHOUT ROWID;
"""
_HOUR_UPSERT = {
    c: (
        f"INSERT INTO activity_hours (animal, hour, {c}, walk_bouts) VALUES (?, ?, ?, ?)"
        f" ON CONFLICT (animal, hour) DO UPDATE SET {c} = {c} + excluded.{c},"
        " walk_bouts = walk_bouts + excluded.walk_bouts"
    )
    for c in HOUR_COLUMNS
}


def _hour_column(label: str) -> str:
    if label == NO_DATA:
        return NO_DATA
    return label if label in BEHAVIOURS else "other"


class BudgetLedger:
    """Daily budgets and hourly bins in the store's database, updated as bouts close.

    >>> import sqlite3
    >>> from gateway.types import BoutClosed
    >>> conn = sqlite3.connect(":memory:")
    >>> ledger = BudgetLedger(DayClock("UTC"))
    >>> ledger.ensure_schema(conn)
    >>> t = 1772406000.0  # 2026-03-01 23:00 UTC
    >>> ledger.listener(conn, [BoutClosed("cow-1", "ruminating", t, t + 7200.0, 0.9)])
    >>> [(b.day, b.minutes) for b in ledger.read(conn, animal="cow-1")]
    [('2026-03-01', {'ruminating': 60.0}), ('2026-03-02', {'ruminating': 60.0})]
    """

    def __init__(self, clock: DayClock, *, final_after_h: float = 3.0) -> None:
        self.clock = clock
        self.final_after_s = float(final_after_h) * HOUR_S

    # -- schema ------------------------------------------------------------------------
    @staticmethod
    def ensure_schema(conn: sqlite3.Connection) -> None:
        """Create the ledger's tables on the store connection (idempotent)."""
        create_tables(conn, _SCHEMA, "budget")

    # -- writing -----------------------------------------------------------------------
    def listener(self, conn: sqlite3.Connection, events: Sequence[Any]) -> None:
        """Store listener: fold closed bouts, no-data stretches and state changes in.

        Runs inside the store's write transaction; it never commits on its own.
        """
        for ev in events:
            if getattr(ev, "kind", None) == "state_changed":
                self._state(conn, ev)
                continue
            iv = interval_of(ev)
            if iv is not None and _usable(iv):
                self.add(conn, iv)

    def _state(self, conn: sqlite3.Connection, ev: Any) -> None:
        if not _finite(ev.since):
            return
        conn.execute(
            "INSERT INTO budget_cursor (animal, state, state_since) VALUES (?, ?, ?)"
            " ON CONFLICT (animal) DO UPDATE SET state = excluded.state,"
            " state_since = excluded.state_since",
            (ev.animal, str(ev.behaviour), float(ev.since)),
        )

    def add(self, conn: sqlite3.Connection, iv: Interval, now: float | None = None) -> bool:
        """Fold one interval in; False when it was already counted (a replay)."""
        row = conn.execute(
            "SELECT through, inactive_since FROM budget_cursor WHERE animal = ?", (iv.animal,)
        ).fetchone()
        through = row[0] if row and row[0] is not None else -math.inf
        inactive_since = row[1] if row else None
        if iv.end <= through + _EPS:
            return False
        fresh = iv.start >= through - _EPS  # the bout itself is new, not a trimmed replay
        start = max(iv.start, through)
        span = iv.end - iv.start
        # bridged no-data is spread evenly over the bout (its position is not known)
        nd_share = min(iv.no_data_s / span, 1.0) if span > 0 else 0.0
        stamp = float(now if now is not None else iv.end)
        counted_day = self.clock.day_of(iv.start) if fresh else None
        for d, s, e in self.clock.split(start, iv.end):
            self._add_day_piece(conn, iv, d, s, e, nd_share, counted_day == d, stamp)
        self._add_hours(conn, iv, start, iv.end, nd_share, fresh)
        if iv.label in ACTIVE_BEHAVIOURS or iv.label == NO_DATA:
            inactive_since = iv.end  # up and about, or unknown: inactivity counts afresh
        elif inactive_since is None:
            inactive_since = start
        conn.execute(
            "INSERT INTO budget_cursor (animal, through, inactive_since) VALUES (?, ?, ?)"
            " ON CONFLICT (animal) DO UPDATE SET through = excluded.through,"
            " inactive_since = excluded.inactive_since",
            (iv.animal, iv.end, inactive_since),
        )
        return True

    def _add_day_piece(
        self,
        conn: sqlite3.Connection,
        iv: Interval,
        d: date,
        s: float,
        e: float,
        nd_share: float,
        count_bout: bool,
        stamp: float,
    ) -> None:
        day_s, day_e = self.clock.bounds(d)
        key = d.isoformat()
        piece = e - s
        if iv.label == NO_DATA:
            classified, no_data = 0.0, piece
        else:
            classified, no_data = piece * (1.0 - nd_share), piece * nd_share
        conn.execute(
            "INSERT INTO budget_days (animal, day, start, end, no_data_s, updated_at)"
            " VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (animal, day) DO UPDATE SET"
            " no_data_s = no_data_s + excluded.no_data_s, updated_at = excluded.updated_at,"
            " unsent = 1",
            (iv.animal, key, day_s, day_e, no_data, stamp),
        )
        if iv.label != NO_DATA:
            conn.execute(
                "INSERT INTO budget_behaviours (animal, day, behaviour, seconds, bouts,"
                " bout_seconds) VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (animal, day, behaviour)"
                " DO UPDATE SET seconds = seconds + excluded.seconds,"
                " bouts = bouts + excluded.bouts, bout_seconds = bout_seconds + excluded.bout_seconds",
                (
                    iv.animal,
                    key,
                    iv.label,
                    classified,
                    1 if count_bout else 0,
                    iv.duration_s if count_bout else 0.0,
                ),
            )

    def _add_hours(
        self,
        conn: sqlite3.Connection,
        iv: Interval,
        start: float,
        end: float,
        nd_share: float,
        fresh: bool,
    ) -> None:
        col = _hour_column(iv.label)
        h = math.floor(start / HOUR_S)
        first = True
        while h * HOUR_S < end:
            s, e = max(start, h * HOUR_S), min(end, (h + 1) * HOUR_S)
            piece = e - s
            walk = 1 if (first and fresh and iv.label == "walking") else 0
            if col == NO_DATA:
                conn.execute(_HOUR_UPSERT[NO_DATA], (iv.animal, h, piece, 0))
            else:
                conn.execute(_HOUR_UPSERT[col], (iv.animal, h, piece * (1 - nd_share), walk))
                if nd_share > 0:
                    conn.execute(_HOUR_UPSERT[NO_DATA], (iv.animal, h, piece * nd_share, 0))
            first = False
            h += 1

    # -- finishing days ------------------------------------------------------------------
    def finalize(self, conn: sqlite3.Connection, now: float) -> list[DailyBudget]:
        """Mark days final that are over and accounted for (or long enough over); return them."""
        rows = conn.execute(
            "SELECT d.animal, d.day FROM budget_days d LEFT JOIN budget_cursor c"
            " ON c.animal = d.animal WHERE d.final = 0 AND d.end <= ?"
            " AND (d.end <= ? OR c.through >= d.end - 1e-6)",
            (now, now - self.final_after_s),
        ).fetchall()
        for animal, day in rows:
            conn.execute(
                "UPDATE budget_days SET final = 1, updated_at = ?, unsent = 1"
                " WHERE animal = ? AND day = ?",
                (now, animal, day),
            )
        return [b for a, d in rows for b in self.read(conn, animal=a, day_from=d, day_to=d)]

    def changed(self, conn: sqlite3.Connection, now: float) -> list[DailyBudget]:
        """Budgets updated since they last went to the sinks; marks them sent."""
        rows = conn.execute("SELECT animal, day FROM budget_days WHERE unsent = 1").fetchall()
        conn.execute("UPDATE budget_days SET unsent = 0 WHERE unsent = 1")
        return [b for a, d in rows for b in self.read(conn, animal=a, day_from=d, day_to=d)]

    def prune(self, conn: sqlite3.Connection, before: float) -> None:
        """Drop hourly bins older than ``before`` (the days themselves stay)."""
        conn.execute("DELETE FROM activity_hours WHERE hour < ?", (math.floor(before / HOUR_S),))

    # -- reading -------------------------------------------------------------------------
    def read(
        self,
        conn: sqlite3.Connection,
        *,
        animal: str | Iterable[str] | None = None,
        day_from: str | date | None = None,
        day_to: str | date | None = None,
    ) -> list[DailyBudget]:
        """Budgets ordered by animal and day; ``day_from``/``day_to`` inclusive."""
        where, args = _filters(animal, day_from, day_to)
        days = conn.execute(
            "SELECT animal, day, start, end, no_data_s, final, updated_at FROM budget_days"
            f"{where} ORDER BY animal, day",
            args,
        ).fetchall()
        per: dict[tuple[str, str], list[tuple[str, float, int, float]]] = {}
        for a, d, b, s, n, bs in conn.execute(
            "SELECT animal, day, behaviour, seconds, bouts, bout_seconds FROM budget_behaviours"
            f"{where}",
            args,
        ):
            per.setdefault((a, d), []).append((b, s, n, bs))
        out = []
        for a, d, start, end, no_data_s, final, updated in days:
            beh = sorted(per.get((a, d), []), key=lambda r: _order(r[0]))
            minutes = {b: s / 60.0 for b, s, _, _ in beh}
            classified = sum(minutes.values())
            length = (end - start) / 60.0
            no_data = max(length - classified, 0.0) if final else no_data_s / 60.0
            out.append(
                DailyBudget(
                    animal=a,
                    day=d,
                    start=start,
                    end=end,
                    minutes=minutes,
                    bouts={b: n for b, _, n, _ in beh if n},
                    mean_bout_min={b: bs / n / 60.0 for b, _, n, bs in beh if n},
                    no_data_min=min(no_data, length),
                    final=bool(final),
                    updated_at=updated,
                )
            )
        return out

    def hours(
        self, conn: sqlite3.Connection, animal: str, t0: float, t1: float
    ) -> tuple[np.ndarray, np.ndarray]:
        """Hourly bins of one animal for hours starting in ``[t0, t1)``.

        Returns ``(seconds [H, len(HOUR_COLUMNS)], walk_bouts [H])``; H = hours in the span,
        missing hours are zeros (nothing accounted there yet).
        """
        h0, h1 = math.floor(t0 / HOUR_S), math.ceil(t1 / HOUR_S)
        n = max(h1 - h0, 0)
        sec = np.zeros((n, len(HOUR_COLUMNS)))
        bouts = np.zeros(n)
        cols = ", ".join(HOUR_COLUMNS)
        for row in conn.execute(
            f"SELECT hour, {cols}, walk_bouts FROM activity_hours"
            " WHERE animal = ? AND hour >= ? AND hour < ?",
            (animal, h0, h1),
        ):
            i = row[0] - h0
            sec[i] = row[1 : 1 + len(HOUR_COLUMNS)]
            bouts[i] = row[-1]
        return sec, bouts

    def hour_rows(self, conn: sqlite3.Connection, animal: str, h_from: int) -> list[tuple]:
        """Raw hourly rows ``(hour, *HOUR_COLUMNS)`` of one animal from hour ``h_from`` on."""
        return conn.execute(
            f"SELECT hour, {', '.join(HOUR_COLUMNS)} FROM activity_hours"
            " WHERE animal = ? AND hour >= ? ORDER BY hour",
            (animal, h_from),
        ).fetchall()

    def cursor(self, conn: sqlite3.Connection, animal: str) -> dict[str, Any] | None:
        """Where an animal's accounted time ends, its current state, and since when it is idle."""
        row = conn.execute(
            "SELECT through, inactive_since, state, state_since FROM budget_cursor"
            " WHERE animal = ?",
            (animal,),
        ).fetchone()
        if row is None:
            return None
        return dict(zip(("through", "inactive_since", "state", "state_since"), row, strict=True))

    def animals(self, conn: sqlite3.Connection) -> list[str]:
        """Every animal the ledger has seen (each has a cursor)."""
        return [r[0] for r in conn.execute("SELECT animal FROM budget_cursor ORDER BY 1")]


# The store refuses non-finite bouts but hands every event to its listeners; one bad event
# must not fail the batch (it would be retried for ever). A bout longer than this is a
# clock error, not behaviour (lying bouts are 88 +/- 30 min, Ito et al. 2009, FIELD.md).
_MAX_INTERVAL_S = 7 * DAY_S
# Unix seconds the ledger accepts: 2000-01-01 to 2200-01-01 (datetime and zone rules hold).
_T_MIN, _T_MAX = 946684800.0, 7258118400.0


def _finite(*xs: Any) -> bool:
    try:
        return all(math.isfinite(float(x)) for x in xs)
    except (TypeError, ValueError):
        return False


def _usable(iv: Interval) -> bool:
    return (
        _finite(iv.start, iv.end, iv.no_data_s)
        and _T_MIN <= iv.start < iv.end <= _T_MAX
        and iv.end - iv.start <= _MAX_INTERVAL_S
        and iv.no_data_s >= 0
    )


def _order(behaviour: str) -> tuple[int, str]:
    return (BEHAVIOURS.index(behaviour) if behaviour in BEHAVIOURS else len(BEHAVIOURS), behaviour)


def _filters(
    animal: str | Iterable[str] | None, day_from: str | date | None, day_to: str | date | None
) -> tuple[str, list[Any]]:
    conds, args = [], []
    if animal is not None:
        cond, names = animal_clause("animal", animal)
        conds.append(cond)
        args.extend(names)
    if day_from is not None:
        conds.append("day >= ?")
        args.append(str(day_from))
    if day_to is not None:
        conds.append("day <= ?")
        args.append(str(day_to))
    return (" WHERE " + " AND ".join(conds)) if conds else "", args
