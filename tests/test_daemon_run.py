"""``boutline run`` as a process: real Mosquitto, HTTP metrics, SIGHUP reload, SIGTERM stop,
refused credentials."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from test_daemon import script
from test_ingest import auth_broker  # noqa: F401 - the password-protected broker fixture
from tiny_model import level_model

from gateway.servers import free_port
from gateway.store import Store
from gateway.wire import collar_topic, encode_json

SITE = "run-farm"


def _config(tmp_path: Path, broker, **mqtt_extra: str) -> tuple[Path, int]:
    model = tmp_path / "m.onnx"
    model.write_bytes(level_model())
    port = free_port()
    extra = "".join(f'{k} = "{v}"\n' for k, v in mqtt_extra.items())
    cfg = tmp_path / "boutline.toml"
    cfg.write_text(
        f"""
[site]
id = "{SITE}"
[mqtt]
host = "{broker.host}"
port = {broker.port}
client_id = "run-test-{port}"
reconnect_min_s = 0.2
reconnect_max_s = 1.0
{extra}
[model]
path = "{model}"
[store]
data_dir = "{tmp_path / "data"}"
[http]
port = {port}
[limits]
max_frame_rate_hz = 1000.0
"""
    )
    return cfg, port


def _metric(port: int, name: str) -> float:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=2) as r:
        for line in r.read().decode().splitlines():
            if line.startswith(name + " "):
                return float(line.split()[1])
    return 0.0


def _start(cfg: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "gateway.cli", "run", "--config", str(cfg)],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        env=dict(os.environ),
    )


@pytest.mark.integration
def test_run_classifies_reloads_on_sighup_and_stops_on_sigterm(tmp_path: Path, mosquitto) -> None:
    cfg, http_port = _config(tmp_path, mosquitto)
    proc = _start(cfg)
    try:
        deadline = time.monotonic() + 30
        while True:
            assert proc.poll() is None, proc.stdout.read().decode()  # type: ignore[union-attr]
            assert time.monotonic() < deadline, "gateway did not come up"
            try:
                if _metric(http_port, "boutline_broker_connected") == 1.0:
                    break
            except OSError:
                pass
            time.sleep(0.2)
        time.sleep(0.3)
        t0 = float(int(time.time() / 10) * 10 - 300)
        pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="run-pub", protocol=mqtt.MQTTv5)
        pub.connect(mosquitto.host, mosquitto.port)
        pub.loop_start()
        try:
            frames = script("C1", [("resting", 200)], t0)
            infos = [
                pub.publish(collar_topic("barn", SITE, "C1"), encode_json(f), qos=1) for f in frames
            ]
            for info in infos:
                info.wait_for_publish(10)
        finally:
            pub.disconnect()
            pub.loop_stop()
        deadline = time.monotonic() + 20
        while _metric(http_port, "boutline_windows_classified_total") < 30:
            assert time.monotonic() < deadline, "no windows classified"
            time.sleep(0.2)
        # windows are classified while the last frames may still be on their way
        while _metric(http_port, "boutline_frames_in_total") < 200.0:
            assert time.monotonic() < deadline, "not every frame arrived"
            time.sleep(0.2)
        assert _metric(http_port, "boutline_frames_in_total") == 200.0
        (tmp_path / "m.onnx").write_bytes(level_model(reverse=True))
        proc.send_signal(signal.SIGHUP)
        deadline = time.monotonic() + 10
        while _metric(http_port, 'boutline_model_reloads_total{result="ok"}') < 1.0:
            assert time.monotonic() < deadline, "SIGHUP did not reload the model"
            time.sleep(0.2)
        proc.send_signal(signal.SIGTERM)
        out, _ = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        if proc.stdout is not None:  # a failed test must not leak the pipe into the next one
            proc.stdout.close()
    text = out.decode()
    assert proc.returncode == 0, text
    assert "model reloaded" in text and "Traceback" not in text
    with Store.open(tmp_path / "data" / "boutline.db", readonly=True) as store:
        states = {s.animal: s.behaviour for s in store.current_states()}
    assert states == {"C1": "resting"}


@pytest.mark.integration
def test_refused_credentials_end_run_with_one_error_line(
    tmp_path: Path, request: pytest.FixtureRequest
) -> None:
    broker = request.getfixturevalue("auth_broker")
    cfg, _ = _config(tmp_path, broker, username="gateway", password="wrong")
    r = subprocess.run(
        [sys.executable, "-m", "gateway.cli", "run", "--config", str(cfg)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 1
    last = r.stderr.strip().splitlines()[-1]
    assert last.startswith("Error: broker") and "refused the connection" in last
    assert "Traceback" not in r.stderr
