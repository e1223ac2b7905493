"""The embedded store: SQLite in WAL mode, the source of truth for reports.

One file in the data directory holds animals, collar assignments, closed bouts, no-data
stretches, each animal's current state and the tracker's snapshot (so a restart resumes open
bouts: no bout is lost and none is counted twice), plus a schema version. Layout, growth
figures and the restart rules are in docs/store.md.

Writes come in batches, one transaction each (:meth:`Store.write_events`). Listeners added
with :meth:`Store.add_listener` run inside that same transaction with the same connection,
so whatever they write (the outputs' outbox) commits or rolls back with the events.

A batch that cannot be written (disk full, a listener failing) is kept in memory, up to
``backlog_max`` events, and written first with the next batch; the caller keeps classifying.
Errors are translated from sqlite3: :class:`~gateway.errors.StoreFullError` when the disk (or
the configured size cap) is full, :class:`~gateway.errors.StoreError` otherwise, with what to do.

>>> import tempfile, pathlib
>>> from gateway.types import BoutClosed, StateChanged
>>> tmp = pathlib.Path(tempfile.mkdtemp())
>>> with Store.open(tmp / "boutline.db") as store:
...     store.write_events([StateChanged("cow1", "resting", 0.0, 0.9),
...                         BoutClosed("cow1", "resting", 0.0, 3600.0, 0.9)])
...     [(b.behaviour, b.duration_s) for b in store.bouts("cow1")]
[('resting', 3600.0)]
"""

from __future__ import annotations

import json
import math
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any

from .errors import StoreError, StoreFullError
from .types import NO_DATA, BoutClosed, StateChanged

__all__ = ["SCHEMA_VERSION", "STORE_FILE", "Listener", "Store"]

SCHEMA_VERSION = 1
STORE_FILE = "boutline.db"
Listener = Callable[[sqlite3.Connection, list[Any]], None]

# sqlite3 primary result codes (https://www.sqlite.org/rescode.html).
_SQLITE_CORRUPT, _SQLITE_FULL, _SQLITE_CANTOPEN, _SQLITE_NOTADB = 11, 13, 14, 26
_SQLITE_READONLY, _SQLITE_BUSY, _SQLITE_IOERR = 8, 5, 10

_SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL) WITHOUT ROWID;
CREATE TABLE behaviours (id INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE);
CREATE TABLE animals (
    id INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE, first_seen REAL, last_seen REAL
);
CREATE TABLE assignments (
    collar TEXT NOT NULL, animal TEXT NOT NULL, valid_from REAL NOT NULL, valid_to REAL,
    PRIMARY KEY (collar, valid_from)
) WITHOUT ROWID;
CREATE TABLE bouts (
    animal INTEGER NOT NULL, start REAL NOT NULL, end REAL NOT NULL,
    behaviour INTEGER NOT NULL, confidence REAL NOT NULL, no_data_s REAL NOT NULL,
    PRIMARY KEY (animal, start)
) WITHOUT ROWID;
CREATE TABLE no_data (
    animal INTEGER NOT NULL, start REAL NOT NULL, end REAL NOT NULL, no_data_s REAL NOT NULL,
    PRIMARY KEY (animal, start)
) WITHOUT ROWID;
CREATE TABLE current_state (
    animal INTEGER PRIMARY KEY, behaviour TEXT, since REAL, confidence REAL, previous TEXT,
    updated REAL, tracker TEXT
);
"""


def _code(exc: sqlite3.Error) -> int:
    return int(getattr(exc, "sqlite_errorcode", -1)) & 0xFF


def _translate(exc: sqlite3.Error, path: Path, doing: str) -> StoreError:
    """One sqlite3 error as the project's error, with what to do about it."""
    code, msg = _code(exc), str(exc)
    if code == _SQLITE_FULL or "full" in msg:
        return StoreFullError(
            f"store {path} is full while {doing}: free disk space, lower"
            " store.retention_days, or raise the store size cap; classification goes on"
        )
    if code in (_SQLITE_CORRUPT, _SQLITE_NOTADB) or "malformed" in msg or "not a database" in msg:
        return StoreError(
            f"store {path} is damaged or not a Boutline store ({msg}); stop the gateway,"
            " move the file aside (it starts afresh) or restore a backup"
        )
    if code == _SQLITE_CANTOPEN:
        return StoreError(
            f"cannot open store {path} ({msg}); check store.data_dir exists and is writable"
        )
    if code == _SQLITE_READONLY:
        return StoreError(f"store {path} is read-only ({msg}); check file permissions")
    if code == _SQLITE_BUSY:
        return StoreError(
            f"store {path} is locked by another process ({msg}); is a second gateway running?"
        )
    return StoreError(f"store {path} failed while {doing}: {msg}")


