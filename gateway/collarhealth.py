"""Collar health: frame rate, frame loss, battery, last seen and orientation per collar.

The tracker sees every accepted frame (``update``) and the pipeline's per-window mean
gravity (``add_gravity``). It keeps, per collar:

- last seen (gateway clock), first seen, frames received, duplicates;
- frame loss from sequence numbers: a forward jump of ``k`` means ``k - 1`` frames were
  lost; ``seq`` wraps at 2^32 (DESIGN.md, collar frames); a jump backwards by more than half
  the range is a collar restart, which starts a new count rather than a huge loss;
- the frame rate and loss share over the last ``window_s`` (one-minute buckets);
- the last battery voltage;
- the collar's roll about the neck per hour, as a vector sum of (gy, gz) so that windows
  with the head straight down (roll undefined) weigh little (roll = atan2(gy, gz),
  NXP AN3461, FIELD.md methods).

``snapshot(now)`` gives one :class:`CollarStatus` fact per collar; ``save``/``load`` keep the
tracker in the store's database across restarts.

>>> import numpy as np
>>> from gateway.types import Frame
>>> ch = CollarHealth()
>>> acc = np.zeros((10, 3), np.float32)
>>> for seq in (1, 2, 5, 6):  # frames 3 and 4 never arrived
...     ch.update(Frame("c1", seq, 100.0 + seq, 10.0, acc, 3.9, 100.0 + seq), animal="cow-1")
>>> s = ch.snapshot(107.0)[0]
>>> s.frames, s.lost, round(s.loss, 3), s.battery_v, s.last_seen
(4, 2, 0.333, 3.9, 106.0)
"""

from __future__ import annotations

import math
import sqlite3
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from .analyticsdb import animal_clause, create_tables
from .lineprotocol import SCHEMA, Point, register_converter
from .types import CollarGravity, Frame

__all__ = ["CollarHealth", "CollarStatus", "CollarTrack"]

_SEQ_MOD = 2**32
_BUCKET_S = 60.0
# A step back larger than this is a collar restart, not a late frame (reordering spans
# seconds, i.e. a handful of frames; common practice, no source).
_RESTART_BACK = 1024
HOUR_S = 3600.0


@dataclass(slots=True)
class CollarStatus:
    """Health of one collar at one instant (a fact for the sinks and ``report collars``)."""

    collar_id: str
    animal: str
    at: float  # when this status was taken
    first_seen: float
    last_seen: float
    frames: int  # received since first seen
    lost: int  # missing sequence numbers since first seen
    duplicates: int
    frame_rate_hz: float  # over the recent window
    loss: float  # lost share over the recent window, 0..1
    battery_v: float | None
    battery_at: float | None
    roll_deg: float | None  # roll about the neck in the last hour with gravity data
    recent_frames: int = 0  # received over the recent window
    kind: str = field(default="collar_health", init=False)

    @property
    def silent_s(self) -> float:
        return max(self.at - self.last_seen, 0.0)

    def to_json(self) -> dict[str, Any]:
        return {
            "collar": self.collar_id,
            "animal": self.animal,
            "at": self.at,
            "first_seen": self.first_seen,
            "last_seen": self.last_seen,
            "silent_s": round(self.silent_s, 3),
            "frames": self.frames,
            "lost": self.lost,
            "duplicates": self.duplicates,
            "frame_rate_hz": round(self.frame_rate_hz, 4),
            "loss": round(self.loss, 4),
            "battery_v": self.battery_v,
            "battery_at": self.battery_at,
            "roll_deg": None if self.roll_deg is None else round(self.roll_deg, 2),
            "recent_frames": self.recent_frames,
        }


@dataclass(slots=True)
class CollarTrack:
    """Running state of one collar."""

    collar_id: str
    animal: str = ""
    first_seen: float = 0.0
    last_seen: float = 0.0
    last_seq: int | None = None
    frames: int = 0
    lost: int = 0
    duplicates: int = 0
    battery_v: float | None = None
    battery_at: float | None = None
    # recent buckets: minute index -> [frames, lost]
    recent: dict[int, list[int]] = field(default_factory=dict)
    # hour index -> [sum gy, sum gz, windows]
    roll_hours: dict[int, list[float]] = field(default_factory=dict)
    dirty_hours: set[int] = field(default_factory=set)  # not saved since they changed

    def roll_deg(self, h0: int, h1: int, min_windows: int = 1) -> float | None:
        """Roll (degrees) over hours ``[h0, h1)``: angle of the summed (gy, gz) vector."""
        sy = sz = n = 0.0
        for h in range(h0, h1):
            b = self.roll_hours.get(h)
            if b:
                sy, sz, n = sy + b[0], sz + b[1], n + b[2]
        if n < min_windows or (sy == 0.0 and sz == 0.0):
            return None
        return math.degrees(math.atan2(sy, sz))


