"""Per-animal ring buffers at the model's rate, cut into the model's windows and hops.

Each animal has one numpy ring buffer ``[L, 3]`` float32 with a mask of real samples.
Samples live on an absolute grid, index ``k`` at time ``k / fs`` (unix seconds), so every
animal's windows start on the same instants, multiples of the hop.

- Resampling: a frame's samples sit on its own sample clock, ``t + i / hz``. The grid points
  they span are filled by linear interpolation on that clock, starting from the last sample of
  the previous frame, so a 12.5 or 25 Hz collar feeds a 10 Hz model without seams (one
  vectorised expression per frame, no per-sample loop). Linear interpolation without an
  anti-alias filter: collar signals of interest sit below 3 Hz (FIELD.md: chewing ~1.1-1.2 Hz,
  strides ~0.7 Hz), far below a 10 Hz model's 5 Hz Nyquist.
- Order: a frame that starts after a gap waits up to ``reorder_s`` (collar time) for the
  frames before it; later than that the gap is committed and the late frame is rejected
  (``late``). Samples at or before the last committed sample are never used twice.
- Duplicates: the same ``seq`` with the same ``t`` (to the millisecond: the times rounded to
  whole ms differ by at most 1) as one of the last 256 frames is dropped (``seq`` wraps at
  2^32, so equality is all that is compared).
- Gaps: grid points more than 1.5 collar sample periods from a real sample are missing; they
  carry the linear interpolation between the samples around the gap (or the last value held)
  and are marked. A window whose missing share is above ``max_missing`` is not classified:
  its hop becomes a :class:`~gateway.types.NoDataHop`. A silence longer than the ring
  becomes one NoDataHop, not thousands.
- Clock rule: a frame that starts more than ``clock_future_s`` after its receive time, or
  ends more than ``clock_past_s`` before it, has a wrong collar clock. ``substitute`` gives it
  the receive time (its end = receive time, snapped onto the stream when within one frame
  span); ``reject`` refuses it (``clock``). Both are counted.
- Rate limit: a token bucket per animal stream on receive time, ``max_frame_rate_hz`` with a
  burst of a minute of frames at that rate (a collar flushing its backlog after a radio drop).
- Silence: with ``speed`` set (collar seconds per gateway second; 1 for live collars), an
  animal silent for longer than a window plus the reorder tolerance (and two frames) has its
  missing time committed as no-data hops while it is silent, not only when it comes back.
  "Now" is the receive time of the freshest frame of any animal, so a gateway behind on its
  queue does not mistake everybody for silent (after a minute without any frame, the clock),
  and the last 5 s of it are left open: a frame delayed that much on its way is never late,
  whatever the speed factor.

>>> import numpy as np
>>> from gateway.types import Frame
>>> w = Windows(sample_rate_hz=10.0, window_len=100, hop_len=50)
>>> for i in range(20):
...     _ = w.push(Frame("C1", i, 1000.0 + i, 10.0, np.zeros((10, 3), np.float32)), "cow-1")
>>> ready = w.collect()
>>> len(ready.batch), ready.batch.x.shape[1:], ready.batch.t_start[:3].tolist()
(3, (3, 100), [1000.0, 1005.0, 1010.0])
"""

from __future__ import annotations

import math
from bisect import insort
from dataclasses import dataclass

import numpy as np

from .config import LimitsSettings, WindowsSettings
from .model import Model
from .telemetry import Telemetry
from .types import Frame, NoDataHop, WindowBatch
from .wire import Reason, Rejection

__all__ = ["Ready", "Windows"]

_DUP_MEMORY = 256  # frames per stream remembered for duplicate detection
_MAX_PENDING = 64  # frames held for reordering per stream; more is a flood, commit the oldest
_BURST_S = 60.0  # token bucket depth: a minute of frames at the rate limit
_GAP_PERIODS = 1.5  # a hole longer than this many sample periods is missing data
_JITTER_S = 5.0  # gateway seconds a frame may be delayed (broker, queue) and still not be late
_ALL_SILENT_S = 60.0  # gateway seconds without any frame before silence is judged on the wall clock
_EPS = 1e-6  # grid rounding slack in samples (float time of ~1.7e9 s has ~2e-7 s resolution)


