"""Which animal wears which collar, when: assignments with validity periods.

A collar moved to another cow on a given date keeps each cow's history apart: a frame is
given to the animal whose assignment covers the frame's time. Periods are half open,
``[valid_from, valid_to)``; an empty ``to`` is open-ended. One collar never has two animals
at once, and one animal never wears two collars at once (checked at load).

Files, CSV (header ``collar,animal,from,to``; ISO 8601 times, UTC when no offset is given)::

    collar,animal,from,to
    C0001,cow-17,2026-01-01T00:00:00Z,2026-03-01T00:00:00Z
    C0001,cow-22,2026-03-01T00:00:00Z,

or TOML (TOML datetimes or ISO strings)::

    [[assignment]]
    collar = "C0001"
    animal = "cow-17"
    from = 2026-01-01T00:00:00Z

Collars not in the file are adopted as animals named after the collar, or refused
(``site.unknown_collars``). At most ``limits.max_collars`` collars are tracked; frames from
further new collars are refused and counted as overflow.

>>> reg = Registry([Assignment("C1", "cow-1", 0.0, 100.0), Assignment("C1", "cow-2", 100.0)])
>>> reg.resolve("C1", 50.0), reg.resolve("C1", 150.0), reg.resolve("C9", 1.0)
('cow-1', 'cow-2', 'C9')
"""

from __future__ import annotations

import csv
import io
import math
import tomllib
from bisect import bisect_right
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .errors import DataError
from .wire import COLLAR_ID_RE, Reason, Rejection

__all__ = [
    "Assignment",
    "Registry",
    "load_assignments",
    "parse_assignments_csv",
    "parse_assignments_toml",
    "parse_time",
]

_MAX_FILE_BYTES = 20_000_000  # ~300k rows; a real herd file is a few kB
_MAX_ROWS = 1_000_000


@dataclass(frozen=True, slots=True)
class Assignment:
    """``collar`` is worn by ``animal`` from ``valid_from`` until ``valid_to`` (unix s)."""

    collar: str
    animal: str
    valid_from: float
    valid_to: float = math.inf

    def covers(self, t: float) -> bool:
        return self.valid_from <= t < self.valid_to


def parse_time(value: Any, where: str) -> float:
    """ISO 8601 text or a datetime to unix seconds; a time without offset is UTC."""
    if isinstance(value, datetime):
        dt = value
    elif isinstance(value, str):
        text = value.strip()
        if text.endswith(("Z", "z")):
            text = text[:-1] + "+00:00"
        try:
            dt = datetime.fromisoformat(text)
        except ValueError as exc:
            raise DataError(
                f"{where}: {value[:40]!r} is not an ISO 8601 time such as 2026-03-01T00:00:00Z"
            ) from exc
    else:
        raise DataError(f"{where}: expected an ISO 8601 time, got {type(value).__name__}")
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def _assignment(collar: Any, animal: Any, start: Any, end: Any, where: str) -> Assignment:
    if not isinstance(collar, str) or not COLLAR_ID_RE.fullmatch(collar.strip()):
        raise DataError(f"{where}: collar {str(collar)[:40]!r} is not [A-Za-z0-9_.-]{{1,64}}")
    if not isinstance(animal, str) or not COLLAR_ID_RE.fullmatch(animal.strip()):
        raise DataError(f"{where}: animal {str(animal)[:40]!r} is not [A-Za-z0-9_.-]{{1,64}}")
    if start is None or (isinstance(start, str) and not start.strip()):
        raise DataError(f"{where}: 'from' is empty; give the time the collar was fitted")
    t0 = parse_time(start, where)
    t1 = math.inf if end is None or (isinstance(end, str) and not end.strip()) else None
    if t1 is None:
        t1 = parse_time(end, where)
    if t1 <= t0:
        raise DataError(f"{where}: 'to' is not after 'from'")
    return Assignment(collar.strip(), animal.strip(), t0, t1)


def parse_assignments_csv(text: str, source: str = "assignments") -> list[Assignment]:
    """Rows of ``collar,animal,from,to``; blank lines and lines starting with # are skipped."""
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    reader = csv.reader(io.StringIO("\n".join(lines)))
    try:
        header = [h.strip().lower() for h in next(reader)]
    except StopIteration:
        return []
    except csv.Error as exc:
        raise DataError(f"{source}: not CSV ({exc})") from exc
    need = ["collar", "animal", "from", "to"]
    if header[:4] != need:
        raise DataError(
            f"{source}: header must be 'collar,animal,from,to', is {','.join(header)!r}"
        )
    out = []
    try:
        for i, row in enumerate(reader, start=2):
            if i > _MAX_ROWS:
                raise DataError(f"{source}: more than {_MAX_ROWS} rows")
            if len(row) < 3 or len(row) > 4:
                raise DataError(f"{source} line {i}: expected 4 fields, got {len(row)}")
            row = row + [""] * (4 - len(row))
            out.append(_assignment(row[0], row[1], row[2], row[3], f"{source} line {i}"))
    except csv.Error as exc:
        raise DataError(f"{source}: not CSV ({exc})") from exc
    return out


