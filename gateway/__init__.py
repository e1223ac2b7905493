"""Boutline gateway: collar frames over MQTT to behaviour bouts, budgets and alerts."""

from __future__ import annotations

__all__ = ["__version__"]


def __getattr__(name: str) -> str:
    # computed on first use: importlib.metadata costs the MQTT ingest process a few MB
    if name != "__version__":
        raise AttributeError(f"module 'gateway' has no attribute {name!r}")
    from importlib.metadata import PackageNotFoundError, version

    try:
        v = version("boutline")
    except PackageNotFoundError:  # running from a source tree without installing
        v = "0.0.0+source"
    globals()["__version__"] = v
    return v
