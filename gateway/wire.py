"""Collar wire format: JSON and compact binary frames (see docs/wire-format.md).

``decode`` turns any payload into either a :class:`~gateway.types.Frame` or a
:class:`Rejection` with a reason code; it never raises. ``encode_json`` and ``encode_binary``
are the inverse, used by the simulator and by collar firmware authors as a reference.

>>> import numpy as np
>>> from gateway.types import Frame
>>> f = Frame("C0001", seq=7, t=1767225600.0, hz=10.0,
...           acc=np.array([[0.01, -0.98, 0.12]] * 10, dtype=np.float32), battery_v=3.9)
>>> decode(encode_binary(f), "C0001").seq
7
>>> print(decode(b"{not json", "C0001").reason)
bad_json
"""

from __future__ import annotations

import json
import math
import re
import struct
from dataclasses import dataclass
from enum import StrEnum
from itertools import chain

import numpy as np

from .types import Frame

__all__ = [
    "BINARY_MAGIC",
    "COLLAR_ID_RE",
    "Limits",
    "Reason",
    "Rejection",
    "collar_topic",
    "decode",
    "encode_binary",
    "encode_json",
    "parse_topic",
]

COLLAR_ID_RE = re.compile(r"[A-Za-z0-9_.-]{1,64}")
BINARY_MAGIC = b"BL"
BINARY_VERSION = 1
# magic(2s) version(B) flags(B) seq(I) t_ms(Q) rate_centihz(H) scale_g_per_lsb(f) count(H)
_HEADER = struct.Struct("<2sBBIQHfH")
_BATTERY = struct.Struct("<H")  # battery in millivolts, present when flags bit 0 is set
FLAG_BATTERY = 0x01
SEQ_MODULO = 2**32


class Reason(StrEnum):
    """Why a payload was rejected. Counted per reason in metrics."""

    OVERSIZE = "oversize"
    EMPTY = "empty"
    BAD_UTF8 = "bad_utf8"
    BAD_JSON = "bad_json"
    TOO_DEEP = "too_deep"
    NOT_OBJECT = "not_object"
    MISSING_FIELD = "missing_field"
    BAD_TYPE = "bad_type"
    BAD_SEQ = "bad_seq"
    BAD_TIME = "bad_time"
    BAD_RATE = "bad_rate"
    BAD_SHAPE = "bad_shape"
    TOO_MANY_SAMPLES = "too_many_samples"
    NOT_FINITE = "not_finite"
    OUT_OF_RANGE = "out_of_range"
    BAD_BATTERY = "bad_battery"
    BAD_MAGIC = "bad_magic"
    BAD_VERSION = "bad_version"
    LENGTH_MISMATCH = "length_mismatch"
    BAD_SCALE = "bad_scale"
    BAD_TOPIC = "bad_topic"
    BAD_COLLAR_ID = "bad_collar_id"
    UNKNOWN_COLLAR = "unknown_collar"
    CLOCK = "clock"
    DUPLICATE = "duplicate"
    RATE_LIMITED = "rate_limited"
    COLLAR_CAP = "collar_cap"
    LATE = "late"  # older than the reorder tolerance: its slot in the window was already used


@dataclass(frozen=True, slots=True)
class Rejection:
    """A payload that is not a frame: ``reason`` for counting, ``detail`` for the log."""

    reason: Reason
    detail: str
    collar_id: str = ""

    def __bool__(self) -> bool:  # a rejection is falsy, so `if frame := decode(...)` reads well
        return False


@dataclass(frozen=True, slots=True)
class Limits:
    """Bounds a frame must respect (DESIGN.md, collar frames)."""

    max_payload_bytes: int = 65536
    max_samples: int = 1024
    max_abs_g: float = 16.0
    min_hz: float = 1.0
    max_hz: float = 200.0


DEFAULT_LIMITS = Limits()


def collar_topic(prefix: str, site: str, collar_id: str) -> str:
    """The topic a collar publishes on.

    >>> collar_topic("barn", "north-shed", "C0001")
    'barn/north-shed/collars/C0001/accel'
    """
    return f"{prefix}/{site}/collars/{collar_id}/accel"


def parse_topic(topic: str, prefix: str = "barn") -> tuple[str, str] | Rejection:
    """Split ``<prefix>/<site>/collars/<collar_id>/accel`` into (site, collar_id).

    >>> parse_topic("barn/north-shed/collars/C0001/accel")
    ('north-shed', 'C0001')
    >>> print(parse_topic("barn/x/collars/bad id/accel").reason)
    bad_collar_id
    """
    pre = prefix.strip("/")
    parts = topic.split("/")
    n_pre = len(pre.split("/")) if pre else 0
    if (
        len(parts) != n_pre + 4
        or "/".join(parts[:n_pre]) != pre
        or parts[n_pre + 1] != "collars"
        or parts[n_pre + 3] != "accel"
    ):
        return Rejection(
            Reason.BAD_TOPIC, f"topic {topic[:120]!r} is not {pre}/<site>/collars/<id>/accel"
        )
    site, collar_id = parts[n_pre], parts[n_pre + 2]
    if not COLLAR_ID_RE.fullmatch(collar_id):
        return Rejection(
            Reason.BAD_COLLAR_ID, f"collar id {collar_id[:80]!r} is not [A-Za-z0-9_.-]{{1,64}}"
        )
    if not COLLAR_ID_RE.fullmatch(site):
        return Rejection(Reason.BAD_TOPIC, f"site {site[:80]!r} is not [A-Za-z0-9_.-]{{1,64}}")
    return site, collar_id


