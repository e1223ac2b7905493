"""MQTT ingest in a process of its own (``[process] ingest``), beside the pipeline's process.

Why: paho-mqtt is pure Python, and at 10,000 collars its network thread (reading each
PUBLISH, MQTT 5 properties, a PUBACK per message) took about half of the gateway's CPU time,
under the same GIL as the pipeline. In a child process it runs on another CPU, and the
pipeline gets a whole core (docs/performance.md, "Ingest in its own process").

The child (gateway/ingestchild.py, a fresh interpreter of ~25 MB) runs the same
:class:`~gateway.ingest.Ingest` (session, QoS 1, reconnects, TLS, credentials, the
byte-bounded queue); its main thread takes the queue in batches and sends them through a
socket pair. The parent's :class:`ProcessIngest` has Ingest's interface
(start, wait_connected, check, drain, stop, connected, subscribed, auth_error, connects),
so the daemon does not know which one it has.

- Backpressure is kept end to end: the parent reads the pipe only while it holds fewer than
  ``buffer_max`` messages, a full pipe blocks the child's sender, the child's queue fills,
  and its network thread waits for room; the broker then holds further QoS 1 messages. It
  waits up to the keep-alive (``mqtt.keepalive_s``) per message before it drops one and
  counts it, so a stall of the pipeline shorter than that loses nothing.
- The child logs through the parent (the same records, the same handlers), and its counters
  (queue drops, reconnects, connected) reach the parent's telemetry as deltas.
- The child ignores SIGINT and SIGTERM: the parent stops it, after taking every message it
  had queued. If the parent dies, the child sees the pipe close and exits.
- If the child dies, :meth:`ProcessIngest.check` starts a new one (the broker kept the
  session); more than ``max_restarts`` deaths within ten minutes raise BrokerError. Messages
  the dead child had acknowledged but not passed on are lost, as on a crash of the gateway
  itself (at most the queue: docs/reliability.md).

>>> use_process("thread", {0, 1}), use_process("auto", {0}), use_process("auto", {0, 1})
(False, False, True)
"""

from __future__ import annotations

import collections
import contextlib
import logging
import os
import socket
import subprocess
import sys
import threading
import time
from multiprocessing.connection import Connection
from typing import Any

from .affinity import allowed_cpus
from .config import MqttSettings
from .errors import BoutlineError, BrokerAuthError, BrokerError, ConfigError
from .ingest import QUEUE_MAX_BYTES, Ingest, Message, validate_filter
from .telemetry import Telemetry

__all__ = ["ProcessIngest", "open_ingest", "use_process"]

log = logging.getLogger("boutline.ingest")

_START_TIMEOUT_S = 60.0
_STOP_TIMEOUT_S = 20.0
_RESTART_WINDOW_S = 600.0
_ERRORS: dict[str, type[BoutlineError]] = {
    "ConfigError": ConfigError,
    "BrokerError": BrokerError,
    "BrokerAuthError": BrokerAuthError,
}

# Messages held between the broker and the pipeline: the child's queue, then the parent's
# buffer (one drain of the daemon's loop). A burst of a second of 10,000 collars fits; the
# broker holds the rest of a longer backlog (its session, max_queued_messages 100000 in
# deploy/mosquitto). Half of the thread ingest's 20,000: both processes are resident, and
# 15,000 messages of JSON frames are ~11 MB (docs/performance.md, change 9).
CHILD_QUEUE_MAX = 10_000
BUFFER_MAX = 5_000


def use_process(setting: str, cpus: set[int]) -> bool:
    """Whether ``[process] ingest`` means a child process on these CPUs."""
    if setting == "process":
        return True
    if setting == "thread":
        return False
    return len(cpus) >= 2


_ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
# The child imports the same gateway package as we did: its directory joins the child's path
# only when it is not there already (a source tree; an installed package is found anyway).
_CHILD_CODE = (
    "import sys\n"
    "if sys.argv[1] not in sys.path: sys.path.insert(0, sys.argv[1])\n"
    "from gateway.ingestchild import main\n"
    "sys.exit(main(sys.argv[2:]))\n"
)


def open_ingest(
    settings: Any, *, topic_filter: str, telemetry: Telemetry | None = None
) -> Ingest | ProcessIngest:
    """The ingest ``[process] ingest`` asks for, not started."""
    if use_process(settings.process.ingest, allowed_cpus()):
        return ProcessIngest(settings.mqtt, topic_filter=topic_filter, telemetry=telemetry)
    return Ingest(settings.mqtt, topic_filter=topic_filter, telemetry=telemetry)


# ---------------------------------------------------------------------- the parent side


