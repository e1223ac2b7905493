"""``boutline demo``: placeholder until its part is built."""

from __future__ import annotations

from ..errors import NotBuiltError


def demo() -> None:
    """Run a simulated herd through the real gateway on an embedded broker; live herd table and summary.

    Example: boutline demo --herd 20
    """
    raise NotBuiltError("`boutline demo` is not built yet")
