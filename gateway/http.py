"""The gateway's HTTP endpoint: ``/healthz`` and ``/metrics``, on 127.0.0.1 unless told otherwise.

``GET /healthz``: JSON; HTTP 200 when ready (broker connected and model loaded), else 503.
It reports every sink's state and backlog; while a sink fails, it says the gateway runs on
its embedded store (nothing is lost: the backlog waits in the store file).

``GET /metrics``: Prometheus text format (prometheus-client) of the given registry: the
pipeline's counters (frames in, rejects by reason, windows, inference time, events by kind)
and, when the outputs are registered in it, per-sink backlog, delivery latency and totals.

>>> h = Health(broker_connected=lambda: True, model_loaded=lambda: False)
>>> code, body = h.check()
>>> code, body["ready"], body["model_loaded"]
(503, False, False)
"""

from __future__ import annotations

import ipaddress
import json
import logging
import socket
import threading
from collections.abc import Callable
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

from .config import HttpSettings
from .errors import ConfigError

__all__ = ["Health", "HttpEndpoint"]

log = logging.getLogger("boutline.http")

# A slow or silent client may hold a handler thread this long at most.
_CLIENT_TIMEOUT_S = 10.0


@dataclass
class Health:
    """What /healthz reports: readiness callbacks and the outputs (anything with .status())."""

    broker_connected: Callable[[], bool]
    model_loaded: Callable[[], bool]
    outputs: Any = None  # gateway.outbox.Outputs; None when no sink is configured

    def check(self) -> tuple[int, dict[str, Any]]:
        broker, model = bool(self.broker_connected()), bool(self.model_loaded())
        sinks = self.outputs.status() if self.outputs is not None else {}
        ready = broker and model
        body: dict[str, Any] = {
            "ready": ready,
            "broker_connected": broker,
            "model_loaded": model,
            "store": "embedded",
            "sinks": sinks,
        }
        failing = [n for n, s in sinks.items() if s["state"] == "failing"]
        notes = []
        if not broker:
            notes.append("not connected to the MQTT broker")
        if not model:
            notes.append("no model loaded")
        if failing:
            waiting = sum(sinks[n]["backlog"] for n in failing)
            notes.append(
                f"{', '.join(failing)} failing: the gateway runs on its embedded store;"
                f" {waiting} facts wait there and are sent when the sink accepts them"
            )
        body["message"] = "; ".join(notes) if notes else "ready"
        return (200 if ready else 503), body


class _Handler(BaseHTTPRequestHandler):
    server_version = "boutline"
    sys_version = ""
    timeout = _CLIENT_TIMEOUT_S
    endpoint: HttpEndpoint  # set on the subclass made per endpoint

    def do_GET(self) -> None:  # noqa: N802 - http.server's naming
        path = self.path.split("?", 1)[0]
        try:
            if path == "/healthz":
                code, body = self.endpoint.health.check()
                self._send(code, "application/json", json.dumps(body).encode())
            elif path == "/metrics":
                self._send(200, CONTENT_TYPE_LATEST, generate_latest(self.endpoint.registry))
            else:
                self._send(404, "text/plain", b"not found; try /healthz or /metrics\n")
        except Exception:  # one broken figure must not take the endpoint down
            log.exception("http: %s failed", path)
            self._send(500, "text/plain", b"internal error; see the gateway log\n")

    def do_HEAD(self) -> None:  # noqa: N802
        self._send(405, "text/plain", b"")

    do_POST = do_PUT = do_DELETE = do_PATCH = do_HEAD  # noqa: N815

    def _send(self, code: int, ctype: str, body: bytes) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        if code == 405:
            self.send_header("Allow", "GET")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:  # noqa: A002
        log.debug("http: " + format, *args)


class _Server(ThreadingHTTPServer):
    daemon_threads = True

    def handle_error(self, request: Any, client_address: Any) -> None:
        # A client that hung up mid-answer is not the gateway's problem; keep stderr clean.
        log.debug("http: request from %s failed", client_address, exc_info=True)


class _Server6(_Server):
    address_family = socket.AF_INET6


class HttpEndpoint:
    """A small threaded HTTP server for /healthz and /metrics; ``start()`` then ``stop()``."""

    def __init__(
        self,
        health: Health,
        registry: CollectorRegistry,
        *,
        bind: str = "127.0.0.1",
        port: int = 8787,
    ) -> None:
        self.health, self.registry = health, registry
        self.bind, self.port = bind, port
        self._server: _Server | None = None
        self._thread: threading.Thread | None = None

    @classmethod
    def from_settings(
        cls, http: HttpSettings, health: Health, registry: CollectorRegistry
    ) -> HttpEndpoint:
        return cls(health, registry, bind=http.bind, port=http.port)

    @property
    def url(self) -> str:
        host = f"[{self.bind}]" if ":" in self.bind else self.bind
        return f"http://{host}:{self.port}"

    def start(self) -> HttpEndpoint:
        """Bind and serve in a thread; port 0 picks a free port (then read ``.port``)."""
        handler = type("Handler", (_Handler,), {"endpoint": self})
        try:
            server_cls = _Server6 if ":" in self.bind else _Server
            self._server = server_cls((self.bind, self.port), handler)
        except OSError as exc:
            raise ConfigError(
                f"http: cannot listen on {self.bind}:{self.port} ({exc.strerror}); pick another"
                " http.port or set http.enabled = false"
            ) from exc
        self.port = int(self._server.server_address[1])
        if not _is_loopback(self.bind):
            log.warning(
                "http: /healthz and /metrics listen on %s, reachable from the network", self.bind
            )
        self._thread = threading.Thread(
            target=self._server.serve_forever, kwargs={"poll_interval": 0.2}, name="http"
        )
        self._thread.daemon = True
        self._thread.start()
        return self

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None
        if self._thread is not None:
            self._thread.join(5)
            self._thread = None


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False
