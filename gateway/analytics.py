"""The analytics of one gateway: daily budgets, own-baseline alerts and collar health.

Wiring (the daemon does this once)::

    analytics = Analytics(settings, speed=1.0)
    analytics.attach(store)                   # own tables; budget ledger as a store listener
    analytics.add_fact_listener(outbox.listener)   # facts go to the sinks
    ... per accepted frame:    analytics.frame(frame, animal)
    ... per classified window: analytics.gravity(CollarGravity(...))
    ... on every tick:         analytics.tick(now)   (or pass ``analytics`` as a Gateway listener)

Budgets follow the bouts inside the store's own write transaction. ``tick`` does the timed
work in one transaction of its own connection to the store file: it finalises days that are
over, sends provisional budgets every ``budgets.emit_interval_s``, evaluates the alert rules
and saves collar health every minute. Fact listeners (the outbox) run inside that same
transaction, so a fact is stored and queued, or neither.

Time: the analytics run on the collars' clock. ``now`` is the newest collar time seen,
advanced between frames by the wall clock times ``speed`` (collar seconds per gateway second;
1 for live collars, the speed factor of a simulated herd, None for a replay run flat out), so
an accelerated demo finishes its days as the simulated clock passes midnight.
"""

from __future__ import annotations

import logging
import sqlite3
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from .alerts import Alert, AlertEngine
from .budgets import DAY_S, BudgetLedger, DailyBudget, DayClock
from .collarhealth import CollarHealth
from .config import Settings
from .errors import StoreError
from .types import CollarGravity, Frame

__all__ = ["Analytics", "FactListener"]

log = logging.getLogger("boutline.analytics")
FactListener = Callable[[sqlite3.Connection, list[Any]], None]

_EVALUATE_EVERY_S = 60.0  # collar rules judge minutes; behaviour rules only act on new hours
_COLLARS_EVERY_S = 60.0
# A collar clock further ahead of the gateway's estimate than this is not believed.
_FUTURE_S = 300.0


