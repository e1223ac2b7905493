"""The pipeline behind the message handler: payloads in, decisions and events out.

Unit tests push ``(topic, payload, receive time)`` straight into ``Gateway.handle``; the
integration test runs the same handler behind a real Mosquitto. The model is the tiny level
model of tests/tiny_model.py, so the right answer for every window is known.
"""

from __future__ import annotations

import struct
import threading
import time
from pathlib import Path

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from tiny_model import level_acc, level_model

from gateway.config import Settings
from gateway.daemon import Gateway, TickResult
from gateway.types import NO_DATA, Frame
from gateway.wire import Reason, collar_topic, encode_binary, encode_json

T0 = 1_767_225_600.0
SITE = "test-site"


def settings(tmp_path: Path, **sections: dict) -> Settings:
    model = tmp_path / "level.onnx"
    if not model.exists():
        model.write_bytes(level_model())
    data: dict = {
        "site": {"id": SITE},
        "model": {"path": str(model)},
        "store": {"data_dir": str(tmp_path / "data")},
    }
    for k, v in sections.items():
        data[k] = {**data.get(k, {}), **v}
    return Settings.model_validate(data)


def frame(collar: str, i: int, behaviour: str, t0: float = T0) -> Frame:
    return Frame(collar, i, t0 + i, 10.0, level_acc(behaviour, 10), battery_v=3.9)


def msg(f: Frame, *, binary: bool = False, rx: float | None = None) -> tuple[str, bytes, float]:
    payload = encode_binary(f) if binary else encode_json(f)
    return (collar_topic("barn", SITE, f.collar_id), payload, f.t_end + 0.2 if rx is None else rx)


def script(collar: str, plan: list[tuple[str, int]], t0: float = T0) -> list[Frame]:
    """Frames of one collar following ``plan``: (behaviour, seconds) pieces."""
    out, i = [], 0
    for behaviour, seconds in plan:
        for _ in range(seconds):
            out.append(frame(collar, i, behaviour, t0))
            i += 1
    return out


def decisions_of(results: list[TickResult], animal: str) -> list[tuple[float, str]]:
    return [(d.t - T0, d.behaviour) for r in results for d in r.decisions if d.animal == animal]


def test_frames_become_decisions_and_events(tmp_path: Path) -> None:
    gw = Gateway(settings(tmp_path))
    plans = {
        "C1": [("resting", 300), ("walking", 300)],
        "C2": [("ruminating", 600)],
        "C3": [("grazing", 200), ("feeding", 400)],
    }
    frames = {c: script(c, p) for c, p in plans.items()}
    results = []
    for i in range(600):  # one frame per collar per second, as collars send
        gw.handle(msg(frames[c][i], binary=(c == "C2")) for c in plans)
        if i % 10 == 9:
            results.append(gw.tick(now=T0 + i))
    results.append(gw.close(now=T0 + 600))
    c1 = decisions_of(results, "C1")
    assert len(c1) >= 100
    # each decision must be the behaviour at the centre of its hop, from the plan
    for t, b in c1:
        assert b == ("resting" if t < 300 else "walking"), (t, b)
    assert {b for _, b in decisions_of(results, "C2")} == {"ruminating"}
    kinds = [(e.kind, e.animal, e.behaviour) for r in results for e in r.events]
    assert ("state_changed", "C1", "walking") in kinds
    assert ("bout_closed", "C1", "resting") in kinds
    assert gw.telemetry.value("boutline_frames_in_total") == 1800.0
    assert gw.telemetry.value("boutline_inference_seconds_count") <= len(results)


