"""``boutline run`` as a child process, the way systemd runs it, for the reliability tests.

The daemon gets a TOML config written from plain dicts, logs to a file, and is watched from
outside only: its /healthz and /metrics (parsed with prometheus_client's own parser), its
peak RSS from /proc, its exit code. ``stop()`` is SIGTERM, ``kill()`` SIGKILL, both by pid.
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
import urllib.request
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from prometheus_client.parser import text_string_to_metric_families

from gateway.bench import pid_peak_rss_mb, tree_mb
from gateway.servers import free_port

__all__ = ["Daemon", "finish", "publish_herd", "toml", "write_assignments"]

ROOT = Path(__file__).resolve().parents[1]


def toml(sections: Mapping[str, Mapping[str, Any]]) -> str:
    """Sections of scalars as TOML (JSON strings are valid TOML basic strings)."""
    lines = []
    for name, values in sections.items():
        lines.append(f"[{name}]")
        for k, v in values.items():
            if isinstance(v, bool):
                lines.append(f"{k} = {'true' if v else 'false'}")
            elif isinstance(v, int | float):
                lines.append(f"{k} = {v!r}")
            else:
                lines.append(f"{k} = {json.dumps(str(v))}")
        lines.append("")
    return "\n".join(lines)


def write_assignments(path: Path, n_animals: int) -> Path:
    """The simulator's fittings for a herd of ``n_animals`` (C0001 -> cow-001, ...), since 2020."""
    from simulator.herd import animal_id, collar_id

    path.parent.mkdir(parents=True, exist_ok=True)
    rows = "".join(
        f"{collar_id(i)},{animal_id(i)},2020-01-01T00:00:00Z,\n" for i in range(n_animals)
    )
    path.write_text("collar,animal,from,to\n" + rows, encoding="utf-8")
    return path


def publish_herd(
    host: str,
    port: int,
    site: str,
    *,
    herd: int,
    duration_s: float,
    speed: float | None = None,
    seed: int = 0,
    frame_s: float = 10.0,
    start: float | None = None,
) -> subprocess.Popen:
    """``boutline simulate publish`` (QoS 1, binary, no simulated loss or silences), started."""
    argv = [
        sys.executable, "-m", "gateway.cli", "simulate", "publish", "--host", host,
        "--port", str(port), "--site", site, "--herd", str(herd), "--seed", str(seed),
        "--duration", str(duration_s), "--frame-s", str(frame_s), "--format", "binary",
        "--qos", "1", "--loss", "0", "--silence", "0",
        *(["--flat-out"] if speed is None else ["--speed", str(speed)]),
        *([] if start is None else ["--start", str(start)]),
    ]  # fmt: skip
    return subprocess.Popen(
        argv, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )


def finish(proc: subprocess.Popen, timeout_s: float = 120.0) -> int:
    """Wait for a publisher; the frames it sent. Raises if it failed; always closes its pipes."""
    try:
        out, err = proc.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        raise AssertionError(f"publisher still running after {timeout_s:g} s") from None
    assert proc.returncode == 0, err[-3000:]
    sent = re.search(r"sent (\d+) frames", out)
    assert sent, out[-500:]
    return int(sent.group(1))


