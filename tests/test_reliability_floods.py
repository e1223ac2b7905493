"""Floods: 10,000 invented collar ids, and one collar sending at 100 times its rate.

Both through a real Mosquitto. The id flood runs against ``boutline run`` (its own process,
watched through /metrics, its RSS and the MQTT alerts topic); the rate flood runs the same
``Gateway.run`` loop in this process so that every other animal's decisions can be compared
with a run that never saw the flooding collar.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import pytest
from daemonproc import Daemon
from mqttpeers import Subscriber, client, publish_all
from polling import wait_for

from gateway.bench import pid_rss_mb, tree_mb
from gateway.config import Settings
from gateway.daemon import Gateway, TickResult
from gateway.outbox import GatewayAlert
from gateway.store import Store
from gateway.types import NO_DATA, Frame
from gateway.wire import Reason, collar_topic, encode_binary
from simulator.herd import Herd

pytestmark = pytest.mark.integration

CAP = 1000
INVENTED = 10_000
# Growth of the gateway's RSS allowed for tracking CAP collars (a ring of 7.8 kB each,
# docs/gateway.md) and refusing the rest; measured in docs/reliability.md.
FLOOD_RSS_MB = 30.0


def _herd_frames(n: int, start: float, seconds: int, seed: int) -> dict[str, list[Frame]]:
    """Each collar's 1 s frames, without simulated radio loss or silences."""
    herd = Herd(n, seed=seed, start=start, frame_s=1.0, days=seconds / 86400.0, loss=0.0,
                silence_per_day=0.0)  # fmt: skip
    out: dict[str, list[Frame]] = {}
    for f in herd:
        out.setdefault(f.collar_id, []).append(f)
    return out


def _rss_mb(pid: int) -> float:
    """RSS of the gateway and its MQTT ingest process ([process] ingest), MB."""
    total = tree_mb(pid, pid_rss_mb)
    assert total, "no VmRSS"
    return total


def test_collar_cap_is_raised_once_as_a_gateway_alert(tmp_path: Path) -> None:
    """Without a broker: the alert reaches the store's listeners once, however long the flood."""
    settings = Settings.model_validate(
        {"limits": {"max_collars": 3}, "store": {"data_dir": str(tmp_path)}}
    )
    seen: list = []
    with Store.open(tmp_path) as store:
        store.add_listener(lambda _c, events: seen.extend(events))
        gw = Gateway(settings, store=store)
        t = time.time() - 60
        acc = Herd(1, seed=1, frame_s=1.0).take(1)[0].acc
        for wave in range(3):
            msgs = [
                (collar_topic("barn", "home-farm", f"X{wave}-{i}"),
                 encode_binary(Frame(f"X{wave}-{i}", 0, t, 10.0, acc)), t + 1.0)
                for i in range(50)
            ]  # fmt: skip
            gw.handle(msgs)
            gw.tick(now=t + 2.0 * (wave + 1))
        gw.close(flush=False)
    alerts = [e for e in seen if isinstance(e, GatewayAlert)]
    assert [(a.cause, a.dropped) for a in alerts] == [("collar_cap", 47)]
    assert "limits.max_collars=3" in alerts[0].message
    assert gw.telemetry.value("boutline_collar_overflow_total") == 147.0
    assert gw.registry.tracked == 3 and len(gw.windows.animals) == 3