def hostile_messages(good: Frame) -> dict[Reason, list[tuple[str, bytes, float]]]:
    """One or more messages for every rejection reason a collar or topic can cause."""
    topic = collar_topic("barn", SITE, "EVIL")
    rx = good.t_end + 0.2
    ok = encode_binary(Frame("EVIL", 1, good.t, 10.0, good.acc))

    def j(text: str) -> tuple[str, bytes, float]:
        return (topic, text.encode(), rx)

    acc = "[[0.0,0.0,1.0]]"
    version = bytearray(ok)
    version[2] = 9
    scale = bytearray(ok)
    scale[18:22] = struct.pack("<f", 1.0)
    return {
        Reason.OVERSIZE: [(topic, b"{" + b" " * 70000 + b"}", rx)],
        Reason.EMPTY: [(topic, b"", rx)],
        Reason.BAD_UTF8: [(topic, b'{"seq": "\xff\xfe"}', rx)],
        Reason.BAD_JSON: [j("{not json"), j('{"seq": 1,')],
        Reason.TOO_DEEP: [j("[" * 30000 + "]" * 30000)],
        Reason.NOT_OBJECT: [j("[1, 2, 3]"), j('"text"'), j("17")],
        Reason.MISSING_FIELD: [j('{"seq": 1, "t": 1767225600, "hz": 10}')],
        Reason.BAD_TYPE: [j(f'{{"seq": "1", "t": 1767225600, "hz": 10, "acc": {acc}}}')],
        Reason.BAD_SEQ: [j(f'{{"seq": 4294967296, "t": 1767225600, "hz": 10, "acc": {acc}}}')],
        Reason.BAD_TIME: [j(f'{{"seq": 1, "t": -5, "hz": 10, "acc": {acc}}}')],
        Reason.BAD_RATE: [j(f'{{"seq": 1, "t": 1767225600, "hz": 0.5, "acc": {acc}}}')],
        Reason.BAD_SHAPE: [j('{"seq": 1, "t": 1767225600, "hz": 10, "acc": [[0, 1]]}')],
        Reason.TOO_MANY_SAMPLES: [
            j(
                '{"seq": 1, "t": 1767225600, "hz": 10, "acc": ['
                + ",".join(["[0,0,1]"] * 1025)
                + "]}"
            )
        ],
        Reason.NOT_FINITE: [j('{"seq": 1, "t": 1767225600, "hz": 10, "acc": [[NaN, 0, 1]]}')],
        Reason.OUT_OF_RANGE: [j('{"seq": 1, "t": 1767225600, "hz": 10, "acc": [[20, 0, 1]]}')],
        Reason.BAD_BATTERY: [
            j(f'{{"seq": 1, "t": 1767225600, "hz": 10, "acc": {acc}, "battery_v": 100}}')
        ],
        Reason.BAD_VERSION: [(topic, bytes(version), rx)],
        Reason.LENGTH_MISMATCH: [(topic, ok[:-1], rx), (topic, ok[:10], rx)],
        Reason.BAD_SCALE: [(topic, bytes(scale), rx)],
        Reason.BAD_TOPIC: [
            ("barn/test-site/collars/EVIL/gyro", ok, rx),
            ("elsewhere/test-site/collars/EVIL/accel", ok, rx),
            ("barn/other-site/collars/EVIL/accel", ok, rx),
        ],
        Reason.BAD_COLLAR_ID: [("barn/test-site/collars/bad id/accel", ok, rx)],
        Reason.UNKNOWN_COLLAR: [(collar_topic("barn", SITE, "STRANGER"), ok, rx)],
    }


def test_every_reject_reason_is_counted_and_other_animals_are_undisturbed(
    tmp_path: Path,
) -> None:
    assignments = tmp_path / "assignments.csv"
    assignments.write_text(
        "collar,animal,from,to\n"
        "C1,cow-1,2025-01-01T00:00:00Z,\n"
        "EVIL,cow-666,2025-01-01T00:00:00Z,\n"
        "FLOOD,cow-7,2025-01-01T00:00:00Z,\n"
        "SKEW,cow-8,2025-01-01T00:00:00Z,\n"
        "LATE,cow-9,2025-01-01T00:00:00Z,\n"
        "CAP,cow-10,2025-01-01T00:00:00Z,\n"
    )
    cfg = settings(
        tmp_path,
        site={"assignments": str(assignments), "unknown_collars": "refuse"},
        windows={"clock_rule": "reject", "reorder_s": 2.0},
        limits={"max_collars": 5, "max_frame_rate_hz": 1.0},
    )
    clean_frames = script("C1", [("ruminating", 200), ("walking", 200)])
    ref = Gateway(cfg)
    ref_results = []
    for i, f in enumerate(clean_frames):
        ref.handle([msg(f)])
        if i % 10 == 9:
            ref_results.append(ref.tick(now=f.t_end))
    ref_results.append(ref.close(now=T0 + 400))

    gw = Gateway(cfg)
    results = []
    expected: dict[str, int] = {}
    for i, f in enumerate(clean_frames):
        gw.handle([msg(f)])
        if i == 50:
            for reason, msgs in hostile_messages(f).items():
                gw.handle(msgs)
                expected[reason] = len(msgs)
            # duplicates: the same frame of another collar twice
            dup = frame("EVIL", 1, "walking", f.t)
            gw.handle([msg(dup), msg(dup)])
            expected[Reason.DUPLICATE] = 1
            # a flood beyond the rate limit (1/s, a burst of 60) from one collar
            flood = [msg(frame("FLOOD", k, "walking", f.t - 200), rx=f.t_end) for k in range(100)]
            gw.handle(flood)
            expected[Reason.RATE_LIMITED] = 40
            # a collar whose clock is a day off, with clock_rule = reject
            gw.handle([msg(frame("SKEW", 0, "walking", f.t - 3 * 86400), rx=f.t_end)])
            expected[Reason.CLOCK] = 1
            # a frame older than the reorder tolerance
            gw.handle([msg(frame("LATE", k, "walking", f.t - 30)) for k in range(10)])
            gw.handle([msg(frame("LATE", 2, "walking", f.t - 31), rx=f.t_end)])
            expected[Reason.LATE] = 1
            # a sixth collar when five are tracked (C1, EVIL, FLOOD, SKEW, LATE)
            gw.handle([msg(frame("CAP", 0, "walking", f.t))])
            expected[Reason.COLLAR_CAP] = 1
        if i % 10 == 9:
            results.append(gw.tick(now=f.t_end))
    results.append(gw.close(now=T0 + 400))

    got = gw.telemetry.rejects_by_reason()
    assert got == {str(k): float(v) for k, v in expected.items()}
    wire_reasons = set(Reason) - {Reason.BAD_MAGIC}  # unreachable: magic is what routes to binary
    assert set(expected) == wire_reasons
    assert gw.telemetry.value("boutline_collar_overflow_total") == 1.0
    assert decisions_of(results, "cow-1") == decisions_of(ref_results, "cow-1")
    assert len(decisions_of(results, "cow-1")) > 60


