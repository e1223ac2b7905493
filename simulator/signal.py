"""Collar signal model: what a neck collar's accelerometer feels, per behaviour.

Axes are the collar's: x along the neck towards the head, y to the animal's left, z out of
the neck (up when the collar sits on top and has not turned). The reading is gravity's
reaction (+1 g up at rest) seen through the head-and-neck pitch and the collar's roll about
the neck, plus the dynamic acceleration of each behaviour:

- ruminating: jaw movement at about 1.1-1.2 Hz with a 3-5 s pause per cud every ~46-58 s
  (chews per cud and cud cycle: Braun et al. 2015, BMC Vet Res, in FIELD.md)
- feeding at a trough: head lowered, chewing near 1.07 Hz in bursts, head movements
  (FIELD.md, eating chewing rate)
- grazing: head down, a sharp bite 55-65 times a minute (FIELD.md, grazing bite rate),
  a step now and then, sideways sweeps
- walking: head level, lateral sway at the stride frequency (~0.7 Hz; Flower et al. 2006,
  J Dairy Sci, in FIELD.md), vertical and fore-aft bob at twice that
- resting: near static with slow drift, breathing, occasional head movements

Every random element is a pure function of (seed, animal, time or bout), see simulator.rand,
so chunking and process count never change the signal.

Static posture is recovered from the output with the usual formulas (NXP AN3461):
roll = atan2(ay, az), pitch = atan2(-ax, sqrt(ay^2 + az^2)).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import rand
from .schedule import LYING, State

__all__ = ["MOTION_G", "SignalTraits", "draw_signal_traits", "neck_acceleration"]

_STREAM_SIG = 21
_DEG = np.pi / 180.0

# mean head-and-neck pitch per state, degrees below horizontal (common practice, no source:
# head down to graze, lowered at the trough, level or raised when ruminating or resting)
_PITCH_DEG = np.array([62.0, 38.0, 2.0, -8.0, 8.0, -4.0, 16.0])
# slow head wander per state, degrees
_WANDER_DEG = np.array([9.0, 7.0, 3.0, 3.0, 3.0, 3.0, 4.0])
# motion noise per state, g (muscle tremor, jostling); the sensor adds its own noise
MOTION_G = np.array([0.018, 0.016, 0.005, 0.004, 0.004, 0.003, 0.025])


@dataclass
class SignalTraits:
    """Per-animal signal parameters, one row per animal of the (sub)herd."""

    key: np.ndarray  # uint64 animal keys
    pitch: np.ndarray  # [N, 7] degrees
    chew_hz: np.ndarray  # rumination chewing rate
    eat_hz: np.ndarray  # chewing rate at the trough
    chew_g: np.ndarray  # chewing amplitude
    cud_s: np.ndarray  # cud cycle
    pause_s: np.ndarray  # regurgitation/swallow pause per cud
    bite_hz: np.ndarray
    bite_g: np.ndarray
    stride_hz: np.ndarray
    stride_g: np.ndarray
    wander_f: np.ndarray  # [N, 3] Hz of the slow wander components
    wander_p: np.ndarray  # [N, 3] phases
    breath_hz: np.ndarray


def draw_signal_traits(seed: int, animals: np.ndarray) -> SignalTraits:
    """Draw per-animal signal parameters keyed by herd-wide animal index."""
    k = rand.keys(rand.key(seed, _STREAM_SIG), np.asarray(animals))
    kc = k[:, None]
    z = rand.normal(kc, np.arange(16)[None, :])
    u = rand.uniform(kc, np.arange(100, 116)[None, :])
    pitch = _PITCH_DEG[None, :] + 6.0 * z[:, :1] + 4.0 * z[:, 1:8]
    return SignalTraits(
        key=k,
        pitch=pitch,
        # ~1.1-1.2 Hz rumination chewing, ~1.07 Hz eating (FIELD.md, derived from Braun 2015)
        chew_hz=np.clip(1.15 + 0.025 * z[:, 8], 1.09, 1.21),
        eat_hz=np.clip(1.07 + 0.03 * z[:, 9], 1.0, 1.14),
        chew_g=np.clip(0.03 * np.exp(0.35 * z[:, 10]), 0.012, 0.08),
        # cud cycle ~46-58 s, pause 3-5 s (FIELD.md)
        cud_s=46.0 + 12.0 * u[:, 0],
        pause_s=3.0 + 2.0 * u[:, 1],
        # 55-65 bites/min (FIELD.md, dairy at pasture)
        bite_hz=(55.0 + 10.0 * u[:, 2]) / 60.0,
        bite_g=0.2 * np.exp(0.2 * z[:, 11]),
        # stride time 1.41-1.49 s (Flower et al. 2006, in FIELD.md)
        stride_hz=1.0 / (1.41 + 0.08 * u[:, 3]),
        stride_g=0.17 * np.exp(0.15 * z[:, 12]),
        wander_f=0.004 + 0.05 * u[:, 4:7] ** 2,
        wander_p=2 * np.pi * u[:, 7:10],
        breath_hz=0.25 + 0.2 * u[:, 10],
    )


def _smoothstep(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


def _slot_bumps(
    k: np.ndarray, t: np.ndarray, slot_s: float, p: float, width_s: float, stream: int
) -> tuple[np.ndarray, np.ndarray]:
    """Random short movements: per slot of ``slot_s`` one bump with probability ``p``.

    Returns (envelope, slot counter) so callers can draw a direction per bump.
    """
    q = np.floor(t / slot_s)
    qi = q.astype(np.int64) * 8 + stream
    u = rand.uniform(k, qi)
    pos = rand.uniform(k, qi + 1)
    c = (q + 0.15 + 0.7 * pos) * slot_s
    env = np.exp(-0.5 * ((t - c) / width_s) ** 2) * (u < p)
    return env, qi


def _slot_level(k: np.ndarray, t: np.ndarray, slot_s: float, p: float, stream: int):
    """A 0/1 level drawn per slot (1 with probability ``p``), smoothly joined between slots."""
    q = np.floor(t / slot_s)
    qi = q.astype(np.int64) * 8 + stream
    a = (rand.uniform(k, qi) < p).astype(np.float64)
    b = (rand.uniform(k, qi + 8) < p).astype(np.float64)
    frac = t / slot_s - q
    return a + (b - a) * _smoothstep((frac - 0.8) / 0.2)


def neck_acceleration(
    tr: SignalTraits,
    row: np.ndarray,
    t: np.ndarray,
    state: np.ndarray,
    prev_state: np.ndarray,
    bout_t0: np.ndarray,
    bout: np.ndarray,
    bout_u: np.ndarray,
    bout_z: np.ndarray,
    roll: np.ndarray,
) -> np.ndarray:
    """Acceleration in g on the collar axes, ``[M, 3]`` float64, before the sensor model.

    ``row`` indexes ``tr`` (the animal), ``t`` is seconds since the herd's epoch, ``state``
    and ``prev_state`` the schedule state now and in the bout before, ``bout_t0`` the bout's
    start (same clock), ``bout`` the bout's row in the tables ``bout_u`` (uniforms) and
    ``bout_z`` (normals) of per-bout random numbers, ``roll`` the collar's roll about the neck in radians. Motion noise is left to
    the caller (see MOTION_G), who draws it together with the sensor's noise.
    """
    m = t.shape[0]
    k = tr.key[row]
    since = t - bout_t0
    # posture: per-animal mean pitch, a per-bout offset, slow wander; blend in from the
    # previous bout's posture over ~2 s
    pitch = tr.pitch[row, state] + 3.0 * bout_z[bout, 0]
    wf, wp = tr.wander_f[row], tr.wander_p[row]
    wander = (
        np.sin(2 * np.pi * wf[:, 0] * t + wp[:, 0])
        + 0.6 * np.sin(2 * np.pi * wf[:, 1] * t + wp[:, 1])
        + 0.4 * np.sin(2 * np.pi * wf[:, 2] * t + wp[:, 2])
    ) / 1.2
    pitch = pitch + _WANDER_DEG[state] * wander
    prev_pitch = tr.pitch[row, prev_state]
    blend = _smoothstep(since / 2.0)
    pitch = prev_pitch + (pitch - prev_pitch) * blend
    tilt = 0.5 * _WANDER_DEG[state] * np.sin(2 * np.pi * wf[:, 1] * 0.7 * t + wp[:, 2])
    d = np.zeros((m, 3))

    def sub(s: int | tuple[int, ...]) -> np.ndarray:
        return np.flatnonzero(np.isin(state, s))

    # ruminating: chewing with a pause per cud, and a regurgitation movement in the pause
    i = sub((State.RUM_S, State.RUM_L))
    if i.size:
        r, ti, bu, bz = row[i], t[i], bout_u[bout[i]], bout_z[bout[i]]
        cyc = tr.cud_s[r] * (1.0 + 0.02 * np.clip(bz[:, 1], -1.0, 1.0))
        pos = np.mod(since[i] + cyc * bu[:, 0], cyc)
        pause = tr.pause_s[r]
        chewing = _smoothstep((pos - pause) / 0.4) * _smoothstep((cyc - pos) / 0.4)
        f = tr.chew_hz[r] * (1.0 + 0.015 * bz[:, 2])
        ph = 2 * np.pi * f * ti + 2 * np.pi * bu[:, 1]
        wave = np.sin(ph) + 0.3 * np.sin(2 * ph + 0.7)
        amp = tr.chew_g[r] * chewing
        bolus = np.where(pos < pause, np.sin(np.pi * pos / pause), 0.0) * 0.05
        d[i, 0] += 0.45 * amp * wave + bolus
        d[i, 2] += amp * wave - 0.5 * bolus
        d[i, 1] += 0.2 * amp * np.sin(ph + 1.3)
    # feeding at the trough: chewing in bursts, head movements, head lifted now and then
    i = sub(State.FEED)
    if i.size:
        r, ti = row[i], t[i]
        kk = k[i]
        on = _slot_level(kk, ti, 6.0, 0.75, 1)
        ph = 2 * np.pi * tr.eat_hz[r] * ti
        wave = np.sin(ph) + 0.35 * np.sin(2 * ph + 0.4)
        amp = 1.4 * tr.chew_g[r] * on
        d[i, 0] += 0.5 * amp * wave
        d[i, 2] += amp * wave
        env, qi = _slot_bumps(kk, ti, 4.0, 0.45, 0.35, 2)
        for ax in range(3):
            d[i, ax] += 0.16 * env * rand.normal(kk, qi + 3 + ax)
        lifted = _slot_level(kk, ti, 8.0, 0.2, 3)
        pitch[i] -= 28.0 * lifted
    # grazing: a sharp bite per bite cycle, steps now and then, head sweeps
    i = sub(State.GRAZE)
    if i.size:
        r, ti, kk = row[i], t[i], k[i]
        cyc = tr.bite_hz[r] * ti + bout_u[bout[i], 2]
        n_bite = np.floor(cyc)
        frac = cyc - n_bite
        jit = 0.12 * (rand.uniform(kk, n_bite.astype(np.int64) * 4) - 0.5)
        pulse = np.exp(-0.5 * ((frac - 0.5 - jit) / 0.09) ** 2)
        pulse = pulse - np.exp(-0.5 * ((frac - 0.72 - jit) / 0.14) ** 2) * 0.3  # head recoils
        bamp = tr.bite_g[r] * (0.7 + 0.6 * rand.uniform(kk, n_bite.astype(np.int64) * 4 + 1))
        bamp = bamp * (rand.uniform(kk, n_bite.astype(np.int64) * 4 + 2) < 0.9)  # missed bites
        # now and then the head comes up to look around, chewing the mouthful, no bites
        up = _slot_level(kk, ti, 12.0, 0.1, 6)
        bamp = bamp * (1.0 - up)
        d[i, 0] += 0.8 * bamp * pulse
        d[i, 2] += bamp * pulse
        chew = 0.8 * tr.chew_g[r] * up * np.sin(2 * np.pi * tr.eat_hz[r] * ti)
        d[i, 2] += chew
        d[i, 0] += 0.45 * chew
        pitch[i] -= 50.0 * up
        env, qi = _slot_bumps(kk, ti, 5.0, 0.4, 0.5, 4)
        sp = np.sin(2 * np.pi * tr.stride_hz[r] * ti)
        d[i, 1] += 0.12 * env * sp
        d[i, 2] += 0.06 * env * np.sin(4 * np.pi * tr.stride_hz[r] * ti)
        tilt[i] += 6.0 * np.sin(2 * np.pi * 0.11 * ti + tr.wander_p[r, 0])
    # walking: lateral sway at the stride frequency, vertical and fore-aft bob at twice it
    i = sub(State.WALK)
    if i.size:
        r, ti, bu, bz = row[i], t[i], bout_u[bout[i]], bout_z[bout[i]]
        f = tr.stride_hz[r] * (1.0 + 0.05 * bz[:, 1])
        ph = 2 * np.pi * f * ti + 2 * np.pi * bu[:, 3]
        a = tr.stride_g[r] * np.exp(0.3 * bz[:, 2]) * _smoothstep(since[i] / 1.5)
        d[i, 1] += a * (np.sin(ph) + 0.15 * np.sin(3 * ph))
        d[i, 2] += 0.55 * a * np.sin(2 * ph + 0.9)
        d[i, 0] += 0.35 * a * np.sin(2 * ph + 2.1)
        pitch[i] += 3.0 * np.sin(2 * ph)
    # resting: breathing, occasional head movements (more often when standing)
    i = sub((State.REST_S, State.REST_L))
    if i.size:
        r, ti, kk = row[i], t[i], k[i]
        d[i, 2] += 0.003 * np.sin(2 * np.pi * tr.breath_hz[r] * ti)
        p_move = np.where(state[i] == State.REST_S, 0.12, 0.06)
        env, qi = _slot_bumps(kk, ti, 30.0, 1.0, 0.8, 5)
        env = env * (rand.uniform(kk, qi + 6) < p_move)
        for ax in range(3):
            d[i, ax] += 0.1 * env * rand.normal(kk, qi + 3 + ax)
        # licking, idle jaw movement: a few seconds of chewing-like motion now and then
        jaw = _slot_level(kk, ti, 10.0, 0.06, 7)
        d[i, 2] += 0.6 * tr.chew_g[r] * jaw * np.sin(2 * np.pi * 1.2 * tr.eat_hz[r] * ti)
    # lying down or getting up: a lurch of the head and neck over a few seconds
    change = (LYING[state] != LYING[prev_state]) & (since < 5.0)
    i = np.flatnonzero(change)
    if i.size:
        x = since[i] / 5.0
        lurch = np.sin(np.pi * x) * np.sin(2 * np.pi * 1.2 * since[i])
        d[i, 0] += 0.35 * lurch
        d[i, 2] += 0.2 * lurch
        pitch[i] += 25.0 * np.sin(np.pi * x)
    # gravity through pitch and roll, then the dynamic part rotated by the collar's roll
    th = pitch * _DEG
    phi = roll + tilt * _DEG
    cth, sth = np.cos(th), np.sin(th)
    cph, sph = np.cos(phi), np.sin(phi)
    out = np.empty((m, 3))
    out[:, 0] = -sth + d[:, 0]
    out[:, 1] = cth * sph + d[:, 1] * cph + d[:, 2] * sph
    out[:, 2] = cth * cph - d[:, 1] * sph + d[:, 2] * cph
    return out
