"""Store-and-forward: outbox tables in the store database and one forwarder per sink.

Every fact (bout, state change, daily budget, alert, collar health, gateway stat) is put
into the outbox in the same SQLite transaction that stores it (a store listener), so a fact
is stored and queued, or neither. A :class:`Forwarder` per sink reads the facts after its own
cursor, sends them in batches (by size and by age) and moves its cursor only after the
server acknowledged the batch: delivery is at least once; points are keyed so a re-sent
batch overwrites itself (see gateway/lineprotocol.py).

Failures, as the sinks report them (gateway.errors):

- ``SinkUnavailable`` (refused connection, timeout, 5xx, 429): retry the same batch with
  capped exponential backoff and jitter; a server's Retry-After is honoured.
- ``SinkRejected`` for the points (cause in :data:`POINT_CAUSES`): the batch is bisected
  until the rejected facts are isolated; those are set aside (table ``outbox_rejected``),
  counted, and reported once per cause; the rest is delivered.
- ``SinkRejected`` for the sink (bad token, unknown database or bucket): nothing is thrown
  away; reported once, and retried in the background until the operator fixes it.

Disk cap: the outbox holds at most ``store.outbox_max_mb`` of facts. When it is reached the
oldest undelivered facts are dropped down to 90 % of the cap, counted per sink, logged and
raised as a ``gateway_alert`` fact (itself delivered like any other): never silently.

Tables (in the store's file):

    outbox(id, kind, at, size, body)       facts some sink has not delivered; body is JSON
    outbox_sinks(sink, delivered_id, ...)  one cursor per sink
    outbox_rejected(sink, id, ...)         facts a sink refused, set aside for inspection
    outbox_counts(sink, what, cause, n)    totals that survive restarts (delivered, ...)
    outbox_meta(name, value)               bytes held, for the cap

Run the forwarders alone on a store file (e.g. to drain a backlog):
``python -m gateway.outbox --db /var/lib/boutline/boutline.db --config boutline.toml``
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import email.utils
import enum
import json
import logging
import math
import queue
import random
import signal
import sqlite3
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from .config import Settings
from .errors import SinkError, SinkRejected, SinkUnavailable, StoreError, StoreFullError

__all__ = [
    "POINT_CAUSES",
    "Forwarder",
    "GatewayAlert",
    "GatewayStats",
    "Outbox",
    "Outputs",
    "Record",
    "SinkMetrics",
    "Sink",
    "fact_of",
    "http_failure",
    "parse_retry_after",
    "sinks_from_settings",
]

log = logging.getLogger("boutline.outbox")

# Causes that concern the points of a batch, not the sink: bisect and set the culprits aside.
POINT_CAUSES = frozenset({"bad_point", "unconvertible", "too_large"})
# Bytes counted per row on top of its JSON body (id, kind, time, b-tree overhead): an estimate.
_ROW_OVERHEAD = 64
# After a cap event the outbox is cut to this share of the cap, so drops come in rare chunks.
_CAP_LOW_WATER = 0.9
# Set-aside facts kept per sink for inspection; older ones are forgotten (they were counted).
_REJECTED_KEEP = 10_000
# Gateway figures go to the sinks this often: dashboards plot them per minute.
_STATS_EVERY_S = 60.0
# Batches of facts waiting for the sinks that need no store while the store is full.
_LIVE_MAX = 1000
# Delivery latency buckets: live delivery takes well under a second, outages hours.
_LATENCY_BUCKETS = (0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 300, 900, 3600, 14400, 86400)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS outbox (
    id INTEGER PRIMARY KEY AUTOINCREMENT,  -- AUTOINCREMENT: ids never reused, cursors stay true
    kind TEXT NOT NULL,
    at REAL NOT NULL,                      -- gateway time it was committed, unix s
    size INTEGER NOT NULL,
    body TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS outbox_sinks (
    sink TEXT PRIMARY KEY,
    delivered_id INTEGER NOT NULL,
    updated REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS outbox_rejected (
    sink TEXT NOT NULL,
    id INTEGER NOT NULL,
    kind TEXT NOT NULL,
    at REAL NOT NULL,
    body TEXT NOT NULL,
    cause TEXT NOT NULL,
    detail TEXT NOT NULL,
    set_aside_at REAL NOT NULL,
    PRIMARY KEY (sink, id)
);
CREATE TABLE IF NOT EXISTS outbox_counts (
    sink TEXT NOT NULL,
    what TEXT NOT NULL,
    cause TEXT NOT NULL DEFAULT '',
    n INTEGER NOT NULL,
    PRIMARY KEY (sink, what, cause)
);
CREATE TABLE IF NOT EXISTS outbox_meta (name TEXT PRIMARY KEY, value INTEGER NOT NULL);
INSERT OR IGNORE INTO outbox_meta (name, value) VALUES ('bytes', 0);
"""


# --------------------------------------------------------------------------- facts


@dataclass(slots=True)
class GatewayAlert:
    """Something the gateway operator must know, e.g. the outbox dropped undelivered facts."""

    cause: str
    message: str
    t: float
    dropped: int = 0
    kind: str = dataclasses.field(default="gateway_alert", init=False)