def test_gap_in_a_collars_frames_is_no_data_in_its_decisions(tmp_path: Path) -> None:
    gw = Gateway(settings(tmp_path, windows={"reorder_s": 0.0}))
    frames = script("C1", [("resting", 400)])
    del frames[100:220]  # two minutes of radio silence
    results = []
    for k in range(0, len(frames), 10):
        gw.handle(msg(f) for f in frames[k : k + 10])
        results.append(gw.tick(now=frames[min(k + 9, len(frames) - 1)].t_end))
    results.append(gw.close(now=frames[-1].t_end))
    d = [(x.t - T0, x.duration_s, x.behaviour) for r in results for x in r.decisions]
    nd = [(t, t + dur) for t, dur, b in d if b == NO_DATA]
    # windows starting 95..215 s lack over 20 % (frames 100..220 s are gone); a decision
    # covers the centre hop of its window, so no data spans 97.5..222.5 s
    assert nd[0][0] == 97.5 and nd[-1][1] == 222.5
    assert sum(b - a for a, b in nd) == 125.0
    assert {b for t, _, b in d if t < 97.5 or t >= 222.5} == {"resting"}


def test_hot_reload_keeps_buffers(tmp_path: Path) -> None:
    cfg = settings(tmp_path)
    gw = Gateway(cfg)
    frames = script("C1", [("grazing", 200)])
    results = []
    for k, f in enumerate(frames):
        gw.handle([msg(f)])
        if k == 103:  # in the middle of a window: its first half is already buffered
            Path(cfg.model.path).write_bytes(level_model(reverse=True))
            gw.inference.request_reload()
        if k % 10 == 9:
            results.append(gw.tick(now=f.t_end))
    results.append(gw.close(now=frames[-1].t_end))
    d = decisions_of(results, "C1")
    times = [t for t, _ in d]
    assert times == sorted(times) and np.all(np.diff(times) == 5.0)  # no hop lost
    assert d[0][1] == "grazing" and d[-1][1] == "walking"  # the reversed model reads 0 g as walking
    assert NO_DATA not in {b for _, b in d}


@pytest.mark.integration
def test_end_to_end_through_a_real_broker(tmp_path: Path, mosquitto) -> None:
    cfg = settings(
        tmp_path,
        mqtt={"host": mosquitto.host, "port": mosquitto.port, "client_id": "e2e-daemon"},
        limits={"max_frame_rate_hz": 1000.0},
    )
    results: list[TickResult] = []
    gw = Gateway(cfg, speed=None, listeners=[results.append])
    stop = threading.Event()
    runner = threading.Thread(target=gw.run, args=(stop,), kwargs={"tick_s": 0.1})
    runner.start()
    pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="e2e-pub", protocol=mqtt.MQTTv5)
    pub.connect(mosquitto.host, mosquitto.port)
    pub.loop_start()
    try:
        deadline = time.monotonic() + 10
        while gw.telemetry.value("boutline_broker_connected") != 1.0:
            assert time.monotonic() < deadline, "gateway did not connect"
            time.sleep(0.05)
        time.sleep(0.2)  # subscription in place
        t0 = float(int(time.time() / 10) * 10 - 400)  # recorded on the collar, sent now
        frames = script("C1", [("ruminating", 150), ("resting", 150)], t0)
        infos = [pub.publish(*msg(f)[:2], qos=1) for f in frames]
        for info in infos:
            info.wait_for_publish(10)
        deadline = time.monotonic() + 20
        while gw.telemetry.value("boutline_frames_in_total") < 300:
            assert time.monotonic() < deadline, gw.status()
            time.sleep(0.05)
    finally:
        pub.disconnect()
        pub.loop_stop()
        stop.set()
        runner.join(10)
    gw.close()
    assert not runner.is_alive()
    d = [(x.t - t0, x.behaviour) for r in results for x in r.decisions]
    assert len(d) >= 50
    assert all(b == ("ruminating" if t < 150 else "resting") for t, b in d)


