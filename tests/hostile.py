"""Malformed collar payloads, each with the rejection reason the gateway must give for it.

Every generator takes a seeded ``random.Random`` and a valid frame to start from, and
returns a :class:`Bad` whose ``reason`` is fixed by construction: one defect per payload,
chosen so that no other check of the wire format (docs/wire-format.md, the order of checks in
gateway/wire.py) can fire first. Where the outcome depends on random bytes (random bytes and
text), the reason is worked out with Python's own UTF-8 codec and JSON parser, the same
references a collar firmware author would test against.

Run as a script, it is the hostile publisher of tests/test_reliability_hostile.py: a
simulated herd's frames interleaved with garbage, published at QoS 0 flat out, and a JSON
manifest on stdout (valid frames, garbage by reason)::

    python tests/hostile.py --host 127.0.0.1 --port 1883 --site s --garbage 100000
"""

from __future__ import annotations

import argparse
import json
import math
import random
import struct
import sys
import time
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

if __package__ in (None, ""):  # run as a script from anywhere
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from gateway.types import Frame
from gateway.wire import BINARY_MAGIC, collar_topic, encode_binary, encode_json

__all__ = [
    "GENERATORS",
    "Bad",
    "Template",
    "garbage",
    "herd_messages",
    "interleave",
    "template_frames",
]

# Offsets in the binary header (docs/wire-format.md): magic 0-1, version 2, flags 3, seq 4-7,
# t_ms 8-15, rate 16-17, scale 18-21, count 22-23.
_VERSION, _RATE, _SCALE, _COUNT = 2, 16, 18, 22
_MAX_PAYLOAD = 65536  # limits.max_payload_bytes default
_MAX_SAMPLES = 1024  # limits.max_samples default
# Python's JSON parser gives up (RecursionError) at 1000 levels below the caller's own depth;
# below ~800 the document parses (then it is not an object).
_TOO_DEEP, _LEGAL_DEPTH = 1000, 800


@dataclass(frozen=True, slots=True)
class Bad:
    """One hostile payload: where it goes, what it is, and why it must be rejected."""

    kind: str
    payload: bytes
    reason: str
    collar: str = ""  # empty: the valid frame's own collar (the most hostile place)


@dataclass(frozen=True, slots=True)
class Template:
    """A valid frame and its two encodings, the raw material of the mutations."""

    frame: Frame
    json: bytes
    binary: bytes

    @classmethod
    def of(cls, frame: Frame) -> Template:
        return cls(frame, encode_json(frame), encode_binary(frame, range_g=8.0))


def _json_obj(tpl: Template) -> dict:
    return json.loads(tpl.json)


def _dump(obj: object) -> bytes:
    return json.dumps(obj, separators=(",", ":")).encode()


