"""The MQTT ingest process: ``python -m gateway.ingestchild FD`` (started by ingestproc.py).

It runs one :class:`~gateway.ingest.Ingest` and passes what it queues to the gateway over the
connection on file descriptor FD, in batches. Kept small on purpose: paho-mqtt and the
standard library, no pydantic, numpy or prometheus-client (about 25 MB resident).

The conversation, all pickled over one ``multiprocessing.connection.Connection``:

- parent -> child, first: ``("settings", dict, topic_filter, client_id, queue_max,
  queue_max_bytes, cpus, log_level)``; the dict is the ``[mqtt]`` section with the password
  in clear (a pipe between our own processes; never on a command line or in a log);
- child -> parent: ``("started", pid)`` or ``("fatal", error class name, message)``; then
  ``("m", [(topic, payload, receive time), ...])``, ``("s", state)``, ``("log", records)``;
  after ``"stop"`` from the parent, what is left and ``("end",)``.
"""

from __future__ import annotations

import collections
import contextlib
import logging
import os
import signal
import sys
import threading
import time
from multiprocessing.connection import Connection
from typing import Any

from .errors import BoutlineError
from .ingest import Ingest

BATCH = 2000  # messages per send (~1 MB of JSON frames)
_STATE_EVERY_S = 0.25


class _Secret:
    """The password, shaped like pydantic's SecretStr for Ingest."""

    def __init__(self, value: str) -> None:
        self._value = value

    def get_secret_value(self) -> str:
        return self._value

    def __repr__(self) -> str:
        return "_Secret('**********')"


class _Settings:
    """The ``[mqtt]`` section as plain attributes (validated by the parent already)."""

    def __init__(self, values: dict[str, Any]) -> None:
        for key, value in values.items():
            setattr(self, key, _Secret(value or "") if key == "password" else value)


class _Count:
    def __init__(self) -> None:
        self.value = 0.0

    def inc(self, n: float = 1.0) -> None:
        self.value += n

    def set(self, v: float) -> None:
        self.value = v


class _Counters:
    """The few counters Ingest touches; their values reach the gateway's telemetry."""

    def __init__(self) -> None:
        self.queue_dropped = _Count()
        self.queue_depth = _Count()
        self.broker_connected = _Count()
        self.broker_reconnects = _Count()


class _PipeLog(logging.Handler):
    """Collect log records for the parent (sent by the main thread)."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.records: collections.deque[tuple[int, str, str]] = collections.deque(maxlen=1000)

    def emit(self, record: logging.LogRecord) -> None:
        with contextlib.suppress(Exception):
            self.records.append((record.levelno, record.name, record.getMessage()))


def state(ing: Ingest, counters: _Counters) -> dict[str, Any]:
    return {
        "connected": ing.connected.is_set(),
        "subscribed": ing.subscribed.is_set(),
        "connects": ing.connects,
        "dropped": counters.queue_dropped.value,
        "depth": ing.queue.qsize(),
        "auth_error": None if ing.auth_error is None else str(ing.auth_error),
    }


def _changed(a: dict[str, Any], b: dict[str, Any]) -> bool:
    keys = ("connected", "subscribed", "connects", "auth_error")
    return any(a.get(k) != b.get(k) for k in keys)


def serve(conn: Connection) -> None:
    """Read the settings, run the ingest, pass its messages on until told to stop."""
    parent = os.getppid()
    kind, values, topic_filter, client_id, queue_max, queue_max_bytes, cpus, level = conn.recv()
    if kind != "settings":
        return
    if cpus and hasattr(os, "sched_setaffinity"):
        with contextlib.suppress(OSError):
            os.sched_setaffinity(0, set(cpus))  # before the network thread starts
    handler = _PipeLog()
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level)
    lock = threading.Lock()

    def send(item: Any) -> None:
        with lock:
            conn.send(item)

    counters = _Counters()
    ing = Ingest(
        _Settings(values),  # type: ignore[arg-type]
        topic_filter=topic_filter,
        queue_max=queue_max,
        queue_max_bytes=queue_max_bytes,
        telemetry=counters,  # type: ignore[arg-type]
        client_id=client_id,
    )
    # A full queue here means the gateway is behind: wait for it rather than drop what the
    # broker would otherwise keep (QoS 1). Up to the keep-alive, so that a pipeline stalled
    # longer (a wedged disk) still lets the connection live; then drop and count.
    ing.put_timeout_s = float(max(1, values.get("keepalive_s", 30)))
    try:
        try:
            ing.start()
        except BoutlineError as exc:
            send(("fatal", type(exc).__name__, str(exc)))
            return
        send(("started", os.getpid()))
        _loop(conn, send, ing, counters, handler, parent)
    except (BrokenPipeError, EOFError, ConnectionError):
        pass  # the parent is gone: nobody to give the messages to
    finally:
        with contextlib.suppress(Exception):
            ing.stop()


def _loop(
    conn: Connection, send: Any, ing: Ingest, counters: _Counters, handler: _PipeLog, parent: int
) -> None:
    last: dict[str, Any] = {}
    next_state = 0.0
    while True:
        msgs = ing.drain(BATCH, timeout_s=0.02)
        if msgs:
            send(("m", msgs))
        if handler.records:
            send(("log", [handler.records.popleft() for _ in range(len(handler.records))]))
        now = time.monotonic()
        st = state(ing, counters)
        if now >= next_state or _changed(st, last):
            send(("s", st))
            last, next_state = st, now + _STATE_EVERY_S
        if conn.poll() and conn.recv() == "stop":
            break
        if os.getppid() != parent:
            return  # the parent died without the pipe closing (it is shared further)
    # Disconnect cleanly (the session stays on the broker) while still passing messages on:
    # a network thread waiting on a full queue finishes its message once there is room.
    stopper = threading.Thread(target=ing.stop, name="ingest-stop", daemon=True)
    stopper.start()
    while stopper.is_alive():
        if msgs := ing.drain(BATCH, timeout_s=0.02):
            send(("m", msgs))
    while msgs := ing.drain(BATCH, timeout_s=0):
        send(("m", msgs))
    if handler.records:
        send(("log", list(handler.records)))
    send(("s", state(ing, counters)))
    send(("end",))


def main(argv: list[str]) -> int:
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the gateway decides when we stop
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    if len(argv) != 1 or not argv[0].isdigit():
        print("usage: python -m gateway.ingestchild FD (started by the gateway)", file=sys.stderr)
        return 2
    conn = Connection(int(argv[0]))
    try:
        serve(conn)
    except (BrokenPipeError, EOFError, ConnectionError):
        pass
    finally:
        conn.close()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