def test_store_gets_bouts_and_a_restart_resumes_the_open_bout(tmp_path: Path) -> None:
    from gateway.store import Store

    cfg = settings(tmp_path)
    frames = script("C1", [("resting", 600), ("walking", 300)])

    def feed(gw: Gateway, part: list[Frame]) -> None:
        for k in range(0, len(part), 10):
            gw.handle(msg(f) for f in part[k : k + 10])
            gw.tick(now=part[min(k + 9, len(part) - 1)].t_end)

    with Store.open(tmp_path / "data") as store:
        first = Gateway(cfg, store=store)
        feed(first, frames[:300])
        first.close(now=frames[299].t_end, flush=False)  # daemon shutdown mid-bout
        assert store.bouts("C1") == []  # the resting bout is still open
    with Store.open(tmp_path / "data") as store:
        second = Gateway(cfg, store=store)
        assert second.tracker.current()["C1"].behaviour == "resting"
        feed(second, frames[300:])
        second.close(now=frames[-1].t_end, final=True)
        bouts = [(b.behaviour, b.start - T0, b.end - T0) for b in store.bouts("C1")]
    # one resting bout across the restart, not two; then the walking bout
    assert [b for b, _, _ in bouts] == ["resting", "walking"]
    assert bouts[0][1] == pytest.approx(2.5, abs=5.0) and bouts[0][2] == pytest.approx(600, abs=5.0)
    assert bouts[1][2] == pytest.approx(900, abs=10.0)


def test_analytics_follow_the_gateway_budgets_and_collar_health(tmp_path: Path) -> None:
    from gateway.analytics import Analytics
    from gateway.store import Store

    cfg = settings(tmp_path)
    # an hour of ruminating then an hour of walking, ending a day: bouts close, minutes count
    frames = script("C1", [("ruminating", 3600), ("walking", 3600)])
    with Store.open(tmp_path / "data" / "boutline.db") as store:
        analytics = Analytics(cfg, speed=None)
        gw = Gateway(cfg, store=store, analytics=analytics, speed=None)
        for k in range(0, len(frames), 60):
            gw.handle(msg(f) for f in frames[k : k + 60])
            gw.tick(now=frames[k + 59].t_end)
        budgets = {b.animal: b for b in analytics.budgets("2026-01-01")}
        gw.close(now=frames[-1].t_end, final=True)
    b = budgets["C1"]
    # bouts close after their criterion; the ruminating hour is accounted for by now
    assert b.minutes.get("ruminating", 0.0) == pytest.approx(60.0, abs=1.0)
    assert b.bouts.get("ruminating") == 1


def test_a_collar_moved_to_another_cow_keeps_both_histories_apart(tmp_path: Path) -> None:
    assignments = tmp_path / "assignments.csv"
    # 2026-01-01T00:05:00Z is T0 + 300 s: the collar goes from cow-a to cow-b then
    assignments.write_text(
        "collar,animal,from,to\n"
        "C1,cow-a,2026-01-01T00:00:00Z,2026-01-01T00:05:00Z\n"
        "C1,cow-b,2026-01-01T00:05:00Z,\n"
    )
    gw = Gateway(settings(tmp_path, site={"assignments": str(assignments)}))
    frames = script("C1", [("resting", 300), ("walking", 300)])
    results = []
    for k in range(0, len(frames), 10):
        gw.handle(msg(f) for f in frames[k : k + 10])
        results.append(gw.tick(now=frames[k + 9].t_end))
    results.append(gw.close(now=frames[-1].t_end))
    a = [(t, b) for t, b in decisions_of(results, "cow-a") if b != NO_DATA]
    b = [(t, b) for t, b in decisions_of(results, "cow-b") if b != NO_DATA]
    assert a and b and decisions_of(results, "C1") == []
    assert max(t for t, _ in a) < 300 <= min(t for t, _ in b)
    assert {x for _, x in a} == {"resting"} and {x for _, x in b} == {"walking"}
