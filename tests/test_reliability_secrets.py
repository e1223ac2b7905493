"""Secrets never shown: distinctive passwords and a token, set the ways an operator sets them
(environment, password file), searched for in everything the gateway shows or keeps.

``boutline run`` (its own process, debug logging) logs in to a Mosquitto that insists on a
password and writes to InfluxDB with another; then the same config is refused a login, and
``boutline config check`` prints it.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
from daemonproc import Daemon
from mqttpeers import client, publish_all
from polling import wait_for
from test_reliability_access import SERVERS, herd_frames, passwd_file

from gateway.servers import start_mosquitto
from gateway.wire import collar_topic, encode_binary

pytestmark = pytest.mark.integration

SECRETS = {
    "mqtt": "mqtt-SECRET-9c1f",
    "influx_password": "influx-SECRET-4b7e",
    "influx_token": "token-SECRET-e0a2",
}


def test_secrets_never_appear_in_logs_check_output_or_metrics(tmp_path: Path, influxdb1) -> None:
    work = tmp_path / "auth"
    work.mkdir()
    passwd_file(work / "passwd", {"gateway": SECRETS["mqtt"]})
    broker = start_mosquitto(work, SERVERS / "mosquitto-auth.conf")
    (tmp_path / "influx-password").write_text(SECRETS["influx_password"] + "\n")
    cfg = {
        "site": {"id": "secret-farm"},
        "mqtt": {"host": broker.host, "port": broker.port, "username": "gateway"},
        "model": {"watch": False},
        "influx": {
            "enabled": True,
            "api": "v1",
            "url": influxdb1.url,
            "database": "secrets",
            "username": "gw",
            "password_file": str(tmp_path / "influx-password"),
        },  # fmt: skip
        "limits": {"max_frame_rate_hz": 1000.0},
    }
    env = {
        "BOUTLINE_MQTT_PASSWORD": SECRETS["mqtt"],
        "BOUTLINE_INFLUX_TOKEN": SECRETS["influx_token"],
    }
    shown: dict[str, str] = {}
    gw = Daemon(tmp_path / "gw", cfg, env=env, log_level="debug")
    try:
        gw.start()
        pub = client(broker.host, broker.port, username="gateway", password=SECRETS["mqtt"])
        frames = herd_frames(1, 3, float(int(time.time())) - 300)
        publish_all(pub, [(collar_topic("barn", "secret-farm", f.collar_id), encode_binary(f))
                          for f in frames])  # fmt: skip
        pub.disconnect()
        pub.loop_stop()
        gw.wait_quiet("boutline_frames_in_total", len(frames))
        assert wait_for(lambda: gw.value("boutline_sink_failures_total", sink="influx",
                                         cause="not_found") > 0, 20)  # fmt: skip
        shown["metrics"] = gw.metrics_text()
        shown["healthz"] = gw.get("/healthz")[1].decode()
    finally:
        gw.stop()
    shown["log"] = gw.log
    # the same secrets refused: the error line names the problem, never the secret
    wrong = Daemon(tmp_path / "wrong", cfg, env={**env, "BOUTLINE_MQTT_PASSWORD": SECRETS["mqtt"]
                                                 + "-x"}, log_level="debug")  # fmt: skip
    wrong.start(ready=False)
    assert wrong.wait_exit(60) == 1
    shown["refused"] = wrong.log
    broker.stop()
    check = subprocess.run(
        [sys.executable, "-m", "gateway.cli", "config", "check", str(gw.config_path)],
        capture_output=True, text=True, timeout=60, env={**os.environ, **env},
    )  # fmt: skip
    assert check.returncode == 0, check.stderr
    shown["config check"] = check.stdout + check.stderr
    shown["store"] = (gw.data_dir / "boutline.db").read_bytes().decode("latin-1")
    for where, text in shown.items():
        for name, secret in SECRETS.items():
            assert secret not in text, f"{name} secret shown in {where}"
    assert 'password = "****"' in shown["config check"]
    assert "boutline_frames_in_total" in shown["metrics"]
