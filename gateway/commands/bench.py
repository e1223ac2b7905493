"""``boutline bench``: placeholder until its part is built."""

from __future__ import annotations

from ..errors import NotBuiltError


def bench() -> None:
    """Measure gateway throughput, latency and memory against the bare-subscriber limit.

    Example: boutline bench --collars 1000
    """
    raise NotBuiltError("`boutline bench` is not built yet")
