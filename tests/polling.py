"""Bounded waiting for something another thread or process does."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable


def wait_for(cond: Callable[[], bool], timeout_s: float, step_s: float = 0.05) -> bool:
    """Poll ``cond`` until it holds or ``timeout_s`` passed; returns its last value."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if cond():
            return True
        threading.Event().wait(step_s)
    return cond()
