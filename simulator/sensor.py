"""Sensor and radio model of a collar: what turns the true motion into published frames.

- range clipping (+/-2, 4 or 8 g; FIELD.md, accelerometer practice) and int16 quantisation
  at ``range / 32767`` g per LSB, the same scale as the binary wire format
- white noise and a bias that drifts slowly (a daily temperature swing plus a slower wander)
- sample-clock drift: each collar's crystal runs fast or slow by some ppm and starts with an
  offset, so frame times are on the collar's clock, not the gateway's
- bursty frame loss: a Gilbert-Elliott channel (good and bad states, loss probability per
  state; Gilbert 1960, Elliott 1963 [M]) per collar
- collars that go silent for a while (out of radio range) and come back
- a battery that drains; an empty collar stops sending
- the collar's roll about the neck: a fixed start, a slow drift, and now and then a slip to
  a new angle

Everything is a pure function of (seed, collar, time or frame number), see simulator.rand.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import rand
from .schedule import DAY_S

__all__ = [
    "LossModel",
    "SensorModel",
    "battery_volts",
    "collar_roll",
    "draw_collar_traits",
    "frame_lost",
    "quantise",
    "silent",
]

_STREAM_COLLAR = 31
_STREAM_LOSS = 32
_STREAM_SILENCE = 33
_STREAM_SLIP = 34
_STREAM_NOISE = 35
_SEG = 4096  # frames per loss-channel segment (the channel restarts good at each)
RANGES_G = (2.0, 4.0, 8.0)
RATES_HZ = (10.0, 12.5, 25.0)


@dataclass(frozen=True)
class LossModel:
    """Gilbert-Elliott frame loss. Probabilities are per frame.

    Defaults give bursts of ~8 frames about every 10 minutes and ~1 % loss overall
    (common practice for a barn LoRa/BLE link, no source).
    """

    p_good_to_bad: float = 1.0 / 600.0
    p_bad_to_good: float = 1.0 / 8.0
    loss_good: float = 0.002
    loss_bad: float = 0.5

    @property
    def mean_loss(self) -> float:
        """Long-run loss fraction of the channel."""
        pb = self.p_good_to_bad / (self.p_good_to_bad + self.p_bad_to_good)
        return pb * self.loss_bad + (1.0 - pb) * self.loss_good

    def scaled(self, factor: float) -> LossModel:
        """Same burst shape, ``factor`` times as many bursts (0 turns loss off)."""
        if factor <= 0:
            return LossModel(0.0, 1.0, 0.0, 0.0)
        return LossModel(
            min(self.p_good_to_bad * factor, 0.5),
            self.p_bad_to_good,
            min(self.loss_good * factor, 1.0),
            self.loss_bad,
        )


@dataclass(frozen=True)
class SensorModel:
    """Collar hardware settings shared by the herd."""

    hz: float = 10.0
    range_g: float = 4.0
    random_roll: bool = True
    loss: LossModel = LossModel()
    silence_per_day: float = 0.05  # chance a collar drops out once in a day
    slips_per_day: float = 0.25  # chance a collar slips to a new roll angle in a day

    @property
    def lsb_g(self) -> float:
        """int16 step, as in the binary wire format."""
        return float(np.float32(self.range_g / 32767.0))


@dataclass
class CollarTraits:
    """Per-collar hardware parameters, one row per collar."""

    key: np.ndarray
    roll0: np.ndarray  # radians
    roll_f: np.ndarray  # Hz of the slow roll drift
    roll_p: np.ndarray
    noise_g: np.ndarray
    bias_g: np.ndarray  # [N, 3]
    bias_p: np.ndarray  # [N, 3] phase of the daily swing
    clock_off_s: np.ndarray
    clock_ppm: np.ndarray
    phase_s: np.ndarray  # where in a frame period the collar's frame grid starts
    charge0: np.ndarray  # battery state of charge at the start, 0..1
    life_days: np.ndarray  # days from full to empty
    link: np.ndarray  # multiplier on the loss channel's burst rate (distance to antenna)


def draw_collar_traits(seed: int, collars: np.ndarray, sensor: SensorModel, frame_dt: float):
    """Per-collar parameters keyed by herd-wide collar index."""
    k = rand.keys(rand.key(seed, _STREAM_COLLAR), np.asarray(collars))
    kc = k[:, None]
    u = rand.uniform(kc, np.arange(16)[None, :])
    z = rand.normal(kc, np.arange(100, 116)[None, :])
    roll0 = (2 * u[:, 0] - 1) * np.pi if sensor.random_roll else np.zeros(len(k))
    return CollarTraits(
        key=k,
        roll0=roll0,
        roll_f=1.0 / (3600.0 * (2.0 + 6.0 * u[:, 1])),
        roll_p=2 * np.pi * u[:, 2],
        noise_g=0.004 + 0.011 * u[:, 3],
        bias_g=0.015 * z[:, 0:3],
        bias_p=2 * np.pi * u[:, 4:7],
        clock_off_s=u[:, 7] - 0.5,
        # crystal tolerance of tens of ppm (common practice, no source)
        clock_ppm=np.clip(20.0 * z[:, 3], -60.0, 60.0),
        phase_s=u[:, 8] * frame_dt,
        charge0=0.35 + 0.65 * u[:, 9],
        life_days=30.0 + 30.0 * u[:, 10],
        link=np.exp(0.5 * z[:, 4]),
    )


def collar_roll(
    tr: CollarTraits, row: np.ndarray, t: np.ndarray, epoch: float, sensor: SensorModel
) -> np.ndarray:
    """Roll angle (radians) of collar ``row`` at ``t`` (seconds since the epoch).

    A slow drift of ~10 degrees, plus slips: in each day a collar may slip once to a new
    angle around its fitted position; the latest slip within the last 8 days holds.
    """
    if not sensor.random_roll:
        return np.zeros(t.shape)
    drift = (10.0 * np.pi / 180.0) * np.sin(2 * np.pi * tr.roll_f[row] * t + tr.roll_p[row])
    k = tr.key[row]
    day = np.floor((t + epoch) / DAY_S).astype(np.int64)
    offset = np.zeros(t.shape)
    found = np.zeros(t.shape, dtype=bool)
    for back in range(8):
        d = day - back
        kd = rand.keys(rand.key(_STREAM_SLIP), d.astype(np.uint64)) ^ k
        has = rand.uniform(kd, 0) < sensor.slips_per_day
        at = (d.astype(np.float64) + rand.uniform(kd, 1)) * DAY_S - epoch
        hit = has & (at <= t) & ~found
        offset = np.where(hit, (35.0 * np.pi / 180.0) * rand.normal(kd, 2), offset)
        found |= hit
    return tr.roll0[row] + drift + offset


def sensor_bias(tr: CollarTraits, row: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Bias ``[M, 3]`` in g: a fixed offset plus a daily swing of ~8 mg (temperature)."""
    w = 2 * np.pi * t[:, None] / DAY_S
    return tr.bias_g[row] + 0.008 * np.sin(w + tr.bias_p[row])


