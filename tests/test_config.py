"""Configuration: TOML + env overrides, secrets never echoed, one error line per problem."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from gateway.config import Settings, example_toml, load_settings, to_toml
from gateway.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def _write(tmp_path: Path, text: str | bytes) -> Path:
    p = tmp_path / "boutline.toml"
    p.write_bytes(text.encode() if isinstance(text, str) else text)
    return p


def test_defaults_load_without_a_file() -> None:
    s = load_settings(None, env={})
    assert s == Settings()
    assert s.http.bind == "127.0.0.1"  # loopback unless configured


def test_example_file_is_the_generated_one_and_every_value_is_the_default(tmp_path: Path) -> None:
    text = (ROOT / "boutline.example.toml").read_text()
    assert text == example_toml(), "regenerate: boutline config example > boutline.example.toml"
    # Uncommenting every setting must give exactly the defaults.
    uncommented = "\n".join(
        line[2:].split("  #")[0] if line.startswith("# ") and " = " in line else line
        for line in text.splitlines()
    )
    assert load_settings(_write(tmp_path, uncommented), env={}) == Settings()


def test_file_and_env_override_in_that_order(tmp_path: Path) -> None:
    p = _write(tmp_path, '[mqtt]\nhost = "10.0.0.2"\nport = 1884\n[site]\nid = "north-shed"\n')
    s = load_settings(
        p, env={"BOUTLINE_MQTT_PORT": "8883", "BOUTLINE_SITE_TIMEZONE": "Europe/Dublin"}
    )
    assert (s.mqtt.host, s.mqtt.port, s.site.id, s.site.timezone) == (
        "10.0.0.2",
        8883,
        "north-shed",
        "Europe/Dublin",
    )


def test_every_problem_is_named_with_key_value_and_what_is_allowed(tmp_path: Path) -> None:
    p = _write(
        tmp_path,
        '[mqtt]\nport = 99999\nprotocol = "4"\npasword = "x"\n'
        '[site]\ntimezone = "Mars/Olympus"\n[bogus]\na = 1\n'
        '[influx]\nurl = "ftp://db"\napi = "v9"\n',
    )
    with pytest.raises(ConfigError) as info:
        load_settings(p, env={"BOUTLINE_HTTP_PORT": "0"})
    problems = "\n".join(info.value.problems)
    for expected in (
        "mqtt.port = 99999",
        "mqtt.protocol = '4': allowed: '5' or '3.1.1'",
        "mqtt.pasword: unknown key",
        "site.timezone = 'Mars/Olympus'",
        "bogus: unknown section",
        "influx.url = 'ftp://db'",
        "influx.api = 'v9'",
        "http.port = '0'",
    ):
        assert expected in problems, problems
    assert len(info.value.problems) == 8


@pytest.mark.parametrize(
    "content",
    [
        b"[mqtt\nport = 1",  # broken TOML
        b"\xff\xfe[mqtt]",  # not UTF-8
        b"mqtt = 5\n",  # section that is not a table
        b"[mqtt]\nport = " + b"9" * 5000 + b"\n",  # absurd number
        b'[mqtt]\nhost = "' + b"a" * 2_000_000 + b'"\n',  # oversized file
        b"[[mqtt]]\nport = 1\n",  # array of tables
        b'[mqtt]\ntls = "yes please"\n',
        b'[mqtt]\ncert_file = "/x.pem"\n',  # cert without key and without tls
    ],
)
def test_malformed_hostile_and_oversized_files_give_config_errors(
    tmp_path: Path, content: bytes
) -> None:
    with pytest.raises(ConfigError) as info:
        load_settings(_write(tmp_path, content), env={})
    assert info.value.problems and all(isinstance(p, str) for p in info.value.problems)


def test_secrets_from_env_and_file_are_never_echoed(tmp_path: Path) -> None:
    secret_file = tmp_path / "token"
    secret_file.write_text("tok-9f8e7d6c\n")
    p = _write(tmp_path, f'[influx]\ntoken_file = "{secret_file}"\n')
    s = load_settings(p, env={"BOUTLINE_MQTT_PASSWORD": "hunter2-barn"})
    assert s.influx.token.get_secret_value() == "tok-9f8e7d6c"
    assert s.mqtt.password.get_secret_value() == "hunter2-barn"
    shown = to_toml(s) + repr(s) + str(s)
    assert "hunter2-barn" not in shown and "tok-9f8e7d6c" not in shown
    assert 'token = "****"' in to_toml(s)


def test_bad_secret_value_is_masked_in_errors(tmp_path: Path) -> None:
    p = _write(tmp_path, '[influx]\ntoken = ["s3cret-list"]\n')
    with pytest.raises(ConfigError) as info:
        load_settings(p, env={})
    assert "s3cret-list" not in "\n".join(info.value.problems)


def test_missing_secret_file_is_a_clear_error(tmp_path: Path) -> None:
    p = _write(tmp_path, '[mqtt]\npassword_file = "/nonexistent/pw"\n')
    with pytest.raises(ConfigError, match="mqtt.password_file: cannot read /nonexistent/pw"):
        load_settings(p, env={})


def _cli(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "gateway.cli", *args],
        capture_output=True,
        text=True,
        timeout=60,
        env=env,
    )


def test_config_check_cli_prints_one_line_per_problem_without_traceback(tmp_path: Path) -> None:
    p = _write(tmp_path, '[mqtt]\nport = "many"\nqos = 2\n[store]\ncommit_interval_s = -1\n')
    r = _cli("config", "check", str(p))
    assert r.returncode == 1
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 3 and all(line.startswith("Error: ") for line in lines), r.stderr
    assert "Traceback" not in r.stderr


def test_config_check_cli_masks_secrets(tmp_path: Path) -> None:
    import os

    p = _write(tmp_path, '[mqtt]\nusername = "gw"\n')
    env = {**os.environ, "BOUTLINE_MQTT_PASSWORD": "pw-do-not-show"}
    r = _cli("config", "check", str(p), env=env)
    assert r.returncode == 0, r.stderr
    assert "pw-do-not-show" not in r.stdout + r.stderr
    assert 'password = "****"' in r.stdout


def test_readme_shows_the_example_config() -> None:
    readme = (ROOT / "README.md").read_text()
    assert "```toml\n" + example_toml().rstrip("\n") + "\n```" in readme
