"""Bouts from smoothed decisions, per animal, and the herd-wide facade the pipeline calls.

A bout is a stretch of one behaviour. Two parameters per behaviour shape it
(``[bouts]`` in the config, defaults and their sources in gateway/config.py):

- minimum bout ``min_s``: a run of one behaviour becomes a bout only once it is longer than
  this; shorter runs are fragments (lying readings of <= 1 min are dropped, Bonk et al. 2013,
  J Dairy Sci, FIELD.md).
- bout criterion interval ``criterion_s``: an interruption of the current bout by no data or
  by fragments of other behaviours, shorter than this, is bridged; the bout goes on and the
  no-data seconds inside are counted (Slater & Lester 1982 define bouts by such a criterion;
  meal criteria from 1.9 to 49.1 min by method, Tolkamp & Kyriazakis, FIELD.md).

Rules, in the order they are applied to each decided hop:

1. The same behaviour as the open bout: the interruption since its last hop is bridged.
2. Another behaviour whose run is longer than its minimum bout: the open bout closes at its
   last hop and the new bout starts where the run started. A real bout of another behaviour
   always ends the current one, whatever the criterion.
3. An interruption at least the current bout's criterion long: the bout closes at its last
   hop. The current state stays until rule 2 or 4 names a new one (a run of another
   behaviour still needs its minimum bout).
4. No bout open and a hop without data: the state becomes ``NO_DATA`` from the start of the
   no-data run.

Time without data that is not bridged into a bout is reported as a bout of ``NO_DATA`` (same
event type, ``behaviour == NO_DATA``), so that an animal's bouts and no-data stretches account
for its time. Time between two bouts taken up by fragments belongs to neither.

Events: :class:`~gateway.types.StateChanged` when an animal's current behaviour changes (emitted
when the new bout is established, ``since`` is when it began), :class:`~gateway.types.BoutClosed`
when a bout ends (emitted before the StateChanged that ended it).

>>> from gateway.types import Decision
>>> seg = BoutSegmenter("cow1", {"resting": 60.0, "walking": 10.0}, {"resting": 300.0, "walking": 30.0})
>>> evs = []
>>> for i in range(30):
...     evs += seg.push(Decision("cow1", 5.0 * i, 5.0, "resting" if i < 20 else "walking", 0.9))
>>> [(type(e).__name__, e.behaviour) for e in evs]
[('StateChanged', 'resting'), ('BoutClosed', 'resting'), ('StateChanged', 'walking')]
>>> evs[1].start, evs[1].end, evs[2].since
(0.0, 100.0, 100.0)
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .config import BoutsSettings, SmoothingSettings
from .smoothing import AnimalSmoother, HmmParams, SmootherBank, default_transitions
from .types import NO_DATA, BoutClosed, Decision, NoDataHop, Posteriors, StateChanged

__all__ = ["BoutSegmenter", "Event", "HerdTracker"]

Event = StateChanged | BoutClosed
# Times closer than this are the same instant (float sums of hop lengths).
_EPS = 1e-6
_SNAPSHOT_VERSION = 1


@dataclass(slots=True)
class _Run:
    """Consecutive hops with one label (a behaviour or NO_DATA)."""

    label: str
    start: float
    end: float
    conf_sum: float = 0.0
    hops: int = 0

    @property
    def mean_conf(self) -> float:
        return self.conf_sum / self.hops if self.hops else 0.0


@dataclass(slots=True)
class _Bout:
    behaviour: str
    start: float
    last_end: float  # end of the last hop of this behaviour
    conf_sum: float
    hops: int
    no_data_s: float = 0.0


class BoutSegmenter:
    """Turns one animal's decided hops into state changes and closed bouts.

    ``min_s`` and ``criterion_s`` map behaviour -> seconds; ``default_min_s`` and
    ``default_criterion_s`` serve classes missing from them. ``dropped`` counts hops that
    arrived before the end of the last one (out of order) and were ignored.
    """

    __slots__ = (
        "_bout", "_crit", "_gap_no_data", "_min", "_nd", "_run", "animal", "confidence",
        "d_crit", "d_min", "dropped", "end", "since", "state",
    )  # fmt: skip

    def __init__(
        self,
        animal: str,
        min_s: Mapping[str, float],
        criterion_s: Mapping[str, float],
        *,
        default_min_s: float = 60.0,
        default_criterion_s: float = 120.0,
    ) -> None:
        self.animal = animal
        self._min = dict(min_s)
        self._crit = dict(criterion_s)
        self.d_min, self.d_crit = default_min_s, default_criterion_s
        self.state: str | None = None  # current behaviour or NO_DATA; None before any
        self.since = 0.0
        self.confidence = 0.0
        self.end: float | None = None  # end of the last hop seen
        self.dropped = 0
        self._bout: _Bout | None = None
        self._run: _Run | None = None
        self._gap_no_data = 0.0  # no-data seconds since the open bout's last hop
        self._nd: list[float] | None = None  # open NO_DATA stretch: [start, end, no-data seconds]

    @property
    def open_bout(self) -> BoutClosed | None:
        """The bout in progress as it would close now (for reports), or None."""
        b = self._bout
        if b is None:
            return None
        return BoutClosed(
            self.animal, b.behaviour, b.start, b.last_end, b.conf_sum / b.hops, b.no_data_s
        )

    def push(self, d: Decision) -> list[Event]:
        """Add one decided hop; return the events it causes."""
        t, dur = float(d.t), float(d.duration_s)
        if not (math.isfinite(t) and math.isfinite(dur) and dur > 0):
            self.dropped += 1
            return []
        out: list[Event] = []
        if self.end is not None:
            if t < self.end - _EPS:
                self.dropped += 1
                return []
            if t > self.end + _EPS:  # a hole in the decided stream is time without data
                self._hop(NO_DATA, self.end, t - self.end, 0.0, out)
        conf = float(d.confidence) if math.isfinite(d.confidence) else 0.0
        self._hop(d.behaviour, t, dur, min(max(conf, 0.0), 1.0), out)
        return out

    def push_many(self, decisions: Iterable[Decision]) -> list[Event]:
        out: list[Event] = []
        for d in decisions:
            out.extend(self.push(d))
        return out

    def close(self) -> list[Event]:
        """Close the open bout or no-data stretch (end of a demo or a replay, not a restart)."""
        out: list[Event] = []
        self._close_bout(out)
        self._close_no_data(out)
        return out

    def _min_s(self, behaviour: str) -> float:
        return self._min.get(behaviour, self.d_min)

    def _crit_s(self, behaviour: str) -> float:
        return self._crit.get(behaviour, self.d_crit)

    def _hop(self, label: str, t: float, dur: float, conf: float, out: list[Event]) -> None:
        end = t + dur
        self.end = end
        run = self._run
        if run is not None and run.label == label and abs(run.end - t) <= _EPS:
            run.end = end
        else:
            run = self._run = _Run(label, t, end)
        if label == NO_DATA:
            self._gap_no_data += dur
            if self._nd is not None:
                self._nd[1] = end
                self._nd[2] += dur
        else:
            run.conf_sum += conf
            run.hops += 1
        bout = self._bout
        if bout is not None and label == bout.behaviour:  # rule 1: bridge the interruption
            bout.no_data_s += self._gap_no_data
            bout.last_end = end
            bout.conf_sum += conf
            bout.hops += 1
            self._gap_no_data = 0.0
        elif label != NO_DATA and run.end - run.start > self._min_s(label) + _EPS:  # rule 2
            self._open(run, out)
        elif bout is not None and end - bout.last_end >= self._crit_s(bout.behaviour) - _EPS:
            self._close_bout(out)  # rule 3
        if self._bout is None and label == NO_DATA and self.state != NO_DATA:  # rule 4
            self._enter_no_data(run.start, end, run.end - run.start, out)

    def _open(self, run: _Run, out: list[Event]) -> None:
        self._close_bout(out)
        self._close_no_data(out)
        self._bout = _Bout(run.label, run.start, run.end, run.conf_sum, run.hops)
        self._gap_no_data = 0.0
        self._set_state(run.label, run.start, run.mean_conf, out)

    def _close_bout(self, out: list[Event]) -> None:
        b = self._bout
        if b is not None:
            out.append(
                BoutClosed(
                    self.animal, b.behaviour, b.start, b.last_end, b.conf_sum / b.hops, b.no_data_s
                )
            )
            self._bout = None
            self._gap_no_data = 0.0

    def _enter_no_data(self, start: float, end: float, no_data_s: float, out: list[Event]) -> None:
        self._nd = [start, end, no_data_s]
        self._set_state(NO_DATA, start, 0.0, out)

    def _close_no_data(self, out: list[Event]) -> None:
        if self._nd is not None:
            start, end, no_data_s = self._nd
            out.append(BoutClosed(self.animal, NO_DATA, start, end, 0.0, no_data_s))
            self._nd = None

    def _set_state(self, behaviour: str, since: float, conf: float, out: list[Event]) -> None:
        previous = self.state
        self.state, self.since, self.confidence = behaviour, since, conf
        out.append(StateChanged(self.animal, behaviour, since, conf, previous))

    # -- persistence -------------------------------------------------------------------------

    def snapshot(self) -> dict[str, Any]:
        """JSON-able state (about 200 bytes)."""
        b, r = self._bout, self._run
        return {
            "state": self.state,
            "since": self.since,
            "confidence": self.confidence,
            "end": self.end,
            "bout": None
            if b is None
            else [b.behaviour, b.start, b.last_end, b.conf_sum, b.hops, b.no_data_s],
            "run": None if r is None else [r.label, r.start, r.end, r.conf_sum, r.hops],
            "gap_no_data": self._gap_no_data,
            "no_data": self._nd,
        }

    def restore(self, s: Mapping[str, Any]) -> None:
        """Load a :meth:`snapshot`; raise ValueError (state left empty) when it is unusable."""
        try:
            state = s["state"]
            if state is not None and not isinstance(state, str):
                raise TypeError("state is not a name")
            end = None if s["end"] is None else float(s["end"])
            b = s["bout"]
            bout = (
                None if b is None else _Bout(str(b[0]), *map(float, b[1:4]), int(b[4]), float(b[5]))
            )
            r = s["run"]
            run = None if r is None else _Run(str(r[0]), *map(float, r[1:4]), int(r[4]))
            nd = s["no_data"]
            nd = None if nd is None else [float(nd[0]), float(nd[1]), float(nd[2])]
            since, conf, gap = float(s["since"]), float(s["confidence"]), float(s["gap_no_data"])
            if bout is not None and bout.hops <= 0:
                raise ValueError("an open bout without hops")
        except (KeyError, IndexError, TypeError, ValueError) as exc:
            raise ValueError(f"bout state for {self.animal} is unusable: {exc}") from exc
        self.state, self.since, self.confidence, self.end = state, since, conf, end
        self._bout, self._run, self._nd, self._gap_no_data = bout, run, nd, gap


def _class_prior(card: Mapping[str, Any], classes: Sequence[str]) -> np.ndarray | None:
    """The card's ``class_prior`` (list in class order, or mapping by name), if usable."""
    raw = card.get("class_prior")
    try:
        if isinstance(raw, Mapping):
            raw = [raw[c] for c in classes]
        prior = np.asarray(raw, dtype=float)
    except (KeyError, TypeError, ValueError):
        return None
    ok = prior.shape == (len(classes),) and np.isfinite(prior).all() and (prior > 0).all()
    return prior if ok else None


