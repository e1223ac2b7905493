"""Collar wire format: decoder totality, round trips, size, and hostile payloads."""

from __future__ import annotations

import json
import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gateway.types import Frame
from gateway.wire import (
    Limits,
    Reason,
    Rejection,
    decode,
    encode_binary,
    encode_json,
    parse_topic,
)

RATES = st.sampled_from([10.0, 12.5, 25.0, 1.0, 50.0, 200.0])


@st.composite
def frames(draw: st.DrawFn, max_n: int = 200) -> Frame:
    n = draw(st.integers(1, max_n))
    seed = draw(st.integers(0, 2**32 - 1))
    acc = np.random.default_rng(seed).uniform(-8.0, 8.0, (n, 3)).astype(np.float32)
    battery = draw(st.none() | st.floats(2.5, 4.3))
    return Frame(
        collar_id="C0001",
        seq=draw(st.integers(0, 2**32 - 1)),
        t=draw(st.floats(1.0e9, 4.0e9)),
        hz=draw(RATES),
        acc=acc,
        battery_v=battery,
    )


def _assert_frame(result: Frame | Rejection) -> Frame:
    assert isinstance(result, Frame), result
    return result


@settings(max_examples=400)
@given(st.binary(max_size=4096))
def test_arbitrary_bytes_give_a_frame_or_a_rejection(payload: bytes) -> None:
    result = decode(payload, "C0001")
    assert isinstance(result, Frame | Rejection)
    if isinstance(result, Rejection):
        assert isinstance(result.reason, Reason) and result.detail


@settings(max_examples=300)
@given(st.binary(min_size=0, max_size=300))
def test_arbitrary_bytes_behind_the_binary_magic_never_raise(tail: bytes) -> None:
    result = decode(b"BL\x01" + tail, "C0001")
    assert isinstance(result, Frame | Rejection)


json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers()
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=10),
    lambda kids: (
        st.lists(kids, max_size=5) | st.dictionaries(st.text(max_size=5), kids, max_size=5)
    ),
    max_leaves=30,
)


@settings(max_examples=300)
@given(st.dictionaries(st.sampled_from(["seq", "t", "hz", "acc", "battery_v", "x"]), json_values))
def test_arbitrary_json_objects_never_raise(obj: dict) -> None:
    result = decode(json.dumps(obj).encode(), "C0001")
    assert isinstance(result, Frame | Rejection)


@settings(max_examples=150)
@given(frames())
def test_json_round_trip(frame: Frame) -> None:
    got = _assert_frame(decode(encode_json(frame), "C0001"))
    assert got.seq == frame.seq and got.hz == frame.hz
    assert got.t == pytest.approx(frame.t, abs=5.001e-4)  # written in ms
    assert np.abs(got.acc - frame.acc).max() <= 5.1e-5  # 4 decimals
    if frame.battery_v is None:
        assert got.battery_v is None
    else:
        assert got.battery_v == pytest.approx(frame.battery_v, abs=5e-4)


@settings(max_examples=150)
@given(frames())
def test_binary_round_trip(frame: Frame) -> None:
    got = _assert_frame(decode(encode_binary(frame), "C0001"))
    assert got.seq == frame.seq and got.hz == frame.hz
    assert got.t == pytest.approx(frame.t, abs=5.001e-4)  # ms resolution
    lsb = 8.0 / 32767
    assert np.abs(got.acc - frame.acc).max() <= lsb / 2 + 1e-6


@settings(max_examples=100)
@given(frames(max_n=10).filter(lambda f: f.n == 10))
def test_binary_is_at_most_a_third_of_json_for_ten_samples(frame: Frame) -> None:
    # DESIGN.md: binary at most a third of the JSON size for the same samples.
    assert 3 * len(encode_binary(frame)) <= len(encode_json(frame))


@settings(max_examples=200)
@given(frames(max_n=50), st.data())
def test_truncated_and_mutated_binary_frames_never_raise(frame: Frame, data: st.DataObject) -> None:
    raw = bytearray(encode_binary(frame))
    cut = data.draw(st.integers(0, len(raw) - 1))
    assert isinstance(decode(bytes(raw[:cut]), "C0001"), Rejection)
    i = data.draw(st.integers(0, len(raw) - 1))
    raw[i] ^= data.draw(st.integers(1, 255))
    assert isinstance(decode(bytes(raw), "C0001"), Frame | Rejection)


def _frame(n: int = 10, **kw) -> Frame:
    acc = np.tile(np.array([[0.02, -0.97, 0.15]], dtype=np.float32), (n, 1))
    return Frame(
        "C0001", kw.pop("seq", 1), kw.pop("t", 1767225600.0), kw.pop("hz", 10.0), acc, **kw
    )


