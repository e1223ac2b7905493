"""Plain data classes that flow between the pipeline stages.

Stages talk through these and nothing else (see DESIGN.md, data flow):

    Frame -> (ring buffer) -> WindowBatch -> Posteriors -> Decision -> StateChanged / BoutClosed

Times are unix seconds (float, UTC) throughout; local days are the analytics' business.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np

__all__ = [
    "BEHAVIOURS",
    "CAUTION",
    "Behaviour",
    "BoutClosed",
    "CollarGravity",
    "Decision",
    "Frame",
    "NO_DATA",
    "NoDataHop",
    "Posteriors",
    "StateChanged",
    "WindowBatch",
]


class Behaviour(StrEnum):
    """The five behaviours Boutline tells apart (trade terms)."""

    GRAZING = "grazing"
    FEEDING = "feeding"  # eating at a trough or feed fence
    RUMINATING = "ruminating"
    RESTING = "resting"  # lying or standing still, not ruminating
    WALKING = "walking"


BEHAVIOURS: tuple[str, ...] = tuple(b.value for b in Behaviour)

# Said wherever an alert is shown or sent (CLI, MQTT payloads, reports, docs): one wording.
CAUTION = (
    "Alerts are decision support, not a diagnosis: examine the animal and consult a"
    " veterinarian; local regulations and licensed veterinary practice prevail."
)

# Label for time that could not be classified (missing frames, collar silent).
NO_DATA = "no_data"


@dataclass(slots=True)
class Frame:
    """One decoded collar frame: ``acc`` is float32 ``[n, 3]`` in g, collar axes x, y, z."""

    collar_id: str
    seq: int
    t: float  # unix seconds of the first sample, collar clock
    hz: float
    acc: np.ndarray
    battery_v: float | None = None
    received_at: float = 0.0  # gateway clock, unix seconds; 0 when not received over MQTT

    @property
    def n(self) -> int:
        return int(self.acc.shape[0])

    @property
    def t_end(self) -> float:
        """Time just after the last sample."""
        return self.t + self.n / self.hz


@dataclass(slots=True)
class WindowBatch:
    """Windows ready for one inference call, from any number of animals.

    ``x`` is float32 ``[N, 3, T]`` in g at the model's rate; row i belongs to ``animals[i]``
    and covers ``[t_start[i], t_start[i] + window_s)``. ``missing[i]`` is the share of the
    window that had to be filled (0..1); windows over the limit never reach the batch.
    ``ready_at[i]`` is the gateway time the window's last sample arrived (for latency).
    """

    animals: list[str]
    t_start: np.ndarray  # float64 [N]
    x: np.ndarray  # float32 [N, 3, T]
    missing: np.ndarray  # float32 [N]
    ready_at: np.ndarray  # float64 [N]

    def __len__(self) -> int:
        return len(self.animals)


@dataclass(slots=True)
class Posteriors:
    """Model output for one window of one animal: ``p`` is float32 ``[C]``, sums to 1."""

    animal: str
    t_start: float
    p: np.ndarray
    ready_at: float = 0.0


@dataclass(slots=True)
class NoDataHop:
    """Time of one animal that could not be classified (collar silent, window too gappy).

    Goes to the smoother in place of a Posteriors. ``t`` is on the same clock as
    ``Posteriors.t_start`` (the start of the first window that could not be classified);
    ``duration_s`` is a whole number of hops and may span many.
    """

    animal: str
    t: float
    duration_s: float
    ready_at: float = 0.0


@dataclass(slots=True)
class Decision:
    """The smoother's settled behaviour for one hop of one animal.

    ``behaviour`` is a class name or NO_DATA; ``t`` is the start of the hop it covers and
    ``duration_s`` its length (the model's hop).
    """

    animal: str
    t: float
    duration_s: float
    behaviour: str
    confidence: float
    ready_at: float = 0.0


@dataclass(slots=True)
class StateChanged:
    """An animal's current behaviour changed (after smoothing and minimum-bout rules)."""

    animal: str
    behaviour: str
    since: float
    confidence: float
    previous: str | None = None
    kind: str = field(default="state_changed", init=False)


@dataclass(slots=True)
class BoutClosed:
    """A behaviour bout ended. ``no_data_s`` counts unclassified seconds bridged inside it."""

    animal: str
    behaviour: str
    start: float
    end: float
    mean_confidence: float
    no_data_s: float = 0.0
    kind: str = field(default="bout_closed", init=False)

    @property
    def duration_s(self) -> float:
        return self.end - self.start


@dataclass(slots=True)
class CollarGravity:
    """Mean static acceleration (gravity as the collar sees it) of one collar over one window.

    The pipeline hands these to the collar-health tracker, which watches the collar's roll
    about the neck (roll = atan2(gy, gz), NXP AN3461) for a lasting change: a collar that
    slipped or turned. ``t`` is the window start (collar clock, as ``Posteriors.t_start``).
    """

    collar_id: str
    animal: str
    t: float
    duration_s: float
    g: tuple[float, float, float]  # mean acceleration over the window in g, collar axes x, y, z
