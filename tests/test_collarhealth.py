"""Collar health: loss from sequence numbers, frame rate, battery, last seen, roll, persistence."""

from __future__ import annotations

import math
import sqlite3

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from gateway.collarhealth import CollarHealth
from gateway.lineprotocol import points_for
from gateway.outbox import fact_of
from gateway.types import CollarGravity, Frame

ACC = np.zeros((10, 3), np.float32)


def frame(seq: int, t: float, battery: float | None = 3.9, collar: str = "C1") -> Frame:
    return Frame(collar, seq, t, 10.0, ACC, battery, t + 1.0)


def test_loss_duplicates_and_late_frames() -> None:
    ch = CollarHealth()
    for seq in (10, 11, 11, 14, 12, 15):  # 11 twice; 13 lost; 12 arrives late
        ch.update(frame(seq, 100.0 + seq))
    s = ch.snapshot(200.0)[0]
    assert (s.frames, s.duplicates, s.lost) == (5, 1, 1)
    assert s.loss == pytest.approx(1 / 6)


def test_sequence_wraps_at_2_to_the_32() -> None:
    # DESIGN.md, collar frames: seq wraps at 2^32
    ch = CollarHealth()
    for i, seq in enumerate((2**32 - 2, 2**32 - 1, 0, 2)):
        ch.update(frame(seq, 100.0 + i))
    s = ch.snapshot(110.0)[0]
    assert (s.frames, s.lost) == (4, 1)


def test_a_collar_restart_is_not_a_loss() -> None:
    ch = CollarHealth()
    for i, seq in enumerate((500_000, 500_001, 0, 1, 2)):
        ch.update(frame(seq, 100.0 + i))
    assert ch.snapshot(110.0)[0].lost == 0


def test_frame_rate_and_loss_over_the_recent_window() -> None:
    ch = CollarHealth(window_s=600.0)
    seq = 0
    for k in range(1800):  # 30 min at 1 frame/s, every 10th frame lost in the last 10 min
        seq += 1
        if k >= 1200 and k % 10 == 0:
            continue
        ch.update(frame(seq, 1000.0 + k))
    s = ch.snapshot(1000.0 + 1800)[0]
    assert s.frame_rate_hz == pytest.approx(0.9, abs=0.05)
    assert s.loss == pytest.approx(0.1, abs=0.02)
    assert s.lost == 60 and s.frames == 1740


def test_battery_keeps_the_last_finite_value() -> None:
    ch = CollarHealth()
    ch.update(frame(1, 100.0, 3.8))
    ch.update(frame(2, 101.0, float("nan")))
    ch.update(frame(3, 102.0, None))
    s = ch.snapshot(103.0)[0]
    assert s.battery_v == 3.8 and s.battery_at == 101.0


def test_roll_about_the_neck_from_gravity() -> None:
    # roll = atan2(gy, gz) (NXP AN3461, FIELD.md); head pitch must not change it
    ch = CollarHealth()
    roll = math.radians(30.0)
    for i, pitch_deg in enumerate((0.0, 40.0, 60.0, -10.0)):
        p = math.radians(pitch_deg)
        g = (-math.sin(p), math.cos(p) * math.sin(roll), math.cos(p) * math.cos(roll))
        ch.add_gravity(CollarGravity("C1", "cow-1", 3600.0 + 60 * i, 5.0, g))
    tr = ch.tracks["C1"]
    assert tr.roll_deg(1, 2) == pytest.approx(30.0, abs=1e-6)
    ch.add_gravity(CollarGravity("C1", "cow-1", 3700.0, 5.0, (0.0, float("nan"), 1.0)))
    assert tr.roll_hours[1][2] == 4  # a NaN window is not counted


def test_save_and_load_round_trip() -> None:
    conn = sqlite3.connect(":memory:")
    CollarHealth.ensure_schema(conn)
    ch = CollarHealth()
    for seq in (1, 2, 4):
        ch.update(frame(seq, 100.0 + seq), animal="cow-1")
    ch.add_gravity(CollarGravity("C1", "cow-1", 0.0, 5.0, (0.0, 0.5, 0.8)))
    saved = ch.save(conn, 200.0)
    back = CollarHealth()
    back.load(conn)
    again = back.snapshot(200.0)[0]
    assert (again.frames, again.lost, again.battery_v, again.animal) == (3, 1, 3.9, "cow-1")
    assert back.tracks["C1"].roll_hours == ch.tracks["C1"].roll_hours
    back.update(frame(5, 105.0))  # the sequence carries on after a restart
    assert back.snapshot(210.0)[0].lost == 1
    (row,) = CollarHealth.read(conn, animal="cow-1")
    assert row.collar_id == "C1" and row.frames == saved[0].frames
    assert CollarHealth.read(conn, animal=[]) == []


def test_collar_health_as_a_line_protocol_point() -> None:
    ch = CollarHealth()
    ch.update(frame(1, 100.0, 3.7), animal="cow-1")
    (p,) = points_for(fact_of(ch.snapshot(130.0)[0]), "farm")
    assert p.measurement == "collar_health"
    assert p.tags == {"site": "farm", "collar": "C1", "animal": "cow-1"}
    assert p.fields["battery_v"] == 3.7 and p.fields["frames"] == 1
    assert p.time_ms == 130_000


@given(
    seqs=st.lists(st.integers(min_value=-(2**70), max_value=2**70), min_size=1, max_size=60),
    battery=st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True)),
)
def test_hostile_sequence_numbers_never_break_the_counts(seqs: list[int], battery) -> None:
    ch = CollarHealth()
    for i, seq in enumerate(seqs):
        ch.update(Frame("C1", seq, 100.0 + i, 10.0, ACC, battery, 100.0 + i))
    s = ch.snapshot(200.0)[0]
    assert s.frames + s.duplicates == len(seqs)
    assert s.lost >= 0 and 0.0 <= s.loss <= 1.0
    assert s.battery_v is None or math.isfinite(s.battery_v)