def encode_json(frame: Frame) -> bytes:
    """JSON frame; samples written with 4 decimals (0.1 mg, finer than int16 at +/-8 g)."""
    rows = ",".join(f"[{x:.4f},{y:.4f},{z:.4f}]" for x, y, z in frame.acc.tolist())
    head = f'{{"seq":{frame.seq % SEQ_MODULO},"t":{frame.t:.3f},"hz":{frame.hz:g},'
    tail = "" if frame.battery_v is None else f',"battery_v":{frame.battery_v:.3f}'
    return f'{head}"acc":[{rows}]{tail}}}'.encode()


def encode_binary(frame: Frame, *, range_g: float = 8.0) -> bytes:
    """Binary frame: header then int16 triples at ``range_g / 32767`` g per LSB."""
    scale = float(np.float32(range_g / 32767.0))
    q = np.clip(np.rint(np.asarray(frame.acc, dtype=np.float64) / scale), -32768, 32767)
    n = int(q.shape[0])
    flags = 0 if frame.battery_v is None else FLAG_BATTERY
    head = _HEADER.pack(
        BINARY_MAGIC,
        BINARY_VERSION,
        flags,
        frame.seq % SEQ_MODULO,
        int(round(frame.t * 1000.0)),
        int(round(frame.hz * 100.0)),
        scale,
        n,
    )
    if frame.battery_v is not None:
        head += _BATTERY.pack(int(round(min(max(frame.battery_v, 0.0), 65.535) * 1000.0)))
    return head + q.astype("<i2").tobytes()


def decode(payload: bytes, collar_id: str, limits: Limits = DEFAULT_LIMITS) -> Frame | Rejection:
    """Decode a JSON or binary payload into a Frame, or a Rejection saying why not."""
    try:
        if not payload:
            return Rejection(Reason.EMPTY, "empty payload", collar_id)
        if len(payload) > limits.max_payload_bytes:
            return Rejection(
                Reason.OVERSIZE,
                f"{len(payload)} bytes > limit {limits.max_payload_bytes}",
                collar_id,
            )
        if payload[:2] == BINARY_MAGIC:
            return _decode_binary(bytes(payload), collar_id, limits)
        return _decode_json(bytes(payload), collar_id, limits)
    except Exception as exc:  # noqa: BLE001 - the decoder's contract is that nothing escapes
        return Rejection(Reason.BAD_TYPE, f"undecodable payload ({type(exc).__name__})", collar_id)


def _is_number(v: object) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


_LIST, _THREE = {list}, {3}
_NUMBER_TYPES = frozenset((int, float))  # not bool: type(True) is bool


def _decode_json(payload: bytes, collar_id: str, limits: Limits) -> Frame | Rejection:
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        return Rejection(Reason.BAD_UTF8, f"invalid UTF-8 at byte {exc.start}", collar_id)
    try:
        obj = json.loads(text)
    except RecursionError:  # hostile nesting; the C parser bounds its own recursion
        return Rejection(Reason.TOO_DEEP, "JSON nested too deeply", collar_id)
    except ValueError as exc:
        return Rejection(Reason.BAD_JSON, f"not JSON: {str(exc)[:80]}", collar_id)
    if not isinstance(obj, dict):
        return Rejection(
            Reason.NOT_OBJECT, f"JSON {type(obj).__name__}, expected an object", collar_id
        )
    for key in ("seq", "t", "hz", "acc"):
        if key not in obj:
            return Rejection(Reason.MISSING_FIELD, f"missing {key!r}", collar_id)
    seq, t, hz, acc = obj["seq"], obj["t"], obj["hz"], obj["acc"]
    if not isinstance(seq, int) or isinstance(seq, bool):
        return Rejection(Reason.BAD_TYPE, f"seq is {type(seq).__name__}, expected int", collar_id)
    if not 0 <= seq < SEQ_MODULO:
        return Rejection(Reason.BAD_SEQ, f"seq {seq} outside 0..2^32-1", collar_id)
    if not _is_number(t) or not _is_number(hz):
        return Rejection(Reason.BAD_TYPE, "t and hz must be numbers", collar_id)
    battery = obj.get("battery_v")
    if battery is not None and not _is_number(battery):
        return Rejection(Reason.BAD_TYPE, "battery_v must be a number", collar_id)
    if not isinstance(acc, list):
        return Rejection(Reason.BAD_TYPE, "acc must be a list of [x, y, z]", collar_id)
    if len(acc) > limits.max_samples:
        return Rejection(
            Reason.TOO_MANY_SAMPLES, f"{len(acc)} samples > limit {limits.max_samples}", collar_id
        )
    if not acc:
        return Rejection(Reason.BAD_SHAPE, "acc is empty", collar_id)
    # Same rule as _is_number on every value (JSON yields exact int/float/bool types), checked
    # by C-level iteration: a per-sample Python loop was a third of the decode time.
    if (
        set(map(type, acc)) != _LIST
        or set(map(len, acc)) != _THREE
        or not set(map(type, chain.from_iterable(acc))) <= _NUMBER_TYPES
    ):
        return Rejection(Reason.BAD_SHAPE, "every acc row must be [x, y, z] numbers", collar_id)
    try:
        arr = np.array(acc, dtype=np.float64)
    except OverflowError:
        return Rejection(Reason.OUT_OF_RANGE, "acc value too large", collar_id)
    return _validated(collar_id, seq, float(t), float(hz), arr, battery, limits)


