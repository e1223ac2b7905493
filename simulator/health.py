"""Health and fertility events with ground truth, applied to behaviour schedules.

Changes follow FIELD.md (health and fertility signals):

- illness: rumination falls 20-40 % against the cow's own recent days, over 2-4 days
  (illness in general [M]); time at the trough falls by half as much
- estrus: activity about 2.8-fold for about 8-9 h (cows 8.1 h, heifers 9.2 h;
  Lovendahl & Chagunda 2010, J Dairy Sci) and rumination -17 % that day (Reith & Hoy 2012,
  J Dairy Sci)
- calving: rumination -63 +/- 30 min in the 24 h before, -133 +/- 35 min in the 24 h after
  (Schirmann et al. 2013, J Dairy Sci)

Rumination is taken away by shortening ruminating bouts (the cut becomes rest in the same
posture), so a lying bout stays a lying bout; estrus restlessness is added as walking
episodes that break up rest. The edits act on one day's bouts at a time, so they work the
same in endless runs.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from . import rand
from .schedule import DAY_S, LYING, Scenario, Schedule, State

__all__ = ["CLINICAL_DROP", "HealthEvent", "apply_events", "draw_events", "usual_walking_s"]

_STREAM_EVENTS = 41
HOUR = 3600.0
# an illness counts as clinical once rumination is this far down (FIELD.md: 20-40 % [M])
CLINICAL_DROP = 0.2
_USUAL_DAYS = 7  # an animal's usual walking: the same hours over up to a week before


@dataclass
class HealthEvent:
    """One injected event. ``onset`` and ``end`` are unix seconds; ``params`` say how much.

    ``onset`` is where the change starts. ``clinical_onset`` is where it is plainly there:
    for an illness the instant its rumination cut first reaches ``CLINICAL_DROP`` (20 %,
    the bottom of the drop FIELD.md gives for illness in general [M]; on a 2-4 day decline
    that is up to 4 days after ``onset``); for estrus and calving the same as ``onset``.
    """

    kind: str  # "illness" | "estrus" | "calving"
    animal: str
    animal_index: int
    onset: float
    end: float
    params: dict[str, float] = field(default_factory=dict)
    source: str = ""
    clinical_onset: float | None = None

    def __post_init__(self) -> None:
        if self.clinical_onset is None:
            self.clinical_onset = self.onset
            if self.kind == "illness":
                share = min(CLINICAL_DROP / self.params["rumination_drop"], 1.0)
                ramp = self.params["ramp_days"] * DAY_S * share
                self.clinical_onset = round(float(self.onset + ramp), 3)

    def to_json(self) -> dict:
        return asdict(self)

    def rumination_cut(self, t: np.ndarray, scenario: Scenario) -> np.ndarray:
        """Fraction of rumination taken away at time(s) ``t``."""
        p = self.params
        if self.kind == "illness":
            ramp = p["ramp_days"] * DAY_S
            rise = np.clip((t - self.onset) / ramp, 0.0, 1.0)
            fall = np.clip((self.end - t) / (2 * DAY_S), 0.0, 1.0)  # two days to recover
            return np.where(t >= self.onset, p["rumination_drop"] * np.minimum(rise, fall), 0.0)
        if self.kind == "estrus":
            d0 = np.floor(self.onset / DAY_S) * DAY_S
            return np.where((t >= d0) & (t < d0 + DAY_S), p["rumination_drop"], 0.0)
        if self.kind == "calving":
            per_day = scenario.rumination_min_per_day
            before = (t >= self.onset - DAY_S) & (t < self.onset)
            after = (t >= self.onset) & (t < self.onset + DAY_S)
            return np.where(before, p["before_min"] / per_day, 0.0) + np.where(
                after, p["after_min"] / per_day, 0.0
            )
        return np.zeros_like(t)


_SOURCES = {
    "illness": "rumination drop of ~20-40 % vs own recent days (FIELD.md, from memory)",
    "estrus": "activity ~2.8-fold for ~8-9 h: Lovendahl & Chagunda 2010, J Dairy Sci;"
    " rumination -17 % on the day: Reith & Hoy 2012, J Dairy Sci",
    "calving": "rumination -63 +/- 30 min in the 24 h before, -133 +/- 35 min after:"
    " Schirmann et al. 2013, J Dairy Sci",
}


def draw_events(
    *,
    seed: int,
    animal_ids: list[str],
    start: float,
    days: int,
    illness_share: float = 0.0,
    estrus_share: float = 0.0,
    calving_share: float = 0.0,
) -> list[HealthEvent]:
    """Choose animals and onsets. Each animal gets at most one event; counts are
    ``round(share * herd)``. Onsets leave at least one ordinary day before them."""
    n = len(animal_ids)
    midnight0 = np.floor(start / DAY_S) * DAY_S
    k = rand.key(seed, _STREAM_EVENTS)
    order = np.argsort(rand.uniform(k, np.arange(n)), kind="stable")
    days = max(int(days), 2)
    events: list[HealthEvent] = []
    taken = 0
    for kind, share in (
        ("illness", illness_share),
        ("estrus", estrus_share),
        ("calving", calving_share),
    ):
        count = int(round(share * n))
        chosen = order[taken : taken + count]
        taken += count
        for i in chosen:
            ki = rand.key(seed, _STREAM_EVENTS, int(i), len(kind))
            u = rand.uniform(ki, np.arange(8))
            if kind == "illness":
                ramp = 2.0 + 2.0 * u[2]
                # two ordinary days first; the full drop reached a day before the span ends
                first = min(2, days - 1)
                room = days - first - int(np.ceil(ramp)) - 3
                day = first + int(u[0] * max(room, 1))
                onset = midnight0 + day * DAY_S + u[1] * DAY_S
                length = ramp + (2.0 + 2.0 * u[3]) + 2.0  # ramp, plateau, recovery
                params = {
                    "rumination_drop": round(0.2 + 0.2 * u[4], 3),
                    "ramp_days": round(ramp, 3),
                    "duration_days": round(length, 3),
                }
                end = onset + length * DAY_S
            elif kind == "estrus":
                day = 1 + int(u[0] * max(days - 1, 1))
                # the whole window falls inside one day, so "that day" is unambiguous
                onset = midnight0 + day * DAY_S + (2.0 + 12.0 * u[1]) * HOUR
                dur_h = 8.1 + 1.1 * u[2]  # cows 8.1 h, heifers 9.2 h
                params = {
                    "duration_h": round(dur_h, 3),
                    "activity_fold": 2.8,
                    "rumination_drop": 0.17,
                }
                end = onset + dur_h * HOUR
            else:
                day = 1 + int(u[0] * max(days - 2, 1))
                onset = midnight0 + day * DAY_S + u[1] * DAY_S
                z = rand.normal(ki, np.arange(2) + 50)
                params = {
                    "before_min": round(float(np.clip(63 + 30 * z[0], 10, 150)), 1),
                    "after_min": round(float(np.clip(133 + 35 * z[1], 40, 240)), 1),
                }
                end = onset + DAY_S
            events.append(
                HealthEvent(
                    kind=kind,
                    animal=animal_ids[int(i)],
                    animal_index=int(i),
                    onset=round(float(onset), 3),
                    end=round(float(end), 3),
                    params=params,
                    source=_SOURCES[kind],
                )
            )
    events.sort(key=lambda e: (e.onset, e.animal_index))
    return events


def apply_events(
    events: list[HealthEvent],
    scenario_of: dict[int, Scenario],
    seed: int,
    animal: np.ndarray,
    start: np.ndarray,
    end: np.ndarray,
    state: np.ndarray,
    history: Schedule | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Edit one day's bouts for the events of the animals present; returns new arrays.

    ``history`` (the schedule of the days before) gives an animal's usual walking for the
    hours of an estrus window; without it the day's own walking there is the reference."""
    if not events:
        return animal, start, end, state
    a, s, e, st = animal.copy(), start.copy(), end.copy(), state.copy()
    add_a, add_s, add_e, add_st = [], [], [], []
    rum = (st == State.RUM_S) | (st == State.RUM_L)
    feed = st == State.FEED
    for ev in events:
        mine = a == ev.animal_index
        if not mine.any():
            continue
        sc = scenario_of[ev.animal_index]
        mid = 0.5 * (s + e)
        cut = ev.rumination_cut(mid, sc)
        frac = np.where(mine & rum, cut, 0.0)
        if ev.kind == "illness":
            frac = np.where(mine & feed, 0.5 * cut, frac)
        frac = np.clip(frac, 0.0, 0.9)
        hit = np.flatnonzero(frac > 0)
        if hit.size:
            new_end = e[hit] - frac[hit] * (e[hit] - s[hit])
            add_a.append(a[hit])
            add_s.append(new_end)
            add_e.append(e[hit].copy())
            add_st.append(np.where(LYING[st[hit]], State.REST_L, State.REST_S))
            e[hit] = new_end
    if add_a:
        a = np.concatenate([a, *add_a])
        s = np.concatenate([s, *add_s])
        e = np.concatenate([e, *add_e])
        st = np.concatenate([st, *[x.astype(np.int8) for x in add_st]])
    for ev in events:
        if ev.kind == "estrus" and (a == ev.animal_index).any():
            a, s, e, st = _restless(ev, seed, a, s, e, st, history)
    return a, s, e, st


