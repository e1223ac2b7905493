"""Start real servers (Mosquitto, InfluxDB 1.x, VictoriaMetrics) on free loopback ports.

Used by the test fixtures and by ``boutline bench``. Each server runs from a config file
written into its own temporary directory; ``stop()`` ends exactly the process it started,
by its pid, and nothing else.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path

from .errors import BoutlineError

__all__ = [
    "INSTALL_HINTS",
    "ServerProcess",
    "free_port",
    "start_influxdb1",
    "start_mosquitto",
    "start_victoria_metrics",
]

INSTALL_HINTS = {
    "mosquitto": "apt-get install -y mosquitto",
    "influxd": "apt-get install -y influxdb",
    "victoria-metrics": "apt-get install -y victoria-metrics",
}


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port that was free a moment ago (the server binds it right after)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((host, 0))
        return int(s.getsockname()[1])


def _binary(name: str) -> str:
    for candidate in (shutil.which(name), f"/usr/sbin/{name}", f"/usr/bin/{name}"):
        if candidate and os.access(candidate, os.X_OK):
            return candidate
    raise BoutlineError(f"{name} is not installed; install it with: {INSTALL_HINTS[name]}")


@dataclass
class ServerProcess:
    """A server we started: its process, address and working directory."""

    name: str
    argv: list[str]
    workdir: Path
    host: str = "127.0.0.1"
    port: int = 0
    proc: subprocess.Popen | None = field(default=None, repr=False)

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}"

    @property
    def pid(self) -> int | None:
        return self.proc.pid if self.proc else None

    def start(self, ready_timeout_s: float = 20.0) -> ServerProcess:
        log = open(self.workdir / f"{self.name}.log", "ab")  # noqa: SIM115 - lives with proc
        self.proc = subprocess.Popen(
            self.argv, cwd=self.workdir, stdout=log, stderr=subprocess.STDOUT
        )
        log.close()
        deadline = time.monotonic() + ready_timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise BoutlineError(
                    f"{self.name} exited with {self.proc.returncode} at start; see {self.log_path}"
                )
            if self._ready():
                return self
            time.sleep(0.05)
        self.stop()
        raise BoutlineError(
            f"{self.name} did not answer within {ready_timeout_s:g} s; see {self.log_path}"
        )

    @property
    def log_path(self) -> Path:
        return self.workdir / f"{self.name}.log"

    def _ready(self) -> bool:
        with contextlib.suppress(OSError), socket.create_connection((self.host, self.port), 0.2):
            return True
        return False

    def stop(self, timeout_s: float = 10.0) -> None:
        """Terminate the process we started (SIGTERM, then SIGKILL). Safe to call twice."""
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.terminate()
        try:
            self.proc.wait(timeout_s)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout_s)

    def kill(self) -> None:
        """SIGKILL, for fault tests."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(10)

    def restart(self) -> ServerProcess:
        """Stop and start again on the same port and data directory."""
        self.stop()
        return self.start()


class _HttpServer(ServerProcess):
    health_path: str = "/ping"

    def _ready(self) -> bool:
        try:
            with urllib.request.urlopen(self.url + self.health_path, timeout=0.5) as r:
                return bool(200 <= r.status < 300)
        except (urllib.error.URLError, OSError):
            return False


class _Influx1(_HttpServer):
    health_path = "/ping"


class _Victoria(_HttpServer):
    health_path = "/health"


def _render(template: Path | None, default: str, **values: object) -> str:
    text = template.read_text() if template else default
    for k, v in values.items():
        text = text.replace("{" + k + "}", str(v))
    return text


MOSQUITTO_DEFAULT = """\
per_listener_settings false
# as root, Mosquitto would drop to a user that cannot write the persistence file here
user root
listener {port} 127.0.0.1
allow_anonymous true
persistence true
persistence_location {workdir}/
log_dest stdout
max_queued_messages 100000
"""


def start_mosquitto(
    workdir: Path, config_template: Path | None = None, port: int | None = None, **extra: object
) -> ServerProcess:
    """Mosquitto with persistence on, from a template holding {port} and {workdir}."""
    workdir.mkdir(parents=True, exist_ok=True)
    port = port or free_port()
    conf = workdir / "mosquitto.conf"
    conf.write_text(
        _render(config_template, MOSQUITTO_DEFAULT, port=port, workdir=workdir, **extra)
    )
    srv = ServerProcess("mosquitto", [_binary("mosquitto"), "-c", str(conf)], workdir, port=port)
    return srv.start()


INFLUXDB1_DEFAULT = """\
reporting-enabled = false
bind-address = "127.0.0.1:{rpc_port}"
[meta]
  dir = "{workdir}/meta"
  logging-enabled = false
[data]
  dir = "{workdir}/data"
  wal-dir = "{workdir}/wal"
  query-log-enabled = false
[monitor]
  store-enabled = false
[http]
  bind-address = "127.0.0.1:{port}"
  log-enabled = false
  auth-enabled = false
[continuous_queries]
  enabled = false
"""


def start_influxdb1(
    workdir: Path, config_template: Path | None = None, port: int | None = None
) -> ServerProcess:
    """InfluxDB 1.x (v1 ``/write`` and ``/query`` API)."""
    workdir.mkdir(parents=True, exist_ok=True)
    port = port or free_port()
    conf = workdir / "influxdb.conf"
    conf.write_text(
        _render(
            config_template, INFLUXDB1_DEFAULT, port=port, rpc_port=free_port(), workdir=workdir
        )
    )
    srv = _Influx1("influxd", [_binary("influxd"), "-config", str(conf)], workdir, port=port)
    return srv.start(ready_timeout_s=30.0)


def start_victoria_metrics(workdir: Path, port: int | None = None) -> ServerProcess:
    """VictoriaMetrics, which accepts the InfluxDB v2 write API (``/api/v2/write``)."""
    workdir.mkdir(parents=True, exist_ok=True)
    port = port or free_port()
    argv = [
        _binary("victoria-metrics"),
        f"-httpListenAddr=127.0.0.1:{port}",
        f"-storageDataPath={workdir}/data",
        "-retentionPeriod=100y",
        # Points are queryable at once instead of after the default 30 s latency offset.
        "-search.latencyOffset=0s",
        "-selfScrapeInterval=0",
        "-loggerLevel=ERROR",
    ]
    return _Victoria("victoria-metrics", argv, workdir, port=port).start()
