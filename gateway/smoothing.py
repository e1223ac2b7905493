"""Online HMM smoothing of per-window class posteriors, decided with a fixed lag.

Each animal's stream of model posteriors is treated as the emissions of a hidden Markov
chain over the model's classes, with the model's per-hop transition matrix (DESIGN.md,
smoothing; Viterbi decoding of an HMM over class posteriors is common practice, no source).

- Emissions: the model gives p(class | window). Dividing by the class prior turns it into a
  likelihood up to a constant per window, p(window | class) / p(window) ("scaled
  likelihood"), which is what an HMM needs; otherwise the prior is counted twice, once by the
  classifier and once by the chain. The prior is the model card's ``class_prior`` when the
  card has one, else the stationary distribution of the transition matrix (the class balance
  of the label sequences the matrix was estimated from).
- Decoding: Viterbi max-product recursion with back pointers. A hop is decided once ``lag``
  newer hops have arrived, by tracing back from the best state now through the last ``lag``
  back pointers (fixed-lag Viterbi). With a lag at least the sequence length, and a flush at
  the end, the path is exactly the full Viterbi path (checked against hmmlearn in the tests).
- Confidence of a decided hop: its fixed-lag smoothed marginal, forward filter times a
  backward pass over the lag window, P(state at hop | everything seen so far).
- No data: a hop without posteriors (collar silent, window too gappy, or bad numbers) is
  decided as ``NO_DATA``. Inside the chain it bridges: the chain steps with the transition
  matrix raised to the gap's hop count and a flat emission, so the behaviour on both sides
  stays connected. Once consecutive no-data exceeds ``bridge_s`` the chain breaks: every
  pending hop is decided at once and the next window starts a fresh chain from the prior.
- Time order: a window that starts before the hop the chain expects (out of order or a
  duplicate) is dropped and counted; a jump forward is a no-data gap.

Decisions tile time without overlap: a window starting at ``t`` decides the hop-long slice
at its centre, ``[t + (window_s - hop_s) / 2, ... + hop_s)``.

>>> import numpy as np
>>> from gateway.types import Posteriors
>>> params = HmmParams.build(("rest", "walk"), np.array([[0.9, 0.1], [0.1, 0.9]]), 5.0,
...                          window_s=5.0, lag_s=10.0)
>>> sm = AnimalSmoother("cow1", params)
>>> out = [d for i in range(4) for d in sm.push(Posteriors("cow1", 5.0 * i, np.array([0.8, 0.2])))]
>>> [(d.t, d.behaviour) for d in out]
[(0.0, 'rest'), (5.0, 'rest')]
>>> [d.behaviour for d in sm.flush()]
['rest', 'rest']
"""

from __future__ import annotations

import base64
import math
from collections import deque
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .types import NO_DATA, Decision, NoDataHop, Posteriors

__all__ = [
    "AnimalSmoother",
    "HmmParams",
    "SmootherBank",
    "default_transitions",
    "stationary_distribution",
]

# Smallest scaled likelihood share a class keeps: a model's hard zero must not make a class
# impossible for the whole chain (log 0); 1e-6 is far below any real posterior (common
# practice, no source).
_P_FLOOR = 1e-6
# Mean dwell time of a behaviour assumed when a model carries no transition matrix: a few
# minutes, the order of short bouts in FIELD.md (walking, meal pauses); common practice, no source.
_DEFAULT_DWELL_S = 300.0
_OBS, _GAP = 0, 1


def default_transitions(n_classes: int, hop_s: float, mean_dwell_s: float = _DEFAULT_DWELL_S):
    """A per-hop transition matrix with geometric dwell times of mean ``mean_dwell_s``.

    >>> default_transitions(2, 5.0, 10.0).round(2).tolist()
    [[0.5, 0.5], [0.5, 0.5]]
    """
    if n_classes < 2:
        raise ValueError("a transition matrix needs at least 2 classes")
    stay = max(0.0, 1.0 - hop_s / mean_dwell_s)
    a = np.full((n_classes, n_classes), (1.0 - stay) / (n_classes - 1))
    np.fill_diagonal(a, stay)
    return a


def stationary_distribution(a: np.ndarray) -> np.ndarray:
    """The distribution ``pi`` with ``pi @ a == pi`` (least squares, so reducible chains work)."""
    c = a.shape[0]
    lhs = np.vstack([a.T - np.eye(c), np.ones((1, c))])
    rhs = np.zeros(c + 1)
    rhs[-1] = 1.0
    pi, *_ = np.linalg.lstsq(lhs, rhs, rcond=None)
    pi = np.clip(pi, _P_FLOOR, None)
    return pi / pi.sum()


