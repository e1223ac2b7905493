"""Behaviour schedules: a semi-Markov process per animal with a daily rhythm.

Each animal moves between seven internal states (five behaviours, two of them split by
posture because lying matters for time budgets and for the collar's gravity vector):

    grazing, feeding, ruminating standing, ruminating lying, resting standing, resting lying,
    walking

A bout's length is drawn from a per-state log-normal (per-animal medians); the next state
is drawn from a transition table weighted by the time of day (feed deliveries and the night
rest for housed herds, dawn and dusk grazing peaks at pasture), by the animal's own
preferences and by a day-to-day factor. Milkings are forced blocks: walk to the parlour,
stand, walk back. Parameters were tuned so a simulated herd falls in the published ranges of
FIELD.md (tests/test_sim_schedule.py checks them with the sources named).

All animals advance together, one bout per step, so a day for 10,000 animals is a few hundred
numpy steps. Random draws come from :mod:`simulator.rand`, keyed by (seed, animal, day), so an
animal's schedule does not depend on the herd size or on how the herd is split over processes.

Times are unix seconds (UTC); the simulator treats UTC as the farm's local time.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from gateway.types import BEHAVIOURS

from . import rand

__all__ = [
    "BEHAVIOUR_OF_STATE",
    "DAY_S",
    "LYING",
    "SCENARIOS",
    "STATE_NAMES",
    "Scenario",
    "Schedule",
    "ScheduleBuilder",
    "State",
]

DAY_S = 86400.0


class State:
    """Internal schedule states (behaviour plus posture)."""

    GRAZE, FEED, RUM_S, RUM_L, REST_S, REST_L, WALK = range(7)
    N = 7


STATE_NAMES = (
    "grazing",
    "feeding",
    "ruminating_standing",
    "ruminating_lying",
    "resting_standing",
    "resting_lying",
    "walking",
)
# index into gateway.types.BEHAVIOURS for each state
BEHAVIOUR_OF_STATE = np.array(
    [BEHAVIOURS.index(b) for b in ("grazing", "feeding", "ruminating", "ruminating")]
    + [BEHAVIOURS.index(b) for b in ("resting", "resting", "walking")],
    dtype=np.int8,
)
LYING = np.array([False, False, False, True, False, True, False])
_STREAM_SCHEDULE = 11
_STREAM_ANIMAL = 12
_STREAM_MILKING = 13
_STREAM_BOUT = 14
_BOUT_U = 8  # uniforms per bout
_BOUT_Z = 4  # normals per bout
_NEED_TAU_MIN = 40.0  # minutes owed that make a behaviour e times likelier


def _bump(h: np.ndarray, centre: float, width: float) -> np.ndarray:
    """Gaussian bump on the 24-h clock (wraps at midnight)."""
    d = (h - centre + 12.0) % 24.0 - 12.0
    return np.exp(-0.5 * (d / width) ** 2)


def _since(h: np.ndarray, event: float, tau: float) -> np.ndarray:
    """Exponential decay after a daily event at hour ``event`` (time constant ``tau`` h)."""
    d = (h - event) % 24.0
    return np.exp(-d / tau)


@dataclass(frozen=True)
class Scenario:
    """Parameters of one management system. Durations in minutes, hours of day in UTC."""

    name: str
    median_min: tuple[float, ...]  # per state
    sigma: tuple[float, ...]  # log-normal shape per state
    transitions: tuple[tuple[float, ...], ...]  # from-state rows, to-state columns
    milkings_h: tuple[float, ...]
    milking_walk_min: float
    milking_stand_min: float
    feed_deliveries_h: tuple[float, ...] = ()
    # daily rumination and eating (trough or grazing) an average animal aims at; the
    # schedule's homeostat keeps each animal near its own targets from day to day
    rumination_min_per_day: float = 440.0
    eating_min_per_day: float = 265.0
    extra: dict[str, float] = field(default_factory=dict)

    def rhythm(self, h: np.ndarray) -> np.ndarray:
        """Multipliers ``[len(h), 7]`` on the transition weights at hour of day ``h``."""
        f = np.ones((h.shape[0], State.N))
        night = 0.5 + 0.5 * np.cos(2 * np.pi * (h - 1.5) / 24.0)  # 1 at 01:30, 0 at 13:30
        lying = 0.45 + 0.9 * night
        f[:, State.RUM_L] = lying * (0.5 + 1.4 * night)
        f[:, State.REST_L] = lying
        f[:, State.RUM_S] = 0.5 + 1.0 * night
        if self.feed_deliveries_h:
            feed = 0.35 + sum(2.6 * _since(h, d, 1.3) for d in self.feed_deliveries_h)
            f[:, State.FEED] = feed * (1.0 - 0.7 * _bump(h, 2.5, 1.5))
        else:
            f[:, State.FEED] = 0.0
        if self.name == "pasture":
            graze = (
                0.25
                + 2.4 * _bump(h, 7.0, 1.6)
                + 2.6 * _bump(h, 19.0, 1.7)
                + 0.8 * _bump(h, 12.5, 1.4)
            )
            f[:, State.GRAZE] = graze
        else:
            f[:, State.GRAZE] = 0.0
        return f


_HOUSED = Scenario(
    name="housed",
    #            GRAZE FEED RUM_S RUM_L REST_S REST_L WALK
    median_min=(30.0, 21.5, 14.0, 28.0, 16.0, 26.0, 2.0),
    sigma=(0.5, 0.4, 0.35, 0.35, 0.6, 0.5, 0.55),
    transitions=(
        (0.0, 0.0, 0.2, 0.2, 0.2, 0.2, 0.2),  # from grazing (unused when housed)
        (0.0, 0.0, 0.15, 0.1, 0.3, 0.05, 0.4),  # from feeding
        (0.0, 0.2, 0.0, 0.2, 0.2, 0.1, 0.2),  # from ruminating standing
        (0.0, 0.08, 0.03, 0.0, 0.2, 0.75, 0.12),  # from ruminating lying
        (0.0, 0.45, 0.15, 0.1, 0.0, 0.1, 0.2),  # from resting standing
        (0.0, 0.1, 0.03, 0.8, 0.15, 0.0, 0.12),  # from resting lying
        (0.0, 0.5, 0.1, 0.1, 0.2, 0.1, 0.0),  # from walking
    ),
    milkings_h=(5.0, 16.0),
    milking_walk_min=3.0,
    milking_stand_min=35.0,
    feed_deliveries_h=(6.0, 17.0),
    rumination_min_per_day=445.0,  # Braun et al. 2015: 441 +/- 71 min/d (FIELD.md)
    eating_min_per_day=265.0,  # Braun et al. 2015: 265 +/- 54 min/d housed (FIELD.md)
)

_PASTURE = Scenario(
    name="pasture",
    median_min=(37.0, 20.0, 16.0, 30.0, 12.0, 22.0, 2.2),
    sigma=(0.5, 0.5, 0.35, 0.35, 0.6, 0.5, 0.6),
    transitions=(
        (0.0, 0.0, 0.25, 0.25, 0.15, 0.1, 0.35),  # from grazing
        (0.0, 0.0, 0.2, 0.2, 0.2, 0.2, 0.2),  # from feeding (unused at pasture)
        (0.35, 0.0, 0.0, 0.3, 0.15, 0.05, 0.15),  # from ruminating standing
        (0.12, 0.0, 0.03, 0.0, 0.12, 0.75, 0.12),  # from ruminating lying
        (0.4, 0.0, 0.15, 0.15, 0.0, 0.1, 0.2),  # from resting standing
        (0.12, 0.0, 0.03, 0.8, 0.12, 0.0, 0.12),  # from resting lying
        (0.55, 0.0, 0.1, 0.1, 0.15, 0.1, 0.0),  # from walking
    ),
    milkings_h=(5.0, 16.0),
    milking_walk_min=11.0,
    milking_stand_min=30.0,
    rumination_min_per_day=445.0,
    eating_min_per_day=510.0,  # grazing ~8.5 h/d median at pasture (FIELD.md, trade press)
)

SCENARIOS: dict[str, Scenario] = {"housed": _HOUSED, "pasture": _PASTURE}


@dataclass
class Schedule:
    """Behaviour intervals of many animals, flat and sorted by (animal, start).

    ``state`` holds internal states (see :class:`State`); ``BEHAVIOUR_OF_STATE[state]``
    indexes gateway.types.BEHAVIOURS. Intervals are half-open ``[start, end)``, unix seconds.
    """

    epoch: float
    n_animals: int
    seed: int = 0
    animal: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int32))
    start: np.ndarray = field(default_factory=lambda: np.zeros(0))
    end: np.ndarray = field(default_factory=lambda: np.zeros(0))
    state: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int8))

    _SPAN = 1.0e8  # seconds; > any simulated horizon, keeps the sort key exact enough

    def __post_init__(self) -> None:
        self._reindex()

    def _reindex(self) -> None:
        self._key = self.animal.astype(np.float64) * self._SPAN + (self.start - self.epoch)
        self.ptr = np.searchsorted(self.animal, np.arange(self.n_animals + 1))
        # per-bout random numbers (chewing rate jitter, phases, ...), keyed by animal and
        # bout start, so a bout looks the same however the schedule was built
        ms = np.round((self.start - self.epoch) * 1000.0).astype(np.int64).astype(np.uint64)
        k = rand.keys(rand.key(self.seed, _STREAM_BOUT), self.animal) ^ ms
        self.bout_u = rand.uniform(k[:, None], np.arange(_BOUT_U)[None, :])
        self.bout_z = rand.normal(k[:, None], np.arange(_BOUT_Z)[None, :] + 64)

    def extend(self, animal: np.ndarray, start: np.ndarray, end: np.ndarray, state: np.ndarray):
        """Add intervals (any order) and keep the table sorted and merged."""
        a = np.concatenate([self.animal, animal.astype(np.int32)])
        s = np.concatenate([self.start, start])
        e = np.concatenate([self.end, end])
        st = np.concatenate([self.state, state.astype(np.int8)])
        order = np.lexsort((s, a))
        a, s, e, st = a[order], s[order], e[order], st[order]
        # an edited bout may overlap a neighbour from another day: the later one wins
        nxt = np.concatenate([s[1:], [np.inf]])
        same_next = np.concatenate([a[1:] == a[:-1], [False]])
        e = np.where(same_next, np.minimum(e, nxt), e)
        keep = e > s
        a, s, e, st = a[keep], s[keep], e[keep], st[keep]
        # merge neighbours of the same animal and state that touch
        same = (a[1:] == a[:-1]) & (st[1:] == st[:-1]) & (np.abs(s[1:] - e[:-1]) < 1e-6)
        if same.any():
            first = np.concatenate([[True], ~same])
            grp = np.cumsum(first) - 1
            last_end = np.zeros(int(grp[-1]) + 1)
            np.maximum.at(last_end, grp, e)
            a, s, st = a[first], s[first], st[first]
            e = last_end
        self.animal, self.start, self.end, self.state = a, s, e, st
        self._reindex()

    def drop_before(self, t: float) -> None:
        """Forget intervals that ended before ``t`` (keeps memory flat in endless runs)."""
        keep = self.end > t
        self.animal, self.start = self.animal[keep], self.start[keep]
        self.end, self.state = self.end[keep], self.state[keep]
        self._reindex()

    def lookup(self, animal: np.ndarray, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Row index of the interval holding each (animal, t); -1 where none does."""
        q = animal.astype(np.float64) * self._SPAN + (t - self.epoch)
        i = np.searchsorted(self._key, q, side="right") - 1
        ok = i >= 0
        ic = np.where(ok, i, 0)
        ok &= self.animal[ic] == animal
        ok &= self.end[ic] > t
        return np.where(ok, ic, -1), ok

    def for_animal(self, i: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(start, end, state) of one animal's intervals."""
        lo, hi = int(self.ptr[i]), int(self.ptr[i + 1])
        return self.start[lo:hi], self.end[lo:hi], self.state[lo:hi]

    def lying_bouts(self, i: int) -> tuple[np.ndarray, np.ndarray]:
        """(start, end) of animal ``i``'s lying bouts: runs of lying states, back to back."""
        s, e, st = self.for_animal(i)
        ly = LYING[st]
        if not ly.any():
            return np.zeros(0), np.zeros(0)
        prev_joined = np.concatenate([[False], ly[:-1] & (np.abs(s[1:] - e[:-1]) < 1e-6)])
        first = ly & ~prev_joined
        run = np.cumsum(first) - 1
        starts = s[first]
        ends = np.zeros(starts.shape)
        np.maximum.at(ends, run[ly], e[ly])
        return starts, ends

    def minutes(self, t0: float, t1: float, lying: bool = False) -> np.ndarray:
        """Minutes per animal and behaviour ``[n_animals, 5]`` inside ``[t0, t1)``.

        With ``lying=True`` returns ``[n_animals]`` lying minutes instead.
        """
        ov = np.clip(np.minimum(self.end, t1) - np.maximum(self.start, t0), 0.0, None) / 60.0
        if lying:
            out = np.zeros(self.n_animals)
            np.add.at(out, self.animal, ov * LYING[self.state])
            return out
        out = np.zeros((self.n_animals, len(BEHAVIOURS)))
        np.add.at(out, (self.animal, BEHAVIOUR_OF_STATE[self.state]), ov)
        return out


@dataclass
class AnimalTraits:
    """Per-animal parameters of the schedule, drawn once from the seed."""

    scenario: np.ndarray  # int index into the scenario list, per animal
    pref: np.ndarray  # [N, 7] multipliers on transition weights
    dur: np.ndarray  # [N, 7] multipliers on median bout length
    milk_offset_s: np.ndarray  # [N] position in the milking order
    target_min: np.ndarray  # [N, 2] daily minutes aimed at: rumination, eating


def draw_traits(seed: int, animals: np.ndarray, scenario: np.ndarray) -> AnimalTraits:
    """Per-animal preferences and bout-length multipliers, keyed by animal index."""
    k = rand.keys(rand.key(seed, _STREAM_ANIMAL), animals)[:, None]
    c = np.arange(2 * State.N + 1)[None, :]
    z = rand.normal(k, c)
    # between-animal spread, tuned so herd SDs land near FIELD.md's (e.g. 441 +/- 71 min/d)
    pref = np.exp(0.2 * z[:, : State.N])
    dur = np.exp(0.15 * z[:, State.N : 2 * State.N])
    milk = rand.uniform(k[:, 0], 99) * 50.0 * 60.0  # milking order spread over ~50 min
    zt = rand.normal(k, np.arange(2)[None, :] + 200)
    # between-cow spread: rumination SD 71 of 441 (~16 %), eating SD 54 of 265 (~20 %)
    # (Braun et al. 2015, FIELD.md)
    spread = np.array([0.17, 0.22])
    target = np.exp(spread[None, :] * zt)
    return AnimalTraits(
        scenario=scenario, pref=pref, dur=dur, milk_offset_s=milk, target_min=target
    )


class ScheduleBuilder:
    """Generates schedules day by day for a set of animals, carrying each animal's state.

    ``edit`` (optional) is called with each new day's raw intervals and returns them edited
    (the health module uses it to take rumination away and add restless walking).
    """

    def __init__(
        self,
        *,
        seed: int,
        animals: np.ndarray,
        scenario_idx: np.ndarray,
        scenarios: list[Scenario],
        start: float,
        n_animals_total: int,
    ) -> None:
        self.seed = seed
        self.animals = np.asarray(animals, dtype=np.int64)
        self.scenarios = scenarios
        self.scenario_idx = np.asarray(scenario_idx, dtype=np.int64)
        self.start = float(start)
        self.midnight0 = np.floor(self.start / DAY_S) * DAY_S
        self.traits = draw_traits(seed, self.animals, self.scenario_idx)
        n = len(self.animals)
        self.t = np.full(n, self.start)
        k0 = rand.keys(rand.key(seed, _STREAM_SCHEDULE, 0), self.animals)
        self.state = np.where(
            rand.uniform(k0, 0) < 0.5, State.REST_L, State.RUM_L
        )  # the herd starts the night lying
        self.day = 0
        base = np.array([[s.rumination_min_per_day, s.eating_min_per_day] for s in scenarios])
        self.traits.target_min = self.traits.target_min * base[self.scenario_idx]
        self.need = np.zeros((n, 2))  # minutes owed to rumination and eating
        self._W = np.stack([np.array(s.transitions) for s in scenarios])
        self._med = np.stack([np.array(s.median_min) for s in scenarios]) * 60.0
        self._sig = np.stack([np.array(s.sigma) for s in scenarios])

    def _rhythm(self, t: np.ndarray) -> np.ndarray:
        h = (t % DAY_S) / 3600.0
        out = np.empty((len(t), State.N))
        for j, sc in enumerate(self.scenarios):
            m = self.scenario_idx == j
            if m.any():
                out[m] = sc.rhythm(h[m])
        return out

    def _milkings(self, day: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Milking windows of days ``day`` and ``day+1``: start, end, walk seconds ``[N, K]``."""
        starts, walks, ends = [], [], []
        for d in (day, day + 1):
            midnight = self.midnight0 + d * DAY_S
            kd = rand.keys(rand.key(self.seed, _STREAM_MILKING, d), self.animals)
            for m in range(max(len(s.milkings_h) for s in self.scenarios)):
                h = np.array([s.milkings_h[m % len(s.milkings_h)] for s in self.scenarios])
                walk = np.array([s.milking_walk_min for s in self.scenarios]) * 60.0
                stand = np.array([s.milking_stand_min for s in self.scenarios]) * 60.0
                jitter = rand.normal(kd, m) * 180.0  # +/- 3 min day to day
                st = midnight + h[self.scenario_idx] * 3600.0 + self.traits.milk_offset_s + jitter
                w = walk[self.scenario_idx]
                starts.append(st)
                walks.append(w)
                ends.append(st + 2 * w + stand[self.scenario_idx])
        return np.stack(starts, 1), np.stack(ends, 1), np.stack(walks, 1)

    def next_day(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, float, float]:
        """Bouts starting in the next UTC day: (animal, start, end, state, day_start, day_end).

        ``animal`` holds herd-wide animal indices. The last bout may run past midnight.
        """
        day = self.day
        d0 = self.midnight0 + day * DAY_S
        d1 = d0 + DAY_S
        n = len(self.animals)
        rows = np.arange(n)
        ms, me, mw = self._milkings(day)
        kd = rand.keys(rand.key(self.seed, _STREAM_SCHEDULE, day + 1), self.animals)
        sc = self.scenario_idx
        # the day's own mood: a multiplier per state, so budgets vary from day to day
        dayvar = np.exp(0.06 * rand.normal(kd[:, None], np.arange(State.N)[None, :] + 10**6))
        out_a, out_s, out_e, out_st = [], [], [], []
        t, state, need = self.t.copy(), self.state.copy(), self.need.copy()
        rate = self.traits.target_min / 1440.0  # minutes owed per minute that passes
        step = 0
        while True:
            active = t < d1
            if not active.any():
                break
            # next milking window that has not ended yet
            pending = me > t[:, None]
            j = np.argmax(pending, axis=1)
            m_start, m_end, m_walk = ms[rows, j], me[rows, j], mw[rows, j]
            in_milk = t >= m_start - 1e-6
            # forced milking phases: walk there, stand, walk back
            ph_walk1 = in_milk & (t < m_start + m_walk - 1e-6)
            ph_walk2 = in_milk & (t >= m_end - m_walk - 1e-6)
            milk_state = np.where(ph_walk1 | ph_walk2, State.WALK, State.REST_S)
            milk_end = np.where(
                ph_walk1, m_start + m_walk, np.where(ph_walk2, m_end, m_end - m_walk)
            )
            # free choice by weights
            u = rand.uniform(kd, 3 * step)
            z = rand.normal(kd, 3 * step + 1)
            w = self._W[sc, state] * self._rhythm(t) * self.traits.pref * dayvar
            # homeostat: what is owed makes it likelier (rumen fill, hunger)
            push = np.exp(np.clip(need / _NEED_TAU_MIN, -3.0, 3.0))
            w[:, State.RUM_S] *= push[:, 0]
            w[:, State.RUM_L] *= push[:, 0]
            w[:, State.FEED] *= push[:, 1]
            w[:, State.GRAZE] *= push[:, 1]
            w[rows, state] = 0.0
            cw = np.cumsum(w, axis=1)
            pick = np.argmax(cw > (u * cw[:, -1])[:, None], axis=1)
            med = self._med[sc, pick] * self.traits.dur[rows, pick]
            dur = med * np.exp(self._sig[sc, pick] * z)
            dur = np.clip(dur, 30.0, 6 * 3600.0)
            free_end = np.minimum(t + dur, m_start)
            new_state = np.where(in_milk, milk_state, pick)
            new_end = np.where(in_milk, milk_end, free_end)
            new_end = np.maximum(new_end, t + 1.0)  # always advance
            a = active
            out_a.append(self.animals[a])
            out_s.append(t[a])
            out_e.append(new_end[a])
            out_st.append(new_state[a])
            spent = np.where(a, new_end - t, 0.0) / 60.0
            rum_now = (new_state == State.RUM_S) | (new_state == State.RUM_L)
            eat_now = (new_state == State.FEED) | (new_state == State.GRAZE)
            # rumination is owed faster at night: 55-62 % of it falls at night (Soriani et
            # al. 2012, FIELD.md); the cosine peaks at 02:00
            mid_h = ((0.5 * (t + new_end)) % DAY_S) / 3600.0
            circ = 1.0 + 0.25 * np.cos(2 * np.pi * (mid_h - 2.0) / 24.0)
            need[:, 0] += spent * (rate[:, 0] * circ - rum_now)
            need[:, 1] += spent * (rate[:, 1] - eat_now)
            t = np.where(a, new_end, t)
            state = np.where(a, new_state, state)
            step += 1
        self.t, self.state, self.need = t, state, need
        self.day += 1
        return (
            np.concatenate(out_a),
            np.concatenate(out_s),
            np.concatenate(out_e),
            np.concatenate(out_st).astype(np.int8),
            d0,
            d1,
        )
