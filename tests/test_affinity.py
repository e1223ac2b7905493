"""[process] cpu: the pipeline's threads kept on one CPU (gateway/affinity.py)."""

from __future__ import annotations

import os
import threading
from pathlib import Path

import pytest

from gateway.affinity import choose_cpu, current_cpu, pin_threads, restore_threads
from gateway.config import load_settings
from gateway.errors import ConfigError

linux = pytest.mark.skipif(not hasattr(os, "sched_setaffinity"), reason="Linux-only API")


def test_choose_cpu_rules() -> None:
    assert choose_cpu("none", {0, 1, 2}) is None
    assert choose_cpu("auto", {3}) is None  # one CPU allowed: nothing to choose
    assert choose_cpu("2", {0, 1, 2}) == 2
    with pytest.raises(ConfigError, match="not among the CPUs"):
        choose_cpu("7", {0, 1})
    assert choose_cpu("auto", {0, 1}) in {0, 1}


@linux
def test_pin_applies_to_the_thread_and_the_threads_it_starts() -> None:
    allowed = os.sched_getaffinity(0)
    if len(allowed) < 2:
        pytest.skip("needs two CPUs to pin anything")
    seen: dict[str, object] = {}

    def body() -> None:
        before = pin_threads("auto")
        seen["pinned"] = os.sched_getaffinity(0)
        child = threading.Thread(target=lambda: seen.update(child=os.sched_getaffinity(0)))
        child.start()
        child.join()
        seen["cpu_now"] = current_cpu()
        restore_threads(before)
        seen["after"] = os.sched_getaffinity(0)

    t = threading.Thread(target=body)
    t.start()
    t.join()
    pinned = seen["pinned"]
    assert isinstance(pinned, set) and len(pinned) == 1 and pinned <= allowed
    assert seen["child"] == pinned  # the network thread, started later, shares the CPU
    assert seen["cpu_now"] in pinned
    assert seen["after"] == allowed
    assert os.sched_getaffinity(0) == allowed  # the test's own thread was never touched


def test_none_changes_nothing() -> None:
    assert pin_threads("none") is None


@pytest.mark.parametrize("bad", ['"fast"', '"-1"', '"1,2"', "3"])
def test_config_refuses_other_values(tmp_path: Path, bad: str) -> None:
    p = tmp_path / "b.toml"
    p.write_text(f"[process]\ncpu = {bad}\n")
    with pytest.raises(ConfigError, match="process.cpu"):
        load_settings(p, env={})


def test_config_default_is_auto() -> None:
    assert load_settings(None, env={}).process.cpu == "auto"