def _stdlib_reason(data: bytes) -> str | None:
    """What a strict UTF-8 + JSON reader makes of ``data``; None if it is a JSON object."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return "bad_utf8"
    try:
        obj = json.loads(text)
    except RecursionError:
        return "too_deep"
    except ValueError:
        return "bad_json"
    return None if isinstance(obj, dict) else "not_object"


def random_bytes(rng: random.Random, tpl: Template) -> Bad:
    while True:
        data = rng.randbytes(rng.randint(1, 400))
        if data[:2] == BINARY_MAGIC:
            continue  # that would be a binary frame: see the binary generators
        reason = _stdlib_reason(data)
        if reason is not None:
            return Bad("random_bytes", data, reason)


_TEXT = '{}[]",:0123456789.eE+-truefalsnul \\/abcxyz\t\n'


def random_text(rng: random.Random, tpl: Template) -> Bad:
    while True:
        data = "".join(rng.choices(_TEXT, k=rng.randint(1, 200))).encode()
        reason = _stdlib_reason(data)
        if reason is not None and data[:2] != BINARY_MAGIC:
            return Bad("random_text", data, reason)


def truncated_json(rng: random.Random, tpl: Template) -> Bad:
    # Any proper prefix of a JSON object's text leaves the object unclosed.
    data = tpl.json
    return Bad("truncated_json", data[: rng.randint(1, len(data) - 1)], "bad_json")


def truncated_binary(rng: random.Random, tpl: Template) -> Bad:
    data = tpl.binary
    return Bad("truncated_binary", data[: rng.randint(2, len(data) - 1)], "length_mismatch")


def lying_length(rng: random.Random, tpl: Template) -> Bad:
    data = bytearray(tpl.binary)
    true = struct.unpack_from("<H", data, _COUNT)[0]
    how = rng.randrange(3)
    if how == 0:  # a count that does not match the samples that follow
        lie = rng.choice([c for c in (0, 1, true - 1, true + 1, rng.randint(0, 1024)) if c != true])
        struct.pack_into("<H", data, _COUNT, lie)
        return Bad("lying_length", bytes(data), "length_mismatch")
    if how == 1:  # a count beyond the sample limit: refused before the length is looked at
        struct.pack_into("<H", data, _COUNT, rng.randint(_MAX_SAMPLES + 1, 65535))
        return Bad("lying_length", bytes(data), "too_many_samples")
    return Bad("lying_length", bytes(data) + rng.randbytes(rng.randint(1, 64)), "length_mismatch")


def bad_binary_header(rng: random.Random, tpl: Template) -> Bad:
    data = bytearray(tpl.binary)
    how = rng.randrange(3)
    if how == 0:
        data[_VERSION] = rng.choice([0, 2, 3, 255])
        return Bad("binary_header", bytes(data), "bad_version")
    if how == 1:
        scale = rng.choice([math.nan, math.inf, 0.0, -0.001, 0.5, 1e30])
        struct.pack_into("<f", data, _SCALE, scale)
        return Bad("binary_header", bytes(data), "bad_scale")
    struct.pack_into("<H", data, _RATE, rng.choice([0, 50, 20001, 65535]))  # 0, 0.5, 200.01 Hz
    return Bad("binary_header", bytes(data), "bad_rate")


def invalid_utf8(rng: random.Random, tpl: Template) -> Bad:
    data = bytearray(tpl.json)
    data[rng.randrange(len(data))] = rng.choice([0x80, 0xBF, 0xC0, 0xC1, 0xF5, 0xFE, 0xFF])
    return Bad("invalid_utf8", bytes(data), "bad_utf8")


# One field replaced by a wrong value: (field, value, reason). Checked in wire.py's order:
# fields present, seq type and range, t and hz types, battery type, acc type, size, shape.
_WRONG: list[tuple[str, object, str]] = [
    ("seq", "7", "bad_type"),
    ("seq", 7.5, "bad_type"),
    ("seq", True, "bad_type"),
    ("seq", None, "bad_type"),
    ("seq", -1, "bad_seq"),
    ("seq", 2**32, "bad_seq"),
    ("seq", 10**30, "bad_seq"),
    ("t", "2026-03-01", "bad_type"),
    ("t", None, "bad_type"),
    ("t", [1.0], "bad_type"),
    ("t", False, "bad_type"),
    ("t", -5.0, "bad_time"),
    ("t", 0, "bad_time"),
    ("hz", "10", "bad_type"),
    ("hz", {"v": 10}, "bad_type"),
    ("hz", 0.5, "bad_rate"),
    ("hz", 500, "bad_rate"),
    ("battery_v", "3.9", "bad_type"),
    ("battery_v", 100.0, "bad_battery"),
    ("battery_v", -1, "bad_battery"),
    ("acc", {"x": 1}, "bad_type"),
    ("acc", "[[0,0,1]]", "bad_type"),
    ("acc", 5, "bad_type"),
    ("acc", [], "bad_shape"),
    ("acc", [[0, 1]], "bad_shape"),
    ("acc", [[0, 1, 2, 3]], "bad_shape"),
    ("acc", [[0, "a", 1]], "bad_shape"),
    ("acc", [[True, 0, 1]], "bad_shape"),
    ("acc", [[None, 0, 1]], "bad_shape"),
    ("acc", [[[0], 0, 1]], "bad_shape"),
    ("acc", [0, 0, 1], "bad_shape"),
    ("acc", [[20.0, 0, 1]], "out_of_range"),
    ("acc", [[0, -16.5, 1]], "out_of_range"),
]


def wrong_types(rng: random.Random, tpl: Template) -> Bad:
    obj = _json_obj(tpl)
    if rng.random() < 0.15:
        del obj[rng.choice(["seq", "t", "hz", "acc"])]
        return Bad("wrong_types", _dump(obj), "missing_field")
    key, value, reason = rng.choice(_WRONG)
    obj[key] = value
    return Bad("wrong_types", _dump(obj), reason)


def nan_inf(rng: random.Random, tpl: Template) -> Bad:
    # Python's JSON reads NaN, Infinity and -Infinity, and 1e999 as inf: all must be refused.
    token = rng.choice(["NaN", "Infinity", "-Infinity", "1e999", "-1e999"])
    obj = _json_obj(tpl)
    where = rng.randrange(4)
    if where == 0:
        i, j = rng.randrange(len(obj["acc"])), rng.randrange(3)
        obj["acc"][i][j] = "@"
        reason = "not_finite"
    else:
        key, reason = [("t", "bad_time"), ("hz", "bad_rate"), ("battery_v", "bad_battery")][
            where - 1
        ]
        obj[key] = "@"
    text = _dump(obj).replace(b'"@"', token.encode())
    return Bad("nan_inf", text, reason)


def huge_array(rng: random.Random, tpl: Template) -> Bad:
    rows = rng.randint(_MAX_SAMPLES + 1, 2000)
    obj = _json_obj(tpl)
    if rng.random() < 0.8:
        obj["acc"] = "@"
        rows_text = b"[" + b",".join([b"[0.0,0.0,1.0]"] * rows) + b"]"
        return Bad("huge_array", _dump(obj).replace(b'"@"', rows_text), "too_many_samples")
    return Bad("huge_array", b"[" + b",".join([b"0"] * (3 * rows)) + b"]", "not_object")


def deep_nesting(rng: random.Random, tpl: Template) -> Bad:
    how = rng.randrange(4)
    depth = rng.randint(_TOO_DEEP, 8000)
    if how == 0:
        return Bad("deep_nesting", b"[" * depth + b"]" * depth, "too_deep")
    if how == 1:
        return Bad("deep_nesting", b'{"a":' * depth + b"1" + b"}" * depth, "too_deep")
    if how == 2:  # deep inside a frame that is otherwise right
        obj = _json_obj(tpl)
        obj["acc"] = "@"
        text = _dump(obj).replace(b'"@"', b"[" * depth + b"]" * depth)
        return Bad("deep_nesting", text, "too_deep")
    depth = rng.randint(2, _LEGAL_DEPTH)  # deep but legal: parses, and is not an object
    return Bad("deep_nesting", b"[" * depth + b"]" * depth, "not_object")


def oversize(rng: random.Random, tpl: Template) -> Bad:
    n = rng.randint(_MAX_PAYLOAD + 1, _MAX_PAYLOAD + 4096)
    head = tpl.json[:-1] + b',"pad":"'
    return Bad("oversize", head + b"x" * (n - len(head) - 2) + b'"}', "oversize")


def empty(rng: random.Random, tpl: Template) -> Bad:
    return Bad("empty", b"", "empty")


def not_object(rng: random.Random, tpl: Template) -> Bad:
    value = rng.choice([b"17", b"-0.5", b'"frame"', b"true", b"null", b"[1,2,3]", b"[]"])
    return Bad("not_object", value, "not_object")


def bad_collar_id(rng: random.Random, tpl: Template) -> Bad:
    # A topic level the collar id rule ([A-Za-z0-9_.-]{1,64}) refuses; the payload is valid.
    collar = rng.choice(["bad id", "C0001;drop", "c\u00e9", "x" * 65, "C*1", "C:1"])
    return Bad("bad_collar_id", tpl.binary, "bad_collar_id", collar=collar)


# name -> (generator, share of the garbage)
GENERATORS: dict[str, tuple[Callable[[random.Random, Template], Bad], float]] = {
    "random_bytes": (random_bytes, 0.14),
    "random_text": (random_text, 0.06),
    "truncated_json": (truncated_json, 0.10),
    "truncated_binary": (truncated_binary, 0.08),
    "lying_length": (lying_length, 0.09),
    "binary_header": (bad_binary_header, 0.06),
    "invalid_utf8": (invalid_utf8, 0.08),
    "wrong_types": (wrong_types, 0.18),
    "nan_inf": (nan_inf, 0.08),
    "huge_array": (huge_array, 0.02),
    "deep_nesting": (deep_nesting, 0.02),
    "oversize": (oversize, 0.003),
    "empty": (empty, 0.012),
    "not_object": (not_object, 0.03),
    "bad_collar_id": (bad_collar_id, 0.025),
}


def garbage(rng: random.Random, frames: list[Frame], n: int) -> Iterator[Bad]:
    """``n`` hostile payloads made from ``frames`` (each from a random one of them)."""
    templates = [Template.of(f) for f in frames]
    names = list(GENERATORS)
    weights = [GENERATORS[k][1] for k in names]
    for name in rng.choices(names, weights, k=n):
        yield GENERATORS[name][0](rng, rng.choice(templates))


def herd_messages(herd_kwargs: dict, prefix: str, site: str) -> list[tuple[str, bytes]]:
    """A simulated herd's frames as (topic, payload) in send order; odd collars send binary."""
    from simulator.herd import Herd

    out = []
    for f in Herd(**herd_kwargs):
        binary = int(f.collar_id[1:]) % 2 == 1
        payload = encode_binary(f, range_g=8.0) if binary else encode_json(f)
        out.append((collar_topic(prefix, site, f.collar_id), payload))
    return out