class Store:
    """A Boutline store file. Use :meth:`open`; thread-safe (one writer lock)."""

    def __init__(self, conn: sqlite3.Connection, path: Path, readonly: bool, backlog_max: int):
        self.retention_s: float | None = None
        self._pruned_at = -math.inf  # data time of the last automatic prune
        self._conn = conn
        self.path = path
        self.readonly = readonly
        self.backlog_max = backlog_max
        self._lock = threading.RLock()
        self._listeners: list[Listener] = []
        self._backlog: list[Any] = []
        self._backlog_states: dict[str, Any] = {}
        self._animal_ids: dict[str, int] = {}
        self._behaviour_ids: dict[str, int] = {}
        self.dropped = 0  # events given up because the backlog overflowed

    # -- opening -----------------------------------------------------------------------------

    @classmethod
    def open(
        cls,
        path: str | Path,
        *,
        readonly: bool = False,
        check: bool = True,
        checkpoint_pages: int = 1000,
        max_mb: float | None = None,
        backlog_max: int = 100_000,
        retention_days: float | None = None,
    ) -> Store:
        """Open (creating when needed) the store at ``path``, a file or a data directory.

        ``check`` runs SQLite's quick integrity check (one pass over the file). ``max_mb``
        caps the file size: past it writes raise StoreFullError, as a full disk does.
        ``retention_days``: once a day (by the data's own clock) bouts and no-data stretches
        that ended longer ago are deleted inside a write; None keeps everything.
        """
        p = Path(path).expanduser()
        if p.is_dir():
            p = p / STORE_FILE
        if readonly and not p.is_file():
            raise StoreError(f"store {p} does not exist; run the gateway first or check --data-dir")
        try:
            if not readonly:
                p.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(
                f"cannot create data directory {p.parent} ({exc.strerror}); check store.data_dir"
            ) from exc
        conn = None
        try:
            uri = f"file:{p}?mode=ro" if readonly else f"file:{p}"
            conn = sqlite3.connect(uri, uri=True, isolation_level=None, check_same_thread=False)
            conn.execute("PRAGMA busy_timeout = 5000")
            if check:
                row = conn.execute("PRAGMA quick_check").fetchone()
                if row is None or row[0] != "ok":
                    raise sqlite3.DatabaseError(f"database disk image is malformed: {row}")
            if not readonly:
                mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    raise StoreError(
                        f"store {p}: SQLite refused WAL mode ({mode}); use a local disk"
                    )
                conn.execute("PRAGMA synchronous = NORMAL")  # durable at checkpoints, safe in WAL
                conn.execute(f"PRAGMA wal_autocheckpoint = {int(checkpoint_pages)}")
            store = cls(conn, p, readonly, backlog_max)
            if retention_days is not None:
                if not (math.isfinite(retention_days) and retention_days > 0):
                    raise StoreError(
                        f"retention_days must be a positive number, not {retention_days!r}"
                    )
                store.retention_s = retention_days * 86400.0
            store._init_schema()
            if max_mb is not None:
                store.set_max_mb(max_mb)
            return store
        except sqlite3.Error as exc:
            if conn is not None:
                conn.close()
            raise _translate(exc, p, "opening") from exc
        except StoreError:
            if conn is not None:
                conn.close()
            raise

    def _init_schema(self) -> None:
        c = self._conn
        tables = {r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if not tables:
            if self.readonly:
                raise StoreError(f"store {self.path} is empty; run the gateway first")
            # One script, one transaction: a crash never leaves half a schema behind.
            c.executescript(
                f"BEGIN IMMEDIATE;{_SCHEMA}"
                f"INSERT INTO meta VALUES ('schema_version', '{SCHEMA_VERSION}');"
                f"INSERT INTO meta VALUES ('created', '{time.time():.3f}');COMMIT;"
            )
            return
        if "meta" not in tables:
            raise StoreError(
                f"{self.path} is an SQLite file but not a Boutline store; give another path"
            )
        row = c.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        version = int(row[0]) if row and str(row[0]).isdigit() else -1
        if version > SCHEMA_VERSION:
            raise StoreError(
                f"store {self.path} has schema {version}, newer than this Boutline"
                f" ({SCHEMA_VERSION}); upgrade Boutline or use another data directory"
            )
        if version != SCHEMA_VERSION:
            raise StoreError(f"store {self.path} has an unknown schema version {row and row[0]!r}")
        self._animal_ids = {n: i for i, n in c.execute("SELECT id, name FROM animals")}
        self._behaviour_ids = {n: i for i, n in c.execute("SELECT id, name FROM behaviours")}

    def set_max_mb(self, max_mb: float | None) -> None:
        """Cap the file size (None: SQLite's own limit); writes past it raise StoreFullError."""
        page = self._conn.execute("PRAGMA page_size").fetchone()[0]
        pages = 4294967294 if max_mb is None else max(1, int(max_mb * 1e6 / page))
        self._conn.execute(f"PRAGMA max_page_count = {pages}")

    def close(self) -> None:
        """Checkpoint the WAL into the main file and close; safe to call twice."""
        with self._lock:
            if self._conn is None:
                return
            try:
                if not self.readonly:
                    self._conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            except sqlite3.Error:
                pass  # closing must not fail; the WAL is replayed at the next open
            self._conn.close()
            self._conn = None  # type: ignore[assignment]

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- writing -----------------------------------------------------------------------------

    def add_listener(self, fn: Listener) -> None:
        """Call ``fn(conn, events)`` inside every write transaction (after the events)."""
        self._listeners.append(fn)

    @property
    def pending(self) -> int:
        """Events kept in memory after a failed write, waiting for the next one."""
        return len(self._backlog)

    def write_events(
        self, events: Sequence[Any], states: Mapping[str, Mapping[str, Any]] | None = None
    ) -> None:
        """Write events (and tracker snapshots by animal) in one transaction.

        ``BoutClosed`` and ``StateChanged`` are stored; any other object in ``events`` (an
        alert, a budget) is only handed to the listeners, in the same transaction. On failure the batch is kept for the next call and the error is raised:
        StoreFullError when the disk or the size cap is full, StoreError otherwise.
        """
        if self.readonly:
            raise StoreError(f"store {self.path} was opened read-only")
        with self._lock:
            batch = self._backlog + list(events)
            all_states = {**self._backlog_states, **(states or {})}
            if not batch and not all_states:
                return
            try:
                with self._transaction("writing events") as c:
                    newest = self._write(c, batch, all_states)
                    pruned = self._auto_prune(c, newest)
                    for fn in self._listeners:
                        try:
                            fn(c, batch)
                        except (sqlite3.Error, StoreError):
                            raise
                        except Exception as exc:
                            raise StoreError(
                                f"a store listener failed ({type(exc).__name__}:"
                                f" {str(exc)[:200]}); the batch is kept and retried with the next"
                            ) from exc
            except BaseException:
                self._keep(batch, all_states)
                raise
            self._backlog, self._backlog_states = [], {}
            if pruned is not None:
                self._pruned_at = pruned

    def _auto_prune(self, c: sqlite3.Connection, newest: float) -> float | None:
        """Delete what is past retention, at most once a day of data time; the time or None."""
        if self.retention_s is None or not newest - self._pruned_at >= 86400.0:
            return None
        _delete_before(c, newest - self.retention_s)
        return newest

    @contextmanager
    def _transaction(self, doing: str) -> Iterator[sqlite3.Connection]:
        """BEGIN IMMEDIATE ... COMMIT; on any error roll back and translate sqlite3's."""
        c = self._conn
        if c is None:
            raise StoreError(f"store {self.path} is closed")
        try:
            c.execute("BEGIN IMMEDIATE")
            yield c
            c.execute("COMMIT")
        except BaseException as exc:
            if c.in_transaction:
                with suppress(sqlite3.Error):  # SQLite may have rolled back already (FULL does)
                    c.execute("ROLLBACK")
            # Ids handed out inside the rolled-back transaction are gone again: ask afresh.
            self._animal_ids, self._behaviour_ids = {}, {}
            if isinstance(exc, sqlite3.Error):
                raise _translate(exc, self.path, doing) from exc
            raise

    def write_states(self, states: Mapping[str, Mapping[str, Any]]) -> None:
        """Write tracker snapshots alone (periodic, and at shutdown)."""
        self.write_events([], states)

    def _keep(self, batch: list[Any], states: dict[str, Any]) -> None:
        over = len(batch) - self.backlog_max
        if over > 0:
            self.dropped += over
            batch = batch[over:]
        self._backlog, self._backlog_states = batch, states

    def _id(self, c: sqlite3.Connection, table: str, cache: dict[str, int], name: str) -> int:
        i = cache.get(name)
        if i is None:
            c.execute(f"INSERT OR IGNORE INTO {table}(name) VALUES (?)", (name,))
            i = c.execute(f"SELECT id FROM {table} WHERE name = ?", (name,)).fetchone()[0]
            cache[name] = i
        return i

    def _animal(self, c: sqlite3.Connection, name: str) -> int:
        return self._id(c, "animals", self._animal_ids, name)

    def _write(self, c: sqlite3.Connection, batch: list[Any], states: Mapping[str, Any]) -> float:
        """Insert a batch; return the newest event time in it (-inf when none)."""
        bouts, no_data, current, seen = [], [], {}, {}
        for e in batch:
            if isinstance(e, BoutClosed):
                if not (
                    _finite(e.start, e.end, e.mean_confidence, e.no_data_s) and e.end >= e.start
                ):
                    continue  # never store a bout that cannot be right
                a = self._animal(c, e.animal)
                if e.behaviour == NO_DATA:
                    no_data.append((a, e.start, e.end, e.no_data_s))
                else:
                    b = self._id(c, "behaviours", self._behaviour_ids, e.behaviour)
                    bouts.append((a, e.start, e.end, b, e.mean_confidence, e.no_data_s))
                lo, hi = seen.get(a, (e.start, e.end))
                seen[a] = (min(lo, e.start), max(hi, e.end))
            elif isinstance(e, StateChanged):
                if not _finite(e.since, e.confidence):
                    continue
                a = self._animal(c, e.animal)
                current[a] = (e.behaviour, e.since, e.confidence, e.previous)
                lo, hi = seen.get(a, (e.since, e.since))
                seen[a] = (min(lo, e.since), max(hi, e.since))
        now = time.time()
        c.executemany("INSERT OR REPLACE INTO bouts VALUES (?, ?, ?, ?, ?, ?)", bouts)
        c.executemany("INSERT OR REPLACE INTO no_data VALUES (?, ?, ?, ?)", no_data)
        c.executemany(
            "INSERT INTO current_state(animal, behaviour, since, confidence, previous, updated)"
            " VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT(animal) DO UPDATE SET"
            " behaviour=excluded.behaviour, since=excluded.since,"
            " confidence=excluded.confidence, previous=excluded.previous, updated=excluded.updated",
            [(a, *v, now) for a, v in current.items()],
        )
        c.executemany(
            "UPDATE animals SET first_seen = min(coalesce(first_seen, ?), ?),"
            " last_seen = max(coalesce(last_seen, ?), ?) WHERE id = ?",
            [(lo, lo, hi, hi, a) for a, (lo, hi) in seen.items()],
        )
        if states:
            rows = [
                (self._animal(c, name), json.dumps(s, separators=(",", ":")))
                for name, s in states.items()
            ]
            c.executemany(
                "INSERT INTO current_state(animal, tracker) VALUES (?, ?)"
                " ON CONFLICT(animal) DO UPDATE SET tracker=excluded.tracker",
                rows,
            )
        return max((hi for _, hi in seen.values()), default=-math.inf)

    def replace_assignments(self, rows: Iterable[tuple[str, str, float, float | None]]) -> None:
        """Replace every collar assignment: ``(collar, animal, valid_from, valid_to or None)``."""
        rows = list(rows)
        with self._lock, self._transaction("writing assignments") as c:
            c.execute("DELETE FROM assignments")
            c.executemany("INSERT INTO assignments VALUES (?, ?, ?, ?)", rows)
            for _, animal, _, _ in rows:
                self._animal(c, animal)

    def counts(self) -> dict[str, int]:
        """How many animals, bouts and no-data stretches the store holds."""
        (row,) = self._query(
            "SELECT (SELECT count(*) FROM animals), (SELECT count(*) FROM bouts),"
            " (SELECT count(*) FROM no_data)"
        )
        return dict(zip(("animals", "bouts", "no_data"), row, strict=True))

    def prune(self, before: float) -> int:
        """Delete bouts and no-data stretches that ended before ``before``; return how many."""
        with self._lock, self._transaction("pruning") as c:
            return _delete_before(c, before)

    # -- reading -----------------------------------------------------------------------------

    def _query(self, sql: str, args: Sequence[Any] = ()) -> list[tuple]:
        with self._lock:
            if self._conn is None:
                raise StoreError(f"store {self.path} is closed")
            try:
                return self._conn.execute(sql, args).fetchall()
            except sqlite3.Error as exc:
                raise _translate(exc, self.path, "reading") from exc

    def load_states(self) -> dict[str, dict[str, Any]]:
        """Tracker snapshots by animal, for ``HerdTracker.restore`` (unreadable ones skipped)."""
        out = {}
        for name, text in self._query(
            "SELECT a.name, s.tracker FROM current_state s JOIN animals a ON a.id = s.animal"
            " WHERE s.tracker IS NOT NULL"
        ):
            try:
                out[name] = json.loads(text)
            except ValueError:
                continue  # the tracker starts that animal afresh
        return out

    def _range(self, table: str, animal: str | None, start: float | None, end: float | None):
        where, args = [], []
        if animal is not None:
            where.append("a.name = ?")
            args.append(animal)
        if end is not None:
            where.append("t.start < ?")
            args.append(end)
        if start is not None:
            where.append("t.end > ?")
            args.append(start)
        return (" WHERE " + " AND ".join(where)) if where else "", args

    def bouts(
        self,
        animal: str | None = None,
        start: float | None = None,
        end: float | None = None,
        behaviour: str | None = None,
    ) -> list[BoutClosed]:
        """Closed bouts overlapping ``[start, end)``, by animal then start time."""
        where, args = self._range("bouts", animal, start, end)
        if behaviour is not None:
            where += (" AND " if where else " WHERE ") + "b.name = ?"
            args.append(behaviour)
        rows = self._query(
            "SELECT a.name, b.name, t.start, t.end, t.confidence, t.no_data_s FROM bouts t"
            " JOIN animals a ON a.id = t.animal JOIN behaviours b ON b.id = t.behaviour"
            f"{where} ORDER BY a.name, t.start",
            args,
        )
        return [BoutClosed(*r) for r in rows]

    def no_data(
        self, animal: str | None = None, start: float | None = None, end: float | None = None
    ) -> list[BoutClosed]:
        """No-data stretches overlapping ``[start, end)`` as bouts of ``NO_DATA``."""
        where, args = self._range("no_data", animal, start, end)
        rows = self._query(
            "SELECT a.name, t.start, t.end, t.no_data_s FROM no_data t"
            f" JOIN animals a ON a.id = t.animal{where} ORDER BY a.name, t.start",
            args,
        )
        return [BoutClosed(a, NO_DATA, s, e, 0.0, nd) for a, s, e, nd in rows]

    def current_states(self) -> list[StateChanged]:
        """Each animal's current behaviour (as of the last write), by animal."""
        rows = self._query(
            "SELECT a.name, s.behaviour, s.since, s.confidence, s.previous FROM current_state s"
            " JOIN animals a ON a.id = s.animal WHERE s.behaviour IS NOT NULL ORDER BY a.name"
        )
        return [StateChanged(*r) for r in rows]

    def animals(self) -> list[tuple[str, float | None, float | None]]:
        """``(animal, first_seen, last_seen)`` for every animal known to the store."""
        return self._query("SELECT name, first_seen, last_seen FROM animals ORDER BY name")

    def assignments(self) -> list[tuple[str, str, float, float | None]]:
        return self._query("SELECT * FROM assignments ORDER BY collar, valid_from")

    def schema_version(self) -> int:
        return int(self._query("SELECT value FROM meta WHERE key='schema_version'")[0][0])

    def size_bytes(self) -> int:
        """Bytes on disk: the main file plus the WAL."""
        wal = self.path.with_name(self.path.name + "-wal")
        return sum(f.stat().st_size for f in (self.path, wal) if f.exists())


def _delete_before(c: sqlite3.Connection, before: float) -> int:
    n = c.execute("DELETE FROM bouts WHERE end < ?", (before,)).rowcount
    return n + c.execute("DELETE FROM no_data WHERE end < ?", (before,)).rowcount


def _finite(*xs: float) -> bool:
    try:
        return all(math.isfinite(x) for x in xs)
    except TypeError:
        return False
