"""The collar sensor and radio model: range, int16 steps, clock drift, bursty loss, battery,
silences."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from simulator import sensor
from simulator.herd import Herd


@pytest.mark.parametrize("range_g", [2.0, 4.0, 8.0])
def test_quantise_clips_to_the_range_and_rounds_to_int16_steps(range_g: float) -> None:
    lsb = range_g / 32767.0
    x = np.array([[0.0, 1e-9, -1e-9], [0.5, -0.5, 1.0], [100.0, -100.0, range_g], [3e38, -3e38, 0]])
    q = sensor.quantise(x, range_g).astype(np.float64)
    assert q.dtype == np.float64 and np.isfinite(q).all()
    # int16: at most 32767 steps up and 32768 down (two's complement)
    assert q.max() <= 32767 * lsb * (1 + 1e-6) and q.min() >= -32768 * lsb * (1 + 1e-6)
    steps = q / np.float32(range_g / 32767.0)
    np.testing.assert_allclose(steps, np.round(steps), atol=1e-3)
    assert abs(q[1, 0] - 0.5) <= lsb / 2 + 1e-7


def test_herd_readings_sit_on_the_int16_grid_inside_the_range() -> None:
    herd = Herd(4, scenario="pasture", seed=2, range_g=2.0, days=1)
    b = herd.generate(6 * 3600.0, 7 * 3600.0)  # morning grazing and milking walks
    a = b.acc.astype(np.float64)
    lsb = float(np.float32(2.0 / 32767.0))
    assert np.abs(a).max() <= 2.0
    np.testing.assert_allclose(a / lsb, np.round(a / lsb), atol=2e-3)
    # the same lsb the binary wire format uses, so binary frames carry them exactly
    assert herd.sensor.lsb_g == lsb


def _traits(n: int, link: float | None = None) -> sensor.CollarTraits:
    tr = sensor.draw_collar_traits(5, np.arange(n), sensor.SensorModel(), 1.0)
    if link is not None:
        tr = dataclasses.replace(tr, link=np.full(n, link))
    return tr


def test_gilbert_elliott_loss_rate_and_burstiness_match_theory() -> None:
    m = sensor.LossModel()
    n_collars, n_frames = 100, 40_000
    tr = _traits(n_collars, link=1.0)
    row = np.repeat(np.arange(n_collars), n_frames)
    k = np.tile(np.arange(n_frames), n_collars)
    lost = sensor.frame_lost(tr, row, k, m).reshape(n_collars, n_frames)
    # Gilbert-Elliott two-state chain (Gilbert 1960 [M]): stationary P(bad) and the chance
    # of losing the next frame after a lost one, computed from the model's own numbers
    pg, pb = m.p_good_to_bad, m.p_bad_to_good
    pi_b = pg / (pg + pb)
    pi = np.array([1 - pi_b, pi_b])
    h = np.array([m.loss_good, m.loss_bad])
    P = np.array([[1 - pg, pg], [pb, 1 - pb]])
    p_loss = float(pi @ h)
    p_ll = float((pi * h) @ P @ h) / p_loss
    rate = lost.mean()
    cond = (lost[:, 1:] & lost[:, :-1]).sum() / lost[:, :-1].sum()
    assert rate == pytest.approx(p_loss, rel=0.15)
    assert cond == pytest.approx(p_ll, rel=0.15)
    # bursty: far likelier to lose a frame after a lost one than on average
    assert cond > 10 * rate


def test_no_loss_when_turned_off_and_more_when_scaled() -> None:
    tr = _traits(10)
    row = np.repeat(np.arange(10), 5000)
    k = np.tile(np.arange(5000), 10)
    assert not sensor.frame_lost(tr, row, k, sensor.LossModel().scaled(0.0)).any()
    base = sensor.frame_lost(tr, row, k, sensor.LossModel()).mean()
    more = sensor.frame_lost(tr, row, k, sensor.LossModel().scaled(5.0)).mean()
    assert more > 3 * base


def test_collar_clock_drifts_by_its_ppm_and_keeps_a_regular_grid() -> None:
    herd = Herd(5, seed=9, days=1, loss=0.0, silence_per_day=0.0)
    b = herd.generate(0.0, 86400.0, samples=False)
    # frames without samples carry the same times as frames with them
    s = herd.generate(3600.0, 3610.0)
    times = dict(zip(zip(b.row.tolist(), b.seq.tolist(), strict=True), b.t.tolist(), strict=True))
    assert len(s) >= 5 * 9
    for r, q, t in zip(s.row.tolist(), s.seq.tolist(), s.t.tolist(), strict=True):
        assert times[r, q] == t
    for row in range(5):
        m = b.row == row
        t, sent = b.t[m], b.sent[m]
        # each frame's samples are contiguous on the collar clock: t steps by n / hz
        np.testing.assert_allclose(np.diff(t), herd.frame_dt, atol=1e-6)
        assert (np.diff(b.seq[m]) == 1).all()
        # collar time of a frame's end minus true send time = offset + drift * elapsed
        lag = (t + herd.frame_dt) - sent
        slope, icpt = np.polyfit(sent - herd.start, lag, 1)
        assert slope * 1e6 == pytest.approx(herd._col.clock_ppm[row], abs=0.01)
        assert icpt == pytest.approx(herd._col.clock_off_s[row], abs=1e-3)
        assert abs(herd._col.clock_ppm[row]) <= 60.0


def test_frame_loss_and_silences_leave_gaps_in_seq() -> None:
    herd = Herd(30, seed=9, days=1, silence_per_day=1.0)
    b = herd.generate(0.0, 86400.0, samples=False)
    long_gaps = 0
    for row in range(30):
        seq, sent = b.seq[b.row == row], b.sent[b.row == row]
        long_gaps += bool((np.diff(sent) > 120.0).any())
        assert (np.diff(seq) >= 1).all()
    # every collar dropped out once that day (median 15 min); a very short one may hide
    assert long_gaps >= 27
    expected = 30 * 86400 / herd.frame_dt
    kept = len(b) / expected
    assert 0.8 < kept < 0.995


def test_battery_drains_and_stays_in_range() -> None:
    herd = Herd(8, seed=1, days=1, loss=0.0, silence_per_day=0.0)
    b = herd.generate(0.0, 86400.0, samples=False)
    for row in range(8):
        v = b.battery_v[b.row == row]
        assert (np.diff(v) <= 1e-9).all() and v[0] > v[-1]
        assert v.min() >= 3.3 and v.max() <= 4.15


def test_an_empty_battery_silences_the_collar() -> None:
    tr = _traits(3)
    tr = dataclasses.replace(tr, charge0=np.array([0.01, 0.5, 1.0]), life_days=np.full(3, 2.0))
    v = sensor.battery_volts(tr, np.arange(3), np.full(3, 0.5 * 86400.0))
    assert np.isnan(v[0]) and np.isfinite(v[1:]).all()
