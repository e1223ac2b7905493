"""``boutline demo``: embedded broker, simulated herd, the real gateway path, store, summary.

The tiny level model stands in for the shipped one here: these tests check the plumbing
(every frame published reaches the store as bouts and minutes), not the model's accuracy.
"""

from __future__ import annotations

import io
import os
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from rich.console import Console
from tiny_model import level_model

from gateway.commands.demo import run_demo
from gateway.store import Store
from gateway.types import NO_DATA


@pytest.fixture
def model(tmp_path: Path) -> Path:
    p = tmp_path / "level.onnx"
    p.write_bytes(level_model())
    return p


def test_demo_runs_a_herd_through_the_embedded_broker_into_the_store(
    tmp_path: Path, model: Path
) -> None:
    out = io.StringIO()
    summary = run_demo(
        herd=3,
        speed=1200.0,
        duration_s=3600.0,
        seed=11,
        data_dir=tmp_path / "demo",
        model=model,
        live=False,
        console=Console(file=out, width=120),
    )
    assert summary["frames_published"] > 3 * 600  # 5 s frames, an hour, minus radio loss
    assert summary["frames_in"] == summary["frames_published"]
    assert summary["rejects"] == {}
    assert set(summary["minutes"]) == {"cow-001", "cow-002", "cow-003"}
    for per in summary["minutes"].values():
        # every decided minute of the hour is accounted for, behaviour or no data
        assert 50.0 <= sum(per.values()) <= 60.0
        assert per.get(NO_DATA, 0.0) < 10.0
    with Store.open(summary["store"], readonly=True) as store:
        bouts = store.bouts()
        assert {b.animal for b in bouts} == {"cow-001", "cow-002", "cow-003"}
        assert sorted(a for a, _, _, _ in store.assignments()) == ["C0001", "C0002", "C0003"]
    text = out.getvalue()
    assert "Done: 3 animals" in text and summary["store"] in text.replace("\n", "")
    assert "consult a veterinarian" in text.replace("\n", " ")


def _demo_process(
    tmp_path: Path, model: Path
) -> tuple[subprocess.Popen, list[str], threading.Thread]:
    """The demo in a child process, its output lines collected as they come."""
    env = dict(os.environ, COLUMNS="160")
    proc = subprocess.Popen(
        [
            sys.executable, "-m", "gateway.cli", "demo", "--herd", "2", "--speed", "60",
            "--duration", "6h", "--model", str(model), "--data-dir", str(tmp_path / "d"),
            "--no-table",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        env=env,
        text=True,
    )  # fmt: skip
    lines: list[str] = []

    def read() -> None:
        with proc.stdout as out:  # type: ignore[union-attr]
            lines.extend(out)

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    return proc, lines, reader


def _interrupt(
    proc: subprocess.Popen, lines: list[str], reader: threading.Thread, ready: Any
) -> str:
    try:
        deadline = time.monotonic() + 90
        while not ready():
            assert time.monotonic() < deadline, "demo did not start:\n" + "".join(lines)
            assert proc.poll() is None, "demo ended early:\n" + "".join(lines)
            time.sleep(0.05)
        proc.send_signal(signal.SIGINT)
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()  # the process started above, by its handle
            proc.wait(10)
    reader.join(10)  # the last lines
    return "".join(lines)


def test_ctrl_c_ends_the_demo_cleanly_with_a_summary(tmp_path: Path, model: Path) -> None:
    proc, lines, reader = _demo_process(tmp_path, model)
    started: list[float] = []

    def ready() -> bool:  # four seconds of frames after the start line
        if not started and any("Ctrl-C ends" in ln for ln in lines):
            started.append(time.monotonic())
        return bool(started) and time.monotonic() - started[0] > 4.0

    text = _interrupt(proc, lines, reader, ready)
    assert proc.returncode == 0, text
    m = re.search(r"Interrupted: (\d+) animals, (\d+) of (\d+) frames taken", text)
    assert m and int(m[1]) == 2 and int(m[2]) > 0, text
    assert "Traceback" not in text and "boutline.db" in text


def test_ctrl_c_during_start_up_still_ends_with_a_summary(tmp_path: Path, model: Path) -> None:
    # The signal comes while the model loads and the ingest process starts: nothing of the
    # start-up may be cut in half (no traceback), and the exit code is 0.
    proc, lines, reader = _demo_process(tmp_path, model)
    text = _interrupt(proc, lines, reader, lambda: (tmp_path / "d" / "boutline.db").exists())
    assert proc.returncode == 0, text
    assert "Interrupted: " in text and "Traceback" not in text, text
    assert "examine the animal" in text  # the caution is printed on every ending


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--duration", "soon"], "--duration 'soon'"),
        (["--herd", "0"], "--herd 0"),
        (["--broker", "nohost"], "--broker 'nohost'"),
    ],
)
def test_bad_options_are_one_line_errors(args: list[str], message: str) -> None:
    r = subprocess.run(
        [sys.executable, "-m", "gateway.cli", "demo", *args],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 1
    assert r.stderr.startswith("Error: ") and message in r.stderr
    assert "Traceback" not in r.stderr


def test_help_has_an_example() -> None:
    r = subprocess.run(
        [sys.executable, "-m", "gateway.cli", "demo", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 0 and "Example: boutline demo" in r.stdout