def _walking_s(a, s, e, st, who: int, w0: float, w1: float) -> float:
    """Seconds animal ``who`` walks inside ``[w0, w1)``."""
    mine = (a == who) & (st == State.WALK) & (e > w0) & (s < w1)
    return float(np.clip(np.minimum(e[mine], w1) - np.maximum(s[mine], w0), 0.0, None).sum())


def usual_walking_s(history: Schedule | None, who: int, w0: float, w1: float) -> float | None:
    """Mean walking of animal ``who`` in the same clock hours on up to ``_USUAL_DAYS``
    earlier days held by ``history``; None when it holds none of them."""
    if history is None or who >= history.n_animals:
        return None
    s, e, st = history.for_animal(who)
    if s.size == 0:
        return None
    seen = []
    for k in range(1, _USUAL_DAYS + 1):
        x0, x1 = w0 - k * DAY_S, w1 - k * DAY_S
        if x0 < max(history.epoch, float(s[0])) or x1 > float(e[-1]):
            break
        seen.append(_walking_s(np.full(s.shape, who), s, e, st, who, x0, x1))
    return float(np.mean(seen)) if seen else None


def _restless(ev: HealthEvent, seed: int, a, s, e, st, history: Schedule | None = None):
    """Estrus: add walking episodes in the window until she walks ``activity_fold`` times
    her usual for these hours (her mean over the previous days, the reference the
    published fold is taken against; the day's own walking when no earlier day is known).
    A quiet reference counts as 1 % of the window."""
    w0, w1 = ev.onset, ev.end
    who = ev.animal_index
    if not ((a == who) & (e > w0) & (s < w1)).any():
        return a, s, e, st
    usual = usual_walking_s(history, who, w0, w1)
    if usual is None:
        usual = _walking_s(a, s, e, st, who, w0, w1)
    want = ev.params["activity_fold"] * max(usual, 0.01 * (w1 - w0))
    ep = 150.0  # a restless walking episode of 2.5 min
    k = rand.key(seed, _STREAM_EVENTS, who, 99)
    # a few rounds: an episode laid over walking she did anyway adds less than its length
    for rnd in range(4):
        deficit = want - _walking_s(a, s, e, st, who, w0, w1)
        n_ep = int(np.floor(deficit / ep + 0.5))
        if n_ep <= 0:
            break
        # episodes spread evenly with jitter, so they do not pile on each other
        slots = (w1 - w0 - ep) / n_ep
        u = rand.uniform(k, np.arange(n_ep) + 1000 * rnd)
        for x in w0 + slots * (np.arange(n_ep) + 0.8 * u):
            a, s, e, st = _overwrite(a, s, e, st, who, x, x + ep, State.WALK)
    return a, s, e, st


