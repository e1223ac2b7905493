"""Keep the gateway's memory near its live state: glibc malloc thresholds fixed at start.

glibc serves a large allocation (from 128 kB) with its own mmap and gives it back on free,
but after the first such free it raises that threshold to the freed size (up to 32 MB) and
the trim threshold to twice it. A gateway's large arrays are a tick's transients (a batch of
windows, the model's intermediates), so after the first big tick every later one comes out
of the heap, and what they leave free there stays resident: 15 MB at 10,000 collars
(docs/performance.md, change 9). Fixed thresholds keep them on mmap and trim the heap top
(tests/test_memory.py shows the difference in a child process). What small allocations
leave free between live ones is given back by :func:`trim_heap`, which the daemon's loop
calls every ``TRIM_EVERY_S`` (10 MB at 10,000 collars; a few ms).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import logging

__all__ = ["MMAP_THRESHOLD", "TRIM_EVERY_S", "TRIM_THRESHOLD", "trim_heap", "tune_malloc"]

log = logging.getLogger(__name__)

MMAP_THRESHOLD = 256 * 1024  # bytes: a larger block gets its own mapping, unmapped on free
TRIM_THRESHOLD = 1024 * 1024  # bytes: free memory at the heap's top beyond this goes back
TRIM_EVERY_S = 10.0  # seconds between two trim_heap() calls of the daemon's loop
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # mallopt parameters (glibc malloc.h)
_done: bool | None = None
_libc: ctypes.CDLL | None = None


def _glibc() -> ctypes.CDLL | None:
    global _libc
    if _libc is None:
        try:
            lib = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
            lib.mallopt.argtypes, lib.mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
            lib.malloc_trim.argtypes, lib.malloc_trim.restype = [ctypes.c_size_t], ctypes.c_int
        except (OSError, AttributeError):  # musl, macOS: their allocators have no such knobs
            return None
        _libc = lib
    return _libc


def tune_malloc() -> bool:
    """Fix glibc's thresholds, once per process; False where libc is not glibc (no-op)."""
    global _done
    if _done is None:
        libc = _glibc()
        _done = libc is not None and bool(
            libc.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD)
            and libc.mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD)
        )
        if libc is None:
            log.debug("malloc thresholds left as they are: no glibc mallopt")
    return _done


def trim_heap() -> bool:
    """Give the free pages inside the heap back to the system (glibc's malloc_trim)."""
    libc = _glibc()
    return libc is not None and libc.malloc_trim(0) == 1