@dataclass(slots=True)
class GatewayStats:
    """Gateway totals since start, sampled periodically (measurement ``gateway_stats``)."""

    t: float
    frames_in: int
    rejects: int
    windows: int
    events: int
    inference_s: float
    backlog: int
    uptime_s: float
    kind: str = dataclasses.field(default="gateway_stats", init=False)


def fact_of(obj: Any) -> dict[str, Any]:
    """A fact as a plain dict with ``kind``: an event dataclass or a mapping holding ``kind``."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        fact = dataclasses.asdict(obj)
    elif isinstance(obj, Mapping):
        fact = dict(obj)
    else:
        raise TypeError(f"cannot queue {type(obj).__name__}: give a dataclass or a mapping")
    if not isinstance(fact.get("kind"), str) or not fact["kind"]:
        raise TypeError(f"cannot queue {type(obj).__name__}: it has no 'kind'")
    return fact


def _json_default(o: Any) -> Any:
    if hasattr(o, "item") and callable(o.item) and getattr(o, "ndim", 1) == 0:
        return o.item()  # numpy scalar
    if hasattr(o, "tolist"):
        return o.tolist()
    if isinstance(o, enum.Enum):
        return o.value
    return str(o)


def _load(kind: str, body: str) -> dict[str, Any]:
    """A stored fact; a damaged row becomes a fact no sink can convert, so it is set aside."""
    try:
        fact = json.loads(body)
    except ValueError:
        fact = None
    if not isinstance(fact, dict):
        return {"kind": "damaged", "stored_kind": kind, "body": str(body)[:200]}
    return fact


@dataclass(frozen=True, slots=True)
class Record:
    """One queued fact as a sink receives it: ``at`` is when it was committed (gateway clock)."""

    id: int
    kind: str
    at: float
    fact: dict[str, Any]


class Sink(Protocol):
    """The surface every sink has. ``close()`` is safe without ``open()``."""

    name: str

    def open(self) -> None:
        """Connect and check the target accepts us (raise SinkUnavailable / SinkRejected)."""

    def write(self, batch: Sequence[Record]) -> None:
        """Deliver the batch; return only once the server acknowledged it."""

    def close(self) -> None: ...


# --------------------------------------------------------------------------- HTTP answers


def parse_retry_after(value: str | None, now: float | None = None) -> float | None:
    """Seconds from a Retry-After header (delta-seconds or HTTP-date, RFC 9110 10.2.3)."""
    if not value or len(value) > 64:  # a real header is a number or a 29-character date
        return None
    value = value.strip()
    try:
        seconds = float(value)
    except ValueError:
        try:
            when = email.utils.parsedate_to_datetime(value)
        except (TypeError, ValueError, IndexError):
            return None
        if when is None or when.tzinfo is None:
            return None
        seconds = when.timestamp() - (time.time() if now is None else now)
    if not math.isfinite(seconds):
        return None
    return max(0.0, seconds)


def _clean(detail: str | bytes | None, limit: int = 300) -> str:
    """A server's error text made safe for one log line (hostile servers send anything)."""
    if isinstance(detail, bytes):
        detail = detail[: limit * 4].decode("utf-8", "replace")
    text = detail or ""
    try:
        parsed = json.loads(text)
        if isinstance(parsed, dict):
            text = str(parsed.get("error") or parsed.get("message") or text)
    except ValueError:
        pass
    text = "".join(ch if ch.isprintable() else " " for ch in text).strip()
    return text[:limit] + ("..." if len(text) > limit else "")


def http_failure(
    status: int,
    detail: str | bytes | None,
    retry_after: str | None,
    *,
    where: str,
    auth_hint: str,
    missing_hint: str,
) -> SinkError:
    """The SinkError for an HTTP answer that is not 2xx (InfluxDB v1 and v2 write APIs)."""
    text = _clean(detail)
    said = f"HTTP {status}" + (f": {text}" if text else "")
    if status in (401, 403):
        return SinkRejected(f"{where} refused the credentials ({said}); {auth_hint}", "auth")
    if status == 404 or "retention policy not found" in text:
        return SinkRejected(f"{where} has no such target ({said}); {missing_hint}", "not_found")
    if status in (400, 422):
        return SinkRejected(f"{where} rejected points ({said})", "bad_point")
    if status == 413:
        return SinkRejected(f"{where} refused the batch as too large ({said})", "too_large")
    if status == 429 or status >= 500 or status < 100:  # < 100: no status at all
        return SinkUnavailable(f"{where} is unavailable ({said})", parse_retry_after(retry_after))
    return SinkRejected(f"{where} refused the write ({said})", f"http_{status}")


# --------------------------------------------------------------------------- outbox


def _connect(path: str | Path) -> sqlite3.Connection:
    """A connection to an existing store file (the store creates it; we never make a stray one)."""
    p = Path(path)
    if not p.is_file():
        raise StoreError(f"store {p} does not exist; open the store (Store.open) before its outbox")
    try:
        conn = sqlite3.connect(
            f"file:{p}?mode=rw",
            uri=True,
            timeout=30.0,
            isolation_level=None,
            check_same_thread=False,
        )
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=NORMAL")
    except sqlite3.Error as exc:
        raise StoreError(
            f"cannot open the store {p}: {exc}; check the path and its rights"
        ) from exc
    return conn


