"""glibc malloc thresholds (gateway/memory.py): freed tick-sized arrays leave the process.

Each case runs in a fresh interpreter, since the thresholds are per process. The pattern is a
gateway tick's: one big batch once (16 MB; untuned, it raises glibc's mmap threshold), then many
1 MB arrays freed while small long-lived objects sit between them on the heap.
"""

from __future__ import annotations

import platform
import subprocess
import sys

import pytest

pytestmark = pytest.mark.skipif(
    platform.system() != "Linux" or platform.libc_ver()[0] != "glibc",
    reason="the thresholds are glibc's",
)

_SCRIPT = """
import sys
import numpy as np
from gateway.memory import trim_heap, tune_malloc

def anon_mb():
    for line in open("/proc/self/status"):
        if line.startswith("RssAnon:"):
            return int(line.split()[1]) / 1024

if sys.argv[1] == "tuned":
    assert tune_malloc() is True
big = np.ones(2_000_000)  # 16 MB (under the 32 MB cap of the dynamic threshold): freed
del big
base = anon_mb()
keep, tick = [], []
for i in range(60):
    tick.append(np.ones(131_072))  # 1 MB each, a tick's transient
    keep.append(bytearray(4000))  # long-lived small objects between them (glibc heap)
tick.clear()
if sys.argv[1] == "trimmed":
    assert trim_heap() is True
print(round(anon_mb() - base, 1))
"""


def _retained_mb(mode: str) -> float:
    out = subprocess.run(
        [sys.executable, "-c", _SCRIPT, mode], capture_output=True, text=True, timeout=60
    )
    assert out.returncode == 0, out.stderr
    return float(out.stdout.strip())


def test_tuned_malloc_gives_freed_transients_back() -> None:
    assert _retained_mb("tuned") < 8.0


def test_untuned_malloc_keeps_them_which_is_why_the_gateway_tunes() -> None:
    # glibc's dynamic threshold (mallopt(3), M_MMAP_THRESHOLD: it follows a freed block up
    # to 32 MB) puts the 1 MB arrays on the heap after the 16 MB free, and the small objects
    # between them pin it; seen here: 60 MB kept untuned, 0.1 MB tuned
    assert _retained_mb("plain") > 30.0


def test_trim_gives_back_what_untuned_malloc_kept() -> None:
    assert _retained_mb("trimmed") < 8.0


def test_tune_malloc_is_idempotent() -> None:
    from gateway.memory import tune_malloc

    assert tune_malloc() is tune_malloc()
