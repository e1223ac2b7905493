"""Ring buffers and windows: resampling, reordering, duplicates, gaps, clock rule, rate limit."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gateway.types import Frame
from gateway.windows import Windows
from gateway.wire import SEQ_MODULO, Reason, Rejection

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z
FS, T, H = 10.0, 100, 50  # the default model's rate, 10 s window, 5 s hop


def signal(t: np.ndarray) -> np.ndarray:
    """A smooth collar signal: gravity on z plus slow chewing-like and stride-like motion."""
    return np.stack(
        [
            0.1 * np.sin(2 * np.pi * 0.7 * t),
            0.05 * np.cos(2 * np.pi * 1.1 * t) - 0.2,
            0.98 + 0.02 * np.sin(2 * np.pi * 0.3 * t),
        ],
        axis=1,
    )


def frames(
    collar: str = "C1",
    hz: float = 10.0,
    per_frame: int = 10,
    count: int = 60,
    t0: float = T0,
    seq0: int = 0,
    rx_delay: float | None = 0.5,
) -> list[Frame]:
    out = []
    for i in range(count):
        t = t0 + i * per_frame / hz
        ts = t + np.arange(per_frame) / hz
        rx = 0.0 if rx_delay is None else t + per_frame / hz + rx_delay
        acc = signal(ts).astype(np.float32)
        out.append(Frame(collar, (seq0 + i) % SEQ_MODULO, t, hz, acc, received_at=rx))
    return out


def windows(**kw: object) -> Windows:
    return Windows(sample_rate_hz=FS, window_len=T, hop_len=H, **kw)  # type: ignore[arg-type]


def push_all(w: Windows, fs: list[Frame], animal: str = "cow-1") -> list[Rejection]:
    return [r for f in fs if (r := w.push(f, animal)) is not None]


def test_10hz_aligned_windows_are_the_raw_samples() -> None:
    w = windows()
    assert push_all(w, frames(count=30)) == []
    ready = w.collect()
    b = ready.batch
    # 30 s of data, 10 s windows every 5 s starting on the hop grid: starts 0, 5, ..., 20
    assert b.t_start.tolist() == [T0 + 5 * i for i in range(5)]
    assert b.x.shape == (5, 3, T) and b.x.dtype == np.float32
    for i, ts in enumerate(b.t_start):
        expect = signal(ts + np.arange(T) / FS).T
        np.testing.assert_allclose(b.x[i], expect, atol=1e-6)
    assert b.missing.tolist() == [0.0] * 5 and ready.no_data == []
    assert w.collect().batch.x.shape[0] == 0  # collected once only


@pytest.mark.parametrize(
    ("hz", "per_frame"), [(12.5, 25), (25.0, 25), (12.5, 13), (25.0, 60), (10.0, 10), (10.0, 7)]
)
def test_faster_collars_match_numpy_interp(hz: float, per_frame: int) -> None:
    """Reference: numpy.interp over the whole sample clock, axis by axis."""
    t0 = T0 + 0.037  # collar clock not on the model's grid
    fs = frames(hz=hz, per_frame=per_frame, count=int(40 * hz / per_frame), t0=t0)
    w = windows()
    assert push_all(w, fs) == []
    b = w.collect().batch
    assert len(b) >= 5
    t_all = np.concatenate([f.t + np.arange(f.n) / f.hz for f in fs])
    a_all = np.concatenate([f.acc for f in fs]).astype(np.float64)
    for i, ts in enumerate(b.t_start):
        grid = ts + np.arange(T) / FS
        ref = np.stack([np.interp(grid, t_all, a_all[:, k]) for k in range(3)])
        np.testing.assert_allclose(b.x[i], ref, atol=1e-5)
    assert (b.missing == 0).all()


def test_slow_huge_frames_longer_than_the_ring() -> None:
    # 1 Hz, 1024 samples per frame (the wire limit): one frame spans 17 minutes
    fs = frames(hz=1.0, per_frame=1024, count=2)
    w = windows(max_missing=0.0)
    assert push_all(w, fs) == []
    b = w.collect().batch
    # samples at 0..2047 s give grid points 0..20470; windows start every 50 up to 20350
    assert len(b) == 408 and b.t_start[-1] == T0 + 2035.0
    t_all = np.concatenate([f.t + np.arange(f.n) / f.hz for f in fs])
    a_all = np.concatenate([f.acc for f in fs]).astype(np.float64)
    i = len(b) // 2
    grid = b.t_start[i] + np.arange(T) / FS
    ref = np.stack([np.interp(grid, t_all, a_all[:, k]) for k in range(3)])
    np.testing.assert_allclose(b.x[i], ref, atol=1e-5)


def test_long_stream_wraps_the_ring_many_times() -> None:
    w = windows()
    fs = frames(count=3600)  # one hour, ring of 60 s
    assert push_all(w, fs) == []
    b = w.collect().batch
    assert len(b) == (3600 - 10) // 5 + 1
    np.testing.assert_allclose(b.x[-1], signal(b.t_start[-1] + np.arange(T) / FS).T, atol=1e-6)


def test_reordered_frames_within_tolerance_give_the_same_windows() -> None:
    fs = frames(count=60)
    ref = windows()
    push_all(ref, fs)
    expected = ref.collect().batch
    order = list(range(60))
    rng = np.random.default_rng(1)
    for i in range(0, 56, 4):  # swap neighbours and shuffle within 4 s blocks (< reorder_s)
        block = order[i : i + 4]
        rng.shuffle(block)
        order[i : i + 4] = block
    w = windows(reorder_s=5.0)
    assert push_all(w, [fs[i] for i in order]) == []
    got = w.collect().batch
    np.testing.assert_array_equal(got.t_start, expected.t_start)
    np.testing.assert_allclose(got.x, expected.x, atol=1e-6)
    assert (got.missing == 0).all()


def test_frame_later_than_tolerance_is_rejected_late_and_leaves_a_gap() -> None:
    fs = frames(count=30)
    late = fs.pop(12)
    w = windows(reorder_s=3.0, max_missing=0.5)
    assert push_all(w, fs) == []
    r = w.push(late, "cow-1")
    assert isinstance(r, Rejection) and r.reason == Reason.LATE
    b = w.collect().batch
    # windows covering second 12 miss 10 of 100 samples
    covering = (b.t_start <= T0 + 12) & (b.t_start + 10 > T0 + 12)
    np.testing.assert_allclose(b.missing[covering], 0.1, atol=1e-6)
    assert (b.missing[~covering] == 0).all()


def test_duplicates_are_dropped_and_seq_wraps() -> None:
    fs = frames(count=30, seq0=SEQ_MODULO - 5)  # seq runs ... 2^32-1, 0, 1, ...
    assert fs[5].seq == 0
    w = windows()
    rejects = push_all(w, [f for f in fs for _ in range(2)])  # every frame twice
    assert [r.reason for r in rejects] == [Reason.DUPLICATE] * 30
    ref = windows()
    push_all(ref, fs)
    np.testing.assert_allclose(w.collect().batch.x, ref.collect().batch.x)


@settings(max_examples=200, deadline=None)
@given(
    st.lists(
        st.tuples(
            # few distinct values, and ones whose bytes straddle slot boundaries when packed
            st.sampled_from([0, 1, 255, 256, 0x01000000, 0x00010100, 2**32 - 1, 7, 0x0707]),
            # times on both sides of the 1 ms rule (rounded to whole ms, at most 1 apart)
            st.sampled_from([0.0, 0.0004, 0.0014, 0.0016, 0.0026, 0.5, 1.0, 1.7e9 + 0.001]),
        ),
        max_size=600,
    )
)
def test_duplicate_memory_matches_a_plain_list_of_the_last_frames(items) -> None:
    """The byte-ring duplicate memory against the obvious model: a frame is a duplicate when
    one of the last 256 remembered frames has its seq and a collar time within 1 ms (times
    rounded to whole milliseconds differ by at most 1: the rule in gateway/windows.py)."""
    from gateway.windows import _DUP_MEMORY, _Stream

    def ms(t: float) -> int:
        return math.floor(t * 1000 + 0.5)

    stream, model = _Stream("a", 10), []
    for seq, t in items:
        want = any(s == seq and abs(ms(u) - ms(t)) <= 1 for s, u in model[-_DUP_MEMORY:])
        assert Windows._seen(stream, seq, t) == want
        Windows._remember_seq(stream, seq, t)
        model.append((seq, t))


def test_gap_over_max_missing_is_a_no_data_hop_and_the_fill_is_linear() -> None:
    fs = frames(count=40)
    del fs[15:18]
    w = windows(max_missing=0.35, reorder_s=0.0)
    push_all(w, fs)
    b = w.collect().batch
    i = int(np.flatnonzero(b.t_start == T0 + 10)[0])  # window 10..20 s holds the gap 15..18 s
    assert b.missing[i] == pytest.approx(0.3)
    # inside the gap: straight line between the last sample before it and the first after
    k = np.arange(50, 80)
    t_before, t_after = T0 + 14.9, T0 + 18.0
    v0, v1 = signal(np.array([t_before]))[0], signal(np.array([t_after]))[0]
    tt = b.t_start[i] + k / FS
    line = v0 + (v1 - v0) * ((tt - t_before) / (t_after - t_before))[:, None]
    np.testing.assert_allclose(b.x[i][:, k].T, line, atol=1e-5)

    strict = windows(max_missing=0.2, reorder_s=0.0)
    push_all(strict, fs)
    ready = strict.collect()
    nd = [(h.t - T0, h.duration_s) for h in ready.no_data]
    # windows starting at 10 s and 15 s lack 30 % (> 20 %): two hops of no data, one record
    assert nd == [(10.0, 10.0)]
    assert T0 + 10 not in ready.batch.t_start and T0 + 15 not in ready.batch.t_start


def test_long_silence_is_one_no_data_hop() -> None:
    a = frames(count=20)
    b = frames(count=20, t0=T0 + 6 * 3600, seq0=20)  # six hours later
    w = windows(reorder_s=0.0)
    assert push_all(w, a + b) == []
    ready = w.collect()
    assert len(ready.no_data) == 1
    nd = ready.no_data[0]
    # classified: starts 0..10 s, then 6 h + 0..10 s; everything between is no data
    starts = ready.batch.t_start - T0
    assert starts.tolist() == [0.0, 5.0, 10.0, 21600.0, 21605.0, 21610.0]
    assert nd.t - T0 == 15.0 and nd.t + nd.duration_s - T0 == 21600.0
    assert nd.duration_s % 5.0 == 0.0


def test_clock_rule_substitute_and_reject() -> None:
    fs = frames(count=20)
    wrong = [
        Frame(f.collar_id, f.seq, f.t - 10 * 86400, f.hz, f.acc, received_at=f.received_at)
        for f in fs
    ]
    sub = windows()
    assert push_all(sub, wrong) == []
    assert sub.clock_substituted == 20
    got = sub.collect().batch
    # receive time (end + 0.5 s) substituted and then snapped onto the stream: seamless
    assert (got.missing == 0).all() and len(got) >= 2
    rej = windows(clock_rule="reject")
    reasons = {r.reason for r in push_all(rej, wrong)}
    assert reasons == {Reason.CLOCK}
    future = Frame("C1", 1, T0 + 3600, 10.0, fs[0].acc, received_at=T0)
    assert windows(clock_rule="reject").push(future, "cow-1").reason == Reason.CLOCK


def test_rate_limit_per_stream_keeps_other_collars() -> None:
    w = windows(max_frame_rate_hz=2.0)  # bucket of 120 frames
    flood = [
        Frame("BAD", i, T0 + i * 1.0, 10.0, np.zeros((10, 3), np.float32), received_at=T0)
        for i in range(200)
    ]
    rejects = push_all(w, flood, "bad-cow")
    assert len(rejects) == 80 and {r.reason for r in rejects} == {Reason.RATE_LIMITED}
    assert push_all(w, frames(count=30), "cow-1") == []


def test_hostile_neighbour_does_not_disturb_other_animals() -> None:
    clean = frames(count=40)
    ref = windows()
    push_all(ref, clean)
    expected = ref.collect().batch
    rng = np.random.default_rng(7)
    w = windows()
    for i, f in enumerate(clean):
        w.push(f, "cow-1")
        # a neighbour with a broken clock, repeats, jumps and absurd rates
        t = T0 + float(rng.uniform(-1e6, 1e6))
        hz = float(rng.choice([1.0, 12.5, 200.0]))
        acc = rng.normal(0, 4, (int(rng.integers(1, 1024)), 3)).astype(np.float32)
        w.push(Frame("EVIL", int(rng.integers(0, 5)), t, hz, acc, received_at=T0 + i), "evil")
    got = w.collect().batch
    mine = np.array([a == "cow-1" for a in got.animals])
    np.testing.assert_array_equal(got.t_start[mine], expected.t_start)
    np.testing.assert_allclose(got.x[mine], expected.x)


def test_new_collar_on_the_same_animal_starts_a_new_sequence() -> None:
    a = frames("C1", count=10)
    b = frames("C2", count=10, t0=T0 + 10.0)  # same seq numbers, another collar
    w = windows()
    assert push_all(w, a + b) == []
    assert len(w.collect().batch) == 3


def test_silent_animal_gets_no_data_while_silent() -> None:
    w = windows(speed=1.0, reorder_s=2.0)
    fs = frames(count=20)
    push_all(w, fs)
    w.collect()
    last_rx = fs[-1].received_at
    assert w.flush_silent(last_rx + 5.0) == 0  # not silent yet
    assert w.flush_silent(last_rx + 120.0) == 1
    ready = w.collect()
    span = sum(h.duration_s for h in ready.no_data)
    assert 90.0 <= span <= 120.0
    # the collar comes back: its frames go on from where the silence was committed
    back = frames(count=20, t0=fs[-1].t + 130.0, seq0=100, rx_delay=0.5)
    assert push_all(w, back) == []
    assert len(w.collect().batch) >= 2


def test_accelerated_clock_tolerates_a_few_seconds_of_delivery_jitter() -> None:
    # 600 collar seconds per gateway second (a fast demo): 3 s of delay on the way is half an
    # hour of collar time, and must not turn a collar's frames into "late" ones
    w = windows(speed=600.0, max_frame_rate_hz=1000.0)  # 600 frames/s per collar here
    a = frames("C1", count=7200, rx_delay=None)
    b = frames("C2", count=600, rx_delay=None)
    for f in a + b:
        f.received_at = T0 + 9000.0 + (f.t_end - T0) / 600.0  # sent after being recorded
    for f in b[300:]:
        f.received_at += 3.0  # the second half of cow-2's frames is 3 s late on its way
    push_all(w, a[:600], "cow-1")
    push_all(w, b[:300], "cow-2")
    w.flush_silent(a[599].received_at)
    assert w.collect().no_data == []
    assert push_all(w, b[300:600], "cow-2") == []
    # cow-1 goes on, cow-2 really went quiet: 8 s of its silence is over an hour here
    assert push_all(w, a[600:], "cow-1") == []
    assert w.flush_silent(a[-1].received_at) == 1
    quiet = w.collect().no_data
    assert {h.animal for h in quiet} == {"cow-2"} and sum(h.duration_s for h in quiet) > 1000
    # everybody quiet (broker gone): after a minute the gateway clock decides
    assert w.flush_silent(a[-1].received_at + 30.0) == 0
    assert w.flush_silent(a[-1].received_at + 90.0) == 2