def _decode_binary(payload: bytes, collar_id: str, limits: Limits) -> Frame | Rejection:
    if len(payload) < _HEADER.size:
        return Rejection(
            Reason.LENGTH_MISMATCH, f"{len(payload)} bytes < header {_HEADER.size}", collar_id
        )
    magic, version, flags, seq, t_ms, rate_c, scale, count = _HEADER.unpack_from(payload)
    if magic != BINARY_MAGIC:
        return Rejection(Reason.BAD_MAGIC, "bad magic", collar_id)
    if version != BINARY_VERSION:
        return Rejection(
            Reason.BAD_VERSION, f"version {version}, expected {BINARY_VERSION}", collar_id
        )
    offset = _HEADER.size
    battery = None
    if flags & FLAG_BATTERY:
        if len(payload) < offset + _BATTERY.size:
            return Rejection(Reason.LENGTH_MISMATCH, "battery field cut off", collar_id)
        battery = _BATTERY.unpack_from(payload, offset)[0] / 1000.0
        offset += _BATTERY.size
    if count > limits.max_samples:
        return Rejection(
            Reason.TOO_MANY_SAMPLES, f"{count} samples > limit {limits.max_samples}", collar_id
        )
    if len(payload) != offset + 6 * count:
        return Rejection(
            Reason.LENGTH_MISMATCH,
            f"count {count} needs {offset + 6 * count} bytes, got {len(payload)}",
            collar_id,
        )
    if count == 0:
        return Rejection(Reason.BAD_SHAPE, "no samples", collar_id)
    if not math.isfinite(scale) or not 0.0 < scale <= 0.01:
        return Rejection(Reason.BAD_SCALE, f"scale {scale!r} g/LSB outside (0, 0.01]", collar_id)
    raw = np.frombuffer(payload, dtype="<i2", count=3 * count, offset=offset)
    # float32 product is the float64 one rounded once (int16 x float32 is exact in float64);
    # the range check uses the exact float64 peak, from the integers
    arr = raw.reshape(count, 3).astype(np.float32) * np.float32(scale)
    peak = max(int(raw.max()), -int(raw.min())) * scale
    return _validated(collar_id, seq, t_ms / 1000.0, rate_c / 100.0, arr, battery, limits, peak)


def _validated(
    collar_id: str,
    seq: int,
    t: float,
    hz: float,
    arr: np.ndarray,
    battery: float | None,
    limits: Limits,
    peak: float | None = None,
) -> Frame | Rejection:
    if not math.isfinite(t) or t <= 0.0:
        return Rejection(Reason.BAD_TIME, f"t {t!r} is not a positive unix time", collar_id)
    if not math.isfinite(hz) or not limits.min_hz <= hz <= limits.max_hz:
        return Rejection(
            Reason.BAD_RATE, f"hz {hz!r} outside {limits.min_hz:g}..{limits.max_hz:g}", collar_id
        )
    if peak is None:
        peak = float(np.abs(arr).max())  # NaN propagates through max: one pass checks both
    if not math.isfinite(peak):
        return Rejection(Reason.NOT_FINITE, "acc holds NaN or inf", collar_id)
    if peak > limits.max_abs_g:
        return Rejection(
            Reason.OUT_OF_RANGE, f"|a| {peak:.3g} g > {limits.max_abs_g:g} g", collar_id
        )
    if battery is not None:
        battery = float(battery)
        if not math.isfinite(battery) or not 0.0 <= battery <= 60.0:
            return Rejection(
                Reason.BAD_BATTERY, f"battery_v {battery!r} outside 0..60 V", collar_id
            )
    return Frame(collar_id, int(seq), t, hz, arr.astype(np.float32, copy=False), battery)