@dataclass(frozen=True, slots=True, eq=False)
class HmmParams:
    """Everything the smoother needs that is the same for every animal (shared, read-only)."""

    classes: tuple[str, ...]
    transitions: np.ndarray  # [C, C], row i: P(next = j | now = i), per hop
    prior: np.ndarray  # [C] class prior the posteriors are divided by
    start: np.ndarray  # [C] distribution of the first hop of a chain
    hop_s: float
    offset_s: float  # where a window's hop sits inside it: (window_s - hop_s) / 2
    lag: int  # hops
    bridge_s: float
    _powers: dict[int, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict, repr=False)

    @classmethod
    def build(
        cls,
        classes: Sequence[str],
        transitions: np.ndarray | None,
        hop_s: float,
        *,
        window_s: float | None = None,
        lag_s: float = 60.0,
        bridge_s: float = 60.0,
        prior: Sequence[float] | np.ndarray | None = None,
    ) -> HmmParams:
        """Check and derive parameters; ``transitions=None`` uses :func:`default_transitions`."""
        c = len(classes)
        if c < 2 or len(set(classes)) != c:
            raise ValueError("classes must be at least 2 distinct names")
        if not (math.isfinite(hop_s) and hop_s > 0):
            raise ValueError(f"hop_s must be a positive number of seconds, not {hop_s!r}")
        window_s = hop_s if window_s is None else window_s
        if not (math.isfinite(window_s) and window_s >= hop_s):
            raise ValueError(f"window_s ({window_s!r}) must be at least hop_s ({hop_s})")
        if not (math.isfinite(lag_s) and lag_s >= 0):
            raise ValueError(f"lag_s must be >= 0 seconds, not {lag_s!r}")
        if not (math.isfinite(bridge_s) and bridge_s >= 0):
            raise ValueError(f"bridge_s must be >= 0 seconds, not {bridge_s!r}")
        a = default_transitions(c, hop_s) if transitions is None else np.array(transitions, float)
        if a.shape != (c, c) or not np.isfinite(a).all() or (a < 0).any():
            raise ValueError(f"transitions must be a {c}x{c} matrix of probabilities")
        if not np.allclose(a.sum(axis=1), 1.0, atol=1e-3):
            raise ValueError("transition matrix rows must sum to 1")
        a = a / a.sum(axis=1, keepdims=True)
        if prior is None:
            pri = stationary_distribution(a)
        else:
            pri = np.asarray(prior, dtype=float)
            if pri.shape != (c,) or not np.isfinite(pri).all() or (pri <= 0).any():
                raise ValueError(f"class prior must be {c} positive numbers")
            pri = pri / pri.sum()
        lag = int(math.ceil(lag_s / hop_s - 1e-9))
        return cls(
            tuple(classes), a, pri, stationary_distribution(a), float(hop_s),
            (window_s - hop_s) / 2.0, lag, float(bridge_s),
        )  # fmt: skip

    @property
    def n_classes(self) -> int:
        return len(self.classes)

    def step_matrix(self, hops: int) -> tuple[np.ndarray, np.ndarray]:
        """Transition matrix over ``hops`` hops and its log (cached; gaps are bridged by these)."""
        hit = self._powers.get(hops)
        if hit is None:
            m = np.linalg.matrix_power(self.transitions, hops)
            with np.errstate(divide="ignore"):
                hit = (m, np.log(m))
            if len(self._powers) < 1024:  # bounded: gaps of many lengths must not grow it
                self._powers[hops] = hit
        return hit

    def scaled_likelihood(self, p: np.ndarray) -> np.ndarray | None:
        """Posteriors divided by the prior, floored and renormalised; None when unusable."""
        try:
            q = np.asarray(p, dtype=np.float64).reshape(-1)
        except (TypeError, ValueError):
            return None
        if q.shape[0] != len(self.classes) or not np.isfinite(q).all() or (q < 0).any():
            return None
        total = q.sum()
        if not total > 0:
            return None
        q = np.maximum(q / total, _P_FLOOR) / self.prior
        return q / q.sum()


@dataclass(slots=True)
class _Step:
    t: float  # start of the decided slice
    duration_s: float
    kind: int  # _OBS or _GAP
    ready_at: float
    back: list[int] | None  # best predecessor of each state; None at a chain start
    lik: np.ndarray | None  # scaled likelihood; None = flat (gap)
    hops: int  # transition matrix power into this step
    alpha: np.ndarray  # filtered distribution after this step


