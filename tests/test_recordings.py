"""Recording reader and window labelling: valid data in, damaged data refused or counted."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from recdir import T0, write_collar, write_csv, write_recording_dir

from gateway.errors import DataError
from gateway.labelling import (
    grid_samples,
    interval_coverage,
    iter_labelled_windows,
    label_windows,
)
from gateway.recordings import (
    Observation,
    open_recordings,
    read_assignments,
    read_observations,
    read_recording,
)
from gateway.types import BEHAVIOURS

OBS_HEADER = ["animal", "collar", "start", "end", "behaviour"]


def windows_of(recs, counts: Counter | None = None, **kw):  # type: ignore[no-untyped-def]
    args = {"classes": BEHAVIOURS, "rate_hz": 10.0, "window_len": 100, "hop_len": 50}
    return list(iter_labelled_windows(recs, counts=counts, **(args | kw)))


def test_raw_and_compact_forms_read_the_same(tmp_path: Path) -> None:
    raw = write_recording_dir(tmp_path / "raw", animals=2, bouts=3, fmt="raw")
    compact = write_recording_dir(tmp_path / "compact", animals=2, bouts=3, fmt="compact")
    a, b = (
        read_recording(raw / "raw" / "C000.csv"),
        read_recording(compact / "compact" / "C000.npz"),
    )
    assert a.collar == b.collar == "C000" and a.hz == pytest.approx(10.0)
    assert np.allclose(a.t, b.t, atol=1e-3) and np.allclose(a.acc, b.acc, atol=1e-5)
    wa, wb = windows_of(open_recordings(raw)), windows_of(open_recordings(compact))
    assert [len(w) for w in wa] == [len(w) for w in wb] and len(wa) == 2
    assert np.allclose(wa[0].x, wb[0].x, atol=1e-4)


def test_labels_follow_observations_and_min_share(tmp_path: Path) -> None:
    root = write_recording_dir(tmp_path / "r", animals=1, bouts=2, bout_s=100.0)
    counts: Counter[str] = Counter()
    (w,) = windows_of(open_recordings(root), counts)
    # 200 s at a 5 s hop: 39 windows of 10 s; the one at 95 s is half each behaviour
    # (mixed, dropped); every other one lies inside one bout.
    starts = w.t_start - T0
    assert set(np.unique(w.y)) == {0, 1}
    assert (w.y[starts + 10 <= 100] == 0).all() and (w.y[starts >= 100] == 1).all()
    assert counts["mixed behaviours"] == 1 and len(w) == 38
    counts2: Counter[str] = Counter()
    (w2,) = windows_of(open_recordings(root), counts2, min_share=0.5)
    assert len(w2) == 39 and counts2["mixed behaviours"] == 0


def test_window_with_85_percent_of_one_behaviour_is_labelled() -> None:
    obs = [
        Observation("cow", "C", 0.0, 8.5, "walking"),
        Observation("cow", "C", 8.5, 20.0, "resting"),
        Observation("cow", "C", 20.0, 27.0, "walking"),
    ]
    counts: Counter[str] = Counter()
    y, animal = label_windows(obs, np.array([0.0, 20.0, 40.0]), 10.0, BEHAVIOURS, 0.8, counts)
    assert y.tolist() == [BEHAVIOURS.index("walking"), -1, -1]
    assert animal[0] == "cow"
    assert counts == Counter({"mixed behaviours": 1, "no observation": 1})


def test_behaviours_outside_the_classes_are_counted() -> None:
    obs = [
        Observation("cow", "C", 0.0, 20.0, "walking"),
        Observation("cow", "C", 20.0, 40.0, "resting"),
    ]
    counts: Counter[str] = Counter()
    y, _ = label_windows(obs, np.array([0.0, 10.0, 20.0, 30.0]), 10.0, BEHAVIOURS[:4], 0.8, counts)
    assert y.tolist() == [-1, -1, 3, 3] and counts["behaviour not in classes"] == 2


def test_overlapping_intervals(tmp_path: Path) -> None:
    # Different behaviours at once: windows touching the overlap are dropped and counted;
    # the same behaviour twice is merged.
    obs = [
        Observation("cow", "C", 0.0, 30.0, "grazing"),
        Observation("cow", "C", 25.0, 60.0, "walking"),
        Observation("cow", "C", 60.0, 80.0, "resting"),
        Observation("cow", "C", 70.0, 90.0, "resting"),
    ]
    counts: Counter[str] = Counter()
    starts = np.arange(0.0, 81.0, 10.0)
    y, _ = label_windows(obs, starts, 10.0, BEHAVIOURS, 0.8, counts)
    g, w, r = (BEHAVIOURS.index(b) for b in ("grazing", "walking", "resting"))
    assert y.tolist() == [g, g, -1, w, w, w, r, r, r]
    assert counts["conflicting intervals"] == 1


def test_interval_coverage_matches_brute_force() -> None:
    rng = np.random.default_rng(0)
    iv = [(a, a + rng.uniform(0, 30)) for a in rng.uniform(0, 500, 40)]
    starts = rng.uniform(-20, 520, 200)
    grid = np.arange(-50, 600, 0.01) + 0.005
    inside = np.zeros(grid.size, dtype=bool)
    for a, b in iv:
        inside |= (grid >= a) & (grid < b)
    brute = np.array([inside[(grid >= s) & (grid < s + 10)].sum() * 0.01 for s in starts])
    assert np.abs(interval_coverage(iv, starts, 10.0) - brute).max() < 0.02


def test_nan_rows_become_counted_gaps(tmp_path: Path) -> None:
    root = write_recording_dir(tmp_path / "r", animals=1, bouts=2, bout_s=100.0)
    z = np.load(root / "compact" / "C000.npz")
    acc = z["acc"].copy()
    acc[500:503] = np.nan  # 0.3 s of NaN at t = 50 s
    acc[1200, 1] = 40.0  # beyond the +/-16 g range
    write_collar(root, "C000", z["t"], acc, 10.0, "compact")
    counts: Counter[str] = Counter()
    (w,) = windows_of(open_recordings(root), counts)
    assert counts["bad sample rows (NaN or out of range)"] == 4
    assert counts["gap in recording"] == 4  # each gap lies in two overlapping windows
    assert np.isfinite(w.x).all() and len(w) == 38 - 4


def test_csv_with_empty_fields_counts_them(tmp_path: Path) -> None:
    root = write_recording_dir(tmp_path / "r", animals=1, bouts=1, fmt="raw")
    path = root / "raw" / "C000.csv"
    lines = path.read_text().splitlines()
    lines[10] = lines[10].split(",")[0] + ",,0.1,0.9"
    lines[11] = lines[11].split(",")[0] + ",nan,0.1,0.9"
    path.write_text("\n".join(lines) + "\n")
    rec = read_recording(path)
    assert rec.bad_rows == 2 and rec.t.size == len(lines) - 3


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("time,x,y,z\n1,0,0,1\n", "header must be t,ax,ay,az"),
        ("t,ax,ay,az\n1,0,0,1\n2,0,abc,1\n", "line 3"),
        ("t,ax,ay,az\n1,0,0,1\n2,0,0\n", "line 3"),
        ("t,ax,ay,az\n2,0,0,1\n1,0,0,1\n", "time does not increase"),
        ("t,ax,ay,az\n", "no samples"),
        ("t,ax,ay,az\nnan,nan,nan,nan\n", "no usable samples"),
        ("t,ax,ay,az\n1,0,0,1\n", "at least 2 samples"),
    ],
)
def test_damaged_csv_is_refused_naming_the_problem(
    tmp_path: Path, content: str, message: str
) -> None:
    p = tmp_path / "C1.csv"
    p.write_text(content)
    with pytest.raises(DataError, match=message):
        read_recording(p)


def test_binary_garbage_and_hostile_npz_are_refused(tmp_path: Path) -> None:
    p = tmp_path / "C1.csv"
    p.write_bytes(b"\xff\xfe\x00garbage" * 100)
    with pytest.raises(DataError):
        read_recording(p)
    q = tmp_path / "C2.npz"
    np.savez(q, t=np.array([object()], dtype=object), acc=np.zeros((1, 3)), hz=10.0)
    with pytest.raises(DataError, match="not a readable compact recording"):
        read_recording(q)
    r = tmp_path / "C3.npz"
    np.savez(r, t=np.arange(5.0), acc=np.zeros((4, 3)), hz=10.0)
    with pytest.raises(DataError, match=r"acc \[n, 3\]"):
        read_recording(r)
    s = tmp_path / "C4.npz"
    np.savez(s, t=np.arange(5.0), acc=np.zeros((5, 3)))
    with pytest.raises(DataError, match="lacks array"):
        read_recording(s)
    u = tmp_path / "C5.npz"
    u.write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.raises(DataError):
        read_recording(u)
    with pytest.raises(DataError, match="not a collar id"):
        read_recording(tmp_path / "bad name!.csv")


@pytest.mark.parametrize(
    ("row", "message"),
    [
        (["cow", "C1", "100", "50", "resting"], "line 2: interval ends"),
        (["cow", "C1", "x", "50", "resting"], "line 2: start"),
        (["cow", "C1", "1", "inf", "resting"], "line 2: end"),
        (["cow/1", "C1", "1", "5", "resting"], "animal"),
        (["cow", "C1", "1", "5", ""], "behaviour must be"),
        (["cow", "C1", "1", "5", "r" * 300], "over 256 characters"),
    ],
)
def test_bad_observations_are_refused(tmp_path: Path, row: list[str], message: str) -> None:
    p = tmp_path / "observations.csv"
    write_csv(p, OBS_HEADER, [row])
    with pytest.raises(DataError, match=message):
        read_observations(p)


def test_observation_times_may_be_iso_and_empty_intervals_are_counted(tmp_path: Path) -> None:
    p = tmp_path / "observations.csv"
    rows = [
        ["cow", "C1", "2026-03-01T00:00:00Z", "2026-03-01T00:01:00Z", "Resting"],
        ["cow", "C1", "100", "100", "walking"],
    ]
    write_csv(p, OBS_HEADER, rows)
    counts: Counter[str] = Counter()
    (o,) = read_observations(p, counts)
    assert (o.start, o.end - o.start, o.behaviour) == (T0, 60.0, "resting")
    assert counts["empty interval"] == 1
    write_csv(p, ["animal", "collar", "begin", "end", "behaviour"], [])
    with pytest.raises(DataError, match="lacks column"):
        read_observations(p)


def test_spreadsheet_bom_is_accepted_and_nul_bytes_refused(tmp_path: Path) -> None:
    p = tmp_path / "observations.csv"
    p.write_bytes(b"\xef\xbb\xbfanimal,collar,start,end,behaviour\ncow,C1,1,5,resting\n")
    assert read_observations(p)[0].behaviour == "resting"
    p.write_bytes(b"animal,collar,start,end,behaviour\ncow,C1,1,5,rest\x00ing\n")
    with pytest.raises(DataError, match="line 2: behaviour must be"):
        read_observations(p)
    p.write_bytes(b"animal,collar,start,end,behaviour\n" + b"cow,C1,1,5,resting\xff\n")
    with pytest.raises(DataError):
        read_observations(p)


def test_unknown_collars_and_assignment_mismatch_are_counted(tmp_path: Path) -> None:
    root = write_recording_dir(tmp_path / "r", animals=2, bouts=2)
    with (root / "observations.csv").open("a") as f:
        f.write(f"cow-9,C999,{T0},{T0 + 100},resting\n")  # no recording for C999
        f.write(f"cow-1,C000,{T0},{T0 + 100},resting\n")  # C000 is on cow-0
    recs = open_recordings(root)
    assert recs.counts["interval on a collar without a recording"] == 1
    assert recs.counts["interval disagrees with assignments"] == 1
    assert len(recs.observations) == 4


def test_assignments_are_checked(tmp_path: Path) -> None:
    p = tmp_path / "assignments.csv"
    write_csv(
        p,
        ["collar", "animal", "from", "to"],
        [
            ["C1", "cow-1", "2026-01-01T00:00:00Z", "2026-02-01T00:00:00Z"],
            ["C1", "cow-2", "2026-01-15T00:00:00Z", ""],
        ],
    )
    with pytest.raises(DataError, match="two animals at once"):
        read_assignments(p)
    write_csv(p, ["collar", "animal", "from", "to"], [["C1", "cow-1", "2026-01-01T00:00:00Z", ""]])
    (a,) = read_assignments(p)
    assert a.collar == "C1" and a.valid_from == pytest.approx(1767225600.0) and a.valid_to == np.inf


def test_empty_or_missing_data_sets_are_refused(tmp_path: Path) -> None:
    with pytest.raises(DataError, match="does not exist"):
        open_recordings(tmp_path / "nope")
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataError, match="holds no recordings"):
        open_recordings(tmp_path / "empty")
    root = write_recording_dir(tmp_path / "r", animals=1, bouts=1)
    write_csv(root / "observations.csv", OBS_HEADER, [])
    with pytest.raises(DataError, match="none of 0 observation intervals"):
        open_recordings(root)
    (root / "observations.csv").unlink()
    with pytest.raises(DataError, match="lacks observations.csv"):
        open_recordings(root)


def test_resampling_keeps_a_tone_and_marks_gaps() -> None:
    from gateway.recordings import Recording

    hz = 25.0
    t = T0 + np.arange(0, 60, 1 / hz)
    t = np.delete(t, np.arange(500, 560))  # a 2.4 s hole
    acc = np.zeros((t.size, 3), dtype=np.float32)
    acc[:, 2] = 1 + 0.3 * np.sin(2 * np.pi * 0.9 * (t - T0))
    rec = Recording("C1", t, acc, hz, Path("C1.npz"))
    k0, out, valid = grid_samples(rec, 10.0)
    grid = (k0 + np.arange(out.shape[0])) / 10.0
    assert grid[0] >= t[0] and grid[0] - t[0] < 0.1
    hole = (grid > t[499]) & (grid < t[500])
    assert not valid[hole].any() and valid[~hole].all()
    ref = 1 + 0.3 * np.sin(2 * np.pi * 0.9 * (grid - T0))
    # linear interpolation error of a tone: A (2 pi f h)^2 / 8 = 0.002 g at h = 0.04 s
    assert np.abs(out[valid, 2] - ref[valid]).max() < 0.003
