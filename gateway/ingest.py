"""MQTT ingest: a paho-mqtt 2.x client subscribed to the collar topics, QoS 1.

- MQTT 5 by default (3.1.1 as an option), a persistent session: a fixed client id, clean
  start off and a session expiry, so frames the broker queued while the gateway was away are
  delivered when it comes back.
- Reconnects with capped exponential backoff (``reconnect_min_s`` doubling up to
  ``reconnect_max_s``). Credentials the broker refuses stop the client for good and surface
  as :class:`~gateway.errors.BrokerAuthError`: retrying would only lock the account.
- TLS (a CA file, optionally a client certificate) and username/password.
- Nothing runs on the network thread but an append: ``on_message`` puts
  ``(topic, payload, receive time)`` into a bounded queue and returns; decoding and all
  further work happen in the daemon's loop, which takes the queue in batches (:meth:`drain`).
  A full queue blocks the network thread briefly (the broker then holds further QoS 1
  messages), and only after that drops and counts.

>>> collar_filter("barn", "north-shed")
'barn/north-shed/collars/+/accel'
"""

from __future__ import annotations

import logging
import queue
import re
import ssl
import threading
import time
from typing import TYPE_CHECKING, Any

from .errors import BrokerAuthError, BrokerError, ConfigError
from .ratelog import RateLimitedLog

if TYPE_CHECKING:  # not imported at run time: the ingest process stays small (ingestchild.py)
    from .config import MqttSettings
    from .telemetry import Telemetry

__all__ = [
    "AUTH_FAILURES",
    "QUEUE_MAX",
    "QUEUE_MAX_BYTES",
    "Ingest",
    "Message",
    "collar_filter",
    "validate_filter",
]

log = logging.getLogger("boutline.ingest")

Message = tuple[str, bytes, float]  # topic, payload, gateway receive time (unix s)

# CONNACK reason codes that mean "your credentials are not accepted" (MQTT 5.0 section
# 3.2.2.2; 3.1.1 return codes 4 and 5 map onto 0x86 and 0x87 in paho).
AUTH_FAILURES = {
    0x85: "client identifier not valid",
    0x86: "bad user name or password",
    0x87: "not authorized",
    0x8A: "banned",
    0x8C: "bad authentication method",
}
# Two seconds of a 10,000-collar herd: a longer backlog waits at the broker (QoS 1,
# backpressure), not in our memory (~550 bytes a JSON frame; docs/performance.md).
QUEUE_MAX = 20_000
QUEUE_MAX_BYTES = 128 * 2**20
_PUT_TIMEOUT_S = 1.0  # how long the network thread waits on a full queue before dropping
_LEVEL = r"[A-Za-z0-9_.-]+"
_FILTER_RE = re.compile(rf"^({_LEVEL}|\+)(/({_LEVEL}|\+))*(/#)?$|^#$")


def collar_filter(prefix: str, site: str) -> str:
    """The subscription for one site's collars."""
    return f"{prefix.strip('/')}/{site}/collars/+/accel"


def validate_filter(topic_filter: str) -> str:
    """Refuse a malformed topic filter at start-up, not at the first message."""
    if len(topic_filter.encode()) > 65535 or not _FILTER_RE.match(topic_filter):
        raise ConfigError(
            f"topic filter {topic_filter[:80]!r} is not valid: use levels of A-Z a-z 0-9 _ . -"
            " separated by '/', with '+' for a whole level and '#' only at the end"
        )
    return topic_filter


# One more byte than the largest payload limit the settings allow (limits.max_payload_bytes).
_KEEP_BYTES = 1_048_576 + 1


def secure_client(
    client: Any,
    *,
    username: str,
    password: str,
    tls: bool,
    ca_file: str = "",
    cert_file: str = "",
    key_file: str = "",
) -> None:
    """Credentials and TLS for any of our paho clients (ingest and the MQTT sink alike).

    Unusable TLS files raise ConfigError naming the settings to check.
    """
    if username:
        client.username_pw_set(username, password or None)
    if not tls:
        return
    try:
        client.tls_set(
            ca_certs=ca_file or None,
            certfile=cert_file or None,
            keyfile=key_file or None,
            cert_reqs=ssl.CERT_REQUIRED,
            tls_version=ssl.PROTOCOL_TLS_CLIENT,
        )
    except (OSError, ssl.SSLError, ValueError) as exc:
        raise ConfigError(
            f"mqtt TLS files cannot be used ({exc}); check mqtt.ca_file, cert_file, key_file"
        ) from exc