class ProcessIngest:
    """Ingest's interface, with the MQTT client running in a child process."""

    def __init__(
        self,
        settings: MqttSettings,
        *,
        topic_filter: str,
        queue_max: int = CHILD_QUEUE_MAX,  # the child's queue
        queue_max_bytes: int = QUEUE_MAX_BYTES,
        telemetry: Telemetry | None = None,
        client_id: str | None = None,
        buffer_max: int = BUFFER_MAX,
        max_restarts: int = 5,
    ) -> None:
        self.settings = settings
        self.topic_filter = validate_filter(topic_filter)
        self.telemetry = telemetry or Telemetry()
        self.client_id = client_id or settings.client_id
        self.queue_max, self.queue_max_bytes = queue_max, queue_max_bytes
        self.buffer_max = buffer_max
        self.max_restarts = max_restarts
        self.connected = threading.Event()
        self.subscribed = threading.Event()
        self.auth_error: BrokerAuthError | None = None
        self.connects = 0
        self.restarts = 0
        self.pid: int | None = None
        self._buf: collections.deque[Message] = collections.deque()
        self._proc: Any = None
        self._conn: Any = None
        self._ended = False
        self._deaths: list[float] = []
        self._seen = {"dropped": 0.0, "connects": 0}
        self._child_depth = 0
        self._fatal: BoutlineError | None = None
        # One reader of the pipe at a time: the daemon's loop drains while another thread
        # (the demo, the benchmark, a test) may wait for the subscription.
        self._pump_lock = threading.Lock()

    # ------------------------------------------------------------------ the pipe

    def _spawn(self) -> None:
        # A fresh interpreter (not fork: the gateway has threads; not multiprocessing's
        # spawn: that imports the gateway's main module again) running gateway/ingestchild.py
        mine, theirs = socket.socketpair()
        cpus = allowed_cpus() - (
            os.sched_getaffinity(0) if hasattr(os, "sched_getaffinity") else set()
        )
        try:
            proc = subprocess.Popen(
                [sys.executable, "-c", _CHILD_CODE, _ROOT, str(theirs.fileno())],
                pass_fds=(theirs.fileno(),),
                stdin=subprocess.DEVNULL,
            )
        except OSError as exc:
            mine.close()
            raise BrokerError(f"cannot start the MQTT ingest process: {exc}") from exc
        finally:
            theirs.close()
        conn = Connection(mine.detach())
        s = self.settings
        values = s.model_dump(mode="json")
        values["password"] = s.password.get_secret_value()
        with contextlib.suppress(OSError):  # if it died at once, that is said below
            conn.send(
                (
                    "settings",
                    values,
                    self.topic_filter,
                    self.client_id,
                    self.queue_max,
                    self.queue_max_bytes,
                    sorted(cpus or allowed_cpus()),
                    logging.getLogger().getEffectiveLevel(),
                )
            )
        self._ended = False
        self._seen = {"dropped": 0.0, "connects": 0}
        # The pipe becomes self._conn (readable by drain and wait_connected) only once the
        # child has said it started; until then it is read here alone.
        deadline = time.monotonic() + _START_TIMEOUT_S
        problem = "did not start"
        while time.monotonic() < deadline:
            try:
                if not conn.poll(0.1):
                    if proc.poll() is not None:
                        problem = f"ended at start (exit code {proc.returncode})"
                        break
                    continue
                item = conn.recv()
            except (EOFError, OSError):
                problem = "ended at start"
                break
            if item[0] == "started":
                with self._pump_lock:
                    self._proc, self._conn, self.pid = proc, conn, int(item[1])
                return
            if item[0] == "fatal":
                self._reap(proc, conn)
                raise _ERRORS.get(item[1], BrokerError)(item[2])
            self._take(item)
        self._reap(proc, conn)
        raise BrokerError(f"the MQTT ingest process {problem}; see the log above")

    def _take(self, item: Any) -> None:
        kind = item[0]
        if kind == "m":
            self._buf.extend(item[1])
        elif kind == "s":
            self._apply_state(item[1])
        elif kind == "log":
            for level, name, msg in item[1]:
                logging.getLogger(name).log(level, "%s", msg)
        elif kind == "end":
            self._ended = True

    def _apply_state(self, state: dict[str, Any]) -> None:
        tel = self.telemetry
        dropped = float(state["dropped"])
        if dropped > self._seen["dropped"]:
            tel.queue_dropped.inc(dropped - self._seen["dropped"])
        connects = int(state["connects"])
        if connects > self._seen["connects"]:
            n = connects - self._seen["connects"]
            tel.broker_reconnects.inc(n)
            self.connects += n
        self._seen = {"dropped": dropped, "connects": connects}
        for flag, on in (
            (self.connected, state["connected"]),
            (self.subscribed, state["subscribed"]),
        ):
            flag.set() if on else flag.clear()
        tel.broker_connected.set(1 if state["connected"] else 0)
        self._child_depth = int(state["depth"])
        if state["auth_error"] and self.auth_error is None:
            self.auth_error = BrokerAuthError(state["auth_error"])

    def _pump(self, timeout_s: float) -> None:
        """Read what the child sent, waiting up to ``timeout_s`` for the first item."""
        with self._pump_lock:
            conn = self._conn
            if conn is None or self._ended:
                if timeout_s > 0:
                    time.sleep(min(timeout_s, 0.05))
                return
            wait = timeout_s
            try:
                while len(self._buf) < self.buffer_max and conn.poll(wait):
                    self._take(conn.recv())
                    if self._ended:
                        break
                    wait = 0
            except (EOFError, OSError):
                self._lost_child()

    def _lost_child(self) -> None:
        """The child's socket is closed (or was): no broker connection to speak of."""
        if self._conn is not None:
            with contextlib.suppress(OSError):
                self._conn.close()
        self._conn = None
        self.connected.clear()
        self.subscribed.clear()
        self.telemetry.broker_connected.set(0)

    def _reap(self, proc: Any = None, conn: Any = None) -> None:
        """End and collect a child: the given one, or (no arguments) the current one."""
        if proc is None:
            proc, self._proc = self._proc, None
            conn, self._conn = self._conn, None
        if conn is not None:
            with contextlib.suppress(OSError):
                conn.close()
        if proc is not None:
            try:
                proc.wait(5.0)
            except subprocess.TimeoutExpired:
                proc.kill()  # our own child, by its handle
                proc.wait(5.0)

    # ------------------------------------------------------------------ Ingest's interface

    def start(self) -> None:
        """Start the ingest process; ConfigError/BrokerError as Ingest.start would raise."""
        if self._proc is None:
            self._spawn()

    def wait_connected(self, timeout_s: float = 10.0) -> bool:
        """Wait for the subscription to be in place; raise BrokerAuthError if refused."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            self.check()
            if self.subscribed.is_set():
                return True
            if self._pump_lock.locked():  # another thread reads the pipe: it updates the flag
                self.subscribed.wait(0.05)
            else:
                self._pump(0.05)
        self.check()
        return self.subscribed.is_set()

    def check(self) -> None:
        """Raise a fatal error; start a new child if the old one died."""
        if self.auth_error is not None:
            raise self.auth_error
        if self._fatal is not None:
            raise self._fatal
        proc = self._proc
        if proc is None or proc.poll() is None or self._ended:
            return
        self._pump(0)  # what it sent before dying is still ours
        code = proc.returncode
        with self._pump_lock:
            self._reap()
        now = time.monotonic()
        self._deaths = [t for t in self._deaths if now - t < _RESTART_WINDOW_S] + [now]
        if len(self._deaths) > self.max_restarts:
            self._fatal = BrokerError(
                f"the MQTT ingest process died {len(self._deaths)} times in"
                f" {_RESTART_WINDOW_S / 60:.0f} minutes (last exit code {code}); see the log"
            )
            raise self._fatal
        log.error("the MQTT ingest process ended (exit code %s); starting a new one", code)
        self.restarts += 1
        self._spawn()

    def drain(self, max_items: int = 5000, timeout_s: float = 0.1) -> list[Message]:
        """Up to ``max_items`` messages; waits up to ``timeout_s`` for the first one."""
        buf = self._buf
        if not buf:
            deadline = time.monotonic() + timeout_s
            while True:
                self._pump(max(0.0, deadline - time.monotonic()))
                if buf or time.monotonic() >= deadline:
                    break
        elif len(buf) < max_items:
            self._pump(0)
        n = min(max_items, len(buf))
        out = [buf.popleft() for _ in range(n)]
        self.telemetry.queue_depth.set(len(buf) + self._child_depth)
        return out

    def stop(self) -> None:
        """Stop the child after taking every message it had; they stay in drain()."""
        if self._proc is None:
            return
        with self._pump_lock:
            self._stop_child()
        self._reap()
        self._lost_child()

    def _stop_child(self) -> None:
        conn = self._conn
        if conn is not None and not self._ended:
            try:
                conn.send("stop")
                deadline = time.monotonic() + _STOP_TIMEOUT_S
                while not self._ended and time.monotonic() < deadline:
                    if conn.poll(0.1):
                        self._take(conn.recv())  # unbounded here: the child's queue is bounded
                    elif self._proc.poll() is not None:
                        break
            except (EOFError, OSError):
                pass
            if not self._ended:
                log.warning("the MQTT ingest process did not stop in time; ending it")
