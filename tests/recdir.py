"""Small labelled recording directories for plumbing tests of the reader, labelling and CLI.

The signals are invented and crude on purpose (one tone and posture per behaviour): these
files check that windows are cut, labelled, counted and scored as specified, not that the
model is any good on cattle. Model quality is checked on BasicMotions and the simulator.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

T0 = 1_772_323_200.0  # 2026-03-01T00:00:00Z
# behaviour -> (tone Hz, tone amplitude g, pitch degrees head down); invented for plumbing
TONES = {
    "grazing": (1.0, 0.25, 60.0),
    "feeding": (1.07, 0.12, 35.0),
    "ruminating": (1.15, 0.04, 0.0),
    "resting": (0.0, 0.0, -5.0),
    "walking": (0.7, 0.35, 5.0),
}


def signal(behaviour: str, n: int, hz: float, rng: np.random.Generator, roll: float) -> np.ndarray:
    """[n, 3] g: gravity through pitch and roll, plus the behaviour's tone and noise."""
    f, amp, pitch_deg = TONES[behaviour]
    p = np.deg2rad(pitch_deg)
    t = np.arange(n) / hz
    g = np.array([-np.sin(p), 0.0, np.cos(p)])
    dyn = np.zeros((n, 3))
    if f:
        phase = rng.uniform(0, 2 * np.pi)
        dyn[:, 2] = amp * np.sin(2 * np.pi * f * t + phase)
        dyn[:, 0] = 0.5 * amp * np.sin(4 * np.pi * f * t + phase)
    acc = g + dyn + rng.normal(0, 0.01, (n, 3))
    c, s = np.cos(roll), np.sin(roll)
    rot = np.array([[1, 0, 0], [0, c, -s], [0, s, c]])  # collar turned about the neck (x)
    return (acc @ rot.T).astype(np.float32)


def write_recording_dir(
    root: Path,
    *,
    animals: int = 4,
    bout_s: float = 120.0,
    bouts: int = 10,
    hz: float = 10.0,
    seed: int = 0,
    fmt: str = "compact",
    behaviours: tuple[str, ...] = tuple(TONES),
) -> Path:
    """Write ``animals`` collars, each a sequence of bouts cycling through ``behaviours``."""
    rng = np.random.default_rng(seed)
    root.mkdir(parents=True, exist_ok=True)
    (root / fmt).mkdir(exist_ok=True)
    obs_rows, assign_rows = [], []
    for a in range(animals):
        collar, animal = f"C{a:03d}", f"cow-{a}"
        roll = rng.uniform(-np.pi, np.pi)
        parts, t = [], T0
        for b in range(bouts):
            beh = behaviours[(a + b) % len(behaviours)]
            n = int(bout_s * hz)
            parts.append(signal(beh, n, hz, rng, roll))
            obs_rows.append([animal, collar, f"{t:.3f}", f"{t + bout_s:.3f}", beh])
            t += bout_s
        acc = np.concatenate(parts)
        ts = T0 + np.arange(acc.shape[0]) / hz
        write_collar(root, collar, ts, acc, hz, fmt)
        assign_rows.append([collar, animal, "2026-02-01T00:00:00Z", ""])
    write_csv(
        root / "observations.csv", ["animal", "collar", "start", "end", "behaviour"], obs_rows
    )
    write_csv(root / "assignments.csv", ["collar", "animal", "from", "to"], assign_rows)
    return root


def write_collar(
    root: Path, collar: str, t: np.ndarray, acc: np.ndarray, hz: float, fmt: str
) -> None:
    if fmt == "compact":
        (root / "compact").mkdir(parents=True, exist_ok=True)
        np.savez(root / "compact" / f"{collar}.npz", t=t, acc=acc.astype(np.float32), hz=hz)
    else:
        (root / "raw").mkdir(parents=True, exist_ok=True)
        rows = [[f"{ti:.3f}", *(f"{v:.5f}" for v in a)] for ti, a in zip(t, acc, strict=True)]
        write_csv(root / "raw" / f"{collar}.csv", ["t", "ax", "ay", "az"], rows)


def write_csv(path: Path, header: list[str], rows: list[list[str]]) -> None:
    with path.open("w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)
