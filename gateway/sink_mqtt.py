"""MQTT out, for barn displays: animal state, bout events, alerts, gateway status.

Topics (``<prefix>`` is ``mqtt.topic_prefix``, ``<site>`` is ``site.id``; payloads are UTF-8
JSON objects, documented in docs/mqtt-topics.md):

    <prefix>/<site>/animals/<animal>/state   retained   current behaviour, since, confidence
    <prefix>/<site>/events/bouts                        one message per closed bout
    <prefix>/<site>/alerts                   QoS 1      alerts (animal and gateway)
    <prefix>/<site>/gateway/status           retained   online/offline, last will "offline"

``<animal>`` is the animal id percent-encoded (RFC 3986, unreserved characters kept), so an
id with ``/``, ``+``, ``#`` or spaces stays one topic level: ``cow 17/b`` -> ``cow%2017%2Fb``.

A message counts as delivered when the broker acknowledged it (PUBACK at QoS 1; written to
the socket at QoS 0). Facts of a kind without a topic here (budgets, collar health, stats)
are not published; other modules add kinds with :func:`register_topic`.
"""

from __future__ import annotations

import contextlib
import json
import threading
import time
import urllib.parse
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from . import __version__
from .config import Settings
from .errors import ConfigError, SinkRejected, SinkUnavailable
from .ingest import secure_client
from .outbox import Record
from .types import CAUTION

__all__ = [
    "CAUTION",
    "Message",
    "MqttSink",
    "Topics",
    "animal_segment",
    "messages_for",
    "register_topic",
]


def animal_segment(animal: str) -> str:
    """An animal id as one topic level (percent-encoded; never empty, never a wildcard)."""
    if not animal:
        raise ValueError("an animal id is empty; it cannot name a topic")
    return urllib.parse.quote(animal, safe="")


@dataclass(frozen=True, slots=True)
class Message:
    topic: str
    payload: bytes
    qos: int
    retain: bool


@dataclass(frozen=True, slots=True)
class Topics:
    """Topic names and delivery options of one gateway."""

    prefix: str
    site: str
    qos: int = 1
    state_retained: bool = True

    @property
    def base(self) -> str:
        return f"{self.prefix}/{self.site}"

    def state(self, animal: str) -> str:
        return f"{self.base}/animals/{animal_segment(animal)}/state"

    @property
    def bouts(self) -> str:
        return f"{self.base}/events/bouts"

    @property
    def alerts(self) -> str:
        return f"{self.base}/alerts"

    @property
    def status(self) -> str:
        return f"{self.base}/gateway/status"


