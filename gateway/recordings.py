"""Reader for labelled recording directories (the simulator writes them; researchers too).

Layout of a recording directory::

    DIR/raw/<collar>.csv       header ``t,ax,ay,az``; t unix seconds, a in g
    DIR/compact/<collar>.npz   arrays ``t`` float64 [n], ``acc`` float32 [n, 3], scalar ``hz``
    DIR/observations.csv       ``animal,collar,start,end,behaviour`` (half-open intervals)
    DIR/assignments.csv        ``collar,animal,from,to`` (ISO 8601 UTC; empty ``to`` = still fitted)

A collar may have either form; the compact one is read when both exist. Structural damage
(bad header, unparseable number, time going backwards, interval ending before it starts,
a collar fitted to two animals at once) raises :class:`~gateway.errors.DataError` naming
the file and line. Damage that loses only some data is skipped and counted: rows with NaN
or out-of-range values become gaps, empty intervals and observations that disagree with the
assignments are left out, and the counts go into the training or evaluation report.

>>> parse_time("2026-03-01T00:00:00Z")
1772323200.0
>>> parse_time("1772323200.5")
1772323200.5
"""

from __future__ import annotations

import csv
import io
import math
import warnings
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from .errors import DataError
from .registry import Assignment, Registry, load_assignments
from .wire import COLLAR_ID_RE

__all__ = [
    "Assignment",
    "Observation",
    "Recording",
    "RecordingSet",
    "open_recordings",
    "parse_time",
    "read_assignments",
    "read_observations",
    "read_recording",
]

# Collars are specified to +/-16 g at most (DESIGN.md, frames); beyond that a row is damage.
MAX_ABS_G = 16.0
MAX_FIELD_CHARS = 256  # a longer CSV field is not a name or a number: refuse it
OBS_COLUMNS = ("animal", "collar", "start", "end", "behaviour")
RAW_COLUMNS = ("t", "ax", "ay", "az")


def parse_time(text: str) -> float:
    """Unix seconds from a number or an ISO 8601 time (``Z`` or an offset; naive = UTC)."""
    s = text.strip()
    try:
        v = float(s)
    except ValueError:
        try:
            dt = datetime.fromisoformat(s.replace("Z", "+00:00").replace("z", "+00:00"))
        except ValueError as exc:
            raise ValueError(f"{s[:40]!r} is neither unix seconds nor an ISO 8601 time") from exc
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=UTC)
        v = dt.timestamp()
    if not math.isfinite(v):
        raise ValueError(f"{s[:40]!r} is not a finite time")
    return v


@dataclass(slots=True)
class Recording:
    """One collar's samples, damaged rows already removed (``bad_rows`` counts them)."""

    collar: str
    t: np.ndarray  # float64 [n], strictly increasing
    acc: np.ndarray  # float32 [n, 3], g
    hz: float
    source: Path
    bad_rows: int = 0


@dataclass(frozen=True, slots=True)
class Observation:
    """One observed behaviour interval ``[start, end)`` of an animal wearing a collar."""

    animal: str
    collar: str
    start: float
    end: float
    behaviour: str
    line: int = 0


def _open_csv(path: Path, columns: tuple[str, ...]) -> tuple[csv.DictReader, io.TextIOBase]:
    try:
        f = path.open(newline="", encoding="utf-8-sig")  # a spreadsheet's BOM is fine
    except OSError as exc:
        raise DataError(f"cannot read {path}: {exc.strerror}") from exc
    reader = csv.DictReader(f)
    try:
        header = reader.fieldnames or []
    except (UnicodeDecodeError, csv.Error) as exc:
        f.close()
        raise DataError(f"{path} is not a UTF-8 CSV file: {exc}") from exc
    missing = [c for c in columns if c not in header]
    if missing:
        f.close()
        raise DataError(
            f"{path} lacks column(s) {', '.join(missing)}; the header must be {','.join(columns)}"
        )
    return reader, f


def _rows(reader: csv.DictReader, path: Path) -> Iterable[tuple[int, dict[str, str]]]:
    try:
        for row in reader:
            if None in row or any(v is None for v in row.values()):
                raise DataError(f"{path} line {reader.line_num}: wrong number of fields")
            if any(len(v) > MAX_FIELD_CHARS for v in row.values()):
                raise DataError(f"{path} line {reader.line_num}: a field is over 256 characters")
            yield reader.line_num, row
    except (UnicodeDecodeError, csv.Error) as exc:
        raise DataError(f"{path} line {reader.line_num}: unreadable CSV ({exc})") from exc


def _name(value: str, what: str, path: Path, line: int) -> str:
    v = value.strip()
    if not COLLAR_ID_RE.fullmatch(v):
        raise DataError(f"{path} line {line}: {what} {v[:40]!r} must be 1-64 of A-Z a-z 0-9 _ . -")
    return v


def _time(value: str, what: str, path: Path, line: int) -> float:
    try:
        return parse_time(value)
    except ValueError as exc:
        raise DataError(f"{path} line {line}: {what}: {exc}") from exc