class Daemon:
    """One gateway process: config, start, figures from outside, stop or kill."""

    def __init__(
        self,
        workdir: Path,
        config: Mapping[str, Mapping[str, Any]],
        *,
        env: Mapping[str, str] | None = None,
        log_level: str = "info",
    ) -> None:
        self.workdir = workdir
        workdir.mkdir(parents=True, exist_ok=True)
        sections = {k: dict(v) for k, v in config.items()}
        http = sections.setdefault("http", {})
        http.setdefault("port", free_port())
        self.http_port = int(http["port"])
        self.http_host = str(http.get("bind", "127.0.0.1"))
        sections.setdefault("store", {}).setdefault("data_dir", str(workdir / "data"))
        self.data_dir = Path(sections["store"]["data_dir"])
        self.config_path = workdir / "boutline.toml"
        self.config_path.write_text(toml(sections), encoding="utf-8")
        self.env = {**os.environ, "PYTHONUNBUFFERED": "1", **(env or {})}
        self.log_level = log_level
        self.log_path = workdir / "gateway.log"
        self.proc: subprocess.Popen | None = None
        self.argv_prefix: list[str] = []  # e.g. a namespace wrapper (unshare)

    @property
    def argv(self) -> list[str]:
        return [
            *self.argv_prefix,
            sys.executable,
            "-m",
            "gateway.cli",
            "run",
            "--config",
            str(self.config_path),
            "--log-level",
            self.log_level,
        ]

    def start(self, *, ready: bool = True, timeout_s: float = 60.0) -> Daemon:
        with self.log_path.open("ab") as log:
            self.proc = subprocess.Popen(
                self.argv, cwd=ROOT, stdout=log, stderr=subprocess.STDOUT, env=self.env
            )
        if ready:
            deadline = time.monotonic() + timeout_s
            while not self.ready():
                if self.proc.poll() is not None:
                    raise AssertionError(f"gateway exited with {self.proc.returncode}:\n{self.log}")
                if time.monotonic() > deadline:
                    raise AssertionError(f"gateway not ready in {timeout_s:g} s:\n{self.log}")
                time.sleep(0.1)
            time.sleep(0.5)  # CONNACK seen; let the SUBACK come back too
        return self

    @property
    def pid(self) -> int:
        assert self.proc is not None
        return self.proc.pid

    @property
    def log(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def get(self, path: str) -> tuple[int, bytes]:
        url = f"http://{self.http_host}:{self.http_port}{path}"
        try:
            with urllib.request.urlopen(url, timeout=5) as r:
                return r.status, r.read()
        except urllib.error.HTTPError as exc:
            return exc.code, exc.read()

    def ready(self) -> bool:
        try:
            return self.get("/healthz")[0] == 200
        except OSError:
            return False

    def healthz(self) -> dict[str, Any]:
        return json.loads(self.get("/healthz")[1])

    def metrics_text(self) -> str:
        code, body = self.get("/metrics")
        assert code == 200, body[:200]
        return body.decode()

    def metrics(self) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
        """Every sample: (name, sorted labels) -> value."""
        out = {}
        for fam in text_string_to_metric_families(self.metrics_text()):
            for s in fam.samples:
                out[(s.name, tuple(sorted(s.labels.items())))] = float(s.value)
        return out

    def value(self, name: str, **labels: str) -> float:
        return self.metrics().get((name, tuple(sorted(labels.items()))), 0.0)

    def by_label(self, name: str, label: str) -> dict[str, float]:
        return {dict(k[1])[label]: v for k, v in self.metrics().items() if k[0] == name}

    def wait_quiet(self, name: str, target: float | None = None, timeout_s: float = 120.0,
                   still_s: float = 1.5) -> float:  # fmt: skip
        """Wait until metric ``name`` reaches ``target`` (if given) and stays put ``still_s``."""
        deadline = time.monotonic() + timeout_s
        last, since = None, time.monotonic()
        while time.monotonic() < deadline:
            v = self.value(name)
            if v != last:
                last, since = v, time.monotonic()
            elif (target is None or v >= target) and time.monotonic() - since >= still_s:
                return v
            assert self.alive(), f"gateway died:\n{self.log[-3000:]}"
            time.sleep(0.1)
        raise AssertionError(f"{name} = {last}, wanted {target}, after {timeout_s:g} s")

    def peak_rss_mb(self) -> float:
        """The gateway's peak RSS with its MQTT ingest process's ([process] ingest)."""
        v = tree_mb(self.pid, pid_peak_rss_mb)
        assert v is not None, "gateway process is gone"
        return v

    def stop(self, timeout_s: float = 30.0) -> int:
        """SIGTERM and wait; the exit code."""
        if self.proc is None:
            return 0
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
                raise AssertionError(f"gateway ignored SIGTERM:\n{self.log[-3000:]}") from None
        return int(self.proc.returncode)

    def kill(self) -> None:
        """SIGKILL: no clean-up of any kind runs in the gateway."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(10)

    def wait_exit(self, timeout_s: float = 30.0) -> int:
        assert self.proc is not None
        return int(self.proc.wait(timeout_s))
