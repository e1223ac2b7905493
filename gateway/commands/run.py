"""``boutline run``: placeholder until its part is built."""

from __future__ import annotations

from ..errors import NotBuiltError


def run() -> None:
    """Run the gateway daemon from a TOML config.

    Example: boutline run --config /etc/boutline/boutline.toml
    """
    raise NotBuiltError("`boutline run` is not built yet")