def _utc(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _json(payload: Mapping[str, Any]) -> bytes:
    # allow_nan=False: NaN is not JSON; such a fact is set aside instead of breaking displays.
    return json.dumps(payload, ensure_ascii=False, allow_nan=False, separators=(",", ":")).encode()


TopicFn = Callable[[Mapping[str, Any], Topics], list[Message]]
_TOPICS: dict[str, TopicFn] = {}


def register_topic(kind: str, fn: TopicFn, *, replace: bool = False) -> TopicFn:
    """Publish facts of ``kind`` as ``fn(fact, topics) -> [Message]``; returns ``fn``."""
    if kind in _TOPICS and not replace and _TOPICS[kind] is not fn:
        raise ValueError(f"a topic mapping for {kind!r} is already registered; pass replace=True")
    _TOPICS[kind] = fn
    return fn


def messages_for(fact: Mapping[str, Any], topics: Topics) -> list[Message]:
    """The messages for one fact; [] for kinds that are not published over MQTT."""
    fn = _TOPICS.get(str(fact.get("kind")))
    return [] if fn is None else fn(fact, topics)


def _state(fact: Mapping[str, Any], tp: Topics) -> list[Message]:
    payload = {
        "site": tp.site,
        "animal": fact["animal"],
        "behaviour": fact["behaviour"],
        "since": float(fact["since"]),
        "since_utc": _utc(float(fact["since"])),
        "confidence": float(fact["confidence"]),
        "previous": fact.get("previous"),
    }
    return [Message(tp.state(fact["animal"]), _json(payload), tp.qos, tp.state_retained)]


def _bout(fact: Mapping[str, Any], tp: Topics) -> list[Message]:
    start, end = float(fact["start"]), float(fact["end"])
    payload = {
        "site": tp.site,
        "animal": fact["animal"],
        "behaviour": fact["behaviour"],
        "start": start,
        "end": end,
        "start_utc": _utc(start),
        "end_utc": _utc(end),
        "duration_s": end - start,
        "mean_confidence": float(fact["mean_confidence"]),
        "no_data_s": float(fact.get("no_data_s", 0.0)),
    }
    return [Message(tp.bouts, _json(payload), tp.qos, False)]


def _alert(fact: Mapping[str, Any], tp: Topics) -> list[Message]:
    """Any alert fact as it is, plus scope and the caution; always QoS 1, never retained."""
    gateway = fact.get("kind") == "gateway_alert"
    payload: dict[str, Any] = {"site": tp.site, "scope": "gateway" if gateway else "animal"}
    payload.update({k: v for k, v in fact.items() if k != "kind"})
    if not gateway:
        payload["caution"] = CAUTION
    return [Message(tp.alerts, _json(payload), 1, False)]


register_topic("state_changed", _state)
register_topic("bout_closed", _bout)
register_topic("alert", _alert)
register_topic("gateway_alert", _alert)


class MqttSink:
    """Publishes facts to the broker; keeps the retained gateway status and its last will."""

    live = True  # needs no store: takes facts the store could not (Outputs.publish_live)

    def __init__(
        self,
        *,
        host: str,
        port: int,
        site: str,
        prefix: str = "barn",
        client_id: str = "boutline-gateway-out",
        qos: int = 1,
        state_retained: bool = True,
        username: str = "",
        password: str = "",
        protocol: str = "5",
        keepalive_s: int = 30,
        tls: bool = False,
        ca_file: str = "",
        cert_file: str = "",
        key_file: str = "",
        timeout_s: float = 10.0,
        name: str = "mqtt",
    ) -> None:
        self.name, self.host, self.port = name, host, port
        self.topics = Topics(prefix, site, qos, state_retained)
        self.client_id, self.keepalive_s, self.timeout_s = client_id, keepalive_s, timeout_s
        self._auth = (username, password)
        self._protocol = protocol
        self._tls = (tls, ca_file, cert_file, key_file)
        self._client: Any = None
        self._connected = threading.Event()
        self._connack: threading.Event = threading.Event()
        self._refused: str | None = None
        self._where = f"MQTT broker {host}:{port}"

    @classmethod
    def from_settings(cls, settings: Settings, name: str = "mqtt") -> MqttSink:
        mq = settings.mqtt
        return cls(
            host=mq.host,
            port=mq.port,
            site=settings.site.id,
            prefix=mq.topic_prefix,
            client_id=f"{mq.client_id[:60]}-out",
            qos=settings.outputs.qos,
            state_retained=settings.outputs.state_retained,
            username=mq.username,
            password=mq.password.get_secret_value(),
            protocol=mq.protocol,
            keepalive_s=mq.keepalive_s,
            tls=mq.tls,
            ca_file=mq.ca_file,
            cert_file=mq.cert_file,
            key_file=mq.key_file,
            name=name,
        )

    # ---- status payloads

    def _status(self, online: bool) -> bytes:
        payload: dict[str, Any] = {
            "site": self.topics.site,
            "status": "online" if online else "offline",
        }
        if online:
            now = time.time()
            payload.update(since=now, since_utc=_utc(now), version=__version__)
        return _json(payload)

    # ---- paho callbacks (paho's network thread)

    def _on_connect(self, client: Any, userdata: Any, flags: Any, reason: Any, props: Any) -> None:
        if reason.is_failure:
            self._refused = str(reason)
        else:
            self._refused = None
            self._connected.set()
            # After every (re)connect: the broker published our will if we dropped.
            client.publish(self.topics.status, self._status(True), 1, True)
        self._connack.set()

    def _on_disconnect(
        self, client: Any, userdata: Any, flags: Any, reason: Any, props: Any
    ) -> None:
        self._connected.clear()

    def _make_client(self) -> Any:
        import paho.mqtt.client as mqtt

        proto = mqtt.MQTTv5 if self._protocol == "5" else mqtt.MQTTv311
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=self.client_id, protocol=proto)
        c.will_set(self.topics.status, self._status(False), qos=1, retain=True)
        tls, ca, cert, key = self._tls
        secure_client(
            c,
            username=self._auth[0],
            password=self._auth[1],
            tls=tls,
            ca_file=ca,
            cert_file=cert,
            key_file=key,
        )
        c.connect_timeout = self.timeout_s
        c.reconnect_delay_set(1, 60)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        return c

    # ---- the sink surface

    def open(self) -> None:
        """Connect and wait for the broker's CONNACK; then the status is ``online``."""
        if self._client is not None and self._connected.is_set():
            return
        self._teardown()
        try:
            self._client = self._make_client()
        except ConfigError as exc:  # e.g. a TLS file not there yet: report, retry later
            raise SinkRejected(str(exc), "config") from exc
        self._connack.clear()
        try:
            self._client.connect(self.host, self.port, keepalive=self.keepalive_s)
        except (OSError, ValueError) as exc:
            self._teardown()
            raise SinkUnavailable(
                f"{self._where} does not answer ({exc}); check mqtt.host/port"
            ) from exc
        self._client.loop_start()
        if not self._connack.wait(self.timeout_s):
            self._teardown()
            raise SinkUnavailable(
                f"{self._where} did not answer CONNECT within {self.timeout_s:g} s"
            )
        if self._refused is not None:
            error = self._refusal()
            self._teardown()
            raise error

    def write(self, batch: Sequence[Record]) -> None:
        msgs: list[Message] = []
        for r in batch:
            try:
                msgs.extend(messages_for(r.fact, self.topics))
            except (KeyError, TypeError, ValueError) as exc:
                raise SinkRejected(
                    f"fact {r.id} ({r.kind}) cannot be published: {exc}", "unconvertible"
                ) from exc
        if not msgs:
            return
        if self._refused is not None:  # paho's reconnect was refused: the password changed
            raise self._refusal()
        if self._client is None or not self._connected.is_set():
            raise SinkUnavailable(
                f"{self._where} is not connected; paho reconnects in the background"
            )
        infos = []
        for m in msgs:
            info = self._client.publish(m.topic, m.payload, m.qos, m.retain)
            if info.rc != 0:
                raise SinkUnavailable(f"{self._where} did not take a message (paho rc {info.rc})")
            infos.append(info)
        deadline = time.monotonic() + self.timeout_s
        for info in infos:
            try:
                info.wait_for_publish(max(0.0, deadline - time.monotonic()))
            except (RuntimeError, ValueError) as exc:
                raise SinkUnavailable(f"{self._where} lost a message in flight ({exc})") from exc
            if not info.is_published():
                raise SinkUnavailable(
                    f"{self._where} did not acknowledge within {self.timeout_s:g} s"
                )

    def _refusal(self) -> SinkRejected:
        return SinkRejected(
            f"{self._where} refused the connection ({self._refused}); check mqtt.username"
            " and mqtt.password",
            "auth",
        )

    def close(self) -> None:
        """Say ``offline`` (retained) and disconnect; safe without open()."""
        if self._client is not None and self._connected.is_set():
            info = self._client.publish(self.topics.status, self._status(False), 1, True)
            with contextlib.suppress(RuntimeError, ValueError):  # going away regardless
                info.wait_for_publish(min(self.timeout_s, 5.0))
        self._teardown()

    def _teardown(self) -> None:
        c, self._client = self._client, None
        self._connected.clear()
        if c is not None:
            c.disconnect()
            c.loop_stop()
