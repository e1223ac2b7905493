"""``boutline report``: tables, CSV and JSON from a real store; pictures; clear errors."""

from __future__ import annotations

import csv
import io
import json
import sys
from pathlib import Path

import pytest

from gateway.analytics import Analytics
from gateway.cli import main
from gateway.config import Settings
from gateway.store import Store
from gateway.types import NO_DATA, BoutClosed, Frame
from simulator.herd import Herd

H = 3600.0
PNG = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG spec, ISO/IEC 15948, section 5.2)


@pytest.fixture(scope="module")
def store_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Three simulated cows for three days of ground truth; cow-002 loses 8 h on day 2."""
    import numpy as np

    d = tmp_path_factory.mktemp("store")
    herd = Herd(3, seed=9, days=3)
    gap = (herd.start + 26 * H, herd.start + 34 * H)
    events = []
    for animal, _c, s, e, b in herd.observations():
        if animal == "cow-002" and s < gap[1] and e > gap[0]:
            if s < gap[0]:
                events.append(BoutClosed(animal, b, s, gap[0], 0.9))
            if e > gap[1]:
                events.append(BoutClosed(animal, b, gap[1], e, 0.9))
        else:
            events.append(BoutClosed(animal, b, s, e, 0.9))
    events.append(BoutClosed("cow-002", NO_DATA, gap[0], gap[1], 0.0, gap[1] - gap[0]))
    events.sort(key=lambda ev: ev.end)
    an = Analytics(Settings(), speed=None)
    with Store.open(d) as store:
        an.attach(store)
        store.write_events(events)
        acc = np.zeros((10, 3), np.float32)
        for i in range(60):  # collar C0001: low battery, then silent
            t = herd.start + i * 60.0
            an.frame(Frame("C0001", i, t, 10.0, acc, 3.4, t), "cow-001")
        an.tick(herd.end + 4 * H)
        an.close()
    return d


def cli(*argv: str) -> tuple[int, str, str]:
    """Run the CLI in-process: (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    old = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = out, err
    code = 0
    try:
        main(list(argv))
    except SystemExit as exc:
        code = int(exc.code or 0)
    finally:
        sys.stdout, sys.stderr = old
    return code, out.getvalue(), err.getvalue()


def test_budgets_json_with_partial_coverage_reported_as_seen(store_dir: Path) -> None:
    code, out, _ = cli("report", "budgets", "--data-dir", str(store_dir), "--format", "json",
                       "--from", "2026-03-01", "--to", "2026-03-03")  # fmt: skip
    assert code == 0
    rows = {(r["animal"], r["day"]): r for r in json.loads(out)}
    assert len(rows) == 9
    full = rows[("cow-001", "2026-03-02")]
    assert full["status"] == "final" and full["coverage_pct"] == 100.0
    part = rows[("cow-002", "2026-03-02")]
    # 8 of 24 hours missing: 66.7 % coverage, under alerts.min_coverage, minutes as seen
    assert part["status"] == "partial" and part["coverage_pct"] == pytest.approx(66.7, abs=0.1)
    seen = sum(part[f"{b}_min"] for b in ("grazing", "feeding", "ruminating", "resting", "walking"))
    assert seen == pytest.approx(960.0, abs=0.5) and part["no_data_min"] == pytest.approx(480.0)
    assert part["ruminating_bouts"] > 0 and part["ruminating_mean_bout_min"] > 0


def test_budgets_table_and_csv(store_dir: Path) -> None:
    code, out, _ = cli("report", "budgets", "--data-dir", str(store_dir), "--animal", "cow-002")
    assert code == 0 and "partial" in out and "cow-002" in out and "cow-001" not in out
    code, out, _ = cli("report", "budgets", "--data-dir", str(store_dir), "-f", "csv",
                       "-a", "cow-001", "-a", "cow-003", "--from", "2026-03-02")  # fmt: skip
    rows = list(csv.DictReader(io.StringIO(out)))
    assert code == 0 and [(r["animal"], r["day"]) for r in rows] == [
        ("cow-001", "2026-03-02"),
        ("cow-001", "2026-03-03"),
        ("cow-003", "2026-03-02"),
        ("cow-003", "2026-03-03"),
    ]


def test_bouts_csv_matches_the_store(store_dir: Path) -> None:
    code, out, _ = cli("report", "bouts", "--data-dir", str(store_dir), "-a", "cow-002",
                       "--from", "2026-03-02", "--to", "2026-03-02", "-f", "csv")  # fmt: skip
    rows = list(csv.DictReader(io.StringIO(out)))
    with Store.open(store_dir, readonly=True) as st:
        t0, t1 = 1772323200.0 + 24 * H, 1772323200.0 + 48 * H
        want = len(st.bouts("cow-002", t0, t1)) + len(st.no_data("cow-002", t0, t1))
    assert code == 0 and len(rows) == want
    assert [r["behaviour"] for r in rows].count(NO_DATA) == 1


def test_alerts_report_with_caution_and_reasons(store_dir: Path) -> None:
    code, out, _ = cli("report", "alerts", "--data-dir", str(store_dir), "-f", "json")
    doc = json.loads(out)
    assert code == 0 and "veterinarian" in doc["caution"]
    rules = {(a["rule"], a["status"]) for a in doc["alerts"]}
    assert ("battery_low", "raised") in rules and ("collar_silent", "raised") in rules
    assert all(a["caution"] == doc["caution"] and "value" in a["evidence"] for a in doc["alerts"])
    # three days are not enough for the behaviour rules, and the report says so
    why = {(w["animal"], w["rule"]): w["why"] for w in doc["not_judged"]}
    assert "5 needed" in why[("cow-001", "rumination_drop")]
    code, out, _ = cli("report", "alerts", "--data-dir", str(store_dir))
    assert code == 0 and "Collar battery low" in out and "Not judged" in out
    assert out.rstrip().endswith("licensed veterinary practice prevail.")


def test_collars_report(store_dir: Path) -> None:
    code, out, _ = cli("report", "collars", "--data-dir", str(store_dir), "-f", "json")
    (row,) = json.loads(out)
    assert code == 0 and row["collar"] == "C0001" and row["animal"] == "cow-001"
    assert row["battery_v"] == 3.4 and row["frames"] == 60


def test_actogram_and_trend_pngs(store_dir: Path, tmp_path: Path) -> None:
    code, out, _ = cli("report", "actogram", "--data-dir", str(store_dir), "-a", "cow-002",
                       "--from", "2026-03-01", "--to", "2026-03-03", "-o", str(tmp_path))  # fmt: skip
    png = tmp_path / "actogram-cow-002.png"
    assert code == 0 and png.read_bytes()[:8] == PNG and "3 days" in out
    with Store.open(store_dir, readonly=True) as st:
        n = len(st.bouts("cow-002", 1772323200.0, 1772323200.0 + 72 * H))
    # every bout is drawn; one crossing midnight is drawn on both days
    assert int(out.split(", ")[2].split()[0]) >= n
    code, out, _ = cli("report", "trend", "--data-dir", str(store_dir), "--from", "2026-03-01",
                       "--to", "2026-03-03", "-o", str(tmp_path / "t.png"), "-f", "json")  # fmt: skip
    assert code == 0 and (tmp_path / "t.png").read_bytes()[:8] == PNG
    rows = json.loads(out[out.index("[") :])
    day2 = rows[1]
    assert day2["animals"] == 2 and day2["left_out_low_coverage"] == 1  # cow-002 left out


def test_missing_matplotlib_says_how_to_install(store_dir: Path, monkeypatch, tmp_path) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    code, _, err = cli(
        "report", "trend", "--data-dir", str(store_dir), "-o", str(tmp_path / "x.png")
    )
    assert (
        code == 1 and err.strip() == "Error: plots need matplotlib: pip install 'boutline[plots]'"
    )
    assert not (tmp_path / "x.png").exists()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["budgets", "-a", "cow-999"], "unknown animal 'cow-999'; this store knows 3 animal(s)"),
        (
            ["bouts", "--from", "2026-03-03", "--to", "2026-03-01"],
            "--from 2026-03-03 is after --to",
        ),
        (["alerts", "--from", "2026-02-30"], "--from '2026-02-30' is not a day"),
        (["budgets", "--to", "03/01/2026"], "--to '03/01/2026' is not a day"),
        (["budgets", "--from", "1900-01-01", "--to", "2026-01-01"], "spans more than"),
        (["budgets", "--format", "xml"], "--format 'xml': allowed: table, csv, json"),
        (["actogram", "-a", "x" * 5000], "unknown animal"),
    ],
)
def test_bad_filters_give_one_clear_error(store_dir: Path, args: list[str], message: str) -> None:
    code, out, err = cli("report", *args, "--data-dir", str(store_dir))
    lines = err.strip().splitlines()
    assert code == 1 and len(lines) == 1 and lines[0].startswith("Error: "), err
    assert message in lines[0] and len(lines[0]) < 300
    assert out == ""


def test_no_store_is_one_clear_error(tmp_path: Path) -> None:
    code, _, err = cli("report", "budgets", "--data-dir", str(tmp_path / "nowhere"))
    assert code == 1 and err.startswith("Error: no store at ") and len(err.splitlines()) == 1


def test_a_file_that_is_not_a_store(tmp_path: Path) -> None:
    bad = tmp_path / "boutline.db"
    bad.write_bytes(b"not sqlite at all" * 100)
    code, _, err = cli("report", "collars", "--data-dir", str(tmp_path))
    assert code == 1 and err.startswith("Error: ") and len(err.splitlines()) == 1
