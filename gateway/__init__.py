"""Boutline gateway: collar frames over MQTT to behaviour bouts, budgets and alerts."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("boutline")
except PackageNotFoundError:  # running from a source tree without installing
    __version__ = "0.0.0+source"

__all__ = ["__version__"]