def quantise(a: np.ndarray, range_g: float) -> np.ndarray:
    """Clip to the range and round to int16 steps (``range / 32767`` g per LSB), float32."""
    lsb = float(np.float32(range_g / 32767.0))
    q = np.clip(np.rint(a / lsb), -32768, 32767)
    return (q * lsb).astype(np.float32)


def frame_lost(tr: CollarTraits, row: np.ndarray, k: np.ndarray, loss: LossModel) -> np.ndarray:
    """Whether frame number ``k`` of collar ``row`` is lost on the Gilbert-Elliott channel.

    The channel runs in segments of 4096 frames, each starting in the good state; sojourns
    are geometric, drawn from the (collar, segment) key.
    """
    if loss.p_good_to_bad <= 0 and loss.loss_good <= 0:
        return np.zeros(k.shape, dtype=bool)
    seg = k // _SEG
    pos = k % _SEG
    pair_id, pair = np.unique(row.astype(np.int64) * (1 << 40) + seg, return_inverse=True)
    p_row = (pair_id >> 40).astype(np.int64)
    p_seg = pair_id & ((1 << 40) - 1)
    pgb = np.clip(loss.p_good_to_bad * tr.link[p_row], 1e-9, 0.5)
    # enough sojourns that their total exceeds a segment almost surely
    n_runs = 2 * int(np.ceil(_SEG * float(pgb.max()) * 2.0 + 8))
    kseg = rand.keys(rand.key(_STREAM_LOSS), p_seg.astype(np.uint64)) ^ tr.key[p_row]
    u = rand.uniform(kseg[:, None], np.arange(n_runs)[None, :])
    p_leave = np.where(np.arange(n_runs)[None, :] % 2 == 0, pgb[:, None], loss.p_bad_to_good)
    runs = np.ceil(np.log(u) / np.log1p(-p_leave))
    bounds = np.minimum(np.cumsum(runs, axis=1), _SEG)
    base = np.arange(len(pair_id))[:, None] * (_SEG + 1)
    flat = (bounds + base).reshape(-1)
    n_passed = np.searchsorted(flat, pair * (_SEG + 1) + pos, side="right") - pair * n_runs
    bad = (n_passed % 2) == 1
    p = np.where(bad, loss.loss_bad, loss.loss_good)
    return rand.uniform(tr.key[row] ^ np.uint64(_STREAM_LOSS), k) < p


def silent(
    tr: CollarTraits, row: np.ndarray, t: np.ndarray, epoch: float, per_day: float
) -> np.ndarray:
    """Whether the collar is out of contact at ``t``: at most one drop-out a day.

    Drop-outs last a log-normal time, median 15 min (common practice, no source); one that
    starts late in a day runs on into the next.
    """
    if per_day <= 0:
        return np.zeros(t.shape, dtype=bool)
    day = np.floor((t + epoch) / DAY_S).astype(np.int64)
    out = np.zeros(t.shape, dtype=bool)
    for back in (0, 1):
        d = day - back
        kd = rand.keys(rand.key(_STREAM_SILENCE), d.astype(np.uint64)) ^ tr.key[row]
        has = rand.uniform(kd, 0) < per_day
        s = (d.astype(np.float64) + rand.uniform(kd, 1)) * DAY_S - epoch
        dur = np.minimum(900.0 * np.exp(1.0 * rand.normal(kd, 2)), 6 * 3600.0)
        out |= has & (t >= s) & (t < s + dur)
    return out


def battery_volts(tr: CollarTraits, row: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Battery voltage (Li-ion, 4.15 V full to 3.3 V empty [M]); NaN once empty."""
    charge = tr.charge0[row] - t / (tr.life_days[row] * DAY_S)
    v = 3.3 + 0.85 * charge
    return np.where(charge > 0, np.round(v, 3), np.nan)