def interleave(
    valid: list[tuple[str, bytes]], bad: list[Bad], rng: random.Random, prefix: str, site: str
) -> list[tuple[str, bytes]]:
    """Valid messages in their order, garbage spread at random between them."""
    slots = sorted(rng.randrange(len(valid) + 1) for _ in bad)
    out: list[tuple[str, bytes]] = []
    k = 0
    for i, item in enumerate(valid):
        while k < len(bad) and slots[k] == i:
            b = bad[k]
            collar = b.collar or item[0].split("/")[-2]
            out.append((collar_topic(prefix, site, collar), b.payload))
            k += 1
        out.append(item)
    for b in bad[k:]:
        out.append((collar_topic(prefix, site, b.collar or "C0001"), b.payload))
    return out


def _publish(host: str, port: int, messages: list[tuple[str, bytes]], batch: int = 2000) -> float:
    """QoS 0, flat out, in batches: each batch is written to the socket before the next."""
    import paho.mqtt.client as mqtt

    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="", protocol=mqtt.MQTTv311)
    client.max_queued_messages_set(0)
    client.connect(host, port, keepalive=60)
    client.loop_start()
    t0 = time.monotonic()
    try:
        for a in range(0, len(messages), batch):
            infos = [client.publish(t, p, qos=0) for t, p in messages[a : a + batch]]
            infos[-1].wait_for_publish(60)
            if not infos[-1].is_published():
                raise RuntimeError("the broker did not take a batch within 60 s")
    finally:
        client.disconnect()
        client.loop_stop()
    return time.monotonic() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--host", default="127.0.0.1")
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--prefix", default="barn")
    ap.add_argument("--site", required=True)
    ap.add_argument("--herd", type=int, default=4)
    ap.add_argument("--hours", type=float, default=4.0)
    ap.add_argument("--start", type=float, required=True)
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--garbage", type=int, default=0)
    a = ap.parse_args(argv)
    herd_kwargs = {"n_animals": a.herd, "seed": a.seed, "start": a.start,
                   "days": a.hours / 24.0, "frame_s": 10.0}  # fmt: skip
    valid = herd_messages(herd_kwargs, a.prefix, a.site)
    rng = random.Random(a.seed)
    templates = template_frames(herd_kwargs)
    bad = list(garbage(rng, templates, a.garbage))
    messages = interleave(valid, bad, rng, a.prefix, a.site)
    wall = _publish(a.host, a.port, messages)
    manifest = {
        "valid": len(valid),
        "garbage": len(bad),
        "messages": len(messages),
        "bytes": sum(len(p) for _, p in messages),
        "reasons": dict(Counter(b.reason for b in bad)),
        "kinds": dict(Counter(b.kind for b in bad)),
        "publish_s": wall,
    }
    json.dump(manifest, sys.stdout)
    return 0


def template_frames(herd_kwargs: dict, n: int = 64) -> list[Frame]:
    """A few of the herd's own frames, 1 s each (small payloads), for the mutations."""
    from simulator.herd import Herd

    return Herd(**{**herd_kwargs, "days": 0.01, "frame_s": 1.0}).take(n)


if __name__ == "__main__":
    sys.exit(main())
