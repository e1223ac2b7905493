"""Cut labelled windows from recordings: the one windowing rule training and evaluation share.

Each collar's samples are put on the absolute grid ``k / rate`` by linear interpolation and
cut into windows of ``window_len`` samples starting on multiples of ``hop_len``: the same
grid, interpolation and gap rule as the gateway's ring buffers (gateway.windows), so a model
is trained on windows like those it will see. A window is kept when:

- every grid sample lies between two real samples no more than 1.5 sample periods apart
  (otherwise: ``gap in recording``);
- one behaviour of one animal covers at least ``min_share`` of it (default 0.8;
  otherwise ``no observation`` when nothing covers it, or ``mixed behaviours``);
- no two intervals with different behaviours overlap inside it (``conflicting intervals``);
- its behaviour is a known class (``behaviour not in classes``).

Every dropped window is counted under its reason.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from .recordings import Observation, Recording, RecordingSet

__all__ = [
    "DEFAULT_MIN_SHARE",
    "LabelledWindows",
    "grid_samples",
    "interval_coverage",
    "iter_labelled_windows",
    "label_windows",
]

DEFAULT_MIN_SHARE = 0.8
GAP_FACTOR = 1.5  # a step longer than 1.5 sample periods is a gap (common practice, no source)


@dataclass(slots=True)
class LabelledWindows:
    """Labelled windows of one collar. ``k`` is the window's index on the collar's hop grid,
    so consecutive hops of one animal have consecutive ``k`` (for transition counts)."""

    collar: str
    x: np.ndarray  # float32 [n, 3, T], g
    y: np.ndarray  # int64 [n], index into classes
    animal: np.ndarray  # object [n]
    t_start: np.ndarray  # float64 [n]
    k: np.ndarray  # int64 [n]

    def __len__(self) -> int:
        return int(self.y.size)


def grid_samples(rec: Recording, rate_hz: float) -> tuple[float, np.ndarray, np.ndarray]:
    """Put a recording on the absolute grid ``k / rate_hz`` (unix seconds), as the gateway's
    ring buffers do, by linear interpolation.

    Returns ``(k0, acc [m, 3] float32, valid [m] bool)``: grid index of the first point, the
    samples, and False where a grid point falls into a gap between real samples.
    """
    t = rec.t
    k0 = int(np.ceil(t[0] * rate_hz - 1e-6))
    m = max(0, int(np.floor(t[-1] * rate_hz + 1e-6)) - k0 + 1)
    grid = (k0 + np.arange(m)) / rate_hz
    period = 1.0 / rec.hz
    j = np.clip(np.searchsorted(t, grid, side="right") - 1, 0, t.size - 1)
    nxt = np.minimum(j + 1, t.size - 1)
    exact = np.abs(grid - t[j]) <= 1e-6 * period
    valid = exact | ((t[nxt] - t[j] <= GAP_FACTOR * period) & (nxt > j))
    acc = rec.acc.astype(np.float64)
    out = np.empty((m, 3), dtype=np.float32)
    for i in range(3):
        out[:, i] = np.interp(grid, t, acc[:, i])
    return k0, out, valid


def interval_coverage(
    intervals: Sequence[tuple[float, float]], starts: np.ndarray, length: float
) -> np.ndarray:
    """Seconds of ``[s, s + length)`` covered by the union of intervals, for each start s."""
    if not intervals:
        return np.zeros(starts.size)
    iv = sorted(intervals)
    merged: list[list[float]] = [list(iv[0])]
    for a, b in iv[1:]:
        if a <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([a, b])
    m = np.asarray(merged)
    lo, hi = m[:, 0], m[:, 1]
    cum = np.concatenate([[0.0], np.cumsum(hi - lo)])

    def covered_before(t: np.ndarray) -> np.ndarray:
        i = np.searchsorted(lo, t, side="right")  # intervals starting at or before t
        prev = np.maximum(i - 1, 0)
        partial = np.where(i > 0, np.clip(t - lo[prev], 0.0, hi[prev] - lo[prev]), 0.0)
        return np.where(i > 0, cum[prev], 0.0) + partial  # full intervals before + partial

    return covered_before(starts + length) - covered_before(starts)


def _overlaps(
    a: list[tuple[float, float]], b: list[tuple[float, float]]
) -> list[tuple[float, float]]:
    out = []
    for s1, e1 in a:
        for s2, e2 in b:
            lo, hi = max(s1, s2), min(e1, e2)
            if hi > lo:
                out.append((lo, hi))
    return out


def label_windows(
    observations: Sequence[Observation],
    starts: np.ndarray,
    window_s: float,
    classes: Sequence[str],
    min_share: float,
    counts: Counter[str],
) -> tuple[np.ndarray, np.ndarray]:
    """Label windows ``[s, s + window_s)`` of one collar from its observations.

    Returns ``(y, animal)``: ``y`` is the class index or -1 where the window is dropped
    (its reason counted in ``counts``), ``animal`` the observed animal's id (or "").
    """
    n = starts.size
    y = np.full(n, -1, dtype=np.int64)
    animal = np.full(n, "", dtype=object)
    if n == 0:
        return y, animal
    groups: dict[tuple[str, str], list[tuple[float, float]]] = {}
    for o in observations:
        groups.setdefault((o.animal, o.behaviour), []).append((o.start, o.end))
    keys = sorted(groups)
    if not keys:
        counts["no observation"] += n
        return y, animal
    cover = np.stack([interval_coverage(groups[k], starts, window_s) for k in keys])  # [G, n]
    conflicts: list[tuple[float, float]] = []
    # Two different (animal, behaviour) keys on one collar at once cannot both be true.
    for i, ki in enumerate(keys):
        for kj in keys[i + 1 :]:
            conflicts += _overlaps(groups[ki], groups[kj])
    conflict = interval_coverage(conflicts, starts, window_s) > 0
    best = cover.argmax(axis=0)
    share = cover[best, np.arange(n)] / window_s
    total = cover.sum(axis=0)
    class_index = {c: i for i, c in enumerate(classes)}
    key_class = np.array([class_index.get(k[1], -1) for k in keys])
    key_animal = np.array([k[0] for k in keys], dtype=object)

    none = total <= 0
    mixed = ~none & ~conflict & (share < min_share - 1e-9)
    ok = ~none & ~conflict & ~mixed
    unknown = ok & (key_class[best] < 0)
    ok &= ~unknown
    counts["no observation"] += int(none.sum())
    counts["conflicting intervals"] += int((~none & conflict).sum())
    counts["mixed behaviours"] += int(mixed.sum())
    counts["behaviour not in classes"] += int(unknown.sum())
    y[ok] = key_class[best[ok]]
    animal[ok] = key_animal[best[ok]]
    return y, animal


def iter_labelled_windows(
    recordings: RecordingSet,
    *,
    classes: Sequence[str],
    rate_hz: float,
    window_len: int,
    hop_len: int,
    min_share: float = DEFAULT_MIN_SHARE,
    counts: Counter[str] | None = None,
    progress: Callable[[str], None] | None = None,
) -> Iterator[LabelledWindows]:
    """Labelled windows, one collar at a time (only collars that have observations).

    Reasons for dropped windows and rows accumulate in ``counts``.
    """
    counts = counts if counts is not None else Counter()
    by_collar: dict[str, list[Observation]] = {}
    for o in recordings.observations:
        by_collar.setdefault(o.collar, []).append(o)
    window_s = window_len / rate_hz
    for collar in recordings.collars:
        if progress:
            progress(collar)
        obs = by_collar.get(collar)
        if not obs:
            continue
        rec = recordings.read(collar)
        counts["bad sample rows (NaN or out of range)"] += rec.bad_rows
        k0, acc, valid = grid_samples(rec, rate_hz)
        # Windows start on multiples of the hop on the absolute grid (as in the gateway).
        first = -k0 % hop_len
        n_win = (acc.shape[0] - first - window_len) // hop_len + 1
        if n_win <= 0:
            counts["recording shorter than a window"] += 1
            continue
        offs = first + np.arange(n_win) * hop_len  # window start, index into acc
        k = (k0 + offs) // hop_len  # absolute hop number: consecutive hops differ by one
        starts = (k0 + offs) / rate_hz
        # Invalid samples per window via a running count: a window with any is a gap.
        bad_cum = np.concatenate([[0], np.cumsum(~valid)])
        gap = bad_cum[offs + window_len] - bad_cum[offs] > 0
        # Each dropped window is counted once: a gap first, else its labelling reason.
        counts["gap in recording"] += int(gap.sum())
        idx = np.flatnonzero(~gap)
        y, animal = label_windows(obs, starts[idx], window_s, classes, min_share, counts)
        keep = y >= 0
        idx, y, animal = idx[keep], y[keep], animal[keep]
        if idx.size == 0:
            continue
        cols = offs[idx, None] + np.arange(window_len)[None, :]
        x = np.ascontiguousarray(acc[cols].transpose(0, 2, 1))
        yield LabelledWindows(collar, x, y, animal, starts[idx], k[idx])
