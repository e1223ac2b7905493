"""The project's one exception tree.

Errors raised by paho-mqtt, influxdb-client, onnxruntime, sqlite3 and the file system are
translated at the boundary (``raise X from exc``) into these, with a message that says what
is wrong and what to do about it. The CLI prints ``Error: <message>`` and exits 1.

    BoutlineError
    ├── ConfigError          a config file, env override or option is wrong
    ├── DataError            recordings, observations or assignments are unusable
    ├── ModelError           a model file is missing, corrupt or breaks the contract
    ├── StoreError           the embedded SQLite store cannot be opened or written
    │   └── StoreFullError   the disk under the store is full
    ├── BrokerError          the MQTT broker cannot be reached
    │   └── BrokerAuthError  the broker refused our credentials (no retry)
    ├── SinkError            an output (InfluxDB, MQTT out) failed
    │   ├── SinkUnavailable  retry later: refused connection, timeout, 5xx, 429
    │   └── SinkRejected     will never succeed as sent: bad token, unknown bucket, bad point
    └── NotBuiltError        a command whose part is not built yet (CLI exits 2)

Wire-format problems are not exceptions: the decoder returns a ``Rejection`` value, so a
collar can never raise into the daemon.
"""

from __future__ import annotations

__all__ = [
    "BoutlineError",
    "BrokerAuthError",
    "BrokerError",
    "ConfigError",
    "DataError",
    "ModelError",
    "NotBuiltError",
    "SinkError",
    "SinkRejected",
    "SinkUnavailable",
    "StoreError",
    "StoreFullError",
]


class BoutlineError(Exception):
    """Base of every error Boutline raises on purpose."""


class ConfigError(BoutlineError):
    """A configuration file, environment override or command-line option is wrong.

    ``problems`` holds one full sentence per problem (key, bad value, what is allowed).
    """

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems = problems or [message]


class DataError(BoutlineError):
    """Recordings, observation intervals or collar assignments cannot be used."""


class ModelError(BoutlineError):
    """A model file is missing, unreadable, or breaks the model contract."""


class StoreError(BoutlineError):
    """The embedded store cannot be opened, read or written."""


class StoreFullError(StoreError):
    """The disk holding the store is full; classification goes on, storing resumes later."""


class BrokerError(BoutlineError):
    """The MQTT broker cannot be reached or dropped the connection."""


class BrokerAuthError(BrokerError):
    """The broker refused the credentials; retrying will not help."""


class SinkError(BoutlineError):
    """An output sink failed to accept a batch."""


class SinkUnavailable(SinkError):
    """Transient: retry with backoff. ``retry_after`` is a server hint in seconds, if any."""

    def __init__(self, message: str, retry_after: float | None = None) -> None:
        super().__init__(message)
        self.retry_after = retry_after


class SinkRejected(SinkError):
    """Permanent: the batch will never be accepted as sent; set it aside and report once."""

    def __init__(self, message: str, cause: str = "rejected") -> None:
        super().__init__(message)
        self.cause = cause


class NotBuiltError(BoutlineError):
    """A command whose part is not built yet; the CLI says so and exits 2."""