def test_binary_count_that_lies_about_the_length_is_rejected() -> None:
    raw = bytearray(encode_binary(_frame(10)))
    struct.pack_into("<H", raw, 22, 11)  # count field claims 11 samples, payload holds 10
    assert decode(bytes(raw), "C0001").reason == Reason.LENGTH_MISMATCH
    struct.pack_into("<H", raw, 22, 65535)
    assert decode(bytes(raw), "C0001").reason == Reason.TOO_MANY_SAMPLES


@pytest.mark.parametrize(
    ("payload", "reason"),
    [
        (b"", Reason.EMPTY),
        (b"\xff\xfe{", Reason.BAD_UTF8),
        (b"{not json", Reason.BAD_JSON),
        (b"[1, 2]", Reason.NOT_OBJECT),
        (b"[" * 200_00 + b"]" * 200_00, Reason.TOO_DEEP),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10}', Reason.MISSING_FIELD),
        (b'{"seq": "1", "t": 1.7e9, "hz": 10, "acc": [[0,0,1]]}', Reason.BAD_TYPE),
        (b'{"seq": true, "t": 1.7e9, "hz": 10, "acc": [[0,0,1]]}', Reason.BAD_TYPE),
        (b'{"seq": -1, "t": 1.7e9, "hz": 10, "acc": [[0,0,1]]}', Reason.BAD_SEQ),
        (b'{"seq": 4294967296, "t": 1.7e9, "hz": 10, "acc": [[0,0,1]]}', Reason.BAD_SEQ),
        (b'{"seq": 1, "t": NaN, "hz": 10, "acc": [[0,0,1]]}', Reason.BAD_TIME),
        (b'{"seq": 1, "t": -5, "hz": 10, "acc": [[0,0,1]]}', Reason.BAD_TIME),
        (b'{"seq": 1, "t": 1.7e9, "hz": 0, "acc": [[0,0,1]]}', Reason.BAD_RATE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 500, "acc": [[0,0,1]]}', Reason.BAD_RATE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": []}', Reason.BAD_SHAPE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0]]}', Reason.BAD_SHAPE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0,"1"]]}', Reason.BAD_SHAPE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0,Infinity]]}', Reason.NOT_FINITE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0,NaN]]}', Reason.NOT_FINITE),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0,16.5]]}', Reason.OUT_OF_RANGE),
        (
            b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0,1]], "battery_v": -1}',
            Reason.BAD_BATTERY,
        ),
        (b'{"seq": 1, "t": 1.7e9, "hz": 10, "acc": [[0,0,1]], "battery_v": "x"}', Reason.BAD_TYPE),
        (b"BL\x02" + bytes(30), Reason.BAD_VERSION),
        (b"BL\x01\x00", Reason.LENGTH_MISMATCH),
    ],
)
def test_malformed_payloads_are_rejected_with_their_reason(payload: bytes, reason: Reason) -> None:
    result = decode(payload, "C0001")
    assert isinstance(result, Rejection)
    assert result.reason == reason, result


def test_oversize_and_too_many_samples() -> None:
    big = _frame(1025)
    assert decode(encode_json(big), "C0001", Limits(max_payload_bytes=10**6)).reason == (
        Reason.TOO_MANY_SAMPLES
    )
    assert decode(b"{" + b" " * 70000 + b"}", "C0001").reason == Reason.OVERSIZE
    assert decode(encode_binary(_frame(20)), "C0001", Limits(max_samples=10)).reason == (
        Reason.TOO_MANY_SAMPLES
    )


def test_unknown_json_keys_are_ignored_and_seq_wraps() -> None:
    payload = json.dumps(
        {"seq": 2**32 - 1, "t": 1767225600.5, "hz": 12.5, "acc": [[0, 0, 1]], "fw": "2.1"}
    ).encode()
    frame = _assert_frame(decode(payload, "C0007"))
    assert frame.seq == 2**32 - 1 and frame.hz == 12.5 and frame.collar_id == "C0007"
    assert encode_binary(_frame(seq=2**32 + 5))[4:8] == struct.pack("<I", 5)


@pytest.mark.parametrize(
    "topic",
    [
        "barn/site/collars/C1/gyro",
        "barn/site/collars/C1",
        "other/site/collars/C1/accel",
        "barn/site/collars/" + "x" * 65 + "/accel",
        "barn/site/collars/C 1/accel",
        "barn/s+/collars/C1/accel",
        "",
    ],
)
def test_bad_topics_are_rejected(topic: str) -> None:
    assert isinstance(parse_topic(topic, "barn"), Rejection)


def test_topic_with_multi_level_prefix() -> None:
    assert parse_topic("farm/a/barn/north/collars/C-1.x_2/accel", "farm/a/barn") == (
        "north",
        "C-1.x_2",
    )
