"""systemd readiness and watchdog notifications, without a dependency.

The protocol is sd_notify(3): one datagram of newline-separated ``KEY=VALUE`` lines sent to
the AF_UNIX socket named by ``$NOTIFY_SOCKET`` (a path, or an abstract name written with a
leading ``@``). The unit (deploy/systemd/boutline.service) has ``Type=notify`` and
``WatchdogSec=``: systemd waits for ``READY=1`` and restarts the daemon when ``WATCHDOG=1``
stops arriving. Outside systemd there is no ``NOTIFY_SOCKET`` and every call does nothing.

The daemon calls, from its main loop (never from a helper thread, so a stuck loop is seen):

>>> n = Notifier(env={})        # not under systemd: disabled, calls return False
>>> n.enabled, n.ready("20 collars"), n.ping(now=0.0), n.stopping()
(False, False, False, False)
"""

from __future__ import annotations

import logging
import os
import socket
import time
from collections.abc import Mapping

__all__ = ["Notifier", "watchdog_interval"]

log = logging.getLogger(__name__)

# A status line is for `systemctl status`; a few hundred characters say all there is to say.
_MAX_STATUS = 512


def watchdog_interval(env: Mapping[str, str] | None = None) -> float | None:
    """Seconds within which systemd expects ``WATCHDOG=1``, or None when no watchdog is set.

    ``WATCHDOG_USEC`` holds the interval; ``WATCHDOG_PID``, when set, names the one process it
    is meant for (sd_watchdog_enabled(3)).

    >>> watchdog_interval({"WATCHDOG_USEC": "60000000"})
    60.0
    >>> watchdog_interval({"WATCHDOG_USEC": "60000000", "WATCHDOG_PID": "1"}) is None
    True
    """
    env = os.environ if env is None else env
    raw = env.get("WATCHDOG_USEC", "")
    pid = env.get("WATCHDOG_PID", "")
    try:
        usec = int(raw)
        if pid and int(pid) != os.getpid():
            return None
    except ValueError:
        return None
    return usec / 1e6 if usec > 0 else None


def _address(value: str) -> str | bytes | None:
    if value.startswith("/"):
        return value
    if value.startswith("@") and len(value) > 1:
        return b"\0" + value[1:].encode()  # Linux abstract socket namespace
    return None


def _clean(text: str) -> str:
    # A newline inside a value would start a forged assignment of its own.
    return " ".join(text.split())[:_MAX_STATUS]


class Notifier:
    """Sends readiness, status, reload, stop and watchdog notifications to systemd."""

    def __init__(self, env: Mapping[str, str] | None = None) -> None:
        env = os.environ if env is None else env
        value = env.get("NOTIFY_SOCKET", "")
        self.address = _address(value)
        if value and self.address is None:
            log.warning("NOTIFY_SOCKET=%r is neither a path nor an @abstract name; ignored", value)
        self.watchdog_s = watchdog_interval(env) if self.address is not None else None
        self._sock: socket.socket | None = None
        self._last_ping = float("-inf")
        self._failed = False

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def send(self, *assignments: str) -> bool:
        """Send ``KEY=VALUE`` assignments in one datagram; True if it was sent."""
        if self.address is None:
            return False
        for a in assignments:
            key, eq, _ = a.partition("=")
            if not eq or not key or "\n" in a:
                raise ValueError(f"not a single KEY=VALUE assignment: {a!r}")
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
            self._sock.sendto("\n".join(assignments).encode(), self.address)
        except OSError as exc:
            # systemd gone or socket removed: the watchdog (if any) will act; say it once.
            if not self._failed:
                log.warning("cannot notify systemd at %s: %s", self.address, exc.strerror)
                self._failed = True
            return False
        self._failed = False
        return True

    def ready(self, status: str = "") -> bool:
        """The daemon is up: broker connected and model loaded."""
        return self.send("READY=1", *([f"STATUS={_clean(status)}"] if status else []))

    def status(self, text: str) -> bool:
        return self.send(f"STATUS={_clean(text)}")

    def reloading(self) -> bool:
        """A reload (SIGHUP: model, assignments) has begun; follow it with ready()."""
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self.send("RELOADING=1", f"MONOTONIC_USEC={usec}")

    def stopping(self) -> bool:
        return self.send("STOPPING=1")

    def ping(self, now: float | None = None) -> bool:
        """``WATCHDOG=1`` at most every half interval (sd_watchdog_enabled(3) advice).

        Call it on every pass of the main loop; it sends only when due. True if sent.
        """
        if self.watchdog_s is None:
            return False
        now = time.monotonic() if now is None else now
        if now - self._last_ping < self.watchdog_s / 2:
            return False
        sent = self.send("WATCHDOG=1")
        if sent:
            self._last_ping = now
        return sent

    def close(self) -> None:
        """Close the socket; safe to call twice and without any notification sent."""
        if self._sock is not None:
            self._sock.close()
            self._sock = None

    def __enter__(self) -> Notifier:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
