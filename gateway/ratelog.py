"""RateLimitedLog: at most one log line per key per interval (bad input must not fill a disk).

In a module of its own, without prometheus-client, so that the MQTT ingest process
(gateway/ingestchild.py) stays small.
"""

from __future__ import annotations

import logging
import time

__all__ = ["RateLimitedLog"]


class RateLimitedLog:
    """Log at most one line per key per ``every_s`` seconds, saying how many were suppressed.

    Bad messages are logged with their collar id and a truncated payload, then skipped; a
    collar sending garbage at 10 Hz must not fill the disk.
    """

    def __init__(self, logger: logging.Logger, every_s: float = 60.0) -> None:
        self._log = logger
        self._every = every_s
        self._last: dict[str, tuple[float, int]] = {}

    def warning(self, key: str, msg: str, *args: object, now: float | None = None) -> bool:
        now = time.monotonic() if now is None else now
        last, suppressed = self._last.get(key, (-1e18, 0))
        if now - last < self._every:
            self._last[key] = (last, suppressed + 1)
            return False
        if len(self._last) > 10_000:  # a flood of distinct keys must not grow memory unbounded
            self._last.clear()
        self._last[key] = (now, 0)
        if suppressed:
            msg += f" ({suppressed} similar suppressed)"
        self._log.warning(msg, *args)
        return True
