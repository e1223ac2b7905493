"""The command line: every DESIGN.md command exists, with --help and an example."""

from __future__ import annotations

import re

import pytest
from typer.testing import CliRunner

from gateway import __version__
from gateway.cli import app

COMMANDS = ["demo", "run", "simulate", "train", "evaluate", "model", "report", "config", "bench"]
runner = CliRunner()


def test_root_help_lists_every_command_and_the_caution() -> None:
    r = runner.invoke(app, ["--help"])
    assert r.exit_code == 0
    for name in COMMANDS:
        assert re.search(rf"^\s+{name}\s", r.output, re.M), name
    assert "veterinarian" in r.output


@pytest.mark.parametrize("name", COMMANDS)
def test_every_command_has_help_with_an_example(name: str) -> None:
    r = runner.invoke(app, [name, "--help"], terminal_width=120)
    assert r.exit_code == 0, r.output
    assert "Example" in r.output and "boutline" in r.output


def test_version() -> None:
    r = runner.invoke(app, ["--version"])
    assert r.exit_code == 0 and r.output.strip() == f"boutline {__version__}"


def test_usage_errors_are_one_message_without_traceback() -> None:
    import subprocess
    import sys

    r = subprocess.run(
        [sys.executable, "-m", "gateway.cli", "run", "--no-such-option"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 2
    assert "No such option" in r.stderr and "Traceback" not in r.stderr