def _ms(t: float) -> int:
    """A collar time in whole milliseconds, modulo 2^32 (the duplicate memory's time)."""
    return math.floor(t * 1000.0 + 0.5) & 0xFFFFFFFF


@dataclass(slots=True)
class Ready:
    """What one :meth:`Windows.collect` gives: windows to classify and hops that cannot be."""

    batch: WindowBatch
    no_data: list[NoDataHop]


class _Stream:
    __slots__ = (
        "animal",
        "collar",
        "buf",
        "mask",
        "head",
        "emit_next",
        "tail_t",
        "tail_v",
        "watermark",
        "pending",
        "dup",
        "dup_n",
        "dup_at",
        "last_rx",
        "tokens",
        "tok_at",
        "span_s",
        "last_nd",
    )

    def __init__(self, animal: str, length: int) -> None:
        self.animal = animal
        self.collar = ""
        self.buf = np.zeros((length, 3), dtype=np.float32)
        self.mask = np.zeros(length, dtype=np.bool_)
        self.head: int | None = None  # next grid index to write; ring holds [head - L, head)
        self.emit_next = 0  # grid index where the next window starts
        self.tail_t: float | None = None  # time of the last committed sample
        self.tail_v = np.zeros(3, dtype=np.float64)
        self.watermark = -math.inf  # latest frame end seen (collar clock)
        self.pending: list[tuple[float, int, Frame]] = []  # sorted by t
        # duplicate memory: the (seq, collar time in ms) of the last _DUP_MEMORY frames in
        # one flat ring of 8-byte slots, 2 kB a collar (docs/performance.md, change 8)
        self.dup = bytearray(8 * _DUP_MEMORY)  # per slot: uint32 seq, uint32 ms, little-endian
        self.dup_n = 0  # slots filled (the first dup_n; all of them once the ring went round)
        self.dup_at = 0  # next slot to write
        self.last_rx = 0.0
        self.tokens = -1.0  # < 0: bucket not started
        self.tok_at = 0.0
        self.span_s = 1.0  # duration of the latest frame
        self.last_nd: NoDataHop | None = None


