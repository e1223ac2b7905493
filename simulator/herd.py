"""A seeded, iterable synthetic herd: behaviour schedules -> collar signals -> frames.

>>> from simulator.herd import Herd
>>> herd = Herd(n_animals=3, scenario="housed", seed=7)
>>> frames = herd.take(6)
>>> [f.collar_id for f in frames][:3], frames[0].acc.shape
(['C0002', 'C0003', 'C0001'], (10, 3))
>>> bool(all(a.t_end <= b.t_end + 1.0 for a, b in zip(frames, frames[1:])))
True

``iter(herd)`` yields :class:`gateway.types.Frame` in the order the gateway would receive
them (by the true time each frame is sent, across collars). ``herd.take(n)`` returns a list.
Ground truth sits beside it: :meth:`Herd.observations` (behaviour intervals per animal),
:attr:`Herd.assignments` (collar <-> animal), :attr:`Herd.events` (injected health events),
:meth:`Herd.budgets` (minutes per behaviour per day).

Generation is vectorised across collars and samples, in blocks of true time. With
``shard=(k, p)`` a herd makes only the collars ``i % p == k``: every animal's signal is the
same in any shard (see simulator.rand), which is how several processes share a large herd;
``collars=[...]`` picks an explicit subset the same way.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass, fields
from datetime import UTC, datetime
from itertools import islice

import numpy as np

from gateway.errors import ConfigError
from gateway.types import BEHAVIOURS, Frame

from . import health, rand, sensor
from .schedule import (
    BEHAVIOUR_OF_STATE,
    DAY_S,
    SCENARIOS,
    Schedule,
    ScheduleBuilder,
    State,
)
from .signal import MOTION_G, draw_signal_traits, neck_acceleration

__all__ = ["DEFAULT_START", "FrameBlock", "Herd", "SCENARIO_CHOICES", "animal_id", "collar_id"]

# 2026-03-01T00:00:00Z: a fixed default so a seed alone reproduces a herd
DEFAULT_START = 1772323200.0
SCENARIO_CHOICES = ("housed", "pasture", "mixed")
_MAX_SAMPLES_PER_BLOCK = 1_500_000
_STREAM_REFIT = 51


def animal_id(i: int) -> str:
    """Animal id of herd index ``i`` (0-based): cow-001, cow-002, ..."""
    return f"cow-{i + 1:03d}"


def collar_id(i: int) -> str:
    """Collar id of collar index ``i`` (0-based): C0001, C0002, ..."""
    return f"C{i + 1:04d}"


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass
class FrameBlock:
    """Frames of many collars over one stretch of true time, sorted by send time.

    ``row`` indexes the herd's local collars, ``seq`` the collar's frame counter, ``sent``
    the true unix time the frame left the collar, ``t`` the collar-clock time of its first
    sample, ``acc`` float32 ``[F, n, 3]``, ``battery_v`` volts.
    """

    row: np.ndarray
    seq: np.ndarray
    sent: np.ndarray
    t: np.ndarray
    acc: np.ndarray
    battery_v: np.ndarray

    def __len__(self) -> int:
        return int(self.row.shape[0])


class Herd:
    """A synthetic herd. All keyword arguments after ``n_animals``; see the module doc."""

    def __init__(
        self,
        n_animals: int = 10,
        *,
        scenario: str = "housed",
        seed: int = 0,
        hz: float = 10.0,
        start: float = DEFAULT_START,
        frame_s: float = 1.0,
        range_g: float = 4.0,
        random_roll: bool = True,
        loss: float = 1.0,
        silence_per_day: float = 0.05,
        illness_share: float = 0.0,
        estrus_share: float = 0.0,
        calving_share: float = 0.0,
        refit_share: float = 0.0,
        days: float | None = None,
        shard: tuple[int, int] = (0, 1),
        collars: list[int] | None = None,
    ) -> None:
        problems = _check(
            n_animals, scenario, seed, hz, start, frame_s, range_g, loss, silence_per_day,
            illness_share, estrus_share, calving_share, days, shard,
        )  # fmt: skip
        if not isinstance(refit_share, int | float) or not 0 <= refit_share <= 1:
            problems.append(f"refit share {refit_share!r} must be between 0 and 1.")
        if collars is not None and (
            not len(collars) or min(collars) < 0 or max(collars) >= n_animals
        ):
            problems.append(f"collar indices must lie in 0..{n_animals - 1}.")
        if problems:
            raise ConfigError(problems[0], problems)
        self.n_animals = int(n_animals)
        self.scenario = scenario
        self.seed = int(seed)
        self.hz = float(hz)
        self.start = float(start)
        self.frame_s = float(frame_s)
        self.days = None if days is None else float(days)
        self.shard = (int(shard[0]), int(shard[1]))
        self.sensor = sensor.SensorModel(
            hz=self.hz,
            range_g=float(range_g),
            random_roll=bool(random_roll),
            loss=sensor.LossModel().scaled(float(loss)),
            silence_per_day=float(silence_per_day),
            slips_per_day=0.25 if random_roll else 0.0,
        )
        self.loss = float(loss)
        self.samples_per_frame = max(1, int(round(self.hz * self.frame_s)))
        self.frame_dt = self.samples_per_frame / self.hz
        self.animal_ids = [animal_id(i) for i in range(self.n_animals)]
        span_days = self.days if self.days else 7.0
        self.refit_share = float(refit_share)
        self._draw_refits(self.refit_share, span_days)
        names = ["housed", "pasture"]
        if scenario == "mixed":
            per_animal = np.arange(self.n_animals) % 2
        else:
            per_animal = np.full(self.n_animals, names.index(scenario))
        self.scenario_of = [names[j] for j in per_animal]
        self._scenarios = [SCENARIOS[x] for x in names]
        k, p = self.shard
        # the animals this herd object makes (a shard or an explicit subset) ...
        self.local_animals = (
            np.arange(k, self.n_animals, p)
            if collars is None
            else np.unique(np.asarray(collars, dtype=np.int64))
        )
        # ... and their collars: ``local`` indexes collar_ids, FrameBlock.row indexes local
        self.local = np.flatnonzero(np.isin(self.collar_animal, self.local_animals))
        self._collar_arow = np.searchsorted(self.local_animals, self.collar_animal[self.local])
        self.events = health.draw_events(
            seed=self.seed,
            animal_ids=self.animal_ids,
            start=self.start,
            days=int(math.ceil(self.days)) if self.days else 7,
            illness_share=illness_share,
            estrus_share=estrus_share,
            calving_share=calving_share,
        )
        self.shares = {
            "illness": float(illness_share),
            "estrus": float(estrus_share),
            "calving": float(calving_share),
        }
        local_set = set(self.local_animals.tolist())
        self._local_events = [e for e in self.events if e.animal_index in local_set]
        self._scenario_by_index = {
            int(i): SCENARIOS[self.scenario_of[int(i)]] for i in self.local_animals
        }
        self._builder = ScheduleBuilder(
            seed=self.seed,
            animals=self.local_animals,
            scenario_idx=per_animal[self.local_animals],
            scenarios=self._scenarios,
            start=self.start,
            n_animals_total=self.n_animals,
        )
        self.schedule = Schedule(epoch=self.start, n_animals=self.n_animals, seed=self.seed)
        self._covered = self.start
        self._sig = draw_signal_traits(self.seed, self.local_animals)
        self._col = sensor.draw_collar_traits(self.seed, self.local, self.sensor, self.frame_dt)
        self._fit_from = self.collar_from[self.local]
        self._fit_to = self.collar_to[self.local]
        self._keep_history = True

    def _draw_refits(self, share: float, span_days: float) -> None:
        """Collar table: collar i on animal i from the start; for ``share`` of the animals
        (at least one day in) a spare collar replaces it at a random time."""
        n = self.n_animals
        k = rand.key(self.seed, _STREAM_REFIT)
        order = np.sort(
            np.argsort(rand.uniform(k, np.arange(n)), kind="stable")[: round(share * n)]
        )
        at = np.round((0.1 + 0.8 * rand.uniform(k, order + 10**6)) * span_days * DAY_S)
        m = len(order)
        self.collar_ids = [collar_id(i) for i in range(n + m)]
        self.collar_animal = np.concatenate([np.arange(n), order]).astype(np.int64)
        self.collar_from = np.concatenate([np.zeros(n), at])  # seconds since the start
        self.collar_to = np.full(n + m, np.inf)
        self.collar_to[order] = at
        self.refits = [
            {"animal": self.animal_ids[int(a)], "old_collar": self.collar_ids[int(a)],
             "new_collar": self.collar_ids[n + j], "at": float(self.start + at[j]),
             "at_iso": _iso(self.start + at[j])}
            for j, a in enumerate(order)
        ]  # fmt: skip

    # ----------------------------------------------------------------- ground truth
    @property
    def end(self) -> float | None:
        """Unix time the herd stops sending (``start + days``), or None when endless."""
        return None if self.days is None else self.start + self.days * DAY_S

    @property
    def assignments(self) -> list[dict[str, str]]:
        """Collar <-> animal fittings: ``collar, animal, from, to`` (ISO 8601 UTC; empty
        ``to`` means still fitted)."""
        rows = []
        for c, a in enumerate(self.collar_animal.tolist()):
            to = self.collar_to[c]
            rows.append(
                {"collar": self.collar_ids[c], "animal": self.animal_ids[a],
                 "from": _iso(self.start + self.collar_from[c]),
                 "to": "" if math.isinf(to) else _iso(self.start + to)}
            )  # fmt: skip
        return rows

    def ensure_schedule(self, until: float) -> None:
        """Generate behaviour schedules up to unix time ``until``."""
        while self._covered < until:
            a, s, e, st, _d0, d1 = self._builder.next_day()
            events, scen = self._local_events, self._scenario_by_index
            a, s, e, st = health.apply_events(events, scen, self.seed, a, s, e, st, self.schedule)
            self.schedule.extend(a, s, e, st)
            self._covered = d1

    def observations(self, t0: float | None = None, t1: float | None = None) -> list[tuple]:
        """Behaviour intervals ``(animal, collar, start, end, behaviour)`` of the local
        animals, clipped to ``[t0, t1)`` (default: the herd's whole span, which must be
        finite), neighbours with the same behaviour merged, sorted by animal then start."""
        t0 = self.start if t0 is None else t0
        if t1 is None:
            if self.end is None:
                raise ConfigError("observations of an endless herd need an end time t1.")
            t1 = self.end
        self.ensure_schedule(t1)
        sch = self.schedule
        out: list[tuple] = []
        for i in self.local_animals:
            s, e, st = sch.for_animal(int(i))
            s, e = np.maximum(s, t0), np.minimum(e, t1)
            b = BEHAVIOUR_OF_STATE[st]
            ok = e > s
            s, e, b = s[ok], e[ok], b[ok]
            if not len(s):
                continue
            new = np.concatenate([[True], (b[1:] != b[:-1]) | (s[1:] > e[:-1] + 1e-6)])
            starts = np.flatnonzero(new)
            ends = np.concatenate([starts[1:], [len(s)]]) - 1
            # each interval under the collar the animal wore then (split at a refit)
            for c in np.flatnonzero(self.collar_animal == i):
                f0 = self.start + self.collar_from[c]
                f1 = self.start + self.collar_to[c]
                for j0, j1 in zip(starts, ends, strict=True):
                    a, z = max(float(s[j0]), f0), min(float(e[j1]), f1)
                    if z > a:
                        beh = BEHAVIOURS[int(b[j0])]
                        out.append((self.animal_ids[i], self.collar_ids[c], a, z, beh))
        return out

    def budgets(self) -> list[tuple[str, str, str, float]]:
        """Minutes per ``(animal, day, behaviour)`` for every whole or part UTC day of the
        herd's span (which must be finite)."""
        if self.end is None:
            raise ConfigError("budgets of an endless herd are undefined; give days.")
        self.ensure_schedule(self.end)
        out = []
        d = math.floor(self.start / DAY_S) * DAY_S
        while d < self.end:
            mins = self.schedule.minutes(max(d, self.start), min(d + DAY_S, self.end))
            day = datetime.fromtimestamp(d, UTC).strftime("%Y-%m-%d")
            for i in self.local_animals:
                for j, b in enumerate(BEHAVIOURS):
                    out.append((self.animal_ids[i], day, b, round(float(mins[i, j]), 3)))
            d += DAY_S
        return out

    def to_json(self) -> dict:
        """Scenario, seed, parameters and the injected events with their ground truth."""
        return {
            "scenario": self.scenario,
            "seed": self.seed,
            "parameters": {
                "n_animals": self.n_animals,
                "hz": self.hz,
                "frame_s": self.frame_s,
                "samples_per_frame": self.samples_per_frame,
                "start": self.start,
                "start_iso": _iso(self.start),
                "days": self.days,
                "range_g": self.sensor.range_g,
                "random_roll": self.sensor.random_roll,
                "loss_scale": self.loss,
                "mean_frame_loss": round(self.sensor.loss.mean_loss, 5),
                "silence_per_day": self.sensor.silence_per_day,
                "refit_share": self.refit_share,
                "shares": self.shares,
            },
            "animals": [
                {
                    "animal": self.animal_ids[i],
                    "collar": self.collar_ids[i],
                    "scenario": self.scenario_of[i],
                }
                for i in range(self.n_animals)
            ],
            "refits": self.refits,  # fmt: skip
            "events": [e.to_json() for e in self.events],
            "time": "unix seconds, UTC; the simulator treats UTC as the farm's local time",
        }

    # ----------------------------------------------------------------- frames
    def block_frames(self) -> int:
        """Frames per collar in one generated block (bounded memory per block)."""
        per = max(1, len(self.local)) * self.samples_per_frame
        return int(np.clip(_MAX_SAMPLES_PER_BLOCK // per, 1, 600))

    def _clock(self, rows: np.ndarray, t: np.ndarray) -> np.ndarray:
        """Collar clock (seconds since the epoch) at true time ``t`` (same units)."""
        c = self._col
        return t + c.clock_off_s[rows] + c.clock_ppm[rows] * 1e-6 * t

    def _true(self, rows: np.ndarray, c_t: np.ndarray) -> np.ndarray:
        c = self._col
        return (c_t - c.clock_off_s[rows]) / (1.0 + c.clock_ppm[rows] * 1e-6)

    def _first_frame(self, rows: np.ndarray) -> np.ndarray:
        """Frame number of each collar's first frame: its first sample is taken once the
        collar is on the animal (at the start, or at the refit)."""
        col = self._col
        c_fit = self._clock(rows, self._fit_from[rows])
        k = np.ceil((c_fit - col.phase_s[rows]) / self.frame_dt - 1e-9).astype(np.int64)
        return np.maximum(k, 0)

    def generate(
        self, t_a: float, t_b: float, rows: np.ndarray | None = None, *, samples: bool = True
    ) -> FrameBlock:
        """Frames of local collars ``rows`` (default all) sent in true time ``[t_a, t_b)``,
        times in seconds since the herd's start. ``samples=False`` skips the accelerations
        (``acc`` is then ``[F, 0, 3]``): frame times, seq and battery only, much faster."""
        rows = np.arange(len(self.local)) if rows is None else np.asarray(rows)
        col, n, fdt = self._col, self.samples_per_frame, self.frame_dt
        if self.end is not None:
            t_b = min(t_b, self.end - self.start)
        if t_b <= t_a or rows.size == 0:
            return _empty_block(n)
        # long spans go in pieces, so memory stays bounded whatever the caller asks for
        piece = max(fdt, _MAX_SAMPLES_PER_BLOCK / (rows.size * self.hz))
        if samples and t_b - t_a > 1.5 * piece:
            edges = np.append(np.arange(t_a, t_b, piece), t_b)
            parts = [self.generate(a, b, rows) for a, b in zip(edges[:-1], edges[1:], strict=True)]
            parts = [p for p in parts if len(p)]
            if not parts:
                return _empty_block(n)
            return FrameBlock(
                *(np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(FrameBlock))
            )
        # frame k of a collar is sent when its last sample is done: phase + (k+1)*fdt
        c_a = self._clock(rows, np.full(rows.shape, t_a))
        k_lo = np.ceil((c_a - col.phase_s[rows]) / fdt - 1.0 - 1e-9).astype(np.int64)
        k_lo = np.maximum(k_lo, self._first_frame(rows))
        span = int(np.ceil((t_b - t_a) / fdt * (1 + 1e-4))) + 2
        kk = k_lo[:, None] + np.arange(span)[None, :]
        rr = np.broadcast_to(rows[:, None], kk.shape)
        sent = self._true(rr, col.phase_s[rr] + (kk + 1) * fdt)
        # sent inside the block, and while the collar is on its animal
        ok = (sent >= t_a) & (sent < t_b) & (sent <= self._fit_to[rr])
        r, k, sent = rr[ok], kk[ok], sent[ok]
        keep = ~sensor.frame_lost(col, r, k, self.sensor.loss)
        keep &= ~sensor.silent(col, r, sent, self.start, self.sensor.silence_per_day)
        batt = sensor.battery_volts(col, r, sent)
        keep &= np.isfinite(batt)
        r, k, sent, batt = r[keep], k[keep], sent[keep], batt[keep]
        order = np.lexsort((r, sent))
        r, k, sent, batt = r[order], k[order], sent[order], batt[order]
        f = r.shape[0]
        if f == 0:
            return _empty_block(n)
        seq = k - self._first_frame(r)  # a collar counts its frames from 0
        if not samples:
            t0 = col.phase_s[r] + k * fdt + self.start
            return FrameBlock(r, seq, sent + self.start, t0, np.zeros((f, 0, 3), np.float32), batt)
        # sample times: on the collar clock a regular grid, in true time slightly stretched
        samp = k[:, None] * n + np.arange(n)[None, :]
        c_t = col.phase_s[r][:, None] + samp / self.hz
        rs = np.repeat(r, n)
        t_true = self._true(rs, c_t.reshape(-1))
        # roll and bias change over hours, so once per frame is enough
        roll = np.repeat(sensor.collar_roll(col, r, sent, self.start, self.sensor), n)
        bias = np.repeat(sensor.sensor_bias(col, r, sent), n, axis=0)
        acc = self._acc(rs, t_true, samp.reshape(-1), roll, bias)
        return FrameBlock(
            row=r,
            seq=seq,
            sent=sent + self.start,
            t=c_t[:, 0] + self.start,
            acc=acc.reshape(f, n, 3),
            battery_v=batt,
        )

    def _acc(self, rs, t_true, samp, roll, bias) -> np.ndarray:
        """Quantised collar readings ``[M, 3]`` float32 at true times (s since start)."""
        t_abs = t_true + self.start
        self.ensure_schedule(float(t_abs.max()) + 1.0)
        sch = self.schedule
        arow = self._collar_arow[rs]  # the animal each collar is on, as a local row
        animal = self.local_animals[arow]
        idx, found = sch.lookup(animal, t_abs)
        state = np.where(found, sch.state[idx], State.REST_L)
        b0 = np.where(found, sch.start[idx], t_abs) - self.start
        prev_i = np.maximum(idx - 1, 0)
        has_prev = found & (idx > 0) & (sch.animal[prev_i] == animal)
        prev = np.where(has_prev, sch.state[prev_i], state)
        a = neck_acceleration(
            self._sig, arow, t_true, state, prev, b0, idx, sch.bout_u, sch.bout_z, roll
        )
        a += bias
        # motion noise of the behaviour and the sensor's own white noise, in one draw
        sd = np.sqrt(MOTION_G[state] ** 2 + self._col.noise_g[rs] ** 2)
        kn = self._col.key[rs] ^ np.uint64(0x5BD1E995)
        a += sd[:, None] * rand.noise(kn[:, None], samp[:, None] * 3 + np.arange(3)[None, :])
        return sensor.quantise(a, self.sensor.range_g)

    def blocks(self) -> Iterator[FrameBlock]:
        """Consecutive blocks of frames from the herd's start (endless unless ``days``)."""
        step = self.block_frames() * self.frame_dt
        t_a = 0.0
        horizon = None if self.end is None else self.end - self.start
        dropped_day = 0
        while horizon is None or t_a < horizon:
            block = self.generate(t_a, t_a + step)
            t_a += step
            day = int(t_a // DAY_S)
            if not self._keep_history and day > dropped_day:  # once a simulated day
                dropped_day = day
                self.schedule.drop_before(self.start + t_a - 2 * DAY_S)
            yield block

    def __iter__(self) -> Iterator[Frame]:
        ids = [self.collar_ids[i] for i in self.local]
        for b in self.blocks():
            seq = (b.seq % 2**32).tolist()
            for j, (r, t, v) in enumerate(
                zip(b.row.tolist(), b.t.tolist(), b.battery_v.tolist(), strict=True)
            ):
                yield Frame(ids[r], seq[j], t, self.hz, b.acc[j], v, 0.0)

    def take(self, n: int) -> list[Frame]:
        """The first ``n`` frames (fewer if the herd's span ends first)."""
        return list(islice(iter(self), n))

    def endless(self) -> Herd:
        """Forget ground truth older than two days as frames go by (long publishing runs)."""
        self._keep_history = False
        return self


def _empty_block(n: int) -> FrameBlock:
    z = np.zeros(0)
    return FrameBlock(
        np.zeros(0, np.int64), np.zeros(0, np.int64), z, z, np.zeros((0, n, 3), np.float32), z
    )


def _check(
    n_animals, scenario, seed, hz, start, frame_s, range_g, loss, silence, ill, est, calv,
    days, shard,
) -> list[str]:  # fmt: skip
    """Every problem with the herd parameters, one full sentence each."""
    p: list[str] = []

    def num(x) -> bool:
        return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)

    if not isinstance(n_animals, int) or isinstance(n_animals, bool) or n_animals < 1:
        p.append(f"herd size {n_animals!r} is not possible; give a whole number of animals >= 1.")
    elif n_animals > 100_000:
        p.append(f"herd size {n_animals} is over the limit of 100000 animals.")
    if scenario not in SCENARIO_CHOICES:
        p.append(f"unknown scenario {scenario!r}; choose one of {', '.join(SCENARIO_CHOICES)}.")
    if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
        p.append(f"seed {seed!r} must be a whole number >= 0.")
    if not num(hz) or not 1.0 <= hz <= 200.0:
        p.append(f"sample rate {hz!r} Hz is not possible; give 1..200 Hz (10, 12.5 or 25 usual).")
    if not num(start) or not 0 < start < 4102444800:  # 2100-01-01
        p.append(f"start {start!r} must be a unix time in seconds between 1970 and 2100.")
    if not num(frame_s) or not 0.05 <= frame_s <= 60.0:
        p.append(f"frame length {frame_s!r} s must be between 0.05 and 60 s.")
    elif num(hz) and 1.0 <= hz <= 200.0 and round(hz * frame_s) > 1024:
        p.append("a frame may hold at most 1024 samples; shorten the frame or lower the rate.")
    if range_g not in sensor.RANGES_G:
        p.append(f"range {range_g!r} g is not a collar range; choose 2, 4 or 8.")
    if not num(loss) or loss < 0 or loss > 50:
        p.append(f"loss scale {loss!r} must be between 0 (no loss) and 50.")
    if not num(silence) or not 0 <= silence <= 1:
        p.append(f"silence chance {silence!r} per day must be between 0 and 1.")
    shares = [("illness", ill), ("estrus", est), ("calving", calv)]
    for name, v in shares:
        if not num(v) or not 0 <= v <= 1:
            p.append(f"{name} share {v!r} must be between 0 and 1.")
    if all(num(v) for _, v in shares) and sum(v for _, v in shares) > 1.0 + 1e-9:
        p.append("illness, estrus and calving shares add up to more than 1 (one event per animal).")
    if days is not None and (not num(days) or days <= 0):
        p.append(f"days {days!r} must be > 0 (or leave it out for an endless herd).")
    elif days is not None and days > 366:
        p.append(f"days {days!r} is more than a year; simulate at most 366 days at a time.")
    if (
        not isinstance(shard, tuple)
        or len(shard) != 2
        or not all(isinstance(x, int) for x in shard)
        or not 0 <= shard[0] < shard[1]
    ):
        p.append(f"shard {shard!r} must be (k, p) with 0 <= k < p.")
    return p
