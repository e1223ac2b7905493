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

Every animal's state lives in one :class:`SmootherBank` (arrays indexed by animal), so the
windows of a tick are decided with a few numpy calls for the whole herd; an
:class:`AnimalSmoother` is one animal's handle on it.

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
    # Transition matrix powers A^0..A^H and their logs, H = the longest bridged gap in hops.
    powers: np.ndarray = field(repr=False)
    log_powers: np.ndarray = field(repr=False)

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
        if bridge_s / hop_s > 100_000:
            raise ValueError(f"bridge_s ({bridge_s:g}) is more than 100000 hops; shorten it")
        pw = [np.eye(c)]
        for _ in range(int(round(bridge_s / hop_s)) + 1):
            pw.append(pw[-1] @ a)
        powers = np.array(pw)
        with np.errstate(divide="ignore"):
            log_powers = np.log(powers)
        return cls(
            tuple(classes), a, pri, stationary_distribution(a), float(hop_s),
            (window_s - hop_s) / 2.0, lag, float(bridge_s), powers, log_powers,
        )  # fmt: skip

    @property
    def n_classes(self) -> int:
        return len(self.classes)

    @property
    def max_bridge_hops(self) -> int:
        return self.powers.shape[0] - 1

    def scaled_likelihood(self, p: np.ndarray) -> np.ndarray:
        """Rows of valid posteriors ``[N, C]`` divided by the prior, floored, renormalised."""
        q = np.maximum(p / p.sum(axis=1, keepdims=True), _P_FLOOR) / self.prior
        return q / q.sum(axis=1, keepdims=True)

    def valid_rows(self, p: np.ndarray) -> np.ndarray:
        """Which rows of ``[N, C]`` are usable posteriors: finite, >= 0, not all zero."""
        with np.errstate(invalid="ignore", over="ignore"):
            total = p.sum(axis=1)
            return (
                np.isfinite(p).all(axis=1) & (p >= 0).all(axis=1) & (total > 0) & np.isfinite(total)
            )


class AnimalSmoother:
    """Fixed-lag Viterbi smoother for one animal: ``push`` items in time order, read decisions.

    A handle on one slot of a :class:`SmootherBank` (a private bank of one when built
    directly). ``dropped`` counts windows refused for being out of order; ``bad`` counts
    posteriors that were unusable (wrong length, NaN, negative, all zero) and became no-data.
    """

    __slots__ = ("_bank", "_slot", "animal")

    def __init__(self, animal: str, params: HmmParams) -> None:
        bank = SmootherBank(params, capacity=1)
        self.animal, self._bank, self._slot = animal, bank, bank._new_slot(animal)
        bank.handles[animal] = self

    @classmethod
    def _on(cls, bank: SmootherBank, animal: str, slot: int) -> AnimalSmoother:
        h = cls.__new__(cls)
        h.animal, h._bank, h._slot = animal, bank, slot
        return h

    @property
    def params(self) -> HmmParams:
        return self._bank.params

    @params.setter
    def params(self, params: HmmParams) -> None:
        if params is not self._bank.params:
            self._bank.set_params(params)

    @property
    def pending(self) -> int:
        """Hops received but not decided yet (at most ``lag`` while the chain runs)."""
        return int(self._bank.count[self._slot])

    @property
    def next_t(self) -> float | None:
        """Window start the chain expects next (None before the first item)."""
        t = float(self._bank.next_t[self._slot])
        return None if math.isnan(t) else t

    @property
    def dropped(self) -> int:
        return int(self._bank.dropped_n[self._slot])

    @property
    def bad(self) -> int:
        return int(self._bank.bad_n[self._slot])

    def push(self, item: Posteriors | NoDataHop) -> list[Decision]:
        """Add one window's posteriors (or a no-data stretch); return hops decided by it."""
        out: list[Decision] = []
        self._bank._push_one(self._slot, item, out)
        return out

    def flush(self) -> list[Decision]:
        """Decide every pending hop now (end of stream, shutdown); the chain goes on."""
        out: list[Decision] = []
        self._bank._decide_all(np.array([self._slot]), out)
        return out

    def snapshot(self, full: bool = True) -> dict[str, Any]:
        """JSON-able state. ``full=False`` keeps only where the decided stream ends (tiny)."""
        return self._bank._snapshot(self._slot, full)

    def restore(self, state: Mapping[str, Any]) -> None:
        """Load a :meth:`snapshot`; raise ValueError when it does not fit these parameters."""
        self._bank._restore(self._slot, state)