class Ingest:
    """Subscribe, keep the session, and queue raw messages for the daemon."""

    def __init__(
        self,
        settings: MqttSettings,
        *,
        topic_filter: str,
        queue_max: int = QUEUE_MAX,
        queue_max_bytes: int = QUEUE_MAX_BYTES,
        telemetry: Telemetry | None = None,
        client_id: str | None = None,
    ) -> None:
        self.settings = settings
        self.topic_filter = validate_filter(topic_filter)
        self.queue: queue.Queue[Message] = queue.Queue(maxsize=queue_max)
        # The queue is bounded in bytes too: a flood of large payloads must not grow memory.
        self.queue_max_bytes = queue_max_bytes
        self._queued_bytes = 0
        self._bytes_lock = threading.Lock()
        if telemetry is None:
            from .telemetry import Telemetry

            telemetry = Telemetry()
        self.telemetry = telemetry
        self.client_id = client_id or settings.client_id
        self.connected = threading.Event()
        self.subscribed = threading.Event()
        self.auth_error: BrokerAuthError | None = None
        self.connects = 0
        self.put_timeout_s = _PUT_TIMEOUT_S
        self._client: Any = None
        self._thread: threading.Thread | None = None
        self._stopping = False
        self._warn = RateLimitedLog(log, 30.0)

    # ------------------------------------------------------------------ network thread

    def on_message(self, client: Any, userdata: Any, message: Any) -> None:
        """paho callback: enqueue and return; the only work done on the network thread."""
        payload = message.payload
        if len(payload) > _KEEP_BYTES:
            # Longer than any allowed payload: keep just enough for the decoder to say oversize.
            payload = payload[:_KEEP_BYTES]
        n = len(payload)
        with self._bytes_lock:
            if self._queued_bytes + n > self.queue_max_bytes:
                self.telemetry.queue_dropped.inc()
                return
            self._queued_bytes += n
        try:
            self.queue.put((message.topic, payload, time.time()), timeout=self.put_timeout_s)
        except queue.Full:
            with self._bytes_lock:
                self._queued_bytes -= n
            self.telemetry.queue_dropped.inc()

    def _on_connect(
        self, client: Any, userdata: Any, flags: Any, reason_code: Any, properties: Any
    ) -> None:
        code = int(getattr(reason_code, "value", reason_code))
        if code in AUTH_FAILURES or (code in (4, 5) and self.settings.protocol == "3.1.1"):
            why = AUTH_FAILURES.get(code, "bad user name or password")
            self.auth_error = BrokerAuthError(
                f"broker {self.settings.host}:{self.settings.port} refused the connection"
                f" ({why}); check mqtt.username and the password (BOUTLINE_MQTT_PASSWORD or"
                " mqtt.password_file)"
            )
            log.error("%s; not retrying", self.auth_error)
            self._stopping = True
            client.disconnect()
            return
        if code != 0:
            self._warn.warning("connack", "broker refused the connection: %s", reason_code)
            return
        self.connects += 1
        self.telemetry.broker_reconnects.inc()
        self.telemetry.broker_connected.set(1)
        present = bool(getattr(flags, "session_present", False))
        log.info(
            "connected to %s:%s as %s (session %s)",
            self.settings.host,
            self.settings.port,
            self.client_id,
            "resumed" if present else "new",
        )
        # Subscribing again on a resumed session is harmless and covers a broker that lost it.
        client.subscribe(self.topic_filter, qos=self.settings.qos)
        self.connected.set()

    def _on_subscribe(self, client: Any, userdata: Any, mid: Any, codes: Any, props: Any) -> None:
        if any(int(getattr(c, "value", c)) >= 0x80 for c in codes):
            log.error("broker refused the subscription to %s: %s", self.topic_filter, codes)
            return
        self.subscribed.set()

    def _on_disconnect(
        self, client: Any, userdata: Any, flags: Any, reason_code: Any, properties: Any
    ) -> None:
        self.connected.clear()
        self.subscribed.clear()
        self.telemetry.broker_connected.set(0)
        if not self._stopping:
            self._warn.warning(
                "disconnect",
                "lost the broker (%s); reconnecting with backoff up to %g s",
                reason_code,
                self.settings.reconnect_max_s,
            )

    def _on_connect_fail(self, client: Any, userdata: Any) -> None:
        # paho does not say why; with TLS an untrusted certificate looks the same as no broker
        hint = (
            " or its TLS certificate is not trusted (check mqtt.ca_file)"
            if self.settings.tls
            else ""
        )
        self._warn.warning(
            "connect_fail",
            "cannot reach the broker at %s:%s%s; retrying with backoff up to %g s",
            self.settings.host,
            self.settings.port,
            hint,
            self.settings.reconnect_max_s,
        )

    # ------------------------------------------------------------------ control

    def _make_client(self) -> Any:
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        s = self.settings
        v5 = s.protocol == "5"
        kwargs: dict[str, Any] = {
            "callback_api_version": CallbackAPIVersion.VERSION2,
            "client_id": self.client_id,
            "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311,
        }
        if not v5:
            kwargs["clean_session"] = False
        client = mqtt.Client(**kwargs)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_message = self.on_message
        client.on_subscribe = self._on_subscribe
        client.on_connect_fail = self._on_connect_fail
        # paho doubles the delay from min to max and resets it after a successful CONNACK
        client.reconnect_delay_set(min_delay=s.reconnect_min_s, max_delay=s.reconnect_max_s)  # type: ignore[arg-type]
        secure_client(
            client,
            username=s.username,
            password=s.password.get_secret_value(),
            tls=s.tls,
            ca_file=s.ca_file,
            cert_file=s.cert_file,
            key_file=s.key_file,
        )
        connect_kwargs: dict[str, Any] = {"keepalive": s.keepalive_s}
        if v5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = s.session_expiry_s
            connect_kwargs.update(clean_start=False, properties=props)
        self._connect_kwargs = connect_kwargs
        return client

    def start(self) -> None:
        """Connect in the background; returns at once. Reconnects on its own."""
        if self._client is not None:
            return
        self._stopping = False
        self._client = self._make_client()
        try:
            self._client.connect_async(
                self.settings.host, self.settings.port, **self._connect_kwargs
            )
        except (OSError, ValueError) as exc:
            raise BrokerError(
                f"cannot start a connection to {self.settings.host}:{self.settings.port}: {exc}"
            ) from exc
        # paho's loop_forever in a thread of ours rather than loop_start(): without paho's
        # own thread marker each PUBACK is written from the callback at once instead of after
        # a wake-up of the select loop, ~10 us less per QoS 1 message (docs/performance.md).
        # Reconnects and backoff are loop_forever's, exactly as under loop_start.
        self._thread = threading.Thread(
            target=self._client.loop_forever,
            kwargs={"retry_first_connection": True},
            name=f"mqtt-ingest-{self.client_id}",
            daemon=True,
        )
        self._thread.start()

    def wait_connected(self, timeout_s: float = 10.0) -> bool:
        """Wait for the subscription to be in place; raise BrokerAuthError if refused."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.auth_error is not None:
                raise self.auth_error
            if self.subscribed.wait(0.05):
                return True
        if self.auth_error is not None:
            raise self.auth_error
        return False

    def check(self) -> None:
        """Raise the fatal error, if the broker refused us; the daemon calls this every tick."""
        if self.auth_error is not None:
            raise self.auth_error

    def drain(self, max_items: int = 5000, timeout_s: float = 0.1) -> list[Message]:
        """Up to ``max_items`` queued messages; waits up to ``timeout_s`` for the first one."""
        q = self.queue
        out: list[Message] = []
        try:
            out.append(q.get(timeout=timeout_s) if timeout_s > 0 else q.get_nowait())
            while len(out) < max_items:
                out.append(q.get_nowait())
        except queue.Empty:
            pass
        if out:
            taken = sum(len(m[1]) for m in out)
            with self._bytes_lock:
                self._queued_bytes -= taken
        self.telemetry.queue_depth.set(q.qsize())
        return out

    def stop(self) -> None:
        """Disconnect cleanly (the session stays on the broker) and end the network thread."""
        client, self._client = self._client, None
        if client is None:
            return
        self._stopping = True
        thread, self._thread = self._thread, None
        try:
            client.disconnect()
        finally:
            # loop_forever returns once disconnected; a backoff wait notices within 1 s
            if thread is not None:
                thread.join(timeout=10.0)
        self.connected.clear()
        self.subscribed.clear()
        self.telemetry.broker_connected.set(0)