def read_observations(path: str | Path, counts: Counter[str] | None = None) -> list[Observation]:
    """Observation intervals from ``observations.csv``.

    Raises DataError for a bad header, a bad time or name, or an interval that ends before
    it starts (naming the line). Empty intervals (end == start) are skipped and counted
    under ``counts["empty interval"]``.
    """
    p = Path(path)
    counts = counts if counts is not None else Counter()
    reader, f = _open_csv(p, OBS_COLUMNS)
    out: list[Observation] = []
    with f:
        for line, row in _rows(reader, p):
            start = _time(row["start"], "start", p, line)
            end = _time(row["end"], "end", p, line)
            if end < start:
                raise DataError(
                    f"{p} line {line}: interval ends ({end:.3f}) before it starts ({start:.3f});"
                    " swap or fix the times"
                )
            behaviour = row["behaviour"].strip().lower()
            if not behaviour or len(behaviour) > 64 or not behaviour.isprintable():
                raise DataError(
                    f"{p} line {line}: behaviour must be a name of 1-64 printable characters"
                )
            obs = Observation(
                _name(row["animal"], "animal", p, line),
                _name(row["collar"], "collar", p, line),
                start,
                end,
                behaviour,
                line,
            )
            if end == start:
                counts["empty interval"] += 1
                continue
            out.append(obs)
    return out


def read_assignments(path: str | Path) -> list[Assignment]:
    """Collar assignments from ``assignments.csv`` (the gateway registry's own reader).

    Raises DataError for a bad header or time, ``to`` not after ``from``, or a collar on two
    animals (or an animal wearing two collars) at once.
    """
    items = load_assignments(path)
    Registry(items)  # checks the overlaps
    return items


def _clean(t: np.ndarray, acc: np.ndarray, path: Path) -> tuple[np.ndarray, np.ndarray, int]:
    """Drop NaN/inf/out-of-range rows (counted); refuse time that does not increase."""
    good = np.isfinite(t) & np.isfinite(acc).all(axis=1) & (np.abs(acc) <= MAX_ABS_G).all(axis=1)
    bad = int((~good).sum())
    t, acc = t[good], acc[good]
    if t.size == 0:
        raise DataError(f"{path} holds no usable samples")
    steps = np.diff(t)
    if (steps <= 0).any():
        i = int(np.argmax(steps <= 0))
        raise DataError(
            f"{path}: time does not increase at sample {i + 1} (t={t[i + 1]:.3f} after"
            f" {t[i]:.3f}); sort the rows and remove duplicates"
        )
    return t, acc, bad


def _read_csv_recording(path: Path) -> tuple[np.ndarray, np.ndarray, int]:
    try:
        with path.open(encoding="utf-8") as f:
            header = f.readline().strip().replace(" ", "")
            if tuple(header.split(",")) != RAW_COLUMNS:
                raise DataError(
                    f"{path}: header must be {','.join(RAW_COLUMNS)}, is {header[:60]!r}"
                )
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
                    data = np.loadtxt(f, delimiter=",", dtype=np.float64, ndmin=2)
            except ValueError:
                data = None
    except (OSError, UnicodeDecodeError) as exc:
        raise DataError(f"cannot read {path}: {exc}") from exc
    if data is None:
        data = _parse_csv_slowly(path)
    if data.size == 0:
        raise DataError(f"{path} holds no samples")
    if data.shape[1] != 4:
        raise DataError(f"{path}: rows must have 4 fields t,ax,ay,az, have {data.shape[1]}")
    return _clean(data[:, 0], data[:, 1:].astype(np.float32), path)


def _parse_csv_slowly(path: Path) -> np.ndarray:
    """Row by row, so empty fields become NaN (a counted gap) and garbage names its line."""
    rows: list[list[float]] = []
    with path.open(encoding="utf-8") as f:
        next(f)
        for line_no, line in enumerate(f, start=2):
            fields = line.strip().split(",")
            if fields == [""]:
                continue
            if len(fields) != 4:
                raise DataError(f"{path} line {line_no}: expected 4 fields t,ax,ay,az")
            try:
                rows.append([float(v) if v.strip() else math.nan for v in fields])
            except ValueError as exc:
                raise DataError(
                    f"{path} line {line_no}: {line.strip()[:60]!r} is not numbers"
                ) from exc
    return np.asarray(rows, dtype=np.float64).reshape(-1, 4)


def _read_npz_recording(path: Path) -> tuple[np.ndarray, np.ndarray, float, int]:
    try:
        with path.open("rb") as fh, np.load(fh, allow_pickle=False) as z:
            missing = [k for k in ("t", "acc", "hz") if k not in z.files]
            if missing:
                raise DataError(f"{path} lacks array(s) {', '.join(missing)} (need t, acc, hz)")
            t = np.asarray(z["t"], dtype=np.float64)
            acc = np.asarray(z["acc"], dtype=np.float32)
            hz = float(np.asarray(z["hz"]).reshape(-1)[0])
    except DataError:
        raise
    except Exception as exc:  # zipfile, pickle refusal, bad dtype: all mean a damaged file
        raise DataError(f"{path} is not a readable compact recording: {str(exc)[:120]}") from exc
    if t.ndim != 1 or acc.shape != (t.size, 3):
        raise DataError(f"{path}: t must be [n] and acc [n, 3], are {t.shape} and {acc.shape}")
    if not 1.0 <= hz <= 200.0:
        raise DataError(f"{path}: hz={hz:g} is outside 1..200")
    t, acc, bad = _clean(t, acc, path)
    return t, acc, hz, bad