class AnimalSmoother:
    """Fixed-lag Viterbi smoother for one animal: ``push`` items in time order, read decisions.

    ``dropped`` counts windows refused for being out of order; ``bad`` counts posteriors that
    were unusable (wrong length, NaN, negative, all zero) and became no-data.
    """

    __slots__ = (
        "_alpha", "_delta", "_nodata_run", "_steps", "animal", "bad", "dropped", "next_t",
        "params",
    )  # fmt: skip

    def __init__(self, animal: str, params: HmmParams) -> None:
        self.animal = animal
        self.params = params
        self._steps: deque[_Step] = deque()
        self._delta: np.ndarray | None = None  # log max-product scores, None: no chain
        self._alpha: np.ndarray | None = None
        self._nodata_run = 0.0
        # Window start the chain expects next (None before the first item).
        self.next_t: float | None = None
        self.dropped = 0
        self.bad = 0

    @property
    def pending(self) -> int:
        """Hops received but not decided yet (at most ``lag`` while the chain runs)."""
        return len(self._steps)

    def push(self, item: Posteriors | NoDataHop) -> list[Decision]:
        """Add one window's posteriors (or a no-data stretch); return hops decided by it."""
        hop = self.params.hop_s
        if isinstance(item, Posteriors):
            t, duration, lik = float(item.t_start), hop, self.params.scaled_likelihood(item.p)
            if lik is None:
                self.bad += 1
        else:
            t, duration, lik = float(item.t), float(item.duration_s), None
            if not (math.isfinite(duration) and duration > 0):
                self.bad += 1
                return []
        if not math.isfinite(t):
            self.bad += 1
            return []
        out: list[Decision] = []
        if self.next_t is not None:
            late = self.next_t - t
            if late > hop / 2:
                self.dropped += 1
                return []
            if -late >= hop / 2:  # silent jump forward: the skipped time is no data
                self._gap(self.next_t, t - self.next_t, item.ready_at, out)
        if lik is None:
            self._gap(t, duration, item.ready_at, out)
            return out
        self._nodata_run = 0.0
        self._observe(t, lik, item.ready_at)
        self.next_t = t + hop
        self._decide_ripe(out)
        return out

    def flush(self) -> list[Decision]:
        """Decide every pending hop now (end of stream, shutdown); the chain goes on."""
        out: list[Decision] = []
        self._decide(len(self._steps), out)
        return out

    def _observe(self, t: float, lik: np.ndarray, ready_at: float) -> None:
        p = self.params
        loglik = np.log(lik)
        if self._delta is None:
            self._delta = np.log(p.start) + loglik
            alpha = p.start * lik
            back = None
        else:
            scores = self._delta[:, None] + p.step_matrix(1)[1]
            idx = scores.argmax(axis=0)
            self._delta = scores[idx, np.arange(p.n_classes)] + loglik
            alpha = (self._alpha @ p.transitions) * lik  # type: ignore[operator]
            back = idx.tolist()
        self._delta -= self._delta.max()  # keep scores bounded over an endless stream
        self._alpha = alpha / alpha.sum()
        self._steps.append(
            _Step(t + p.offset_s, p.hop_s, _OBS, ready_at, back, lik, 1, self._alpha)
        )

    def _gap(self, t: float, duration: float, ready_at: float, out: list[Decision]) -> None:
        p = self.params
        self._nodata_run += duration
        self.next_t = t + duration
        slice_t = t + p.offset_s
        if self._delta is None or self._nodata_run > p.bridge_s:
            # Break the chain: nothing links the two sides of a long silence.
            self._decide(len(self._steps), out)
            self._delta = self._alpha = None
            if out and out[-1].behaviour == NO_DATA and out[-1].t + out[-1].duration_s == slice_t:
                out[-1].duration_s += duration  # one decision for one silence
            else:
                out.append(Decision(self.animal, slice_t, duration, NO_DATA, 0.0, ready_at))
            return
        hops = max(1, int(round(duration / p.hop_s)))
        m, logm = p.step_matrix(hops)
        scores = self._delta[:, None] + logm
        idx = scores.argmax(axis=0)
        self._delta = scores[idx, np.arange(p.n_classes)]
        self._delta -= self._delta.max()
        alpha = self._alpha @ m  # type: ignore[operator]
        self._alpha = alpha / alpha.sum()
        self._steps.append(
            _Step(slice_t, duration, _GAP, ready_at, idx.tolist(), None, hops, self._alpha)
        )
        self._decide_ripe(out)

    def _decide_ripe(self, out: list[Decision]) -> None:
        extra = len(self._steps) - self.params.lag
        if extra > 0:
            self._decide(extra, out)

    def _decide(self, count: int, out: list[Decision]) -> None:
        """Decide the ``count`` oldest pending hops by tracing back from the best state now."""
        steps = self._steps
        if count <= 0 or self._delta is None:
            return
        p = self.params
        n = len(steps)
        state = int(self._delta.argmax())
        beta = np.ones(p.n_classes)
        states = [0] * n
        conf = [0.0] * n
        for k in range(n - 1, -1, -1):
            s = steps[k]
            states[k] = state
            if k < count:
                g = s.alpha * beta
                conf[k] = float(g[state] / g.sum())
            if k == 0:
                break
            # One step back: Viterbi pointer for the state, backward message for confidence.
            weighted = beta if s.lik is None else beta * s.lik
            beta = p.step_matrix(s.hops)[0] @ weighted
            beta /= beta.sum()
            state = s.back[state]  # type: ignore[index]
        for k in range(count):
            s = steps.popleft()
            if s.kind == _GAP:
                out.append(Decision(self.animal, s.t, s.duration_s, NO_DATA, 0.0, s.ready_at))
            else:
                beh = p.classes[states[k]]
                out.append(Decision(self.animal, s.t, s.duration_s, beh, conf[k], s.ready_at))
        if steps:
            steps[0].back = None  # the oldest pending hop now starts the traced path

    # -- persistence -------------------------------------------------------------------------

    def snapshot(self, full: bool = True) -> dict[str, Any]:
        """JSON-able state. ``full=False`` keeps only where the decided stream ends (tiny)."""
        if not full:
            decided = self._steps[0].t - self.params.offset_s if self._steps else self.next_t
            return {"next_t": decided}
        return {
            "next_t": self.next_t,
            "nodata_run": self._nodata_run,
            "delta": _enc(self._delta),
            "alpha": _enc(self._alpha),
            "steps": [
                [s.t, s.duration_s, s.kind, s.ready_at, s.back, _enc(s.lik), s.hops, _enc(s.alpha)]
                for s in self._steps
            ],
        }

    def restore(self, state: Mapping[str, Any]) -> None:
        """Load a :meth:`snapshot`; raise ValueError when it does not fit these parameters."""
        c = self.params.n_classes
        try:
            next_t = state.get("next_t")
            self.next_t = None if next_t is None else float(next_t)
            self._nodata_run = float(state.get("nodata_run", 0.0))
            self._delta = _dec(state.get("delta"), c)
            self._alpha = _dec(state.get("alpha"), c)
            steps = deque()
            for t, dur, kind, ready, back, lik, hops, alpha in state.get("steps", []):
                if back is not None and (len(back) != c or not all(0 <= b < c for b in back)):
                    raise ValueError("back pointers do not fit the classes")
                a = _dec(alpha, c)
                if a is None:
                    raise ValueError("a pending hop lacks its filtered distribution")
                steps.append(
                    _Step(
                        float(t),
                        float(dur),
                        int(kind),
                        float(ready),
                        back,
                        _dec(lik, c),
                        int(hops),
                        a,
                    )
                )
        except (TypeError, ValueError, KeyError) as exc:
            self._steps, self._delta, self._alpha = deque(), None, None
            raise ValueError(f"smoother state for {self.animal} is unusable: {exc}") from exc
        if (self._delta is None) != (self._alpha is None) or (steps and self._delta is None):
            self._steps, self._delta, self._alpha = deque(), None, None
            raise ValueError(f"smoother state for {self.animal} is inconsistent")
        if steps:
            steps[0].back = None
        self._steps = steps


