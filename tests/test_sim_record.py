"""Labelled recordings on disk: layout, agreement between forms, the gateway's reader."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from gateway.cli import main
from gateway.errors import ConfigError
from gateway.recordings import open_recordings
from gateway.types import BEHAVIOURS
from simulator.record import fixed_decimals, record, write_raw_csv

DAYS = 0.05  # 72 min
KW = dict(n_animals=3, days=DAYS, seed=13, scenario="mixed", estrus_share=0.34)


@pytest.fixture(scope="module")
def rec(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("rec") / "herd"
    summary = record(out, fmt="both", processes=2, **KW)
    return out, summary


def _csv_rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8", newline="") as f:
        return list(csv.DictReader(f))


def test_layout_and_headers(rec) -> None:
    out, summary = rec
    names = {p.name for p in out.iterdir()}
    assert names == {"raw", "compact", "observations.csv", "assignments.csv",
                     "truth_budgets.csv", "herd.json"}  # fmt: skip
    assert sorted(p.name for p in (out / "raw").iterdir()) == ["C0001.csv", "C0002.csv",
                                                               "C0003.csv"]  # fmt: skip
    assert (out / "raw" / "C0001.csv").read_text().splitlines()[0] == "t,ax,ay,az"
    assert (out / "observations.csv").read_text().splitlines()[0] == (
        "animal,collar,start,end,behaviour"
    )
    assert _csv_rows(out / "assignments.csv")[0] == {
        "collar": "C0001", "animal": "cow-001", "from": "2026-03-01T00:00:00Z", "to": ""
    }  # fmt: skip
    assert summary["collars"] == 3 == summary["animals"] and 0.9 < summary["kept_share"] <= 1.0
    line = (out / "raw" / "C0002.csv").read_text().splitlines()[1]
    t, *a = line.split(",")
    assert len(t.split(".")[1]) == 3 and all(len(x.split(".")[1]) == 4 for x in a)


def test_csv_and_npz_hold_the_same_samples(rec) -> None:
    out, summary = rec
    total = 0
    for c in ("C0001", "C0002", "C0003"):
        raw = np.loadtxt(out / "raw" / f"{c}.csv", delimiter=",", skiprows=1)
        with np.load(out / "compact" / f"{c}.npz") as z:
            t, acc, hz = z["t"], z["acc"], float(z["hz"])
            assert t.dtype == np.float64 and acc.dtype == np.float32 and acc.shape == (t.size, 3)
        assert hz == 10.0 and raw.shape == (t.size, 4)
        np.testing.assert_allclose(raw[:, 0], t, atol=5e-4)
        np.testing.assert_allclose(raw[:, 1:], acc, atol=5e-5)
        assert (np.diff(t) > 0).all()
        total += t.size
    assert total == summary["samples"]


def test_the_gateway_reader_accepts_it(rec) -> None:
    out, _ = rec
    rs = open_recordings(out)
    assert sorted(rs.files) == ["C0001", "C0002", "C0003"]
    assert not rs.counts  # nothing skipped or repaired
    assert {o.behaviour for o in rs.observations} <= set(BEHAVIOURS)


def test_observations_tile_the_span_and_match_the_budgets(rec) -> None:
    out, _ = rec
    start = 1772323200.0
    obs = _csv_rows(out / "observations.csv")
    minutes: dict[tuple[str, str], float] = {}
    for animal in ("cow-001", "cow-002", "cow-003"):
        mine = [o for o in obs if o["animal"] == animal]
        s = np.array([float(o["start"]) for o in mine])
        e = np.array([float(o["end"]) for o in mine])
        assert s[0] == start and e[-1] == pytest.approx(start + DAYS * 86400)
        np.testing.assert_allclose(s[1:], e[:-1], atol=1e-3)  # half-open, back to back
        assert all(a["behaviour"] != b["behaviour"] for a, b in zip(mine, mine[1:], strict=False))
        for o in mine:
            key = (animal, o["behaviour"])
            minutes[key] = minutes.get(key, 0.0) + (float(o["end"]) - float(o["start"])) / 60
    budgets = _csv_rows(out / "truth_budgets.csv")
    assert len(budgets) == 3 * len(BEHAVIOURS)
    for b in budgets:
        assert b["day"] == "2026-03-01"
        got = minutes.get((b["animal"], b["behaviour"]), 0.0)
        assert float(b["minutes"]) == pytest.approx(got, abs=0.01)


def test_herd_json_has_parameters_and_ground_truth(rec) -> None:
    out, _ = rec
    doc = json.loads((out / "herd.json").read_text())
    assert doc["scenario"] == "mixed" and doc["seed"] == 13
    p = doc["parameters"]
    assert p["n_animals"] == 3 and p["hz"] == 10.0 and p["days"] == DAYS and p["random_roll"]
    assert [e["kind"] for e in doc["events"]] == ["estrus"]
    assert "Lovendahl" in doc["events"][0]["source"]


def test_one_process_or_two_write_the_same_files(rec, tmp_path: Path) -> None:
    out, _ = rec
    again = tmp_path / "again"
    record(again, fmt="csv", processes=1, **KW)
    for name in ("raw/C0003.csv", "observations.csv", "truth_budgets.csv", "herd.json"):
        assert (again / name).read_bytes() == (out / name).read_bytes(), name


def test_refuses_to_overwrite_unless_asked(tmp_path: Path) -> None:
    out = tmp_path / "r"
    small = dict(n_animals=1, days=0.002, seed=1, processes=1)
    record(out, fmt="npz", **small)
    with pytest.raises(ConfigError, match="not empty"):
        record(out, fmt="npz", **small)
    record(out, fmt="csv", overwrite=True, **small)
    assert not (out / "compact").exists() and (out / "raw" / "C0001.csv").exists()
    (out / "notes.txt").write_text("mine")
    with pytest.raises(ConfigError, match="not a recording"):
        record(out, fmt="csv", overwrite=True, **small)
    assert (out / "notes.txt").read_text() == "mine"  # nothing else is lost
    (tmp_path / "file").write_text("x")
    with pytest.raises(ConfigError, match="is a file"):
        record(tmp_path / "file", **small)


def test_refitted_collars_get_their_own_files_and_agree_with_assignments(tmp_path) -> None:
    out = tmp_path / "refit"
    summary = record(out, n_animals=3, days=0.05, seed=4, refit_share=0.34, processes=1)
    assert summary["animals"] == 3 and summary["collars"] == 4
    assert sorted(p.stem for p in (out / "compact").iterdir()) == [
        "C0001", "C0002", "C0003", "C0004"
    ]  # fmt: skip
    rs = open_recordings(out)
    assert not rs.counts  # every observation agrees with the assignments
    doc = json.loads((out / "herd.json").read_text())
    assert doc["refits"][0]["new_collar"] == "C0004"


def test_fixed_point_writer_agrees_with_python_formatting() -> None:
    rng = np.random.default_rng(0)
    v = np.concatenate([rng.integers(-80000, 80000, 2000), [0, 1, -1, 9999, -10000, 123456789]])
    got = [float(x) for x in fixed_decimals(v, 4)]
    # Python's own decimal formatting as the reference
    want = [float(f"{x / 1e4:.4f}") for x in v.tolist()]
    assert got == want
    assert fixed_decimals(np.array([-5]), 4) == [b"-0.0005"]


def test_raw_csv_roundtrip(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    t = 1772323200.0 + np.arange(1000) * 0.04
    acc = rng.uniform(-8, 8, (1000, 3)).astype(np.float32)
    p = tmp_path / "C9.csv"
    write_raw_csv(p, t[:500], acc[:500])
    write_raw_csv(p, t[500:], acc[500:], append=True)
    back = np.loadtxt(p, delimiter=",", skiprows=1)
    np.testing.assert_allclose(back[:, 0], t, atol=5e-4)
    np.testing.assert_allclose(back[:, 1:], acc, atol=5.01e-5)


def test_cli_record_writes_and_reports(tmp_path: Path, capsys) -> None:
    out = tmp_path / "cli"
    with pytest.raises(SystemExit) as ei:
        main(["simulate", "record", "--herd", "2", "--days", "0.01", "--seed", "2", "--format",
              "npz", "--processes", "1", "--fixed-roll", "--out", str(out)])  # fmt: skip
    assert ei.value.code in (0, None)
    text = capsys.readouterr().out
    assert "recorded 2 animals (2 collars)" in text and str(out) in text
    assert sorted(p.name for p in (out / "compact").iterdir()) == ["C0001.npz", "C0002.npz"]
    assert not (out / "raw").exists()
    assert json.loads((out / "herd.json").read_text())["parameters"]["random_roll"] is False