def read_recording(path: str | Path) -> Recording:
    """One collar's recording from a raw CSV or a compact npz file (collar id = file stem)."""
    p = Path(path)
    collar = p.stem
    if not COLLAR_ID_RE.fullmatch(collar):
        raise DataError(f"{p}: file name {collar!r} is not a collar id (1-64 of A-Z a-z 0-9 _ . -)")
    if p.suffix == ".npz":
        t, acc, hz, bad = _read_npz_recording(p)
    elif p.suffix == ".csv":
        t, acc, bad = _read_csv_recording(p)
        if t.size < 2:
            raise DataError(f"{p} needs at least 2 samples to tell its rate")
        hz = float(1.0 / np.median(np.diff(t)))
        if not 1.0 <= hz <= 200.0:
            raise DataError(f"{p}: sample rate {hz:g} Hz from the times is outside 1..200")
    else:
        raise DataError(f"{p}: recordings are .csv (raw) or .npz (compact)")
    return Recording(collar, t, acc, hz, p, bad)


@dataclass(slots=True)
class RecordingSet:
    """A recording directory: where each collar's samples are, plus observations and assignments.

    Samples are read one collar at a time (:meth:`read`), so a large herd never sits in memory.
    """

    root: Path
    files: dict[str, Path]
    observations: list[Observation]
    assignments: list[Assignment] | None
    counts: Counter[str] = field(default_factory=Counter)
    meta: dict[str, object] = field(default_factory=dict)

    @property
    def collars(self) -> list[str]:
        return sorted(self.files)

    @property
    def animals(self) -> list[str]:
        return sorted({o.animal for o in self.observations})

    def read(self, collar: str) -> Recording:
        return read_recording(self.files[collar])

    def behaviours(self) -> Counter[str]:
        return Counter(o.behaviour for o in self.observations)


def _usable_observations(
    obs: list[Observation],
    files: dict[str, Path],
    assignments: list[Assignment] | None,
    counts: Counter[str],
) -> list[Observation]:
    by_collar: dict[str, list[Assignment]] = {}
    for a in assignments or []:
        by_collar.setdefault(a.collar, []).append(a)
    out = []
    for o in obs:
        if o.collar not in files:
            counts["interval on a collar without a recording"] += 1
            continue
        if assignments is not None and not any(
            a.animal == o.animal and a.valid_from <= o.start and o.end <= a.valid_to
            for a in by_collar.get(o.collar, [])
        ):
            counts["interval disagrees with assignments"] += 1
            continue
        out.append(o)
    return out


def open_recordings(path: str | Path) -> RecordingSet:
    """Index a recording directory and read its observations and assignments.

    Raises DataError when the directory, its observations or every recording is missing,
    or when no observation interval is usable.
    """
    import json

    root = Path(path)
    if not root.is_dir():
        raise DataError(f"recording directory {root} does not exist")
    files: dict[str, Path] = {}
    for sub, ext in (("raw", ".csv"), ("compact", ".npz")):  # compact wins when both exist
        d = root / sub
        if d.is_dir():
            for f in sorted(d.iterdir()):
                if f.suffix == ext and f.is_file():
                    files[f.stem] = f
    if not files:
        raise DataError(
            f"{root} holds no recordings: expected raw/<collar>.csv or compact/<collar>.npz"
        )
    obs_path = root / "observations.csv"
    if not obs_path.is_file():
        raise DataError(f"{root} lacks observations.csv (animal,collar,start,end,behaviour)")
    counts: Counter[str] = Counter()
    observations = read_observations(obs_path, counts)
    assign_path = root / "assignments.csv"
    assignments = read_assignments(assign_path) if assign_path.is_file() else None
    usable = _usable_observations(observations, files, assignments, counts)
    if not usable:
        raise DataError(
            f"{root}: none of {len(observations)} observation intervals can be used"
            f" ({', '.join(f'{k}: {v}' for k, v in counts.items()) or 'observations.csv is empty'})"
        )
    meta: dict[str, object] = {}
    herd = root / "herd.json"
    if herd.is_file():
        try:
            loaded = json.loads(herd.read_text(encoding="utf-8")[:1_000_000])
        except (OSError, ValueError) as exc:
            raise DataError(f"{herd} is not readable JSON: {exc}") from exc
        if isinstance(loaded, dict):
            params = loaded.get("parameters")
            params = params if isinstance(params, dict) else {}
            meta = {k: loaded[k] for k in ("scenario", "seed") if k in loaded}
            meta |= {
                k: params[k] for k in ("n_animals", "days", "hz", "random_roll") if k in params
            }
        meta["synthetic"] = True  # herd.json is the simulator's mark
    return RecordingSet(root, files, usable, assignments, counts, meta)
