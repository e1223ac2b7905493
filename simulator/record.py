"""Labelled recordings on disk: what ``boutline simulate record`` writes.

Layout (read by gateway.recordings and by researchers' own tools)::

    DIR/raw/<collar>.csv         header t,ax,ay,az; t unix seconds (3 decimals), a in g (4 decimals)
    DIR/compact/<collar>.npz     arrays t float64 [n], acc float32 [n, 3], scalar hz (nominal)
    DIR/observations.csv         animal,collar,start,end,behaviour (unix s, half-open [start, end))
    DIR/assignments.csv          collar,animal,from,to (ISO 8601 UTC; empty to = still fitted)
    DIR/truth_budgets.csv        animal,day,behaviour,minutes (day = UTC date)
    DIR/herd.json                scenario, seed, parameters, health events with ground truth

Sample times are the collar's own clock (drift and offset included) and frames lost on the
radio or while a collar was silent are gaps, as a gateway would have stored them. Collars are
generated one animal (with the collars it wore) per task on a process pool; the numbers do
not depend on the pool.

>>> fixed_decimals(np.array([12345, -5, 0, -80000]), 4)
[b'1.2345', b'-0.0005', b'0.0000', b'-8.0000']
"""

from __future__ import annotations

import json
import math
import multiprocessing as mp
import os
import shutil
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path

import numpy as np

from gateway.errors import ConfigError, DataError

from .herd import Herd

__all__ = ["FORMATS", "RECORD_FILES", "fixed_decimals", "record", "write_raw_csv"]

FORMATS = ("csv", "npz", "both")
RECORD_FILES = ("observations.csv", "assignments.csv", "truth_budgets.csv", "herd.json")
_SAMPLES_PER_CALL = 1_500_000