@pytest.mark.slow
def test_ten_thousand_invented_collars(tmp_path: Path, mosquitto) -> None:
    site = "flood-ids"
    now = float(int(time.time()))
    herd = _herd_frames(4, now - 300, 130, seed=21)
    gw = Daemon(
        tmp_path,
        {
            "site": {"id": site},  # unknown collars adopted (the default): the hard case
            "mqtt": {"host": mosquitto.host, "port": mosquitto.port, "client_id": "gw-flood"},
            "model": {"watch": False},
            "limits": {"max_collars": CAP, "max_frame_rate_hz": 1000.0},
        },
    ).start()
    alerts = Subscriber(mosquitto.host, mosquitto.port, f"barn/{site}/alerts")
    pub = client(mosquitto.host, mosquitto.port)
    try:

        def herd_part(a: int, b: int) -> list[tuple[str, bytes]]:
            return [
                (collar_topic("barn", site, c), encode_binary(frames[j]))
                for j in range(a, b)
                for c, frames in herd.items()
            ]

        acc = herd["C0001"][0].acc
        publish_all(pub, herd_part(0, 40))
        gw.wait_quiet("boutline_frames_in_total", 160)
        before = _rss_mb(gw.pid)
        for wave in range(2):  # two waves: the second must not raise the alert again
            ids = [f"X{wave * INVENTED // 2 + i:05d}" for i in range(INVENTED // 2)]
            invented = [
                (collar_topic("barn", site, c), encode_binary(Frame(c, 0, now - 5, 10.0, acc)))
                for c in ids
            ]
            # the herd keeps talking through the flood (a collar silent for long is no data)
            own = herd_part(40 + 40 * wave, 80 + 40 * wave)
            step = len(invented) // len(own)
            mixed = []
            for i, item in enumerate(own):
                mixed += [item, *invented[i * step : (i + 1) * step]]
            mixed += invented[len(own) * step :]
            publish_all(pub, mixed)
        gw.wait_quiet("boutline_messages_in_total", 480 + INVENTED)
        after, peak = _rss_mb(gw.pid), gw.peak_rss_mb()
        tracked = gw.value("boutline_collars_tracked")
        overflow = gw.value("boutline_collar_overflow_total")
        rejects = gw.by_label("boutline_rejects_total", "reason")
        frames_in = gw.value("boutline_frames_in_total")
        got = alerts.collect(quiet_s=3.0)
        assert gw.alive()
    finally:
        pub.disconnect()
        pub.loop_stop()
        alerts.close()
        rc = gw.stop()
    print(f"\nid flood: RSS {before:.1f} -> {after:.1f} MB (peak {peak:.1f}), overflow {overflow}")
    assert rc == 0
    assert tracked == CAP
    assert overflow == INVENTED - (CAP - 4) and rejects == {Reason.COLLAR_CAP: overflow}
    assert frames_in == 480 + CAP - 4  # the herd's own frames all went in, before and after
    payloads = [json.loads(p) for _, p, _ in got]
    assert [(p["scope"], p["cause"]) for p in payloads] == [("gateway", "collar_cap")]
    assert f"limits.max_collars={CAP}" in payloads[0]["message"]
    assert gw.log.count("collar cap reached") == 1
    assert after - before < FLOOD_RSS_MB


@pytest.mark.slow
def test_a_collar_at_a_hundred_times_its_rate_is_limited_and_starves_no_one(
    tmp_path: Path, mosquitto
) -> None:
    seconds, rate = 20, 2.0  # normal collars send 1 frame/s; the limit is 2 frames/s
    t0 = float(int(time.time()) + 2)
    normal = _herd_frames(4, t0, seconds + 10, seed=31)
    # the flooding collar replays its own past 100 times too fast: valid frames, in order
    flood = [
        Frame("FLOOD", f.seq, f.t, f.hz, f.acc, f.battery_v)
        for f in _herd_frames(1, t0 - 150 * seconds, 110 * seconds, seed=32)["C0001"]
    ]
    cfg = {
        "site": {"id": "flood-rate"},
        "mqtt": {"host": mosquitto.host, "port": mosquitto.port, "client_id": "gw-rate"},
        "model": {"watch": False},
        "smoothing": {"lag_s": 0.0},  # decisions at once: what the others get is seen live
        "limits": {"max_frame_rate_hz": rate},
        "store": {"data_dir": str(tmp_path / "live")},
    }
    settings = Settings.model_validate(cfg)
    results: list[TickResult] = []
    gw = Gateway(settings, speed=1.0, listeners=[results.append])
    stop = threading.Event()
    runner = threading.Thread(target=gw.run, args=(stop,), kwargs={"tick_s": 0.5})
    runner.start()
    pub = client(mosquitto.host, mosquitto.port)
    sent_flood = 0
    try:
        assert wait_for(lambda: gw.telemetry.value("boutline_broker_connected") == 1.0, 15)
        time.sleep(0.5)
        topic = {c: collar_topic("barn", "flood-rate", c) for c in [*normal, "FLOOD"]}
        began = time.monotonic()
        for k in range(100 * seconds):  # one step per 10 ms of wall time
            lag = t0 + k / 100.0 - time.time()
            if lag > 0:
                time.sleep(lag)
            if k % 100 == 99:  # each normal frame leaves its collar when its last sample is in
                for c, frames in normal.items():
                    pub.publish(topic[c], encode_binary(frames[k // 100]), qos=1)
            if k < len(flood):
                pub.publish(topic["FLOOD"], encode_binary(flood[k]), qos=1)
                sent_flood += 1
        flood_s = time.monotonic() - began  # longer than `seconds` when the box is busy
        assert wait_for(
            lambda: gw.telemetry.value("boutline_messages_in_total") == sent_flood + 4 * seconds,
            20,
        )
    finally:
        pub.disconnect()
        pub.loop_stop()
        stop.set()
        runner.join(20)
    gw.close(flush=True)  # its results reach the listener (results) already
    rejects = gw.telemetry.rejects_by_reason()
    limited = rejects.pop(Reason.RATE_LIMITED, 0.0)
    accepted_flood = sent_flood - limited
    # a token bucket: a minute of frames at the limit as burst, then the limit (docs/gateway.md)
    print(
        f"\nrate flood: {sent_flood} sent, {accepted_flood:.0f} taken, {limited:.0f} rate_limited"
    )
    assert rejects == {}
    assert 60 * rate <= accepted_flood <= 60 * rate + rate * (flood_s + 2)
    assert gw.telemetry.value("boutline_frames_in_total") == accepted_flood + 4 * seconds

    # the others: every hop decided, the same decisions as a gateway that never saw FLOOD
    ref = Gateway(
        Settings.model_validate({**cfg, "store": {"data_dir": str(tmp_path / "ref")}}),
        speed=None,
    )
    ref_results = []
    for j in range(seconds):
        ref.handle([(topic[c], encode_binary(fr[j]), fr[j].t_end) for c, fr in normal.items()])
        ref_results.append(ref.tick(now=t0 + j + 1))
    ref_results.append(ref.close(flush=True))

    def decided(rs: list[TickResult], animal: str) -> list[tuple[float, str]]:
        return [(d.t, d.behaviour) for r in rs for d in r.decisions if d.animal == animal]

    for c in normal:
        live, want = decided(results, c), decided(ref_results, c)
        assert len(want) >= (seconds - 10) // 5 and NO_DATA not in {b for _, b in want}
        assert live == want, c