def _number(x: Any) -> float:
    """A float, or NaN for anything that is not a number (hostile input is no data)."""
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


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
    """Every animal's smoother state in shared arrays, so a batch is one set of numpy calls.

    Each animal owns a slot: the chain's scores and filter, and a ring of its pending hops.
    :meth:`push_many` takes the common case (the next window of a running chain) for all
    animals at once; anything else (first window, gaps, out-of-order, bad numbers) goes
    through the same operations one animal at a time.
    """

    def __init__(self, params: HmmParams, capacity: int = 64) -> None:
        self.handles: dict[str, AnimalSmoother] = {}
        self._slots: dict[str, int] = {}
        self._names: list[str] = []
        self._alloc(params, max(1, capacity), params.lag + 2)

    # -- arrays ------------------------------------------------------------------------------

    def _alloc(self, params: HmmParams, cap: int, ring: int) -> None:
        c = params.n_classes
        self.params = params
        self._cap, self._ring = cap, ring
        self.delta = np.zeros((cap, c))  # log max-product scores of the chain
        self.alpha = np.zeros((cap, c))  # forward filter
        self.live = np.zeros(cap, bool)  # a chain is running
        self.next_t = np.full(cap, np.nan)
        self.nodata_run = np.zeros(cap)
        self.head = np.zeros(cap, np.int64)  # ring position of the oldest pending hop
        self.count = np.zeros(cap, np.int64)  # pending hops
        self.dropped_n = np.zeros(cap, np.int64)
        self.bad_n = np.zeros(cap, np.int64)
        self.r_alpha = np.zeros((cap, ring, c))
        self.r_lik = np.ones((cap, ring, c))  # flat (ones) for a bridged gap
        self.r_back = np.zeros((cap, ring, c), np.int16)  # best predecessor of each state
        self.r_hops = np.ones((cap, ring), np.int64)  # matrix power into the hop
        self.r_t = np.zeros((cap, ring))  # start of the decided slice
        self.r_dur = np.zeros((cap, ring))
        self.r_gap = np.zeros((cap, ring), bool)
        self.r_ready = np.zeros((cap, ring))

    _PER_SLOT = ("delta", "alpha", "live", "next_t", "nodata_run", "head", "count",
                 "dropped_n", "bad_n")  # fmt: skip
    _RING = ("r_alpha", "r_lik", "r_back", "r_hops", "r_t", "r_dur", "r_gap", "r_ready")

    def _resize(self, cap: int, ring: int) -> None:
        """Grow the arrays (more animals, or a longer ring); pending hops keep their order."""
        old = {k: getattr(self, k) for k in self._PER_SLOT + self._RING}
        n, old_ring = self._cap, self._ring
        self._alloc(self.params, cap, ring)
        for k in self._PER_SLOT:
            getattr(self, k)[:n] = old[k]
        # Ring contents move to positions 0..count-1 (the oldest first).
        pos = (old["head"][:, None] + np.arange(old_ring)[None, :]) % old_ring
        keep = min(old_ring, ring)
        for k in self._RING:
            getattr(self, k)[:n, :keep] = np.take_along_axis(
                old[k], pos.reshape(pos.shape + (1,) * (old[k].ndim - 2)), axis=1
            )[:, :keep]
        self.head[:n] = 0

    def _new_slot(self, animal: str) -> int:
        slot = len(self._names)
        if slot >= self._cap:
            # a quarter more, not double: at 10,000 animals doubling leaves up to 8 MB unused,
            # and the old and new arrays are both alive while they are copied
            self._resize(max(self._cap + 16, self._cap * 5 // 4), self._ring)
        self._names.append(animal)
        self._slots[animal] = slot
        return slot

    def get(self, animal: str) -> AnimalSmoother:
        h = self.handles.get(animal)
        if h is None:
            h = self.handles[animal] = AnimalSmoother._on(self, animal, self._new_slot(animal))
        return h

    def reset(self, animal: str) -> None:
        """Forget an animal's chain and pending hops (its counters stay)."""
        self._clear(self.get(animal)._slot)

    def _clear(self, slot: int) -> None:
        self.live[slot] = False
        self.count[slot] = self.head[slot] = 0
        self.next_t[slot] = np.nan
        self.nodata_run[slot] = 0.0

    def set_params(self, params: HmmParams) -> None:
        """New chain parameters (a reloaded model); pending hops are kept."""
        if params.classes != self.params.classes:
            raise ValueError("a new model must keep the classes to keep the smoothers' state")
        states = {s: self._snapshot(s, True) for s in range(len(self._names))}
        counters = (self.dropped_n.copy(), self.bad_n.copy())
        ring = max(params.lag + 2, int(self.count.max(initial=0)) + 2)
        self._alloc(params, self._cap, ring)
        self.dropped_n[:], self.bad_n[:] = counters
        for s, st in states.items():
            self._restore(s, st)

    # -- the batch path ----------------------------------------------------------------------

    def push_many(self, items: Iterable[Posteriors | NoDataHop]) -> list[Decision]:
        """Push a batch (any animals, each animal's items in time order); decisions in order.

        Decisions of one animal come in time order; animals are interleaved.
        """
        rounds: list[list[tuple[int, Posteriors | NoDataHop]]] = []
        depth: dict[int, int] = {}
        slots = self._slots
        for item in items:
            slot = slots.get(item.animal)
            if slot is None:
                slot = self.get(item.animal)._slot
            r = depth.get(slot, 0)
            depth[slot] = r + 1
            if r == len(rounds):
                rounds.append([])
            rounds[r].append((slot, item))
        out: list[Decision] = []
        for rnd in rounds:  # round k holds the k-th item of each animal in the batch
            self._round(rnd, out)
        return out

    def _round(self, rnd: list[tuple[int, Posteriors | NoDataHop]], out: list[Decision]) -> None:
        p = self.params
        c, half = p.n_classes, p.hop_s / 2
        live, next_t = self.live, self.next_t
        fast: list[int] = []
        fast_items: list[Posteriors] = []
        slow: list[tuple[int, Posteriors | NoDataHop]] = []
        for slot, item in rnd:
            if (
                type(item) is Posteriors
                and live[slot]
                and abs(item.t_start - next_t[slot]) < half
                and isinstance(item.t_start, float)
                and isinstance(item.p, np.ndarray)
                and item.p.shape == (c,)
                and item.p.dtype.kind == "f"
            ):
                fast.append(slot)
                fast_items.append(item)
            else:
                slow.append((slot, item))
        if fast:
            post = np.array([it.p for it in fast_items], dtype=np.float64)
            ok = p.valid_rows(post)
            if not ok.all():
                slow.extend((fast[i], fast_items[i]) for i in np.flatnonzero(~ok))
                post = post[ok]
                fast_items = [it for it, k in zip(fast_items, ok, strict=True) if k]
                fast = [s for s, k in zip(fast, ok, strict=True) if k]
            if fast:
                s_arr = np.array(fast)
                t = np.array([it.t_start for it in fast_items])
                ready = np.array([it.ready_at for it in fast_items])
                self._observe(s_arr, t, p.scaled_likelihood(post), ready)
                self._decide_ripe(s_arr, out)
        for slot, item in slow:
            self._push_one(slot, item, out)

    # -- one animal --------------------------------------------------------------------------

    def _push_one(self, slot: int, item: Posteriors | NoDataHop, out: list[Decision]) -> None:
        p = self.params
        hop = p.hop_s
        one = np.array([slot])
        lik = None
        if isinstance(item, Posteriors):
            t, duration = _number(item.t_start), hop
            try:
                row = np.asarray(item.p, dtype=np.float64).reshape(1, -1)
            except (TypeError, ValueError):
                row = np.zeros((1, 0))
            usable = row.shape[1] == p.n_classes and bool(p.valid_rows(row)[0])
            if usable:
                lik = p.scaled_likelihood(row)
            else:
                self.bad_n[slot] += 1
        else:
            t, duration = _number(item.t), _number(item.duration_s)
            if not (math.isfinite(duration) and duration > 0):
                self.bad_n[slot] += 1
                return
        if not math.isfinite(t):
            self.bad_n[slot] += 1
            return
        expected = float(self.next_t[slot])
        if not math.isnan(expected):
            late = expected - t
            if late > hop / 2:
                self.dropped_n[slot] += 1
                return
            if -late >= hop / 2:  # silent jump forward: the skipped time is no data
                self._gap(slot, expected, t - expected, item.ready_at, out)
        if lik is None:
            self._gap(slot, t, duration, item.ready_at, out)
            return
        self._observe(one, np.array([t]), lik, np.array([item.ready_at]))
        self._decide_ripe(one, out)

    def _gap(
        self, slot: int, t: float, duration: float, ready_at: float, out: list[Decision]
    ) -> None:
        p = self.params
        self.nodata_run[slot] += duration
        self.next_t[slot] = t + duration
        slice_t = t + p.offset_s
        one = np.array([slot])
        if not self.live[slot] or self.nodata_run[slot] > p.bridge_s:
            # Break the chain: nothing links the two sides of a long silence.
            self._decide_all(one, out)
            self.live[slot] = False
            last = out[-1] if out else None
            if (
                last is not None
                and last.animal == self._names[slot]
                and last.behaviour == NO_DATA
                and abs(last.t + last.duration_s - slice_t) < 1e-6
            ):
                last.duration_s += duration  # one decision for one silence
            else:
                out.append(Decision(self._names[slot], slice_t, duration, NO_DATA, 0.0, ready_at))
            return
        hops = min(max(1, int(round(duration / p.hop_s))), p.max_bridge_hops)
        self._step(one, np.array([hops]))
        self._write(one, np.array([slice_t]), np.array([duration]), True, np.array([ready_at]))
        self._decide_ripe(one, out)

    # -- the operations (vectorised over distinct slots) -------------------------------------

    def _step(self, s: np.ndarray, hops: np.ndarray, lik: np.ndarray | None = None) -> None:
        """One Viterbi and forward step for slots ``s`` (``lik=None``: a flat gap step)."""
        p = self.params
        if (self.count[s] + 1 >= self._ring).any():
            self._resize(self._cap, self._ring * 2)
        if lik is not None:  # an observed hop: one step of the matrix, shared by all
            scores = self.delta[s][:, :, None] + p.log_powers[1]
            alpha = self.alpha[s] @ p.transitions
        else:  # a bridged gap: each slot its own matrix power
            scores = self.delta[s][:, :, None] + p.log_powers[hops]
            alpha = (self.alpha[s][:, None, :] @ p.powers[hops])[:, 0, :]
        back = scores.argmax(axis=1)  # [N, C]: the best predecessor of each state
        delta = np.take_along_axis(scores, back[:, None, :], axis=1)[:, 0, :]
        if lik is not None:
            delta += np.log(lik)
            alpha *= lik
        fresh = ~self.live[s]
        if fresh.any():  # a chain starts from the prior
            delta[fresh] = np.log(p.start) + np.log(lik[fresh])  # type: ignore[index]
            alpha[fresh] = p.start * lik[fresh]  # type: ignore[index]
        delta -= delta.max(axis=1, keepdims=True)  # bounded over an endless stream
        total = alpha.sum(axis=1, keepdims=True)
        alpha = np.where(total > 0, alpha / np.where(total > 0, total, 1.0), p.start)
        self.delta[s], self.alpha[s], self.live[s] = delta, alpha, True
        pos = (self.head[s] + self.count[s]) % self._ring
        self.r_back[s, pos] = back
        self.r_hops[s, pos] = hops
        self.r_alpha[s, pos] = alpha
        self.r_lik[s, pos] = 1.0 if lik is None else lik

    def _write(self, s: np.ndarray, t: np.ndarray, dur: np.ndarray, gap: bool, ready: np.ndarray):
        pos = (self.head[s] + self.count[s]) % self._ring
        self.r_t[s, pos], self.r_dur[s, pos], self.r_ready[s, pos] = t, dur, ready
        self.r_gap[s, pos] = gap
        self.count[s] += 1

    def _observe(self, s: np.ndarray, t: np.ndarray, lik: np.ndarray, ready: np.ndarray) -> None:
        p = self.params
        self._step(s, np.ones(len(s), np.int64), lik)
        self._write(s, t + p.offset_s, np.full(len(s), p.hop_s), False, ready)
        self.nodata_run[s] = 0.0
        self.next_t[s] = t + p.hop_s

    def _decide_ripe(self, s: np.ndarray, out: list[Decision]) -> None:
        extra = self.count[s] - self.params.lag
        ripe = extra > 0
        if ripe.any():
            self._decide(s[ripe], extra[ripe], out)

    def _decide_all(self, s: np.ndarray, out: list[Decision]) -> None:
        has = self.count[s] > 0
        if has.any():
            self._decide(s[has], self.count[s[has]], out)

    def _decide(self, s: np.ndarray, m: np.ndarray, out: list[Decision]) -> None:
        """Decide the ``m`` oldest pending hops of each slot by tracing back from the best
        state now; confidence is the forward filter times a backward pass over the lag."""
        p = self.params
        n, ring = len(s), self._ring
        cnt, head = self.count[s], self.head[s]
        maxc, maxm = int(cnt.max()), int(m.max())
        rows = np.arange(n)
        # Every pending hop of these slots, oldest first: [n, maxc, ...] (one gather each).
        cols = (head[:, None] + np.arange(maxc)[None, :]) % ring
        sc = s[:, None]
        r_alpha, r_lik = self.r_alpha[sc, cols], self.r_lik[sc, cols]
        r_back, hops = self.r_back[sc, cols], self.r_hops[sc, cols]
        # Windows without a bridged gap (the usual case) share one matrix.
        trans = None if (hops == 1).all() else p.powers[hops]
        a_t = p.transitions.T
        state = np.zeros(n, np.int64)
        beta = np.ones((n, p.n_classes))
        states = np.zeros((n, maxm), np.int64)
        betas = np.ones((n, maxm, p.n_classes))
        newest = cnt - 1
        first_start, last_start = int(newest.min()), maxc - 1
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            for k in range(maxc - 1, -1, -1):
                if first_start <= k <= last_start:  # newest hop of some slots: trace from here
                    start = newest == k
                    state[start] = self.delta[s[start]].argmax(axis=1)
                    beta[start] = 1.0
                if k < maxm:
                    states[:, k] = state
                    betas[:, k] = beta
                if k:  # one hop back: Viterbi pointer for the state, backward message
                    w = beta * r_lik[:, k]
                    beta = w @ a_t if trans is None else (trans[:, k] @ w[:, :, None])[:, :, 0]
                    beta /= beta.sum(axis=1, keepdims=True)
                    state = r_back[rows, k, state]
            g = r_alpha[:, :maxm] * betas
            conf = np.take_along_axis(g, states[:, :, None], axis=2)[:, :, 0] / g.sum(axis=2)
        cols = cols[:, :maxm]
        ts = self.r_t[sc, cols].tolist()
        durs = self.r_dur[sc, cols].tolist()
        gaps = self.r_gap[sc, cols].tolist()
        readys = self.r_ready[sc, cols].tolist()
        conf[~(conf >= 0.0)] = 0.0  # NaN from a degenerate backward message: no confidence
        st, cf = states.tolist(), np.minimum(conf, 1.0).tolist()
        names, classes = self._names, p.classes
        for i, (slot, mi) in enumerate(zip(s.tolist(), m.tolist(), strict=True)):
            name = names[slot]
            for k in range(mi):
                if gaps[i][k]:
                    out.append(Decision(name, ts[i][k], durs[i][k], NO_DATA, 0.0, readys[i][k]))
                else:
                    beh = classes[st[i][k]]
                    out.append(Decision(name, ts[i][k], durs[i][k], beh, cf[i][k], readys[i][k]))
        self.head[s] = (head + m) % ring
        self.count[s] = cnt - m

    def flush_all(self) -> list[Decision]:
        out: list[Decision] = []
        self._decide_all(np.arange(len(self._names)), out)
        return out

    @property
    def dropped(self) -> int:
        return int(self.dropped_n.sum())

    @property
    def bad(self) -> int:
        return int(self.bad_n.sum())

    # -- persistence -------------------------------------------------------------------------

    def _snapshot(self, slot: int, full: bool) -> dict[str, Any]:
        p = self.params
        n, ring, head = int(self.count[slot]), self._ring, int(self.head[slot])
        nt = float(self.next_t[slot])
        next_t = None if math.isnan(nt) else nt
        if not full:
            return {"next_t": float(self.r_t[slot, head]) - p.offset_s if n else next_t}
        live = bool(self.live[slot])
        steps = []
        for k in range(n):
            i = (head + k) % ring
            gap = bool(self.r_gap[slot, i])
            steps.append([
                float(self.r_t[slot, i]), float(self.r_dur[slot, i]), int(gap),
                float(self.r_ready[slot, i]), None if k == 0 else self.r_back[slot, i].tolist(),
                None if gap else _enc(self.r_lik[slot, i]), int(self.r_hops[slot, i]),
                _enc(self.r_alpha[slot, i]),
            ])  # fmt: skip
        return {
            "next_t": next_t,
            "nodata_run": float(self.nodata_run[slot]),
            "delta": _enc(self.delta[slot]) if live else None,
            "alpha": _enc(self.alpha[slot]) if live else None,
            "steps": steps,
        }

    def _restore(self, slot: int, state: Mapping[str, Any]) -> None:
        p = self.params
        c, name = p.n_classes, self._names[slot]
        try:
            next_t = state.get("next_t")
            next_t = math.nan if next_t is None else float(next_t)
            nodata_run = float(state.get("nodata_run", 0.0))
            delta, alpha = _dec(state.get("delta"), c), _dec(state.get("alpha"), c)
            steps = []
            for t, dur, kind, ready, back, lik, hops, a in state.get("steps", []):
                if back is not None and (len(back) != c or not all(0 <= b < c for b in back)):
                    raise ValueError("back pointers do not fit the classes")
                if int(hops) < 1:
                    raise ValueError("a hop without a transition")
                # A gap from a longer bridge_s (older settings) steps with the longest power.
                hops = min(int(hops), p.max_bridge_hops)
                a = _dec(a, c)
                if a is None:
                    raise ValueError("a pending hop lacks its filtered distribution")
                lik = _dec(lik, c)
                steps.append(
                    (float(t), float(dur), bool(kind), float(ready), back, lik, int(hops), a)
                )
            if (delta is None) != (alpha is None) or (steps and delta is None):
                raise ValueError("inconsistent chain")
        except (TypeError, ValueError, KeyError, AttributeError) as exc:
            self._clear(slot)
            raise ValueError(f"smoother state for {name} is unusable: {exc}") from exc
        if len(steps) + 2 > self._ring:
            self._resize(self._cap, len(steps) + 2)
        self._clear(slot)
        self.next_t[slot], self.nodata_run[slot] = next_t, nodata_run
        if delta is not None:
            self.delta[slot], self.alpha[slot], self.live[slot] = delta, alpha, True
        for k, (t, dur, gap, ready, back, lik, hops, a) in enumerate(steps):
            self.r_t[slot, k], self.r_dur[slot, k], self.r_gap[slot, k] = t, dur, gap
            self.r_ready[slot, k], self.r_hops[slot, k], self.r_alpha[slot, k] = ready, hops, a
            self.r_back[slot, k] = 0 if back is None else back
            self.r_lik[slot, k] = 1.0 if lik is None else lik
        self.count[slot] = len(steps)
