"""A scripted HTTP peer: a real HTTP server on loopback that answers as a test scripts it.

Used where the real servers cannot show a behaviour (VictoriaMetrics ignores tokens, has no
databases to miss, never says 429). It does not imitate InfluxDB: it answers the statuses,
headers and bodies the test lists, in order, and records every request it received.
"""

from __future__ import annotations

import gzip
import threading
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer


@dataclass
class Answer:
    status: int = 204
    headers: dict[str, str] = field(default_factory=dict)
    body: bytes = b""
    delay_s: float = 0.0  # wait this long before answering (for timeouts)


@dataclass
class Request:
    method: str
    path: str
    headers: dict[str, str]
    body: bytes


class ScriptedPeer:
    """``answers`` are used in order, then ``default``; ``rule(request)`` may answer first."""

    def __init__(
        self,
        answers: list[Answer] | None = None,
        default: Answer | None = None,
        rule: Callable[[Request], Answer | None] | None = None,
    ) -> None:
        self.answers = deque(answers or [])
        self.default = default or Answer()
        self.rule = rule
        self.requests: list[Request] = []
        self._lock = threading.Lock()
        peer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                n = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(n)
                if self.headers.get("Content-Encoding") == "gzip" and body:
                    body = gzip.decompress(body)
                req = Request("POST", self.path, dict(self.headers), body)
                with peer._lock:
                    peer.requests.append(req)
                    answer = (peer.rule(req) if peer.rule else None) or (
                        peer.answers.popleft() if peer.answers else peer.default
                    )
                if answer.delay_s:
                    threading.Event().wait(answer.delay_s)
                self.send_response(answer.status)
                for k, v in answer.headers.items():
                    self.send_header(k, v)
                self.send_header("Content-Length", str(len(answer.body)))
                self.end_headers()
                self.wfile.write(answer.body)

            def log_message(self, *args: object) -> None:
                pass

        class Server(ThreadingHTTPServer):
            def handle_error(self, request, client_address) -> None:
                pass  # a client that timed out and left: expected in timeout tests

        self._server = Server(("127.0.0.1", 0), Handler)
        self._server.daemon_threads = True
        self.port = int(self._server.server_address[1])
        self.url = f"http://127.0.0.1:{self.port}"
        self._thread = threading.Thread(target=self._server.serve_forever, args=(0.05,))

    def __enter__(self) -> ScriptedPeer:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._server.shutdown()
        self._server.server_close()
        self._thread.join(5)

    def writes(self) -> list[Request]:
        """Requests that carried points (the sinks' start-up probe has an empty body)."""
        return [r for r in self.requests if r.body]