def _digit_columns(v: np.ndarray, decimals: int) -> tuple[np.ndarray, np.ndarray]:
    """ASCII of integers ``v`` read as fixed-point with ``decimals`` places.

    Returns ``(chars [n, w] uint8, used [n, w] bool)``: right-aligned digits, a minus sign
    where needed, unused cells marked False so a mask squeezes them out.
    """
    v = np.asarray(v, dtype=np.int64)
    neg = v < 0
    a = np.abs(v)
    scale = 10**decimals
    ip, fp = a // scale, a % scale
    nd = max(1, len(str(int(ip.max())))) if ip.size else 1
    digits_int = np.maximum(1, np.floor(np.log10(np.maximum(ip, 1))).astype(np.int64) + 1)
    w = 1 + nd + (1 + decimals if decimals else 0)
    chars = np.zeros((v.size, w), dtype=np.uint8)
    used = np.zeros((v.size, w), dtype=bool)
    chars[:, 0] = ord("-")
    used[:, 0] = neg
    for j in range(nd):  # j-th digit from the right of the integer part
        col = nd - j
        chars[:, col] = (ip // 10**j) % 10 + 48
        used[:, col] = j < digits_int
    # a minus sign sits just left of the first digit: move it there
    first = 1 + nd - digits_int
    sign_col = first - 1
    rows = np.flatnonzero(neg)
    chars[rows, 0] = 0
    used[rows, 0] = False
    chars[rows, sign_col[rows]] = ord("-")
    used[rows, sign_col[rows]] = True
    if decimals:
        chars[:, 1 + nd] = ord(".")
        used[:, 1 + nd] = True
        for j in range(decimals):
            col = 1 + nd + decimals - j
            chars[:, col] = (fp // 10**j) % 10 + 48
            used[:, col] = True
    return chars, used


def fixed_decimals(v: np.ndarray, decimals: int) -> list[bytes]:
    """Integers read as fixed-point numbers, as ASCII (for checks and small outputs)."""
    chars, used = _digit_columns(v, decimals)
    return [bytes(c[u]) for c, u in zip(chars, used, strict=True)]


_TABLE_MAX = 160_000  # 16 g in 0.1 mg steps: beyond that a reading is damage anyway
_table: tuple[np.ndarray, np.ndarray] | None = None


def _g_table() -> tuple[np.ndarray, np.ndarray]:
    """Every 4-decimal value in +/-16 g, pre-formatted once: lookups beat digit arithmetic."""
    global _table
    if _table is None:
        _table = _digit_columns(np.arange(-_TABLE_MAX, _TABLE_MAX + 1), 4)
    return _table


def _lookup(v: np.ndarray, decimals: int) -> tuple[np.ndarray, np.ndarray]:
    """Like _digit_columns, from the table when every value is in it."""
    if decimals == 4 and v.size and np.abs(v).max() <= _TABLE_MAX:
        chars, used = _g_table()
        return chars[v + _TABLE_MAX], used[v + _TABLE_MAX]
    return _digit_columns(v, decimals)


def _csv_bytes(t: np.ndarray, acc: np.ndarray) -> bytes:
    """Rows ``t,ax,ay,az\n`` with 3 and 4 decimals, built column-wise in numpy (no per-row
    Python): accelerations come from a table of formatted values, the whole seconds of t
    are formatted once per distinct second."""
    n = t.shape[0]
    t_ms = np.rint(t * 1000.0).astype(np.int64)
    whole, inverse = np.unique(t_ms // 1000, return_inverse=True)
    sc, su = _digit_columns(whole, 0)
    frac = _digit_columns(t_ms % 1000 + 1000, 0)[0][:, -3:]  # 1000..1999: keep 3 digits
    parts: list[tuple[np.ndarray, np.ndarray]] = [
        (sc[inverse], su[inverse]),
        (np.full((n, 1), ord("."), np.uint8), np.ones((n, 1), bool)),
        (frac, np.ones(frac.shape, bool)),
    ]
    for ax in range(3):
        parts.append((np.full((n, 1), ord(","), np.uint8), np.ones((n, 1), bool)))
        parts.append(_lookup(np.rint(acc[:, ax].astype(np.float64) * 1e4).astype(np.int64), 4))
    parts.append((np.full((n, 1), ord("\n"), np.uint8), np.ones((n, 1), bool)))
    chars = np.concatenate([c for c, _ in parts], axis=1)
    used = np.concatenate([u for _, u in parts], axis=1)
    return chars[used].tobytes()


def write_raw_csv(path: Path, t: np.ndarray, acc: np.ndarray, append: bool = False) -> None:
    """Write (or append) samples to a raw CSV with the ``t,ax,ay,az`` header."""
    mode = "ab" if append else "wb"
    with path.open(mode) as f:
        if not append:
            f.write(b"t,ax,ay,az\n")
        for i in range(0, t.shape[0], 200_000):
            f.write(_csv_bytes(t[i : i + 200_000], acc[i : i + 200_000]))


def _record_animal(spec: dict, animal: int, out: str, fmt: str) -> int:
    """Worker: generate the recording of every collar one animal wore; write their files."""
    herd = Herd(**spec, collars=[animal])
    span = herd.days * 86400.0
    n = herd.samples_per_frame
    step = max(60.0, _SAMPLES_PER_CALL / (herd.hz * len(herd.local)))
    ids = [herd.collar_ids[c] for c in herd.local]
    ts: dict[int, list[np.ndarray]] = {r: [] for r in range(len(ids))}
    accs: dict[int, list[np.ndarray]] = {r: [] for r in range(len(ids))}
    started: set[int] = set()
    n_total = 0
    t_a = 0.0
    while t_a < span:
        b = herd.generate(t_a, min(t_a + step, span))
        t_a += step
        for r in range(len(ids)):
            m = b.row == r
            if not m.any():
                continue
            t = (b.t[m][:, None] + np.arange(n)[None, :] / herd.hz).reshape(-1)
            acc = b.acc[m].reshape(-1, 3)
            n_total += t.shape[0]
            if fmt in ("csv", "both"):
                write_raw_csv(Path(out) / "raw" / f"{ids[r]}.csv", t, acc, append=r in started)
                started.add(r)
            if fmt in ("npz", "both"):
                ts[r].append(t)
                accs[r].append(acc)
    for r, cid in enumerate(ids):
        if fmt in ("csv", "both") and r not in started:
            write_raw_csv(Path(out) / "raw" / f"{cid}.csv", np.zeros(0), np.zeros((0, 3)))
        if fmt in ("npz", "both"):
            t = np.concatenate(ts[r]) if ts[r] else np.zeros(0)
            acc = np.concatenate(accs[r]) if accs[r] else np.zeros((0, 3), np.float32)
            np.savez(Path(out) / "compact" / f"{cid}.npz", t=t, acc=acc, hz=np.float64(herd.hz))
    return n_total


def _prepare(out: Path, overwrite: bool) -> None:
    if out.exists() and not out.is_dir():
        raise ConfigError(f"--out {out} is a file; give a directory for the recording.")
    if out.is_dir() and any(out.iterdir()):
        ours = {"raw", "compact", *RECORD_FILES}
        foreign = [p.name for p in out.iterdir() if p.name not in ours]
        if not overwrite:
            raise ConfigError(
                f"--out {out} is not empty; choose a new directory or pass --overwrite."
            )
        if foreign:
            raise ConfigError(
                f"--out {out} holds files that are not a recording ({', '.join(foreign[:3])});"
                " refusing to overwrite, choose another directory."
            )
        for name in ("raw", "compact"):
            shutil.rmtree(out / name, ignore_errors=True)
        for name in RECORD_FILES:
            (out / name).unlink(missing_ok=True)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise DataError(f"cannot create {out}: {exc.strerror}; check the path and rights") from exc


def _write_truth(herd: Herd, out: Path) -> None:
    with (out / "observations.csv").open("w", encoding="utf-8") as f:
        f.write("animal,collar,start,end,behaviour\n")
        for a, c, s, e, b in herd.observations():
            f.write(f"{a},{c},{s:.3f},{e:.3f},{b}\n")
    with (out / "assignments.csv").open("w", encoding="utf-8") as f:
        f.write("collar,animal,from,to\n")
        for row in herd.assignments:
            f.write(f"{row['collar']},{row['animal']},{row['from']},{row['to']}\n")
    with (out / "truth_budgets.csv").open("w", encoding="utf-8") as f:
        f.write("animal,day,behaviour,minutes\n")
        for a, d, b, m in herd.budgets():
            f.write(f"{a},{d},{b},{m:.3f}\n")
    (out / "herd.json").write_text(json.dumps(herd.to_json(), indent=2) + "\n", "utf-8")


def record(
    out: str | Path,
    *,
    n_animals: int,
    days: float,
    fmt: str = "both",
    processes: int | None = None,
    overwrite: bool = False,
    progress: Callable[[int, int], None] | None = None,
    **herd_kwargs,
) -> dict:
    """Write a labelled recording of a simulated herd to ``out``; returns a summary.

    ``herd_kwargs`` go to :class:`simulator.herd.Herd` (scenario, seed, hz, range_g, ...).
    ``progress(done, total)`` is called as animals finish (with all their collars).
    """
    if fmt not in FORMATS:
        raise ConfigError(f"unknown format {fmt!r}; choose csv, npz or both.")
    if processes is not None and (not isinstance(processes, int) or processes < 1):
        raise ConfigError(f"processes {processes!r} must be a whole number >= 1.")
    spec = dict(herd_kwargs, n_animals=n_animals, days=days)
    herd = Herd(**spec)  # checks every parameter before anything touches the disk
    out = Path(out)
    _prepare(out, overwrite)
    if fmt in ("csv", "both"):
        (out / "raw").mkdir(exist_ok=True)
    if fmt in ("npz", "both"):
        (out / "compact").mkdir(exist_ok=True)
    _write_truth(herd, out)
    total = herd.n_animals
    procs = processes or max(1, min(os.cpu_count() or 1, total))
    samples = 0
    done = 0
    if progress:
        progress(0, total)
    if procs == 1:
        for i in range(total):
            samples += _record_animal(spec, i, str(out), fmt)
            done += 1
            if progress:
                progress(done, total)
    else:
        ctx = mp.get_context("spawn")
        with ProcessPoolExecutor(max_workers=procs, mp_context=ctx) as pool:
            futs = [pool.submit(_record_animal, spec, i, str(out), fmt) for i in range(total)]
            for fut in as_completed(futs):
                samples += fut.result()
                done += 1
                if progress:
                    progress(done, total)
    expected = total * days * 86400.0 * herd.hz
    with (out / "observations.csv").open() as f:
        n_obs = sum(1 for _ in f) - 1
    return {
        "out": str(out),
        "animals": total,
        "collars": len(herd.collar_ids),
        "samples": samples,
        "kept_share": round(samples / expected, 4) if expected else math.nan,
        "observations": n_obs,
    }