class CollarHealth:
    """Per-collar health from frames and gravity windows; see the module docstring."""

    def __init__(self, *, window_s: float = 600.0, roll_keep_h: int = 96) -> None:
        self.window_s = float(window_s)
        self.roll_keep_h = int(roll_keep_h)
        self.tracks: dict[str, CollarTrack] = {}

    def _track(self, collar_id: str) -> CollarTrack:
        tr = self.tracks.get(collar_id)
        if tr is None:
            tr = self.tracks[collar_id] = CollarTrack(collar_id)
        return tr

    def update(self, frame: Frame, *, animal: str = "", now: float | None = None) -> None:
        """Count one accepted frame. ``now`` defaults to its receive time (else its end)."""
        seen = float(now if now is not None else (frame.received_at or frame.t_end))
        tr = self._track(frame.collar_id)
        if animal:
            tr.animal = animal
        if tr.frames == 0:
            tr.first_seen = seen
        tr.last_seen = max(tr.last_seen, seen)
        seq = int(frame.seq) % _SEQ_MOD
        lost = 0
        if tr.last_seq is None:
            tr.last_seq = seq
        else:
            step = (seq - tr.last_seq) % _SEQ_MOD
            if step == 0:
                tr.duplicates += 1
                return
            if step < _SEQ_MOD // 2:
                lost = step - 1
                tr.last_seq = seq
            elif (tr.last_seq - seq) % _SEQ_MOD > _RESTART_BACK:
                tr.last_seq = seq  # the collar restarted its count: no loss, count afresh
            elif tr.lost > 0:
                lost = -1  # a late frame: it was counted lost when the newer one came
        tr.frames += 1
        tr.lost += lost
        b = tr.recent.setdefault(int(seen // _BUCKET_S), [0, 0])
        b[0] += 1
        b[1] += lost
        if frame.battery_v is not None and math.isfinite(frame.battery_v):
            tr.battery_v = float(frame.battery_v)
            tr.battery_at = seen
        if len(tr.recent) > self.window_s / _BUCKET_S + 2:
            self._trim(tr, seen)

    def update_many(self, frames: Iterable[Frame], animals: Iterable[str] | None = None) -> None:
        """``update`` for a batch; ``animals`` (optional) pairs with ``frames``."""
        if animals is None:
            for f in frames:
                self.update(f)
        else:
            for f, a in zip(frames, animals, strict=True):
                self.update(f, animal=a)

    def add_gravity(self, g: CollarGravity) -> None:
        """Fold one window's mean gravity into the collar's hourly roll bins."""
        gy, gz = float(g.g[1]), float(g.g[2])
        if not (math.isfinite(gy) and math.isfinite(gz)):
            return
        tr = self._track(g.collar_id)
        if g.animal:
            tr.animal = g.animal
        h = int((g.t + g.duration_s / 2) // HOUR_S)
        b = tr.roll_hours.setdefault(h, [0.0, 0.0, 0.0])
        b[0] += gy
        b[1] += gz
        b[2] += 1.0
        tr.dirty_hours.add(h)
        if len(tr.roll_hours) > self.roll_keep_h + 8:
            for old in [k for k in tr.roll_hours if k < h - self.roll_keep_h]:
                del tr.roll_hours[old]

    def _trim(self, tr: CollarTrack, now: float) -> None:
        first = int(now // _BUCKET_S) - int(self.window_s // _BUCKET_S)
        for k in [k for k in tr.recent if k < first]:
            del tr.recent[k]

    def status(self, collar_id: str, now: float) -> CollarStatus | None:
        tr = self.tracks.get(collar_id)
        if tr is None or tr.frames == 0 and not tr.roll_hours:
            return None
        self._trim(tr, now)
        # whole buckets after ``lo`` up to the one in progress
        lo = int(now // _BUCKET_S) - int(self.window_s // _BUCKET_S)
        got = sum(v[0] for k, v in tr.recent.items() if k > lo)
        lost = sum(v[1] for k, v in tr.recent.items() if k > lo)
        start = max((lo + 1) * _BUCKET_S, tr.first_seen)
        span = max(now - start, 1.0) if tr.frames else 0.0
        h = int(now // HOUR_S)
        return CollarStatus(
            collar_id=tr.collar_id,
            animal=tr.animal,
            at=now,
            first_seen=tr.first_seen,
            last_seen=tr.last_seen,
            frames=tr.frames,
            lost=tr.lost,
            duplicates=tr.duplicates,
            frame_rate_hz=got / span if span > 0 else 0.0,
            loss=lost / (got + lost) if got + lost else 0.0,
            battery_v=tr.battery_v,
            battery_at=tr.battery_at,
            roll_deg=tr.roll_deg(h - 1, h + 1),
            recent_frames=got,
        )

    def snapshot(self, now: float) -> list[CollarStatus]:
        """Status of every collar, ordered by collar id."""
        out = [self.status(c, now) for c in sorted(self.tracks)]
        return [s for s in out if s is not None]

    # -- persistence -------------------------------------------------------------------
    _SCHEMA = """
    CREATE TABLE IF NOT EXISTS collar_health (
        collar TEXT PRIMARY KEY,
        animal TEXT NOT NULL DEFAULT '',
        first_seen REAL NOT NULL,
        last_seen REAL NOT NULL,
        last_seq INTEGER,
        frames INTEGER NOT NULL,
        lost INTEGER NOT NULL,
        duplicates INTEGER NOT NULL,
        frame_rate_hz REAL NOT NULL DEFAULT 0,
        loss REAL NOT NULL DEFAULT 0,
        battery_v REAL,
        battery_at REAL,
        roll_deg REAL,
        updated_at REAL NOT NULL
    ) WITHOUT ROWID;
    CREATE TABLE IF NOT EXISTS collar_roll_hours (
        collar TEXT NOT NULL,
        hour INTEGER NOT NULL,
        sum_gy REAL NOT NULL,
        sum_gz REAL NOT NULL,
        windows REAL NOT NULL,
        PRIMARY KEY (collar, hour)
    ) WITHOUT ROWID;
    """

    @classmethod
    def ensure_schema(cls, conn: sqlite3.Connection) -> None:
        create_tables(conn, cls._SCHEMA, "collar-health")

    def save(self, conn: sqlite3.Connection, now: float) -> list[CollarStatus]:
        """Write every collar's status and roll bins (inside the caller's transaction)."""
        snap = self.snapshot(now)
        conn.executemany(
            "INSERT OR REPLACE INTO collar_health (collar, animal, first_seen, last_seen,"
            " last_seq, frames, lost, duplicates, frame_rate_hz, loss, battery_v, battery_at,"
            " roll_deg, updated_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [
                (
                    s.collar_id,
                    s.animal,
                    s.first_seen,
                    s.last_seen,
                    self.tracks[s.collar_id].last_seq,
                    s.frames,
                    s.lost,
                    s.duplicates,
                    s.frame_rate_hz,
                    s.loss,
                    s.battery_v,
                    s.battery_at,
                    s.roll_deg,
                    now,
                )
                for s in snap
            ],
        )
        rows = []
        for c, tr in self.tracks.items():
            rows += [(c, h, *tr.roll_hours[h]) for h in tr.dirty_hours if h in tr.roll_hours]
            tr.dirty_hours.clear()
        conn.executemany("INSERT OR REPLACE INTO collar_roll_hours VALUES (?, ?, ?, ?, ?)", rows)
        keep_from = int(now // HOUR_S) - self.roll_keep_h
        conn.execute("DELETE FROM collar_roll_hours WHERE hour < ?", (keep_from,))
        return snap

    def unsaved(self) -> None:
        """The last save was rolled back: write every roll bin again at the next one."""
        for tr in self.tracks.values():
            tr.dirty_hours.update(tr.roll_hours)

    def load(self, conn: sqlite3.Connection) -> None:
        """Restore collars saved by ``save`` (counters, battery, roll history)."""
        for row in conn.execute(
            "SELECT collar, animal, first_seen, last_seen, last_seq, frames, lost, duplicates,"
            " battery_v, battery_at FROM collar_health"
        ):
            tr = self._track(row[0])
            (tr.animal, tr.first_seen, tr.last_seen, tr.last_seq, tr.frames, tr.lost) = row[1:7]
            tr.duplicates, tr.battery_v, tr.battery_at = row[7:10]
        for c, h, sy, sz, n in conn.execute("SELECT * FROM collar_roll_hours"):
            self._track(c).roll_hours[int(h)] = [sy, sz, n]

    @staticmethod
    def read(
        conn: sqlite3.Connection, *, animal: str | Iterable[str] | None = None
    ) -> list[CollarStatus]:
        """Saved statuses (for reports), ordered by collar."""
        sql = (
            "SELECT collar, animal, updated_at, first_seen, last_seen, frames, lost, duplicates,"
            " frame_rate_hz, loss, battery_v, battery_at, roll_deg FROM collar_health"
        )
        args: list[Any] = []
        if animal is not None:
            cond, args = animal_clause("animal", animal)
            sql += f" WHERE {cond}"
        return [CollarStatus(*r) for r in conn.execute(sql + " ORDER BY collar", args)]


def _collar_points(fact: dict[str, Any], site: str) -> list[Point]:
    """A CollarStatus fact as one ``collar_health`` point (docs/line-protocol.md)."""
    tags = {"site": site, "collar": fact["collar_id"], "animal": fact["animal"] or "unassigned"}
    fields = {
        "frame_rate_hz": fact["frame_rate_hz"],
        "loss": fact["loss"],
        "battery_v": fact.get("battery_v"),
        "last_seen": fact["last_seen"],
        "frames": fact.get("recent_frames", 0),
    }
    return [SCHEMA["collar_health"].point(fact["at"], tags, fields)]


register_converter("collar_health", _collar_points)
