"""The compose stack without Docker: its services' own configs and commands, on real servers.

Mosquitto runs the shipped config with the password file made by the mqtt-users command's
script; InfluxDB 1.x has the users the compose file gives it (write-only gateway, read-only
Grafana); the gateway and the demo herd run with the environment and command that
``docker-compose config`` resolves for them. The herd-now dashboard's queries, run as
Grafana's read-only user, must then show the simulated herd.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path

import pytest
import yaml
from test_deploy_compose import compose, filled_env
from test_deploy_dashboards import dashboards, grafana_macros, queries
from test_deploy_mosquitto import broker_template, make_passwd

from gateway.servers import INFLUXDB1_DEFAULT, free_port, start_influxdb1, start_mosquitto

pytestmark = [pytest.mark.integration, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]


def _influx(url: str, q: str, auth: tuple[str, str] | None = None, db: str = "") -> dict:
    # InfluxDB 1.x reads the login from the URL's query string (u, p), the query from the body.
    login = "?" + urllib.parse.urlencode({"u": auth[0], "p": auth[1]}) if auth else ""
    body = urllib.parse.urlencode({"q": q, **({"db": db} if db else {})}).encode()
    with urllib.request.urlopen(f"{url}/query{login}", data=body, timeout=30) as r:
        (result,) = json.loads(r.read())["results"]
    assert "error" not in result, (q, result)
    return result


def _swap(argv: list[str], old: str, new: str) -> list[str]:
    return [new if a == old else a for a in argv]


def test_stack_shows_the_demo_herd_on_the_herd_dashboard(tmp_path):
    env_file = filled_env(tmp_path, MQTT_SIMULATOR_PASSWORD="demo-herd-pw", SITE_ID="test-farm")
    done = compose(env_file, "--profile", "demo", "config")
    assert done.returncode == 0, done.stderr
    services = yaml.safe_load(done.stdout)["services"]

    # Mosquitto: shipped config, password file from the mqtt-users service's environment.
    work = tmp_path / "mosquitto"
    work.mkdir()
    users_env = {k: str(v) for k, v in services["mqtt-users"]["environment"].items()}
    made = make_passwd(work / "passwd", None, users_env)
    assert made.returncode == 0, made.stderr
    broker = start_mosquitto(work, broker_template(work))

    # InfluxDB 1.x with authentication and the users the influxdb service is given.
    ienv = services["influxdb"]["environment"]
    conf = tmp_path / "influxdb.template"
    conf.write_text(INFLUXDB1_DEFAULT.replace("auth-enabled = false", "auth-enabled = true"))
    influx = start_influxdb1(tmp_path / "influxdb", conf)
    admin = (ienv["INFLUXDB_ADMIN_USER"], ienv["INFLUXDB_ADMIN_PASSWORD"])
    db = ienv["INFLUXDB_DB"]
    _influx(
        influx.url, f"CREATE USER \"{admin[0]}\" WITH PASSWORD '{admin[1]}' WITH ALL PRIVILEGES"
    )
    for stmt in (
        f'CREATE DATABASE "{db}"',
        f"CREATE USER \"{ienv['INFLUXDB_WRITE_USER']}\" WITH PASSWORD '{ienv['INFLUXDB_WRITE_USER_PASSWORD']}'",
        f'GRANT WRITE ON "{db}" TO "{ienv["INFLUXDB_WRITE_USER"]}"',
        f"CREATE USER \"{ienv['INFLUXDB_READ_USER']}\" WITH PASSWORD '{ienv['INFLUXDB_READ_USER_PASSWORD']}'",
        f'GRANT READ ON "{db}" TO "{ienv["INFLUXDB_READ_USER"]}"',
    ):
        _influx(influx.url, stmt, admin)

    base = {k: v for k, v in os.environ.items() if not k.startswith("BOUTLINE_")}
    gw_env = base | {k: str(v) for k, v in services["gateway"]["environment"].items()}
    gw_env |= {
        "BOUTLINE_MQTT_HOST": broker.host,
        "BOUTLINE_MQTT_PORT": str(broker.port),
        "BOUTLINE_INFLUX_URL": influx.url,
        "BOUTLINE_STORE_DATA_DIR": str(tmp_path / "data"),
        "BOUTLINE_HTTP_BIND": "127.0.0.1",
        "BOUTLINE_HTTP_PORT": str(free_port()),
        # Deliver at once rather than in the Pi config's 10 s batches.
        "BOUTLINE_INFLUX_FLUSH_INTERVAL_S": "1",
    }
    # The image's command: boutline run --config /etc/boutline/boutline.toml (deploy/boutline.toml).
    log = open(tmp_path / "gateway.log", "wb")  # noqa: SIM115 - closed in finally
    gateway = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "gateway.cli",
            "run",
            "--config",
            str(ROOT / "deploy" / "boutline.toml"),
        ],
        env=gw_env,
        stdout=subprocess.DEVNULL,
        stderr=log,
    )
    try:
        sim = services["simulator"]
        argv = _swap(list(sim["command"]), "mosquitto", broker.host) + ["--port", str(broker.port)]
        # Ten simulated minutes at 20x instead of a year in real time; the rest as composed.
        argv = argv[: argv.index("--speed")] + argv[argv.index("--speed") + 2 :]
        argv = argv[: argv.index("--duration")] + argv[argv.index("--duration") + 2 :]
        argv += ["--speed", "20", "--duration", "600", "--herd", "4"]
        sim_env = base | {k: str(v) for k, v in sim["environment"].items()}
        published = subprocess.run(
            [sys.executable, "-m", "gateway.cli", *argv],
            env=sim_env,
            capture_output=True,
            text=True,
            timeout=300,
        )
        assert published.returncode == 0, published.stderr
        assert gateway.poll() is None, (tmp_path / "gateway.log").read_text()[-3000:]

        reader = (ienv["INFLUXDB_READ_USER"], ienv["INFLUXDB_READ_USER_PASSWORD"])
        board = dashboards()["herd-now.json"]
        (current,) = [q for where, q in queries(board) if where == "panel 'Current behaviour'"]
        deadline = time.monotonic() + 90
        animals: set[str] = set()
        while time.monotonic() < deadline and len(animals) < 4:
            result = _influx(influx.url, grafana_macros(current), reader, db)
            animals = {s["tags"]["animal"] for s in result.get("series", [])}
            time.sleep(1)
        assert len(animals) == 4, (tmp_path / "gateway.log").read_text()[-3000:]
        for where, q in queries(board):
            if where.startswith("panel") and "daily_budget" not in q:
                assert _influx(influx.url, grafana_macros(q), reader, db).get("series"), where
        # docs/operations.md troubleshoots from /healthz and /metrics: every name it uses is real.
        http = f"http://127.0.0.1:{gw_env['BOUTLINE_HTTP_PORT']}"
        with urllib.request.urlopen(f"{http}/healthz", timeout=10) as r:
            assert r.status == 200
            health = json.loads(r.read())
        assert health["ready"] and health["broker_connected"] and health["model_loaded"]
        for sink in health["sinks"].values():
            assert {"state", "backlog", "oldest_s", "last_error"} <= set(sink)
        with urllib.request.urlopen(f"{http}/metrics", timeout=10) as r:
            exposed = set(re.findall(r"^# TYPE (\w+)", r.read().decode(), flags=re.M))
        ops = (ROOT / "docs" / "operations.md").read_text()
        for name in set(re.findall(r"\b(boutline_[a-z_]+[a-z])\b", ops)):
            base = name.removesuffix("_total")
            assert name in exposed or base in exposed, f"docs/operations.md names {name}"
        # The read-only login cannot write, as in the compose file.
        with pytest.raises(urllib.error.HTTPError) as denied:
            urllib.request.urlopen(
                f"{influx.url}/write?db={db}&u={reader[0]}&p={reader[1]}", data=b"x v=1", timeout=10
            )
        assert denied.value.code == 403
        denied.value.close()
    finally:
        gateway.send_signal(signal.SIGTERM)
        try:
            gateway.wait(30)
        except subprocess.TimeoutExpired:
            gateway.kill()
            gateway.wait(10)
        log.close()
        influx.stop()
        broker.stop()
