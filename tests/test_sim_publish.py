"""Publishing a simulated herd to a real Mosquitto, decoded by the gateway's own decoder."""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

from gateway.cli import main
from gateway.errors import BrokerError, ConfigError
from gateway.servers import free_port
from gateway.types import Frame
from gateway.wire import decode, parse_topic
from simulator.herd import Herd
from simulator.publish import publish

START = 1772323200.0
SITE = "test-site"


class Subscriber:
    """A plain paho subscriber that decodes every frame it gets."""

    def __init__(self, host: str, port: int, topic: str) -> None:
        import paho.mqtt.client as mqtt

        self.frames: list[Frame] = []
        self.rejected: list[object] = []
        self._lock = threading.Lock()
        ready = threading.Event()
        self.c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"sub-{time.time_ns()}")

        def on_connect(client, userdata, flags, rc, props=None):
            client.subscribe(topic, qos=1)

        def on_subscribe(client, userdata, mid, rcs, props=None):
            ready.set()

        def on_message(client, userdata, msg):
            parsed = parse_topic(msg.topic, "barn")
            assert not hasattr(parsed, "reason"), parsed
            f = decode(msg.payload, parsed[1])
            with self._lock:
                (self.frames if isinstance(f, Frame) else self.rejected).append(f)

        self.c.on_connect, self.c.on_subscribe, self.c.on_message = (
            on_connect,
            on_subscribe,
            on_message,
        )
        self.c.connect(host, port)
        self.c.loop_start()
        assert ready.wait(10), "subscription not acknowledged"

    def wait_for(self, n: int, timeout_s: float = 20.0) -> None:
        deadline = time.monotonic() + timeout_s
        while len(self.frames) + len(self.rejected) < n and time.monotonic() < deadline:
            time.sleep(0.02)

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


def _herd_kwargs(**kw) -> dict:
    base = dict(n_animals=6, scenario="mixed", seed=5, start=START)
    base.update(kw)
    return base


def _expected(kw: dict, duration_s: float) -> dict[tuple[str, int], Frame]:
    herd = Herd(**kw, days=duration_s / 86400.0)
    return {(f.collar_id, f.seq): f for f in herd}


@pytest.mark.integration
@pytest.mark.parametrize(("fmt", "processes", "tol"), [("json", 1, 6e-5), ("binary", 2, 1e-6)])
def test_published_frames_arrive_and_decode_to_the_herd(mosquitto, fmt, processes, tol) -> None:
    kw = _herd_kwargs()
    sub = Subscriber(mosquitto.host, mosquitto.port, f"barn/{SITE}-{fmt}/collars/+/accel")
    try:
        res = publish(
            host=mosquitto.host, port=mosquitto.port, site=f"{SITE}-{fmt}", herd_kwargs=kw,
            speed=None, fmt=fmt, qos=1, processes=processes, duration_s=30.0,
        )  # fmt: skip
        sub.wait_for(res.frames)
    finally:
        sub.close()
    want = _expected(kw, 30.0)
    assert res.frames == len(want) > 6 * 25  # ~1 % frame loss, so nearly 30 per collar
    assert res.collars == 6 and res.stopped_by == "duration"
    assert not sub.rejected
    got = {(f.collar_id, f.seq): f for f in sub.frames}
    assert got.keys() == want.keys()
    for key, f in got.items():
        w = want[key]
        assert f.t == pytest.approx(w.t, abs=1e-3)
        assert f.hz == w.hz and f.battery_v == pytest.approx(w.battery_v, abs=1e-3)
        # JSON carries 4 decimals; binary carries the same int16 steps the sensor model made
        np.testing.assert_allclose(f.acc, w.acc, atol=tol)


@pytest.mark.integration
def test_speed_factor_paces_and_wall_limit_stops(mosquitto) -> None:
    kw = _herd_kwargs(n_animals=3)
    res = publish(
        host=mosquitto.host, port=mosquitto.port, site=SITE, herd_kwargs=kw,
        speed=20.0, duration_s=20.0,
    )  # fmt: skip
    # 20 simulated seconds at 20x take about a second, never much less
    assert res.wall_s >= 0.9 and res.stopped_by == "duration"
    res = publish(
        host=mosquitto.host, port=mosquitto.port, site=SITE, herd_kwargs=kw,
        speed=1.0, duration_s=3600.0, max_wall_s=1.0,
    )  # fmt: skip
    assert res.stopped_by == "wall" and res.wall_s < 5.0
    assert 0 < res.frames <= 3 * 4


@pytest.mark.integration
def test_cli_publish_prints_a_summary(mosquitto, capsys) -> None:
    with pytest.raises(SystemExit) as ei:
        main(
            ["simulate", "publish", "--host", mosquitto.host, "--port", str(mosquitto.port),
             "--herd", "4", "--flat-out", "--duration", "10", "--format", "binary", "--qos", "1",
             "--site", SITE, "--seed", "3"]
        )  # fmt: skip
    assert ei.value.code in (0, None)
    out = capsys.readouterr().out
    assert "sent " in out and "from 4 collars" in out and "stopped by duration" in out


def test_unreachable_broker_is_one_clear_error(capsys) -> None:
    port = free_port()  # nothing listens there
    with pytest.raises(BrokerError, match="cannot reach the MQTT broker"):
        publish(port=port, herd_kwargs=_herd_kwargs(), duration_s=5.0)
    with pytest.raises(SystemExit) as ei:
        main(["simulate", "publish", "--port", str(port), "--duration", "5"])
    assert ei.value.code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("Error: cannot reach the MQTT broker")


@pytest.mark.parametrize(
    ("kw", "message"),
    [
        ({"fmt": "xml"}, "unknown frame format"),
        ({"qos": 2}, "QoS 2"),
        ({"speed": 0.0}, "speed"),
        ({"processes": 0}, "processes"),
        ({"duration_s": 0.0}, "duration"),
        ({"site": "a/b"}, "site"),
        ({"prefix": "barn/#"}, "prefix"),
        ({"port": 70000}, "port"),
    ],
)
def test_bad_publish_settings_are_refused_before_connecting(kw, message) -> None:
    args = dict(port=free_port(), herd_kwargs=_herd_kwargs(), duration_s=5.0)
    args.update(kw)
    with pytest.raises(ConfigError, match=message):
        publish(**args)
