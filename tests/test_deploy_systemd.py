"""The systemd unit (deploy/systemd/boutline.service) and the sd_notify client (gateway/systemd.py)."""

from __future__ import annotations

import configparser
import os
import re
import shutil
import socket
import subprocess
from pathlib import Path

import pytest

from gateway.config import load_settings
from gateway.systemd import Notifier, watchdog_interval

ROOT = Path(__file__).resolve().parents[1]
UNIT = ROOT / "deploy" / "systemd" / "boutline.service"
PI_CONFIG = ROOT / "deploy" / "boutline.toml"


def unit_lines() -> dict[str, list[tuple[str, str]]]:
    """Sections of the unit as (key, value) lists; systemd allows repeated keys."""
    sections: dict[str, list[tuple[str, str]]] = {}
    current = ""
    for raw in UNIT.read_text().splitlines():
        line = raw.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("["):
            current = line.strip("[]")
            sections.setdefault(current, [])
            continue
        key, _, value = line.partition("=")
        sections[current].append((key.strip(), value.strip()))
    return sections


def service() -> dict[str, str]:
    return dict(unit_lines()["Service"])


def test_unit_has_the_hardening_keys():
    s = service()
    # Own user, read-only system with the data directory writable, no way to gain privileges.
    assert s["User"] == "boutline" and s["Group"] == "boutline"
    assert s["ProtectSystem"] == "strict"
    assert s["StateDirectory"] == "boutline"
    assert "/var/lib/boutline" in s["ReadWritePaths"].split()
    assert s["NoNewPrivileges"] == "yes"
    assert s["ProtectHome"] == "yes" and s["PrivateTmp"] == "yes"
    assert s["CapabilityBoundingSet"] == ""
    assert set(s["RestrictAddressFamilies"].split()) == {"AF_UNIX", "AF_INET", "AF_INET6"}
    # Restart on failure, watchdog through sd_notify, journald logging.
    assert s["Restart"] == "on-failure"
    assert s["Type"] == "notify" and s["NotifyAccess"] == "main"
    assert int(s["WatchdogSec"].rstrip("s")) >= 10
    assert s["StandardOutput"] == "journal" and s["StandardError"] == "journal"
    assert s["ExecReload"].endswith("-HUP $MAINPID")
    # The unit runs the daemon on the shipped Pi config.
    assert s["ExecStart"].split()[1:] == ["run", "--config", "/etc/boutline/boutline.toml"]


def test_unit_data_dir_matches_the_pi_config():
    settings = load_settings(PI_CONFIG, env={})
    s = service()
    assert str(settings.data_dir) in s["ReadWritePaths"].split()
    assert s["WorkingDirectory"] == str(settings.data_dir)
    assert str(settings.data_dir) == f"/var/lib/{s['StateDirectory']}"


def test_unit_parses_as_ini():
    # systemd's syntax is close to INI; repeated keys are allowed, so no strict parsing.
    parser = configparser.ConfigParser(strict=False, interpolation=None)
    parser.optionxform = str  # type: ignore[assignment,method-assign]
    parser.read_string(UNIT.read_text())
    assert parser.sections() == ["Unit", "Service", "Install"]
    assert parser["Install"]["WantedBy"] == "multi-user.target"


def _unit_with_existing_binary(tmp_path: Path) -> Path:
    # systemd-analyze checks that ExecStart exists; the gateway is not installed at /opt here.
    text = UNIT.read_text().replace(
        "/opt/boutline/venv/bin/boutline", shutil.which("true") or "/bin/true"
    )
    out = tmp_path / "boutline.service"
    out.write_text(text)
    return out


def _systemd_analyze() -> str:
    exe = shutil.which("systemd-analyze")
    assert exe, "systemd-analyze is missing; install it with: apt-get install -y systemd"
    return exe


def test_systemd_analyze_verify_finds_nothing(tmp_path):
    done = subprocess.run(
        [_systemd_analyze(), "verify", str(_unit_with_existing_binary(tmp_path))],
        capture_output=True,
        text=True,
        timeout=60,
    )
    # Unknown keys and bad values are only warnings to systemd; any output is a mistake here.
    assert done.returncode == 0 and done.stderr == "" and done.stdout == "", done.stderr


