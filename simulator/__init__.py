"""Synthetic herds: behaviour schedules, collar signals, sensor models, publishers, recorders.

The same seeded generator feeds unit tests, the demo, training recordings and load tests::

    from simulator import Herd
    frames = Herd(n_animals=10, scenario="housed", seed=1).take(100)
"""

from .herd import DEFAULT_START, Herd

__all__ = ["DEFAULT_START", "Herd"]