def _overwrite(a, s, e, st, who: int, x0: float, x1: float, new_state: int):
    """Make ``[x0, x1)`` of animal ``who`` one bout of ``new_state``, splitting others."""
    over = (a == who) & (e > x0) & (s < x1)
    if not over.any():
        return a, s, e, st
    idx = np.flatnonzero(over)
    left = idx[s[idx] < x0]
    right = idx[e[idx] > x1]
    keep = ~over
    pieces_a = [a[keep], [who]]
    pieces_s = [s[keep], [x0]]
    pieces_e = [e[keep], [x1]]
    pieces_st = [st[keep], [new_state]]
    for j in left:
        pieces_a.append([who])
        pieces_s.append([s[j]])
        pieces_e.append([x0])
        pieces_st.append([st[j]])
    for j in right:
        pieces_a.append([who])
        pieces_s.append([x1])
        pieces_e.append([e[j]])
        pieces_st.append([st[j]])
    return (
        np.concatenate([np.asarray(p, dtype=a.dtype) for p in pieces_a]),
        np.concatenate([np.asarray(p, dtype=np.float64) for p in pieces_s]),
        np.concatenate([np.asarray(p, dtype=np.float64) for p in pieces_e]),
        np.concatenate([np.asarray(p, dtype=np.int8) for p in pieces_st]),
    )