class Analytics:
    """Budgets, alerts and collar health over one store file; see the module docstring."""

    def __init__(self, settings: Settings, *, speed: float | None = 1.0) -> None:
        self.settings = settings
        self.speed = speed
        self.clock = DayClock.from_settings(settings.site)
        self.ledger = BudgetLedger(self.clock, final_after_h=settings.budgets.final_after_h)
        self.collars = CollarHealth()
        self.engine = AlertEngine(settings.alerts, self.ledger)
        self._listeners: list[FactListener] = []
        self._conn: sqlite3.Connection | None = None
        self._path: Path | None = None
        self._data_now = 0.0
        self._data_wall = 0.0
        self._next = {"evaluate": 0.0, "collars": 0.0, "emit": 0.0, "prune": 0.0}

    # -- wiring ----------------------------------------------------------------------------
    def attach(self, store: Any) -> None:
        """Create the analytics tables in ``store``'s file and follow its writes."""
        self.open(store.path)
        store.add_listener(self.ledger.listener)

    def open(self, path: str | Path) -> None:
        """Open our own connection to the store file (tables created, collar health loaded)."""
        self._path = Path(path)
        try:
            conn = sqlite3.connect(self._path, isolation_level=None, check_same_thread=False)
            conn.execute("PRAGMA busy_timeout = 5000")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open {self._path} for the analytics: {exc}") from exc
        self._conn = conn
        self.ledger.ensure_schema(conn)
        self.engine.ensure_schema(conn)
        self.collars.ensure_schema(conn)
        self.collars.load(conn)

    def add_fact_listener(self, fn: FactListener) -> None:
        """``fn(conn, facts)`` runs inside the analytics' transaction (e.g. outbox.listener)."""
        self._listeners.append(fn)

    def close(self) -> None:
        """Save collar health and close our connection; safe to call twice."""
        if self._conn is None:
            return

        def save(conn: sqlite3.Connection) -> list[Any]:
            self.collars.save(conn, self.now())
            return []

        try:
            self._transaction(save)
        except StoreError as exc:
            log.warning("could not save collar health at close: %s", exc)
        self._conn.close()
        self._conn = None

    # -- input -----------------------------------------------------------------------------
    def frame(self, frame: Frame, animal: str = "") -> None:
        """Count one accepted frame for its collar's health."""
        self._observe(frame.t_end)
        self.collars.update(frame, animal=animal, now=self.now())

    def gravity(self, g: CollarGravity) -> None:
        """One window's mean gravity of a collar (for the collar-rotated alert)."""
        self.collars.add_gravity(g)

    def _observe(self, t: float) -> None:
        wall = time.time()
        if self._data_now and t > self.now(wall) + _FUTURE_S:
            return  # a collar clock far ahead: do not let it drag the analytics' clock
        if t > self._data_now:
            self._data_now, self._data_wall = t, wall

    def now(self, wall: float | None = None) -> float:
        """The analytics' clock: newest collar time seen, advanced by the wall clock."""
        if self.speed is None or not self._data_now:
            return self._data_now
        wall = time.time() if wall is None else wall
        return self._data_now + max(wall - self._data_wall, 0.0) * self.speed

    # -- timed work ------------------------------------------------------------------------
    def __call__(self, result: Any) -> None:
        """As a Gateway listener: run the timed work after a tick."""
        self.tick()

    def tick(self, now: float | None = None) -> list[Any]:
        """Finalise days, emit budgets, evaluate alerts, save collar health when due.

        Returns the facts handed to the fact listeners (budgets, alerts, collar statuses).
        """
        now = self.now() if now is None else float(now)
        if self._conn is None or not now:
            return []
        due = {k for k, t in self._next.items() if now >= t}
        if not due:
            return []

        def work(conn: sqlite3.Connection) -> list[Any]:
            facts: list[Any] = []
            if "evaluate" in due:
                facts += self.ledger.finalize(conn, now)
            if "emit" in due:
                self._next["emit"] = now + self.settings.budgets.emit_interval_s
                done = {(b.animal, b.day) for b in facts}
                facts += [
                    b for b in self.ledger.changed(conn, now) if (b.animal, b.day) not in done
                ]
            if "evaluate" in due:
                self._next["evaluate"] = now + _EVALUATE_EVERY_S
                facts += self.engine.evaluate(conn, now, self.collars)
            if "collars" in due:
                self._next["collars"] = now + _COLLARS_EVERY_S
                facts += self.collars.save(conn, now)
            if "prune" in due:
                self._next["prune"] = now + DAY_S
                keep_days = self.settings.alerts.lookback_days + 3
                self.ledger.prune(conn, now - keep_days * DAY_S)
            return facts

        return self._transaction(work)

    def _transaction(self, work: Callable[[sqlite3.Connection], list[Any]]) -> list[Any]:
        conn = self._conn
        if conn is None:
            raise StoreError("the analytics are not attached to a store; call attach() first")
        try:
            conn.execute("BEGIN IMMEDIATE")
            facts = work(conn) or []
            if facts:
                for fn in self._listeners:
                    fn(conn, facts)
            conn.execute("COMMIT")
        except sqlite3.Error as exc:
            self._rolled_back(conn)
            raise StoreError(
                f"analytics could not write to {self._path}: {exc}; the work is retried at the"
                " next tick"
            ) from exc
        except BaseException:
            self._rolled_back(conn)
            raise
        return facts

    def _rolled_back(self, conn: sqlite3.Connection) -> None:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        self.engine.forget()  # what the engine holds in memory must follow the database
        self.collars.unsaved()

    # -- reading (for the demo table) -----------------------------------------------------
    def budgets(self, day: str | None = None) -> list[DailyBudget]:
        """Budgets of one day (default: the day in progress), every animal."""
        if self._conn is None:
            return []
        d = day or self.clock.day_of(self.now() or time.time()).isoformat()
        return self.ledger.read(self._conn, day_from=d, day_to=d)

    def open_alerts(self) -> Sequence[dict[str, Any]]:
        if self._conn is None:
            return []
        return self.engine.book.read(self._conn, open_only=True)

    @staticmethod
    def alert_facts(facts: Sequence[Any]) -> list[Alert]:
        return [f for f in facts if isinstance(f, Alert)]
