"""Keep the gateway's Python threads on one CPU (``[process] cpu``).

The network thread (paho) and the pipeline thread take turns at Python's GIL thousands of
times a second: every socket call of the network thread lets the GIL go. With the two threads
on different CPUs each turn is a cross-CPU wake-up, and on a two-core box that cost half the
process's CPU time per frame (docs/performance.md: 175 against 91 us per frame at 1,000
collars). On one CPU the turns are cheap. The GIL lets the threads use one CPU at a time
anyway; onnxruntime's single inference thread is all that ran beside them, a few percent.

Linux only (``os.sched_setaffinity``); elsewhere, or when the CPU cannot be used, nothing
changes and :func:`pin_threads` says so by returning None.

>>> choose_cpu("none", {0, 1}) is None
True
>>> choose_cpu("1", {0, 1})
1
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

from .errors import ConfigError

__all__ = ["allowed_cpus", "choose_cpu", "current_cpu", "pin_threads", "restore_threads"]

# The CPU set the process had before pin_threads narrowed it (the MQTT ingest process, if
# any, runs on the others: gateway/ingestproc.py). None while nothing is pinned.
_before_pin: set[int] | None = None


def current_cpu() -> int | None:
    """The CPU the calling thread runs on now (proc(5) ``stat`` field 39), None if unknown."""
    try:
        stat = Path("/proc/thread-self/stat").read_text()
        return int(stat.rsplit(")", 1)[1].split()[36])
    except (OSError, ValueError, IndexError):
        return None


def allowed_cpus() -> set[int]:
    """The CPUs this process may use, as before any :func:`pin_threads` (empty if unknown)."""
    if _before_pin is not None:
        return set(_before_pin)
    if not hasattr(os, "sched_getaffinity"):
        return set()
    return set(os.sched_getaffinity(0))


def choose_cpu(setting: str, allowed: set[int]) -> int | None:
    """The CPU for ``[process] cpu``: a number, ``auto`` (the one we run on) or ``none``."""
    if setting == "none" or len(allowed) < 2:
        return None
    if setting == "auto":
        cpu = current_cpu()
        return cpu if cpu in allowed else min(allowed)
    cpu = int(setting)
    if cpu not in allowed:
        raise ConfigError(
            f"process.cpu = {cpu} is not among the CPUs this process may use"
            f" ({', '.join(map(str, sorted(allowed)))}); give one of them, auto or none"
        )
    return cpu


def pin_threads(setting: str) -> set[int] | None:
    """Pin the calling thread, and every thread it starts from now on, to one CPU.

    Returns the CPU set to restore with :func:`restore_threads`, or None when nothing changed.
    """
    if not hasattr(os, "sched_setaffinity"):
        return None
    before = os.sched_getaffinity(0)
    cpu = choose_cpu(setting, set(before))
    if cpu is None:
        return None
    try:
        os.sched_setaffinity(0, {cpu})  # 0: this thread; threads started later inherit it
    except OSError:
        return None
    global _before_pin
    if _before_pin is None:
        _before_pin = set(before)
    return before


def restore_threads(before: set[int] | None) -> None:
    """Give the calling thread back the CPUs it had before :func:`pin_threads`."""
    global _before_pin
    if before is not None:
        with contextlib.suppress(OSError):
            os.sched_setaffinity(0, before)
        if _before_pin is not None and set(before) >= _before_pin:
            _before_pin = None