@contextmanager
def _tx(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


def _count(conn: sqlite3.Connection, sink: str, what: str, n: int, cause: str = "") -> None:
    conn.execute(
        "INSERT INTO outbox_counts (sink, what, cause, n) VALUES (?, ?, ?, ?)"
        " ON CONFLICT (sink, what, cause) DO UPDATE SET n = n + excluded.n",
        (sink, what, cause, n),
    )


class Outbox:
    """The outbox tables of one store file; safe to use from several threads and processes.

    ``sinks`` names every sink that will deliver from it. A sink seen for the first time
    starts at the newest fact; a sink in the file but not named here is retired (its cursor
    removed) so it cannot hold facts back forever. With no sinks nothing is queued.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        sinks: Iterable[str],
        site: str = "home-farm",
        max_mb: float = 200.0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.path = Path(path)
        self.site = site
        self.max_bytes = int(max_mb * 1_000_000)
        self.clock = clock
        self.sinks = tuple(dict.fromkeys(sinks))
        self._lock = threading.Lock()
        self._wakers: list[threading.Event] = []
        self._conn = _connect(self.path)
        try:
            self._conn.executescript(_SCHEMA)
            with _tx(self._conn) as c:
                newest = self._newest_id(c)
                for name in self.sinks:
                    c.execute(
                        "INSERT OR IGNORE INTO outbox_sinks (sink, delivered_id, updated)"
                        " VALUES (?, ?, ?)",
                        (name, newest, self.clock()),
                    )
                known = [r[0] for r in c.execute("SELECT sink FROM outbox_sinks")]
                for name in set(known) - set(self.sinks):
                    log.warning(
                        "outbox: sink %r is no longer configured; its cursor is removed", name
                    )
                    c.execute("DELETE FROM outbox_sinks WHERE sink = ?", (name,))
                self._prune(c)
        except sqlite3.Error as exc:
            self._conn.close()
            raise StoreError(f"cannot set up the outbox in {self.path}: {exc}") from exc

    # ---- producer side

    def listener(self, conn: sqlite3.Connection, events: Sequence[Any]) -> None:
        """Store listener: queue ``events`` inside the store's own transaction on ``conn``."""
        if self.sinks and events:
            self._insert(conn, [fact_of(e) for e in events])
            self._wake()

    def put(self, facts: Iterable[Any]) -> int:
        """Queue facts in a transaction of the outbox's own; returns how many were queued."""
        rows = [fact_of(f) for f in facts]
        if not self.sinks or not rows:
            return 0
        try:
            with self._lock, _tx(self._conn) as c:
                self._insert(c, rows)
        except sqlite3.OperationalError as exc:
            if "full" in str(exc):
                raise StoreFullError(f"the disk under {self.path} is full; free space") from exc
            raise StoreError(f"cannot queue facts in {self.path}: {exc}") from exc
        self._wake()
        return len(rows)

    def _insert(self, conn: sqlite3.Connection, facts: list[dict[str, Any]]) -> None:
        now = self.clock()
        rows = []
        for f in facts:
            body = json.dumps(f, separators=(",", ":"), default=_json_default)
            rows.append((f["kind"], now, len(body.encode("utf-8")) + _ROW_OVERHEAD, body))
        conn.executemany("INSERT INTO outbox (kind, at, size, body) VALUES (?, ?, ?, ?)", rows)
        held = self._add_bytes(conn, sum(r[2] for r in rows))
        if held > self.max_bytes:
            self._enforce_cap(conn, held)

    @staticmethod
    def _add_bytes(conn: sqlite3.Connection, n: int) -> int:
        conn.execute("UPDATE outbox_meta SET value = value + ? WHERE name = 'bytes'", (n,))
        return int(conn.execute("SELECT value FROM outbox_meta WHERE name = 'bytes'").fetchone()[0])

    def _enforce_cap(self, conn: sqlite3.Connection, held: int) -> None:
        held -= self._prune(conn)
        if held <= self.max_bytes:
            return
        need = held - int(self.max_bytes * _CAP_LOW_WATER)
        cutoff, freed = 0, 0
        for row_id, size in conn.execute("SELECT id, size FROM outbox ORDER BY id"):
            cutoff, freed = row_id, freed + size
            if freed >= need:
                break
        lost: dict[str, int] = {}
        for sink, delivered in conn.execute(
            "SELECT sink, delivered_id FROM outbox_sinks"
        ).fetchall():
            n = conn.execute(
                "SELECT COUNT(*) FROM outbox WHERE id > ? AND id <= ?", (delivered, cutoff)
            ).fetchone()[0]
            if n:
                lost[sink] = n
                _count(conn, sink, "dropped", n)
        conn.execute("DELETE FROM outbox WHERE id <= ?", (cutoff,))
        conn.execute(
            "UPDATE outbox_sinks SET delivered_id = ? WHERE delivered_id < ?", (cutoff, cutoff)
        )
        self._add_bytes(conn, -freed)
        dropped = max(lost.values(), default=0)
        so_far = conn.execute(
            "SELECT COALESCE(MAX(n), 0) FROM outbox_counts WHERE what = 'dropped'"
        ).fetchone()[0]
        message = (
            f"outbox reached its cap of {self.max_bytes / 1e6:g} MB (store.outbox_max_mb):"
            f" dropped the {dropped} oldest undelivered facts ("
            + ", ".join(f"{s}: {n}" for s, n in sorted(lost.items()))
            + f"; {so_far} in all so far); fix the failing sink or raise the cap"
        )
        log.error("outbox: %s", message)
        alert = fact_of(GatewayAlert("outbox_full", message, self.clock(), dropped))
        body = json.dumps(alert, separators=(",", ":"))
        size = len(body) + _ROW_OVERHEAD
        conn.execute(
            "INSERT INTO outbox (kind, at, size, body) VALUES (?, ?, ?, ?)",
            (alert["kind"], alert["t"], size, body),
        )
        self._add_bytes(conn, size)

    def _wake(self) -> None:
        for ev in list(self._wakers):
            ev.set()

    def add_waker(self, ev: threading.Event) -> None:
        """``ev`` is set whenever facts are queued in this process."""
        self._wakers.append(ev)

    # ---- consumer side (each forwarder passes its own connection)

    def connect(self) -> sqlite3.Connection:
        """A new connection to the store file, for one forwarder thread."""
        return _connect(self.path)

    @staticmethod
    def _newest_id(conn: sqlite3.Connection) -> int:
        row = conn.execute("SELECT seq FROM sqlite_sequence WHERE name = 'outbox'").fetchone()
        return int(row[0]) if row else 0

    @staticmethod
    def cursor(conn: sqlite3.Connection, sink: str) -> int:
        row = conn.execute(
            "SELECT delivered_id FROM outbox_sinks WHERE sink = ?", (sink,)
        ).fetchone()
        if row is None:
            raise StoreError(f"sink {sink!r} is not registered in the outbox")
        return int(row[0])

    def pending(self, conn: sqlite3.Connection, sink: str, limit: int) -> list[Record]:
        """Up to ``limit`` facts after the sink's cursor, oldest first."""
        rows = conn.execute(
            "SELECT id, kind, at, body FROM outbox WHERE id > ? ORDER BY id LIMIT ?",
            (self.cursor(conn, sink), limit),
        ).fetchall()
        return [Record(i, k, at, _load(k, body)) for i, k, at, body in rows]

    def ack(self, conn: sqlite3.Connection, sink: str, records: Sequence[Record]) -> None:
        """The server acknowledged ``records``: move the cursor past them, forget what all sent."""
        if not records:
            return
        with _tx(conn) as c:
            c.execute(
                "UPDATE outbox_sinks SET delivered_id = MAX(delivered_id, ?), updated = ?"
                " WHERE sink = ?",
                (records[-1].id, self.clock(), sink),
            )
            _count(c, sink, "delivered", len(records))
            self._prune(c)

    def set_aside(
        self, conn: sqlite3.Connection, sink: str, record: Record, cause: str, detail: str
    ) -> None:
        """The sink will never take ``record``: keep it in outbox_rejected and move on."""
        with _tx(conn) as c:
            c.execute(
                "INSERT OR REPLACE INTO outbox_rejected VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    sink,
                    record.id,
                    record.kind,
                    record.at,
                    json.dumps(record.fact, default=_json_default),
                    cause,
                    detail[:1000],
                    self.clock(),
                ),
            )
            c.execute(
                "DELETE FROM outbox_rejected WHERE sink = ? AND id <= (SELECT id FROM"
                " outbox_rejected WHERE sink = ? ORDER BY id DESC LIMIT 1 OFFSET ?)",
                (sink, sink, _REJECTED_KEEP),
            )
            c.execute(
                "UPDATE outbox_sinks SET delivered_id = MAX(delivered_id, ?), updated = ?"
                " WHERE sink = ?",
                (record.id, self.clock(), sink),
            )
            _count(c, sink, "rejected", 1, cause)
            self._prune(c)

    def _prune(self, conn: sqlite3.Connection) -> int:
        """Delete facts every sink has delivered; returns the bytes freed."""
        upto = conn.execute("SELECT MIN(delivered_id) FROM outbox_sinks").fetchone()[0]
        if upto is None:  # no sinks: nothing will ever deliver what is held
            upto = self._newest_id(conn)
        freed = conn.execute("SELECT COALESCE(SUM(size), 0) FROM outbox WHERE id <= ?", (upto,))
        n = int(freed.fetchone()[0])
        if n:
            conn.execute("DELETE FROM outbox WHERE id <= ?", (upto,))
            self._add_bytes(conn, -n)
        return n

    def requeue(self, sink: str, cause: str | None = None) -> int:
        """Queue set-aside facts of ``sink`` again (after a fix); returns how many."""
        with self._lock, _tx(self._conn) as c:
            q = "SELECT id, body FROM outbox_rejected WHERE sink = ?" + (
                " AND cause = ?" if cause else ""
            )
            rows = c.execute(q + " ORDER BY id", (sink, cause) if cause else (sink,)).fetchall()
            if rows:
                self._insert(c, [_load("requeued", body) for _, body in rows])
                c.executemany(
                    "DELETE FROM outbox_rejected WHERE sink = ? AND id = ?",
                    [(sink, i) for i, _ in rows],
                )
        self._wake()
        return len(rows)

    # ---- figures (any thread)

    def _read(self, sql: str, args: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
        with self._lock:
            return self._conn.execute(sql, args).fetchall()

    def backlog(self, sink: str) -> int:
        """Facts the sink has not delivered yet."""
        rows = self._read(
            "SELECT COUNT(*) FROM outbox WHERE id > (SELECT delivered_id FROM outbox_sinks"
            " WHERE sink = ?)",
            (sink,),
        )
        return int(rows[0][0])

    def oldest_age(self, sink: str) -> float | None:
        """Seconds the oldest undelivered fact of the sink has waited, or None."""
        rows = self._read(
            "SELECT MIN(at) FROM outbox WHERE id > (SELECT delivered_id FROM outbox_sinks"
            " WHERE sink = ?)",
            (sink,),
        )
        return None if rows[0][0] is None else max(0.0, self.clock() - rows[0][0])

    def counts(self) -> dict[tuple[str, str, str], int]:
        """Totals kept in the file: (sink, what, cause) -> n; what is delivered/rejected/dropped."""
        return {
            (s, w, c): n
            for s, w, c, n in self._read("SELECT sink, what, cause, n FROM outbox_counts")
        }

    def held_bytes(self) -> int:
        return int(self._read("SELECT value FROM outbox_meta WHERE name = 'bytes'")[0][0])

    def rejected(self, sink: str) -> list[tuple[int, str, str, str]]:
        """Set-aside facts of a sink: (id, kind, cause, detail), oldest first."""
        return self._read(
            "SELECT id, kind, cause, detail FROM outbox_rejected WHERE sink = ? ORDER BY id",
            (sink,),
        )

    def close(self) -> None:
        with self._lock:
            self._conn.close()


# --------------------------------------------------------------------------- forwarder


class Backoff:
    """Capped exponential backoff with equal jitter: the n-th wait is in [d/2, d], d = min * 2^n."""

    def __init__(self, min_s: float, max_s: float, rng: random.Random | None = None) -> None:
        self.min_s, self.max_s = min_s, max_s
        self.rng = rng or random.Random()
        self.failures = 0

    def next(self, retry_after: float | None = None) -> float:
        self.failures += 1
        if retry_after is not None:
            # The server said when; a hostile or confused one may say a year: cap it.
            return min(retry_after, self.max_s)
        d = min(self.max_s, self.min_s * 2 ** min(self.failures - 1, 30))
        return self.rng.uniform(d / 2, d)

    def reset(self) -> None:
        self.failures = 0


class SinkMetrics:
    """Delivery latency and failed attempts of the sinks of one gateway (labelled by sink)."""

    def __init__(self) -> None:
        self.latency = Histogram(
            "boutline_sink_delivery_seconds",
            "time from a fact being stored to the sink acknowledging it",
            ["sink"],
            buckets=_LATENCY_BUCKETS,
            registry=None,
        )
        self.failures = Counter(
            "boutline_sink_failures",
            "failed delivery attempts, by cause",
            ["sink", "cause"],
            registry=None,
        )


class Forwarder:
    """Delivers one sink's facts from the outbox, in a thread of its own."""

    def __init__(
        self,
        outbox: Outbox,
        sink: Sink,
        *,
        batch_size: int = 1000,
        flush_interval_s: float = 5.0,
        retry_min_s: float = 1.0,
        retry_max_s: float = 300.0,
        poll_s: float = 0.25,
        rng: random.Random | None = None,
        metrics: SinkMetrics | None = None,
    ) -> None:
        self.outbox, self.sink, self.name = outbox, sink, sink.name
        self.batch_size, self.flush_interval_s, self.poll_s = batch_size, flush_interval_s, poll_s
        self.backoff = Backoff(retry_min_s, retry_max_s, rng)
        self.metrics = metrics or SinkMetrics()
        self.state = "starting"  # starting | ok | failing
        self.fail_cause: str | None = None
        self.last_error: str | None = None
        self.failing_since: float | None = None
        self.opened = False
        self.first_result = threading.Event()  # set after the first open() attempt
        self._reported: set[str] = set()  # point causes already logged
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread: threading.Thread | None = None
        self._conn: sqlite3.Connection | None = None
        outbox.add_waker(self._wake)

    # ---- thread

    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(
                target=self._run, name=f"forward-{self.name}", daemon=True
            )
            self._thread.start()

    def request_stop(self) -> None:
        self._stop.set()
        self._wake.set()

    def stop(self, timeout_s: float = 15.0) -> None:
        """Stop after the attempt in progress (bounded by the sink's timeout), close the sink."""
        self.request_stop()
        if self._thread is not None:
            self._thread.join(timeout_s)
            self._thread = None
        else:
            self._close()

    def _run(self) -> None:
        try:
            while not self._stop.is_set():
                try:
                    delay = self.step()
                except Exception as exc:  # a bug must not end delivery for good: say it, retry
                    log.exception("%s: unexpected error; retrying", self.name)
                    delay = self._failed(SinkUnavailable(f"unexpected error: {exc!r}"), "bug")
                if delay > 0:
                    self._wake.wait(delay)
                    self._wake.clear()
        finally:
            self._close()

    def _close(self) -> None:
        try:
            self.sink.close()
        except Exception:  # a sink that fails to close must not hide why we stopped
            log.exception("%s: closing the sink failed", self.name)
        self.opened = False
        if self._conn is not None:
            self._conn.close()
            self._conn = None

    # ---- one step: open if needed, then at most one batch; returns seconds to wait

    def step(self, *, flush: bool = False) -> float:
        """One attempt; ``flush`` sends a partial batch without waiting for its age."""
        try:
            if self._conn is None:
                self._conn = self.outbox.connect()
            if not self.opened:
                try:
                    self.sink.open()
                except SinkError as exc:
                    return self._failed(exc)
                finally:
                    self.first_result.set()
                self.opened = True
                self._healthy()
            batch = self.outbox.pending(self._conn, self.name, self.batch_size)
            if not batch:
                return self.poll_s
            age = self.outbox.clock() - batch[0].at
            if len(batch) < self.batch_size and age < self.flush_interval_s and not flush:
                return min(self.poll_s, self.flush_interval_s - age)
            try:
                self._deliver(batch)
            except SinkError as exc:
                return self._failed(exc)
            self._healthy()
            return 0.0 if len(batch) == self.batch_size else self.poll_s
        except (sqlite3.Error, StoreError) as exc:
            # The store is busy or broken: nothing is lost (the cursor did not move); try later.
            return self._failed(SinkUnavailable(f"cannot read the outbox: {exc}"), "store")

    def _deliver(self, batch: Sequence[Record]) -> None:
        assert self._conn is not None
        try:
            self.sink.write(batch)
        except SinkRejected as exc:
            if exc.cause not in POINT_CAUSES:
                raise
            if len(batch) == 1:
                self._set_aside(batch[0], exc)
                return
            # Bisect: the good halves go through (re-sent points overwrite themselves).
            mid = len(batch) // 2
            self._deliver(batch[:mid])
            self._deliver(batch[mid:])
            return
        now = self.outbox.clock()
        latency = self.metrics.latency.labels(sink=self.name)
        for r in batch:
            latency.observe(max(0.0, now - r.at))
        self.outbox.ack(self._conn, self.name, batch)

    def _set_aside(self, record: Record, exc: SinkRejected) -> None:
        assert self._conn is not None
        self.outbox.set_aside(self._conn, self.name, record, exc.cause, str(exc))
        if exc.cause not in self._reported:
            self._reported.add(exc.cause)
            log.warning(
                "%s: set aside fact %d (%s): %s; further facts refused for this cause are"
                " counted (boutline_sink_rejected_total), not logged",
                self.name,
                record.id,
                record.kind,
                exc,
            )

    def _failed(self, exc: SinkError, cause: str | None = None) -> float:
        """Count a failed attempt, say it once per episode and cause; return the wait."""
        cause = cause or (exc.cause if isinstance(exc, SinkRejected) else "unavailable")
        self.metrics.failures.labels(sink=self.name, cause=cause).inc()
        if self.state != "failing" or cause != self.fail_cause:
            log.error(
                "%s: %s; the gateway runs on its embedded store (%d facts wait in %s) and"
                " keeps retrying in the background",
                self.name,
                exc,
                self.outbox.backlog(self.name),
                self.outbox.path,
            )
            if self.state != "failing":
                self.failing_since = self.outbox.clock()
        self.state, self.fail_cause, self.last_error = "failing", cause, str(exc)
        return self.backoff.next(exc.retry_after if isinstance(exc, SinkUnavailable) else None)

    def _healthy(self) -> None:
        if self.state == "failing":
            log.warning("%s: delivering again", self.name)
        self.state, self.fail_cause, self.last_error, self.failing_since = "ok", None, None, None
        self.backoff.reset()

    def status(self) -> dict[str, Any]:
        """State, backlog and totals of this sink (for /healthz)."""
        totals = {"delivered": 0, "rejected": 0, "dropped": 0}
        for (sink, what, _), n in self.outbox.counts().items():
            if sink == self.name and what in totals:
                totals[what] += n
        return {
            "state": self.state,
            "backlog": self.outbox.backlog(self.name),
            "oldest_s": self.outbox.oldest_age(self.name),
            "last_error": self.last_error,
            "failing_since": self.failing_since,
            **totals,
        }


# --------------------------------------------------------------------------- outputs


class _Collector:
    """Prometheus view of the outputs: live backlog from the file, totals that survive restarts."""

    def __init__(self, outputs: Outputs) -> None:
        self.outputs = outputs

    def describe(self) -> list[Any]:
        return []  # scraped live; nothing to check at registration

    def collect(self) -> Iterator[Any]:
        ob = self.outputs.outbox
        backlog = GaugeMetricFamily(
            "boutline_sink_backlog", "facts not yet delivered", labels=["sink"]
        )
        oldest = GaugeMetricFamily(
            "boutline_sink_oldest_seconds", "age of the oldest undelivered fact", labels=["sink"]
        )
        up = GaugeMetricFamily(
            "boutline_sink_up", "1 while the sink accepts writes", labels=["sink"]
        )
        for fw in self.outputs.forwarders:
            backlog.add_metric([fw.name], ob.backlog(fw.name))
            oldest.add_metric([fw.name], ob.oldest_age(fw.name) or 0.0)
            up.add_metric([fw.name], 1.0 if fw.state == "ok" else 0.0)
        fams = {
            "delivered": CounterMetricFamily(
                "boutline_sink_delivered", "facts the sink acknowledged", labels=["sink"]
            ),
            "rejected": CounterMetricFamily(
                "boutline_sink_rejected",
                "facts set aside as refused, by cause",
                labels=["sink", "cause"],
            ),
            "dropped": CounterMetricFamily(
                "boutline_outbox_dropped",
                "undelivered facts dropped at the outbox cap",
                labels=["sink"],
            ),
        }
        for (sink, what, cause), n in sorted(ob.counts().items()):
            if what in fams:
                fams[what].add_metric([sink, cause] if what == "rejected" else [sink], n)
        held = GaugeMetricFamily("boutline_outbox_bytes", "bytes of facts held in the outbox")
        held.add_metric([], ob.held_bytes())
        yield from (backlog, oldest, up, *fams.values(), held)
        yield from self.outputs.metrics.latency.collect()
        yield from self.outputs.metrics.failures.collect()


class Outputs:
    """The outbox and its forwarders: what the daemon attaches to the store, starts and stops.

    With a ``registry`` (e.g. ``Telemetry.registry``) the sink figures appear in /metrics,
    and every ``stats_every_s`` a ``gateway_stats`` fact made from the registry's pipeline
    counters is queued for the sinks.
    """

    def __init__(
        self,
        outbox: Outbox,
        sinks: Sequence[tuple[Sink, dict[str, Any]]],
        registry: CollectorRegistry | None = None,
        *,
        stats_every_s: float = _STATS_EVERY_S,
    ) -> None:
        self.outbox = outbox
        self.metrics = SinkMetrics()
        self.forwarders = [Forwarder(outbox, s, metrics=self.metrics, **o) for s, o in sinks]
        self.registry = registry
        self.stats_every_s = stats_every_s
        self.started_at = time.monotonic()
        self._stats_stop = threading.Event()
        self._stats_thread: threading.Thread | None = None
        self._collector = _Collector(self)
        if registry is not None:
            registry.register(self._collector)
        self._live: queue.Queue[list[Record] | None] = queue.Queue(maxsize=_LIVE_MAX)
        self._live_thread: threading.Thread | None = None
        self.live_sent = self.live_lost = 0

    def publish_live(self, events: Sequence[Any]) -> int:
        """Hand facts the store could not take (disk full) straight to the sinks that need no
        store (``sink.live``: MQTT), best effort, from a thread of their own; how many taken.

        The store keeps such facts and queues them once it can write again, so these sinks
        may get them twice (MQTT delivery is at least once anyway); the others get them then.
        """
        sinks = [fw.sink for fw in self.forwarders if getattr(fw.sink, "live", False)]
        if not sinks or not events:
            return 0
        now = self.outbox.clock()
        batch = []
        for e in events:
            try:
                fact = json.loads(json.dumps(fact_of(e), default=_json_default))
            except (TypeError, ValueError):
                continue  # not a fact; the store's own path reports those
            batch.append(Record(0, fact["kind"], now, fact))
        if self._live_thread is None:
            self._live_thread = threading.Thread(
                target=self._live_loop, args=(sinks,), name="outputs-live", daemon=True
            )
            self._live_thread.start()
        try:
            self._live.put_nowait(batch)
        except queue.Full:
            self.live_lost += len(batch)
            return 0
        return len(batch)

    def _live_loop(self, sinks: list[Sink]) -> None:
        failing = False
        while (batch := self._live.get()) is not None:
            for sink in sinks:
                try:
                    sink.write(batch)
                except SinkError as exc:  # best effort: the outbox delivers them later
                    self.live_lost += len(batch)
                    if not failing:
                        log.warning(
                            "%s: facts the store could not take not sent: %s", sink.name, exc
                        )
                    failing = True
                else:
                    self.live_sent += len(batch)
                    failing = False

    def stats(self) -> GatewayStats:
        """Pipeline totals from the registry (gateway/telemetry.py names) and the backlog."""
        total = self._registry_total
        return GatewayStats(
            t=self.outbox.clock(),
            frames_in=int(total("boutline_frames_in_total")),
            rejects=int(total("boutline_rejects_total")),
            windows=int(total("boutline_windows_classified_total")),
            events=int(total("boutline_events_total")),
            inference_s=total("boutline_inference_seconds_sum"),
            backlog=max((self.outbox.backlog(f.name) for f in self.forwarders), default=0),
            uptime_s=time.monotonic() - self.started_at,
        )

    def _registry_total(self, sample: str) -> float:
        """Sum of a sample over all its labels; 0 when the registry does not have it."""
        if self.registry is None:
            return 0.0
        return float(
            sum(s.value for m in self.registry.collect() for s in m.samples if s.name == sample)
        )

    def _stats_loop(self) -> None:
        while not self._stats_stop.wait(self.stats_every_s):
            try:
                self.outbox.put([self.stats()])
            except StoreError as exc:  # figures are not worth stopping for; say so, go on
                log.warning("gateway stats not queued: %s", exc)

    @classmethod
    def from_settings(
        cls,
        settings: Settings,
        db_path: str | Path,
        *,
        registry: CollectorRegistry | None = None,
        sinks: Sequence[tuple[Sink, dict[str, Any]]] | None = None,
    ) -> Outputs:
        """Sinks per the settings (InfluxDB v1/v2, MQTT out) on the outbox of ``db_path``."""
        pairs = list(sinks_from_settings(settings) if sinks is None else sinks)
        outbox = Outbox(
            db_path,
            sinks=[s.name for s, _ in pairs],
            site=settings.site.id,
            max_mb=settings.store.outbox_max_mb,
        )
        return cls(outbox, pairs, registry)

    @property
    def listener(self) -> Callable[[sqlite3.Connection, Sequence[Any]], None]:
        """For ``Store.add_listener``: queues events in the store's transaction."""
        return self.outbox.listener

    def start(self, wait_s: float = 5.0) -> list[str]:
        """Start every forwarder; wait up to ``wait_s`` for their first check; return problems."""
        for fw in self.forwarders:
            fw.start()
        if self.registry is not None and self._stats_thread is None:
            self._stats_thread = threading.Thread(
                target=self._stats_loop, name="gateway-stats", daemon=True
            )
            self._stats_thread.start()
        deadline = time.monotonic() + wait_s
        for fw in self.forwarders:
            fw.first_result.wait(max(0.0, deadline - time.monotonic()))
        return [f"{fw.name}: {fw.last_error}" for fw in self.forwarders if fw.state == "failing"]

    def stop(self, timeout_s: float = 15.0) -> None:
        self._stats_stop.set()
        if self._stats_thread is not None:
            self._stats_thread.join(timeout_s)
        if self._live_thread is not None:
            with contextlib.suppress(queue.Full):
                self._live.put(None, timeout=timeout_s)
            self._live_thread.join(timeout_s)
        for fw in self.forwarders:
            fw.request_stop()
        for fw in self.forwarders:
            fw.stop(timeout_s)
        if self.registry is not None:
            self.registry.unregister(self._collector)
            self.registry = None
        self.outbox.close()

    def status(self) -> dict[str, dict[str, Any]]:
        return {fw.name: fw.status() for fw in self.forwarders}


def sinks_from_settings(settings: Settings) -> list[tuple[Sink, dict[str, Any]]]:
    """(sink, forwarder options) for every output the settings enable."""
    out: list[tuple[Sink, dict[str, Any]]] = []
    ix = settings.influx
    if ix.enabled:
        opts = {
            "batch_size": ix.batch_size,
            "flush_interval_s": ix.flush_interval_s,
            "retry_max_s": ix.retry_max_s,
        }
        if ix.api == "v1":
            from .sink_influx_v1 import InfluxV1Sink

            out.append((InfluxV1Sink.from_settings(settings), opts))
        else:
            from .sink_influx_v2 import InfluxV2Sink

            out.append((InfluxV2Sink.from_settings(settings), opts))
    if settings.outputs.mqtt:
        from .sink_mqtt import MqttSink

        # Barn displays want the state now: no age batching; reconnect like the ingest side.
        mq = settings.mqtt
        opts = {
            "batch_size": 200,
            "flush_interval_s": 0.0,
            "retry_min_s": mq.reconnect_min_s,
            "retry_max_s": mq.reconnect_max_s,
        }
        out.append((MqttSink.from_settings(settings), opts))
    return out


# --------------------------------------------------------------------------- standalone


def main(argv: Sequence[str] | None = None) -> int:
    """Run the forwarders of a store file until SIGTERM/SIGINT (see the module docstring)."""
    from .config import load_settings
    from .errors import BoutlineError

    ap = argparse.ArgumentParser(
        prog="python -m gateway.outbox",
        description="Deliver the outbox of a Boutline store file to the configured sinks.",
        epilog="Example: python -m gateway.outbox --db ~/.local/share/boutline/boutline.db"
        " --config boutline.toml",
    )
    ap.add_argument("--db", required=True, help="the store's SQLite file")
    ap.add_argument("--config", default=None, help="TOML config (env overrides apply)")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s")
    try:
        outputs = Outputs.from_settings(load_settings(args.config), args.db)
    except BoutlineError as exc:
        print(f"Error: {exc}", file=sys.stderr)
        return 1
    stop = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stop.set())
    outputs.start()
    while not stop.wait(1.0):
        pass
    outputs.stop()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