class HerdTracker:
    """Smoother plus bout segmenter for every animal: posteriors in, events out.

    >>> import numpy as np
    >>> from gateway.types import Posteriors
    >>> herd = HerdTracker(("resting", "walking"), None, 5.0)
    >>> evs = herd.push_many(Posteriors("cow1", 5.0 * i, np.array([0.9, 0.1])) for i in range(40))
    >>> [(e.kind, e.behaviour, e.since) for e in evs]
    [('state_changed', 'resting', 0.0)]
    """

    def __init__(
        self,
        classes: Sequence[str],
        transitions: np.ndarray | None,
        hop_s: float,
        *,
        window_s: float | None = None,
        smoothing: SmoothingSettings | None = None,
        bouts: BoutsSettings | None = None,
        prior: Sequence[float] | np.ndarray | None = None,
    ) -> None:
        sm = smoothing or SmoothingSettings()
        self.bouts_settings = bouts or BoutsSettings()
        if transitions is None:
            transitions = default_transitions(len(classes), hop_s, sm.dwell_s)
        if prior is None and sm.prior == "uniform":
            prior = np.ones(len(classes))
        params = HmmParams.build(
            classes, transitions, hop_s, window_s=window_s, lag_s=sm.lag_s,
            bridge_s=sm.bridge_s, prior=prior,
        )  # fmt: skip
        b = self.bouts_settings
        self._min = {c: b.min_bout_s(c) for c in classes}
        self._crit = {c: b.criterion_s(c) for c in classes}
        self.bank = SmootherBank(params)
        self.segmenters: dict[str, BoutSegmenter] = {}
        self._evented: set[str] = set()  # animals with events since the last commit snapshot
        self._cursor = 0  # round-robin position of commit_snapshot's refresh share

    @property
    def params(self) -> HmmParams:
        return self.bank.params

    @params.setter
    def params(self, params: HmmParams) -> None:
        """New chain parameters (a reloaded model with the same classes); state is kept."""
        self.bank.set_params(params)

    @property
    def smoothers(self) -> dict[str, AnimalSmoother]:
        return self.bank.handles

    @classmethod
    def from_model(
        cls,
        model: Any,
        smoothing: SmoothingSettings | None = None,
        bouts: BoutsSettings | None = None,
    ) -> HerdTracker:
        """Build from a loaded :class:`gateway.model.Model` (classes, transitions, hop, card)."""
        sm = smoothing or SmoothingSettings()
        prior = _class_prior(model.card, model.classes) if sm.prior == "card" else None
        return cls(
            model.classes, model.transitions, model.hop_s, window_s=model.window_s,
            smoothing=sm, bouts=bouts, prior=prior,
        )  # fmt: skip

    @property
    def classes(self) -> tuple[str, ...]:
        return self.params.classes

    def _segmenter(self, animal: str) -> BoutSegmenter:
        seg = self.segmenters.get(animal)
        if seg is None:
            seg = self.segmenters[animal] = BoutSegmenter(animal, self._min, self._crit)
        return seg

    def _segment(self, decided: list[Decision], decisions: list[Decision] | None) -> list[Event]:
        out: list[Event] = []
        segs = self.segmenters
        for d in decided:
            seg = segs.get(d.animal) or self._segmenter(d.animal)
            evs = seg.push(d)
            if evs:
                out.extend(evs)
                self._evented.add(d.animal)
        if decisions is not None:
            decisions.extend(decided)
        return out

    def push_many(
        self, items: Iterable[Posteriors | NoDataHop], decisions: list[Decision] | None = None
    ) -> list[Event]:
        """Push posteriors and no-data hops (each animal's in time order); return events.

        Decided hops are appended to ``decisions`` when a list is given (for evaluation).
        """
        return self._segment(self.bank.push_many(items), decisions)

    def flush(self, decisions: list[Decision] | None = None) -> list[Event]:
        """Decide every pending hop of every animal now (shorter lag for the last hops)."""
        return self._segment(self.bank.flush_all(), decisions)

    def close_all(self) -> list[Event]:
        """Flush and close every open bout (end of a demo or replay; not for restarts)."""
        out = self.flush()
        for seg in self.segmenters.values():
            out.extend(seg.close())
        return out

    def current(self) -> dict[str, StateChanged]:
        """Each animal's current state as the last StateChanged said it."""
        return {
            a: StateChanged(a, s.state, s.since, s.confidence)
            for a, s in self.segmenters.items()
            if s.state is not None
        }

    @property
    def dropped(self) -> int:
        """Windows and hops ignored for arriving out of order."""
        return self.bank.dropped + sum(s.dropped for s in self.segmenters.values())

    @property
    def bad(self) -> int:
        """Posteriors that were unusable (NaN, negative, wrong length) and counted as no data."""
        return self.bank.bad

    # -- persistence -------------------------------------------------------------------------

    def snapshot(
        self, animals: Iterable[str] | None = None, *, full: bool = False
    ) -> dict[str, dict[str, Any]]:
        """JSON-able state per animal for the store.

        ``full=False`` (cheap, for every commit) keeps the bout state and where the decided
        stream ends; after a crash the undecided lag is lost and becomes no data. ``full=True``
        (clean shutdown) also keeps the smoother's pending hops, so nothing is lost.
        """
        handles = self.bank.handles
        names = handles.keys() if animals is None else animals
        out = {}
        for a in names:
            if a in handles:
                out[a] = {
                    "v": _SNAPSHOT_VERSION,
                    "smoother": handles[a].snapshot(full=full),
                    "bouts": self._segmenter(a).snapshot(),
                }
        return out

    def commit_snapshot(self, refresh_every: int = 60) -> dict[str, dict[str, Any]]:
        """Light snapshots to write with a commit: every animal that had an event since the
        last call, plus a rotating share of the others so each is refreshed at least every
        ``refresh_every`` calls.

        The first part is what keeps a crash from counting a bout twice (the snapshot and the
        events that changed it commit together); between events a snapshot only advances its
        running sums, so an older one loses at most that much time, never a bout.
        """
        names = self.bank._names
        take = set(self._evented)
        self._evented.clear()
        if names:
            share = -(-len(names) // max(1, refresh_every))
            start = self._cursor % len(names)
            take.update(names[start : start + share])
            take.update(names[: max(0, start + share - len(names))])
            self._cursor = start + share
        return self.snapshot(take)

    def restore(self, states: Mapping[str, Mapping[str, Any]]) -> list[str]:
        """Load snapshots; return the animals whose state was unusable (they start afresh)."""
        bad = []
        for animal, state in states.items():
            sm, seg = self.bank.get(animal), self._segmenter(animal)
            try:
                if not isinstance(state, Mapping) or state.get("v") != _SNAPSHOT_VERSION:
                    raise ValueError("unknown snapshot version")
                sm.restore(state["smoother"])
                seg.restore(state["bouts"])
            except (ValueError, KeyError, TypeError):
                self.bank.reset(animal)
                self.segmenters[animal] = BoutSegmenter(animal, self._min, self._crit)
                bad.append(animal)
        return bad