def _enc(a: np.ndarray | None) -> str | None:
    return None if a is None else base64.b64encode(np.asarray(a, "<f8").tobytes()).decode()


def _dec(s: str | None, c: int) -> np.ndarray | None:
    if s is None:
        return None
    a = np.frombuffer(base64.b64decode(s, validate=True), dtype="<f8")
    if a.shape != (c,) or np.isnan(a).any():
        raise ValueError("a stored vector does not fit the classes")
    return a.copy()


class SmootherBank:
    """One :class:`AnimalSmoother` per animal, created on first sight."""

    def __init__(self, params: HmmParams) -> None:
        self.params = params
        self.animals: dict[str, AnimalSmoother] = {}

    def get(self, animal: str) -> AnimalSmoother:
        sm = self.animals.get(animal)
        if sm is None:
            sm = self.animals[animal] = AnimalSmoother(animal, self.params)
        return sm

    def push_many(self, items: Iterable[Posteriors | NoDataHop]) -> list[Decision]:
        """Push a batch (any animals, each animal's items in time order); decisions in order."""
        out: list[Decision] = []
        for item in items:
            out.extend(self.get(item.animal).push(item))
        return out

    def flush_all(self) -> list[Decision]:
        out: list[Decision] = []
        for sm in self.animals.values():
            out.extend(sm.flush())
        return out

    @property
    def dropped(self) -> int:
        return sum(sm.dropped for sm in self.animals.values())

    @property
    def bad(self) -> int:
        return sum(sm.bad for sm in self.animals.values())