def parse_assignments_toml(text: str, source: str = "assignments") -> list[Assignment]:
    """``[[assignment]]`` tables with ``collar``, ``animal``, ``from`` and optional ``to``."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise DataError(f"{source}: not valid TOML ({exc})") from exc
    rows = data.get("assignment", [])
    if not isinstance(rows, list) or set(data) - {"assignment"}:
        raise DataError(f"{source}: expected only [[assignment]] tables")
    out = []
    for i, row in enumerate(rows, start=1):
        where = f"{source} assignment #{i}"
        if not isinstance(row, dict):
            raise DataError(f"{where}: not a table")
        extra = set(row) - {"collar", "animal", "from", "to"}
        if extra:
            raise DataError(f"{where}: unknown keys {sorted(extra)}")
        out.append(
            _assignment(row.get("collar"), row.get("animal"), row.get("from"), row.get("to"), where)
        )
    return out


def load_assignments(path: str | Path) -> list[Assignment]:
    """Read a CSV or TOML (by suffix ``.toml``) assignments file; raise DataError if unusable."""
    p = Path(path).expanduser()
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise DataError(
            f"cannot read assignments file {p}: {exc.strerror}; check site.assignments"
        ) from exc
    if len(raw) > _MAX_FILE_BYTES:
        raise DataError(
            f"assignments file {p} is {len(raw)} bytes; that is not an assignments file"
        )
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(f"assignments file {p} is not UTF-8 text (byte {exc.start})") from exc
    if p.suffix.lower() == ".toml":
        return parse_assignments_toml(text, str(p))
    return parse_assignments_csv(text, str(p))


def _check_overlaps(items: list[Assignment], key: str) -> None:
    groups: dict[str, list[Assignment]] = {}
    for a in items:
        groups.setdefault(getattr(a, key), []).append(a)
    for name, group in groups.items():
        group.sort(key=lambda a: a.valid_from)
        for a, b in zip(group, group[1:], strict=False):
            if b.valid_from < a.valid_to:
                other = "animals" if key == "collar" else "collars"
                raise DataError(
                    f"{key} {name} has two {other} at once ({a.animal if key == 'collar' else a.collar}"
                    f" and {b.animal if key == 'collar' else b.collar} from"
                    f" {datetime.fromtimestamp(b.valid_from, UTC).isoformat()});"
                    " close the first assignment before the second starts"
                )


class Registry:
    """Collar to animal at a time; adopts or refuses unknown collars; caps tracked collars."""

    def __init__(
        self,
        assignments: list[Assignment] | None = None,
        *,
        unknown_collars: str = "adopt",
        max_collars: int = 12000,
    ) -> None:
        if unknown_collars not in ("adopt", "refuse"):
            raise DataError("unknown_collars must be 'adopt' or 'refuse'")
        items = list(assignments or [])
        _check_overlaps(items, "collar")
        _check_overlaps(items, "animal")
        self._by_collar: dict[str, tuple[list[float], list[Assignment]]] = {}
        for a in sorted(items, key=lambda a: (a.collar, a.valid_from)):
            starts, group = self._by_collar.setdefault(a.collar, ([], []))
            starts.append(a.valid_from)
            group.append(a)
        self.adopt = unknown_collars == "adopt"
        self.max_collars = max_collars
        self._tracked: set[str] = set()
        self.overflow = 0
        # Last answer per collar: frames of one collar almost always fall in the same period.
        self._last: dict[str, Assignment] = {}

    @property
    def assignments(self) -> list[Assignment]:
        return [a for _, group in self._by_collar.values() for a in group]

    @property
    def tracked(self) -> int:
        return len(self._tracked)

    def known(self, collar: str) -> bool:
        return collar in self._by_collar

    def animals(self) -> set[str]:
        return {a.animal for a in self.assignments}

    def resolve(self, collar: str, t: float) -> str | Rejection:
        """The animal wearing ``collar`` at time ``t``, or a Rejection (unknown, cap)."""
        last = self._last.get(collar)
        if last is not None and last.covers(t):
            return last.animal
        if collar not in self._tracked and len(self._tracked) >= self.max_collars:
            self.overflow += 1
            return Rejection(
                Reason.COLLAR_CAP,
                f"already tracking limits.max_collars={self.max_collars} collars",
                collar,
            )
        entry = self._by_collar.get(collar)
        if entry is None:
            if not self.adopt:
                return Rejection(
                    Reason.UNKNOWN_COLLAR,
                    "collar not in site.assignments and site.unknown_collars = 'refuse'",
                    collar,
                )
            a = Assignment(collar, collar, -math.inf)
        else:
            starts, group = entry
            i = bisect_right(starts, t) - 1
            if i < 0 or not group[i].covers(t):
                return Rejection(
                    Reason.UNKNOWN_COLLAR,
                    "collar is in site.assignments but not assigned at the frame's time",
                    collar,
                )
            a = group[i]
        self._tracked.add(collar)
        self._last[collar] = a
        return a.animal