class Windows:
    """All animals' ring buffers; ``push`` frames in, ``collect`` ready windows out."""

    def __init__(
        self,
        *,
        sample_rate_hz: float,
        window_len: int,
        hop_len: int,
        max_missing: float = 0.2,
        reorder_s: float = 5.0,
        buffer_s: float = 20.0,
        clock_future_s: float = 300.0,
        clock_past_s: float = 86400.0,
        clock_rule: str = "substitute",
        max_frame_rate_hz: float = 5.0,
        speed: float | None = None,
        telemetry: Telemetry | None = None,
    ) -> None:
        if clock_rule not in ("substitute", "reject"):
            raise ValueError("clock_rule must be 'substitute' or 'reject'")
        if not 0 < hop_len <= window_len:
            raise ValueError("hop_len must be in 1..window_len")
        self.fs = float(sample_rate_hz)
        self.T = int(window_len)
        self.H = int(hop_len)
        self.hop_s = self.H / self.fs
        self.window_s = self.T / self.fs
        # The ring must hold a window plus room to write into (two hops); buffer_s may ask more.
        self.L = max(int(math.ceil(buffer_s * self.fs)), self.T + 2 * self.H)
        self._chunk = self.L - self.T  # largest write that cannot overwrite an unread window
        self.max_missing = float(max_missing)
        self.reorder_s = float(reorder_s)
        self.clock_future_s = float(clock_future_s)
        self.clock_past_s = float(clock_past_s)
        self.substitute = clock_rule == "substitute"
        self.rate = float(max_frame_rate_hz)
        self.burst = max(1.0, self.rate * _BURST_S)
        self.speed = speed
        self.telemetry = telemetry
        self._streams: dict[str, _Stream] = {}
        self._w_animals: list[str] = []
        self._w_t: list[float] = []
        self._w_x: list[np.ndarray] = []
        self._w_missing: list[float] = []
        self._w_ready: list[float] = []
        self._no_data: list[NoDataHop] = []
        self.clock_substituted = 0
        self._max_rx = 0.0  # latest receive time of any accepted frame

    @classmethod
    def for_model(
        cls,
        model: Model,
        windows: WindowsSettings,
        limits: LimitsSettings,
        *,
        speed: float | None = None,
        telemetry: Telemetry | None = None,
    ) -> Windows:
        """Build from a Model and the ``[windows]`` / ``[limits]`` settings sections."""
        return cls(
            sample_rate_hz=model.sample_rate_hz,
            window_len=model.window_len,
            hop_len=model.hop_len,
            max_missing=windows.max_missing,
            reorder_s=windows.reorder_s,
            buffer_s=windows.buffer_s,
            clock_future_s=windows.clock_future_s,
            clock_past_s=windows.clock_past_s,
            clock_rule=windows.clock_rule,
            max_frame_rate_hz=limits.max_frame_rate_hz,
            speed=speed,
            telemetry=telemetry,
        )

    # ------------------------------------------------------------------ frames in

    @property
    def animals(self) -> list[str]:
        return list(self._streams)

    def collar_of(self, animal: str) -> str:
        """The collar whose frames the animal's stream holds now ('' if none)."""
        st = self._streams.get(animal)
        return st.collar if st else ""

    def last_seen(self, animal: str) -> float:
        """Gateway time of the animal's latest accepted frame (0 if never)."""
        st = self._streams.get(animal)
        return st.last_rx if st else 0.0

    def push(self, frame: Frame, animal: str) -> Rejection | None:
        """Take one frame for ``animal``; a Rejection says why it was not used."""
        st = self._streams.get(animal)
        if st is None:
            st = self._streams[animal] = _Stream(animal, self.L)
        rx = frame.received_at
        if rx > 0.0 and not self._take_token(st, rx):
            return Rejection(Reason.RATE_LIMITED, f"over {self.rate:g} frames/s", frame.collar_id)
        if frame.collar_id != st.collar:  # a new collar on this animal starts a new sequence
            st.collar = frame.collar_id
            st.dup_n = st.dup_at = 0
        t = frame.t
        span = frame.n / frame.hz
        if rx > 0.0 and (t > rx + self.clock_future_s or t + span < rx - self.clock_past_s):
            if not self.substitute:
                return Rejection(
                    Reason.CLOCK,
                    f"collar time {t:.0f} is {t - rx:+.0f} s from the receive time",
                    frame.collar_id,
                )
            t = rx - span
            if st.tail_t is not None and abs(t - (st.tail_t + 1.0 / frame.hz)) < span:
                t = st.tail_t + 1.0 / frame.hz  # keep a wrong-clock collar's stream seamless
            self.clock_substituted += 1
            if self.telemetry is not None:
                self.telemetry.clock_substituted.inc()
        if self._seen(st, frame.seq, frame.t):
            return Rejection(Reason.DUPLICATE, f"seq {frame.seq} again", frame.collar_id)
        last_sample = t + (frame.n - 1) / frame.hz
        if st.tail_t is not None and last_sample <= st.tail_t + _EPS / self.fs:
            return Rejection(
                Reason.LATE,
                f"frame ends {st.tail_t - last_sample:.1f} s before samples already cut",
                frame.collar_id,
            )
        self._remember_seq(st, frame.seq, frame.t)
        st.last_rx = max(st.last_rx, rx)
        if rx > self._max_rx:
            self._max_rx = rx
        st.span_s = span
        st.watermark = max(st.watermark, t + span)
        if self.reorder_s <= 0.0 or st.tail_t is None or t - st.tail_t <= _GAP_PERIODS / frame.hz:
            self._commit(st, t, frame)
        else:
            insort(st.pending, (t, frame.seq, frame), key=lambda e: e[0])
        self._drain_pending(st, force=len(st.pending) > _MAX_PENDING)
        return None

    def _take_token(self, st: _Stream, rx: float) -> bool:
        if st.tokens < 0.0:
            st.tokens, st.tok_at = self.burst, rx
        else:
            st.tokens = min(self.burst, st.tokens + (rx - st.tok_at) * self.rate)
            st.tok_at = max(st.tok_at, rx)
        if st.tokens < 1.0:
            return False
        st.tokens -= 1.0
        return True

    @staticmethod
    def _seen(st: _Stream, seq: int, t: float) -> bool:
        """A frame with this seq and (to 1 ms) this collar time among the remembered ones.

        The ring is searched for the seq's bytes (a C loop, ~0.3 us); a hit counts only at
        the start of a slot, and then if the slot's millisecond time is within 1 of ``t``'s
        (modulo 2^32 ms, 49.7 days: a repeat that far apart is not in the last 256 frames).
        """
        ring, key, end = st.dup, (seq & 0xFFFFFFFF).to_bytes(4, "little"), 8 * st.dup_n
        pos = ring.find(key, 0, end)
        while pos >= 0:
            if not pos & 7:
                ms = int.from_bytes(ring[pos + 4 : pos + 8], "little")
                if (ms - _ms(t) + 1) & 0xFFFFFFFF <= 2:
                    return True
            pos = ring.find(key, pos + 1, end)
        return False

    @staticmethod
    def _remember_seq(st: _Stream, seq: int, t: float) -> None:
        i = st.dup_at
        st.dup[8 * i : 8 * i + 8] = (seq & 0xFFFFFFFF | _ms(t) << 32).to_bytes(8, "little")
        st.dup_at = (i + 1) % _DUP_MEMORY
        if st.dup_n < _DUP_MEMORY:
            st.dup_n += 1

    def _drain_pending(self, st: _Stream, force: bool = False) -> None:
        while st.pending:
            t, _, frame = st.pending[0]
            contiguous = st.tail_t is not None and t - st.tail_t <= _GAP_PERIODS / frame.hz
            if not (force or contiguous or st.watermark - t > self.reorder_s):
                break
            st.pending.pop(0)
            force = force and len(st.pending) > _MAX_PENDING
            self._commit(st, t, frame)

    # ------------------------------------------------------------------ ring writes

    def _commit(self, st: _Stream, t: float, frame: Frame) -> None:
        """Resample one frame (in order) onto the grid, after the last committed sample."""
        fs = self.fs
        acc = frame.acc
        if frame.hz == fs and st.head is not None:
            # Fast path, the common case: a collar at the model's rate, on the grid, in order.
            k = t * fs
            if abs(k - st.head) < 0.01 and st.tail_t is not None and t > st.tail_t:
                self._write(st, acc, np.ones(frame.n, dtype=np.bool_))
                st.tail_t = t + (frame.n - 1) / fs
                st.tail_v = acc[-1].astype(np.float64)
                return
            if st.tail_t is not None and self._commit_contiguous(st, t, acc):
                return
        src_t = t + np.arange(frame.n, dtype=np.float64) / frame.hz
        if st.tail_t is not None:
            keep = src_t > st.tail_t + _EPS / fs
            if not keep.all():
                src_t, acc = src_t[keep], acc[keep]
            if src_t.size == 0:
                return
        first_k = math.ceil(src_t[0] * fs - _EPS)
        if st.head is None:
            st.head = first_k
            st.emit_next = -(-first_k // self.H) * self.H
        elif first_k - st.head > self.L:  # long silence: skip it in O(1) windows
            self._fill_missing(st, first_k - self.T - self.H)
        tol = _GAP_PERIODS / frame.hz
        if st.tail_t is not None:
            xs = np.concatenate(([st.tail_t], src_t))
            ys = np.concatenate((st.tail_v[None, :], acc.astype(np.float64)))
        else:
            xs, ys = src_t, acc.astype(np.float64)
        last_k = math.floor(xs[-1] * fs + _EPS)
        if last_k >= st.head:
            kt = np.arange(st.head, last_k + 1, dtype=np.float64) / fs
            if xs.size == 1:
                vals = np.repeat(ys, kt.size, axis=0)
                real = np.abs(kt - xs[0]) <= 0.5 / fs + _EPS
            else:
                j = np.searchsorted(xs, kt, side="right") - 1
                np.minimum(np.maximum(j, 0, out=j), xs.size - 2, out=j)
                x0, x1 = xs[j], xs[j + 1]
                w = np.minimum(np.maximum((kt - x0) / (x1 - x0), 0.0), 1.0)[:, None]
                vals = ys[j] * (1.0 - w) + ys[j + 1] * w
                real = (x1 - x0 <= tol + _EPS / fs) & (kt >= xs[0] - _EPS / fs)
            self._write(st, vals, real)
        st.tail_t = float(xs[-1])
        st.tail_v = ys[-1].copy()

    def _commit_contiguous(self, st: _Stream, t: float, acc: np.ndarray) -> bool:
        """The common case off the grid: a collar at the model's rate whose frame starts one
        sample after the last one. Its samples and the grid points then keep one phase, so
        the linear interpolation of the general path has one weight for the whole frame
        (the same values, a handful of array operations instead of two dozen). False when
        the frame does not fit this case; the general path then handles it."""
        fs, n = self.fs, acc.shape[0]
        assert st.head is not None and st.tail_t is not None
        # 1e-4 of a sample: 40x the float resolution of unix seconds * fs (ulp 2.4e-7 s)
        if abs((t - st.tail_t) * fs - 1.0) > 1e-4:
            return False
        u0 = st.head - st.tail_t * fs  # first grid point, in samples after the last sample
        last_k = math.floor((t + (n - 1) / fs) * fs + _EPS)
        m = last_k - st.head + 1
        if not (_EPS <= u0 < 1.0 and 1 <= m <= n):
            return False
        ys = np.empty((n + 1, 3), dtype=np.float64)
        ys[0] = st.tail_v
        ys[1:] = acc
        w = u0
        vals = ys[:m] * (1.0 - w) + ys[1 : m + 1] * w
        self._write(st, vals, np.ones(m, dtype=np.bool_))
        st.tail_t = t + (n - 1) / fs
        st.tail_v = ys[-1].copy()
        return True

    def _fill_missing(self, st: _Stream, k_to: int) -> None:
        """Advance ``head`` to ``k_to`` over a gap with no samples (last value held)."""
        assert st.head is not None
        if k_to - st.head > self.L:
            self._write_const(st, self.T)  # finishes every window that holds older samples
            n = (k_to - self.T - st.emit_next) // self.H + 1
            if n > 0:
                self._no_data_hops(st, st.emit_next, n)
                st.emit_next += n * self.H
            st.head = max(st.head, st.emit_next)
        if k_to > st.head:
            self._write_const(st, k_to - st.head)

    def _write_const(self, st: _Stream, m: int) -> None:
        vals = np.broadcast_to(st.tail_v.astype(np.float32), (m, 3))
        self._write(st, vals, np.zeros(m, dtype=np.bool_))

    def _write(self, st: _Stream, vals: np.ndarray, real: np.ndarray) -> None:
        """Write samples at ``head`` onwards, emitting windows as they complete."""
        assert st.head is not None
        L = self.L
        for a in range(0, vals.shape[0], self._chunk):
            v, r = vals[a : a + self._chunk], real[a : a + self._chunk]
            m = v.shape[0]
            p = st.head % L
            first = min(m, L - p)
            st.buf[p : p + first] = v[:first]
            st.mask[p : p + first] = r[:first]
            if first < m:
                st.buf[: m - first] = v[first:]
                st.mask[: m - first] = r[first:]
            st.head += m
            self._emit(st)

    def _emit(self, st: _Stream) -> None:
        T, L = self.T, self.L
        assert st.head is not None
        while st.emit_next + T <= st.head:
            p = st.emit_next % L
            if p + T <= L:
                real = int(np.count_nonzero(st.mask[p : p + T]))
                x = st.buf[p : p + T].T.copy() if real else None
            else:
                idx = np.arange(p, p + T) % L
                real = int(np.count_nonzero(st.mask[idx]))
                x = st.buf[idx].T.copy() if real else None
            missing = 1.0 - real / T
            if x is None or missing > self.max_missing:
                self._no_data_hops(st, st.emit_next, 1)
            else:
                st.last_nd = None
                self._w_animals.append(st.animal)
                self._w_t.append(st.emit_next / self.fs)
                self._w_x.append(x)
                self._w_missing.append(missing)
                self._w_ready.append(st.last_rx)
            st.emit_next += self.H

    def _no_data_hops(self, st: _Stream, k_start: int, n: int) -> None:
        t = k_start / self.fs
        nd = st.last_nd
        if nd is not None and abs(nd.t + nd.duration_s - t) < 0.5 / self.fs:
            nd.duration_s = round((nd.duration_s + n * self.hop_s) / self.hop_s) * self.hop_s
            nd.ready_at = st.last_rx
        else:
            nd = NoDataHop(st.animal, t, n * self.hop_s, st.last_rx)
            self._no_data.append(nd)
            st.last_nd = nd

    # ------------------------------------------------------------------ windows out

    def flush_silent(self, now: float) -> int:
        """Commit the missing time of animals that went silent; returns how many were."""
        if self.speed is None:
            return 0
        # Judge silence against the freshest frame handled, not the wall clock, so a gateway
        # that is behind on its queue does not take everybody for silent; when nothing at all
        # arrives for a minute, the wall clock decides.
        if 0.0 < now - self._max_rx < _ALL_SILENT_S:
            now = self._max_rx
        count = 0
        for st in self._streams.values():
            if st.head is None or st.last_rx <= 0.0:
                continue
            # collar clock now, less what a frame delayed by receive jitter could still cover
            waited = now - st.last_rx - _JITTER_S
            if waited <= 0.0:
                continue
            est = st.watermark + waited * self.speed
            silence_s = self.window_s + self.reorder_s + 2.0 * st.span_s
            if est - st.watermark <= silence_s:
                continue
            self._drain_pending(st, force=True)
            k_to = math.floor((est - silence_s) * self.fs)
            if k_to > st.head:
                self._fill_missing(st, k_to)
                # samples before the committed point are late now; the held value bridges on
                st.tail_t = k_to / self.fs
                count += 1
        return count

    def collect(self) -> Ready:
        """Windows completed since the last call (one batch) and no-data hops, in time order."""
        n = len(self._w_animals)
        x = (
            np.stack(self._w_x).astype(np.float32, copy=False)
            if n
            else np.zeros((0, 3, self.T), dtype=np.float32)
        )
        batch = WindowBatch(
            animals=self._w_animals,
            t_start=np.asarray(self._w_t, dtype=np.float64),
            x=x,
            missing=np.asarray(self._w_missing, dtype=np.float32),
            ready_at=np.asarray(self._w_ready, dtype=np.float64),
        )
        ready = Ready(batch, self._no_data)
        self._w_animals, self._w_t, self._w_x, self._w_missing, self._w_ready = [], [], [], [], []
        self._no_data = []
        for nd in ready.no_data:
            self._streams[nd.animal].last_nd = None
        if self.telemetry is not None:
            self.telemetry.windows_no_data.inc(
                sum(round(nd.duration_s / self.hop_s) for nd in ready.no_data)
            )
        return ready