def test_systemd_security_exposure_is_low(tmp_path):
    # systemd's own assessment (systemd-analyze security); exposure 0 (best) .. 10 (none).
    # --threshold is in tenths; 2.0 or below is what systemd labels "OK".
    done = subprocess.run(
        [
            _systemd_analyze(),
            "security",
            "--offline=true",
            "--threshold=20",
            "--no-pager",
            str(_unit_with_existing_binary(tmp_path)),
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr
    assert "Overall exposure level" in done.stdout


# --------------------------------------------------------------------------- sd_notify


@pytest.fixture
def notify_socket(tmp_path):
    path = tmp_path / "notify"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(path))
    sock.settimeout(5)
    yield path, sock
    sock.close()


def test_ready_status_watchdog_stopping_datagrams(notify_socket):
    path, sock = notify_socket
    n = Notifier(env={"NOTIFY_SOCKET": str(path), "WATCHDOG_USEC": "20000000"})
    assert n.enabled and n.watchdog_s == 20.0
    assert n.ready("20 collars, model default.onnx")
    assert sock.recv(4096) == b"READY=1\nSTATUS=20 collars, model default.onnx"
    assert n.status("line 1\nWATCHDOG=1")  # a newline cannot forge a second assignment
    assert sock.recv(4096) == b"STATUS=line 1 WATCHDOG=1"
    assert n.ping(now=100.0)
    assert sock.recv(4096) == b"WATCHDOG=1"
    assert not n.ping(now=109.9)  # at most every half interval
    assert n.ping(now=110.0)
    assert sock.recv(4096) == b"WATCHDOG=1"
    assert n.reloading()
    reload_msg = sock.recv(4096).decode().split("\n")
    assert reload_msg[0] == "RELOADING=1" and reload_msg[1].startswith("MONOTONIC_USEC=")
    assert int(reload_msg[1].split("=")[1]) > 0
    assert n.stopping()
    assert sock.recv(4096) == b"STOPPING=1"
    n.close()
    n.close()


def test_matches_systemd_notify(notify_socket):
    # Reference: systemd's own systemd-notify(1) writes the same datagram for the same state.
    path, sock = notify_socket
    exe = shutil.which("systemd-notify")
    assert exe, "systemd-notify is missing; install it with: apt-get install -y systemd"
    subprocess.run(
        [exe, "--no-block", "--ready", "--status=herd of 20"],
        env={"NOTIFY_SOCKET": str(path)},
        check=True,
        timeout=30,
    )
    reference = sock.recv(4096)
    with Notifier(env={"NOTIFY_SOCKET": str(path)}) as n:
        n.ready("herd of 20")
    assert sock.recv(4096) == reference


def test_abstract_socket_name():
    name = f"boutline-test-{os.getpid()}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(b"\0" + name.encode())
    sock.settimeout(5)
    try:
        with Notifier(env={"NOTIFY_SOCKET": "@" + name}) as n:
            assert n.ready()
        assert sock.recv(4096) == b"READY=1"
    finally:
        sock.close()


@pytest.mark.parametrize("value", ["", "relative/path", "@", "tcp://127.0.0.1:9"])
def test_outside_systemd_or_bad_socket_does_nothing(value, caplog):
    n = Notifier(env={"NOTIFY_SOCKET": value, "WATCHDOG_USEC": "1000000"})
    assert not n.enabled and n.watchdog_s is None
    assert not n.ready() and not n.ping(now=0.0) and not n.stopping()
    assert ("neither a path" in caplog.text) == bool(value)


def test_vanished_socket_is_reported_once_not_raised(tmp_path, caplog):
    with Notifier(env={"NOTIFY_SOCKET": str(tmp_path / "gone")}) as n:
        assert not n.ready() and not n.status("x")
    assert caplog.text.count("cannot notify systemd") == 1


def test_assignments_are_validated(notify_socket):
    path, _ = notify_socket
    with Notifier(env={"NOTIFY_SOCKET": str(path)}) as n:
        for bad in ("READY", "=1", "A=1\nB=2"):
            with pytest.raises(ValueError, match="KEY=VALUE"):
                n.send(bad)


@pytest.mark.parametrize(
    ("env", "expected"),
    [
        ({"WATCHDOG_USEC": "60000000"}, 60.0),
        ({"WATCHDOG_USEC": "60000000", "WATCHDOG_PID": str(os.getpid())}, 60.0),
        ({"WATCHDOG_USEC": "60000000", "WATCHDOG_PID": str(os.getpid() + 1)}, None),
        ({"WATCHDOG_USEC": "0"}, None),
        ({"WATCHDOG_USEC": "-5"}, None),
        ({"WATCHDOG_USEC": "soon"}, None),
        ({"WATCHDOG_USEC": "1" * 5000}, None),
        ({"WATCHDOG_USEC": "60000000", "WATCHDOG_PID": "me"}, None),
        ({}, None),
    ],
)
def test_watchdog_interval(env, expected):
    assert watchdog_interval(env) == expected


# --------------------------------------------------------------------------- Pi config


def test_pi_config_is_valid_and_sd_card_friendly():
    from gateway.config import StoreSettings

    s = load_settings(PI_CONFIG, env={})
    # Fewer, larger writes than the defaults: commits batched, WAL checkpoints rarer.
    assert s.store.commit_interval_s > StoreSettings().commit_interval_s
    assert s.store.checkpoint_pages > StoreSettings().checkpoint_pages
    assert s.http.bind == "127.0.0.1"
    assert s.mqtt.username == "gateway"  # the ACL's service user (deploy/mosquitto/acl)
    acl = (ROOT / "deploy" / "mosquitto" / "acl").read_text()
    assert f"user {s.mqtt.username}\n" in acl


def test_pi_config_holds_no_secrets_and_takes_them_from_the_environment():
    text = PI_CONFIG.read_text()
    for line in text.splitlines():
        key = line.split("=")[0].strip()
        assert key not in ("password", "token"), line
    s = load_settings(
        PI_CONFIG, env={"BOUTLINE_MQTT_PASSWORD": "from-env", "BOUTLINE_INFLUX_ENABLED": "true"}
    )
    assert s.mqtt.password.get_secret_value() == "from-env"
    assert s.influx.enabled


# --------------------------------------------------------------------------- the daemon


@pytest.mark.integration
def test_daemon_speaks_the_units_notify_protocol(mosquitto, notify_socket, tmp_path):
    # Type=notify and WatchdogSec in the unit: the daemon must say READY=1, ping the watchdog
    # from its loop at least every half interval, and say STOPPING=1 on SIGTERM.
    import signal
    import sys
    import time

    from gateway.servers import free_port

    path, sock = notify_socket
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith(("BOUTLINE_", "NOTIFY_", "WATCHDOG_"))
    }
    env |= {
        "NOTIFY_SOCKET": str(path),
        "WATCHDOG_USEC": "2000000",
        "BOUTLINE_MQTT_HOST": mosquitto.host,
        "BOUTLINE_MQTT_PORT": str(mosquitto.port),
        "BOUTLINE_MQTT_CLIENT_ID": f"notify-test-{os.getpid()}",
        "BOUTLINE_STORE_DATA_DIR": str(tmp_path / "data"),
        "BOUTLINE_HTTP_PORT": str(free_port()),
    }
    proc = subprocess.Popen(
        [sys.executable, "-m", "gateway.cli", "run"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    try:
        sock.settimeout(60)  # model load and first connect on a loaded machine
        messages = []
        while not any(m.startswith(b"READY=1") for m in messages):
            messages.append(sock.recv(4096))
        sock.settimeout(5)
        t0 = time.monotonic()
        after_ready = []
        while time.monotonic() - t0 < 3.5:
            after_ready.append(sock.recv(4096))
        # About one ping a second for a 2 s watchdog (status lines may come in between).
        assert after_ready.count(b"WATCHDOG=1") >= 2, after_ready
        proc.send_signal(signal.SIGTERM)
        rest = []
        while b"STOPPING=1" not in rest:
            rest.append(sock.recv(4096))
        assert proc.wait(30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        proc.stderr.close()


def test_pi_mosquitto_sed_maps_every_container_path():
    # docs/deploy.md (route B) rewrites the container's paths with sed; run its expressions.
    doc = (ROOT / "docs" / "deploy.md").read_text()
    exprs = re.findall(r"-e '(s#[^']+#)'", doc)
    assert len(exprs) == 4, exprs
    conf = ROOT / "deploy" / "mosquitto" / "mosquitto.conf"
    argv = ["sed"] + [a for e in exprs for a in ("-e", e)] + [str(conf)]
    out = subprocess.run(argv, capture_output=True, text=True, check=True, timeout=30).stdout
    settings = dict(line.split(None, 1) for line in out.splitlines() if line and line[0] != "#")
    assert not [v for v in settings.values() if v.startswith("/mosquitto/")]
    assert settings["password_file"] == "/etc/mosquitto/passwd"
    assert settings["acl_file"] == "/etc/mosquitto/acl"
    assert settings["persistence_location"] == "/var/lib/mosquitto/"
    assert settings["log_dest"] == "syslog"
    assert settings["allow_anonymous"] == "false"
