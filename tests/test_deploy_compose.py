"""compose.yaml, .env.example and deploy/Dockerfile, checked with Debian's docker-compose.

``docker-compose config`` validates and resolves the file exactly as compose would before
starting anything; no Docker engine is needed and nothing is built or run here.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from gateway.config import load_settings

ROOT = Path(__file__).resolve().parents[1]
COMPOSE = ROOT / "compose.yaml"
ENV_EXAMPLE = ROOT / ".env.example"
DOCKERFILE = ROOT / "deploy" / "Dockerfile"
REQUIRED = [
    "MQTT_GATEWAY_PASSWORD",
    "INFLUX_ADMIN_PASSWORD",
    "INFLUX_WRITE_PASSWORD",
    "INFLUX_READ_PASSWORD",
    "GRAFANA_ADMIN_PASSWORD",
]
SERVICES = {"mqtt-users", "mosquitto", "influxdb", "grafana", "gateway", "simulator"}


def env_example() -> dict[str, str]:
    out = {}
    for line in ENV_EXAMPLE.read_text().splitlines():
        if line and not line.startswith("#"):
            key, eq, value = line.partition("=")
            assert eq, f".env.example: {line!r} is not KEY=value"
            out[key] = value
    return out


def filled_env(tmp_path: Path, **changes: str | None) -> Path:
    values = env_example() | {k: f"pw-{k.lower()}" for k in REQUIRED} | changes
    path = tmp_path / "test.env"
    path.write_text("".join(f"{k}={v}\n" for k, v in values.items() if v is not None))
    return path


def compose(env_file: Path, *args: str) -> subprocess.CompletedProcess:
    exe = shutil.which("docker-compose")
    assert exe, "docker-compose is missing; install it with: apt-get install -y docker-compose"
    # Only the env file speaks: no variable of this machine may fill a gap in it.
    env = {k: v for k, v in os.environ.items() if k in ("PATH", "HOME", "LANG")}
    return subprocess.run(
        [exe, "-f", str(COMPOSE), "--env-file", str(env_file), *args],
        capture_output=True,
        text=True,
        timeout=120,
        env=env,
        cwd=ROOT,
    )


@pytest.fixture(scope="module")
def resolved(tmp_path_factory) -> dict:
    done = compose(filled_env(tmp_path_factory.mktemp("compose")), "config")
    assert done.returncode == 0, done.stderr
    return yaml.safe_load(done.stdout)


def volume(service: dict, target: str) -> str:
    """The source (named volume or host path) mounted at ``target`` in a resolved service."""
    for v in service.get("volumes", []):
        parts = v.split(":") if isinstance(v, str) else [v["source"], v["target"]]
        if parts[1] == target:
            return parts[0]
    raise AssertionError(f"nothing is mounted at {target}")


def ports(service: dict) -> list[tuple[str, int]]:
    """(host address, container port) of each published port, short or long syntax."""
    out = []
    for p in service.get("ports", []):
        if isinstance(p, dict):
            out.append((p.get("host_ip", "0.0.0.0"), int(p["target"])))
        else:
            parts = p.split("/")[0].split(":")
            out.append((parts[0] if len(parts) == 3 else "0.0.0.0", int(parts[-1])))
    return out


def test_compose_file_is_valid_with_the_documented_env(resolved):
    assert set(resolved["services"]) == SERVICES
    profiles = {name: s.get("profiles") for name, s in resolved["services"].items()}
    # The demo herd starts only with --profile demo; everything else by default.
    assert profiles.pop("simulator") == ["demo"]
    assert set(profiles.values()) == {None}
    assert set(resolved["volumes"]) >= {
        "mosquitto-data",
        "influxdb-data",
        "grafana-data",
        "boutline-data",
    }


@pytest.mark.parametrize("missing", REQUIRED)
def test_a_missing_secret_stops_compose_with_a_clear_message(tmp_path, missing):
    done = compose(filled_env(tmp_path, **{missing: ""}), "config")
    assert done.returncode != 0
    assert f"set {missing} in .env (see .env.example)" in done.stderr, done.stderr


def test_env_example_documents_exactly_the_variables_compose_uses():
    used = set(re.findall(r"\$\{([A-Z_][A-Z0-9_]*)", COMPOSE.read_text()))
    documented = env_example()
    assert used == set(documented), used ^ set(documented)
    # Every variable, or the group of variables it opens with, has a comment above it.
    lines = ENV_EXAMPLE.read_text().splitlines()
    for i, line in enumerate(lines):
        if "=" in line and not line.startswith("#"):
            above = next(x for x in reversed(lines[:i]) if not re.match(r"^[A-Z_]+=", x))
            assert above.startswith("#"), f".env.example: {line!r} has no comment above"
    for key in REQUIRED:
        assert documented[key] == "", f"{key} must be empty in .env.example: people fill it in"


def test_env_and_collar_secrets_are_not_committed():
    for path in (".env", "secrets/collars.txt"):
        done = subprocess.run(["git", "check-ignore", "-q", path], cwd=ROOT, timeout=30)
        assert done.returncode == 0, f"{path} is not in .gitignore"
    assert (
        not (ROOT / ".env").exists()
        or subprocess.run(
            ["git", "ls-files", "--error-unmatch", ".env"],
            cwd=ROOT,
            capture_output=True,
            timeout=30,
        ).returncode
        != 0
    )


def test_gateway_service_env_gives_valid_settings(resolved):
    gw = resolved["services"]["gateway"]
    env = {k: str(v) for k, v in gw["environment"].items()}
    assert all(k.startswith("BOUTLINE_") for k in env)
    # The image runs deploy/boutline.toml; the compose environment overrides it.
    s = load_settings(ROOT / "deploy" / "boutline.toml", env=env)
    assert (
        s.mqtt.host == "mosquitto"
        and s.mqtt.password.get_secret_value() == "pw-mqtt_gateway_password"
    )
    assert f"user {s.mqtt.username}\n" in (ROOT / "deploy" / "mosquitto" / "acl").read_text()
    assert s.influx.enabled and s.influx.api == "v1" and s.influx.url == "http://influxdb:8086"
    influx = resolved["services"]["influxdb"]["environment"]
    assert s.influx.username == influx["INFLUXDB_WRITE_USER"]
    assert s.influx.password.get_secret_value() == influx["INFLUXDB_WRITE_USER_PASSWORD"]
    assert s.influx.database == influx["INFLUXDB_DB"]
    assert volume(gw, str(s.data_dir)) == "boutline-data"
    assert ports(gw) == [("127.0.0.1", s.http.port)]
    assert f"127.0.0.1:{s.http.port}/healthz" in DOCKERFILE.read_text()


def test_only_collars_and_displays_reach_the_box_from_outside(resolved):
    services = resolved["services"]
    for name in ("influxdb", "gateway"):
        assert all(host == "127.0.0.1" for host, _ in ports(services[name])), name
    assert ports(services["mosquitto"]) == [("0.0.0.0", 1883)]
    assert ports(services["grafana"]) == [("0.0.0.0", 3000)]
    assert not any(ports(services[n]) for n in ("mqtt-users", "simulator"))
    assert services["mqtt-users"]["network_mode"] == "none"


def test_mosquitto_mounts_what_its_config_names(resolved):
    mq = resolved["services"]["mosquitto"]
    conf_src = volume(mq, "/mosquitto/config/mosquitto.conf")
    conf = Path(conf_src).read_text()
    settings = dict(
        line.split(None, 1) for line in conf.splitlines() if line and not line.startswith("#")
    )
    assert settings["allow_anonymous"] == "false" and settings["persistence"] == "true"
    assert Path(volume(mq, settings["acl_file"])) == ROOT / "deploy" / "mosquitto" / "acl"
    pw_dir = str(Path(settings["password_file"]).parent)
    assert volume(mq, pw_dir) == "mosquitto-auth"
    assert volume(mq, settings["persistence_location"].rstrip("/")) == "mosquitto-data"
    # mqtt-users writes the same file into the same volume before the broker starts.
    users = resolved["services"]["mqtt-users"]
    assert volume(users, pw_dir) == "mosquitto-auth"
    assert settings["password_file"] in users["command"][0]
    assert mq["depends_on"]["mqtt-users"]["condition"] == "service_completed_successfully"


def test_mqtt_users_command_makes_the_password_file(resolved, tmp_path):
    # The container's shell command, run here with its paths mapped into tmp_path.
    users = resolved["services"]["mqtt-users"]
    script = users["command"][0]
    mapping = {
        "/deploy/make-passwd.sh": volume(users, "/deploy/make-passwd.sh"),
        "/secrets/": f"{tmp_path}/secrets/",
        "/mosquitto/auth/": f"{tmp_path}/",
    }
    for old, new in mapping.items():
        script = script.replace(old, new)
    (tmp_path / "secrets").mkdir()
    env = {"PATH": os.environ["PATH"], **{k: str(v) for k, v in users["environment"].items()}}

    def run() -> subprocess.CompletedProcess:
        return subprocess.run(
            ["sh", "-c", script], env=env, capture_output=True, text=True, timeout=60
        )

    done = run()
    assert done.returncode == 0, done.stderr

    def users_in() -> list[str]:
        return [x.split(":")[0] for x in (tmp_path / "passwd").read_text().splitlines()]

    assert users_in() == ["gateway"]  # display and simulator passwords are empty in .env
    (tmp_path / "secrets" / "collars.txt").write_text("C-001 first-collar\n")
    assert run().returncode == 0
    assert users_in() == ["gateway", "C-001"]


def test_grafana_mounts_the_provisioning_and_dashboards(resolved):
    gf = resolved["services"]["grafana"]
    prov = Path(volume(gf, "/etc/grafana/provisioning/dashboards"))
    (provider,) = yaml.safe_load((prov / "boutline.yaml").read_text())["providers"]
    dash_dir = provider["options"]["path"]
    assert Path(volume(gf, dash_dir)) == ROOT / "deploy" / "grafana" / "dashboards"
    home = gf["environment"]["GF_DASHBOARDS_DEFAULT_HOME_DASHBOARD_PATH"]
    assert (ROOT / "deploy" / "grafana" / "dashboards" / Path(home).relative_to(dash_dir)).exists()
    ds_dir = Path(volume(gf, "/etc/grafana/provisioning/datasources"))
    wanted = set(re.findall(r"\$\{(\w+)\}", (ds_dir / "boutline.yaml").read_text()))
    assert wanted and wanted <= set(gf["environment"]), wanted - set(gf["environment"])
    influx = resolved["services"]["influxdb"]["environment"]
    assert gf["environment"]["INFLUX_READ_USER"] == influx["INFLUXDB_READ_USER"]
    assert gf["environment"]["INFLUX_READ_PASSWORD"] == influx["INFLUXDB_READ_USER_PASSWORD"]


def _cli(argv: list[str]) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "gateway.cli", *argv, "--help"],
        capture_output=True,
        text=True,
        timeout=120,
    )


@pytest.mark.parametrize("service", ["gateway", "simulator"])
def test_service_commands_are_real_cli_commands(resolved, service):
    # click refuses an unknown option before it shows the help: a renamed option fails here.
    s = resolved["services"][service]
    (cmd,) = re.findall(r"^CMD (\[.*\])$", DOCKERFILE.read_text(), flags=re.M)
    argv = s.get("command") or json.loads(cmd)
    done = _cli(argv)
    assert done.returncode == 0, f"boutline {' '.join(argv)}: {done.stderr}"
    assert "Example:" in done.stdout


def test_dockerfile_is_slim_and_arch_neutral():
    text = DOCKERFILE.read_text()
    code = "\n".join(line for line in text.splitlines() if not line.lstrip().startswith("#"))
    (base,) = re.findall(r"^FROM (\S+)", code, flags=re.M)
    assert base.startswith("python:") and "-slim" in base
    # No step that only works on one CPU: no arch names, no downloads of prebuilt binaries.
    for word in ("amd64", "x86_64", "aarch64", "arm64", "armhf", "curl ", "wget "):
        assert word not in code, word
    assert re.search(r"^USER boutline$", code, flags=re.M)
    assert 'ENTRYPOINT ["boutline"]' in code


def test_dockerignore_lets_in_what_the_dockerfile_copies():
    allowed = [
        line[1:].rstrip("/")
        for line in (ROOT / ".dockerignore").read_text().splitlines()
        if line.startswith("!")
    ]
    sources = [
        src
        for line in DOCKERFILE.read_text().splitlines()
        if line.startswith("COPY ")
        for src in line.split()[1:-1]
    ]
    assert sources
    for src in sources:
        assert (ROOT / src).exists(), src
        assert any(src == a or src.startswith(a + "/") for a in allowed), f"{src} is ignored"
