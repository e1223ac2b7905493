"""Plain paho clients for the reliability tests: a recording subscriber and a batch publisher."""

from __future__ import annotations

import queue
import ssl
import threading
import time
from collections.abc import Iterable
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

__all__ = ["Subscriber", "client", "publish_all"]


def client(
    host: str,
    port: int,
    *,
    client_id: str = "",
    username: str = "",
    password: str = "",
    ca_file: str = "",
    clean: bool = True,
) -> mqtt.Client:
    """A connected MQTT 3.1.1 client with its network loop running."""
    c = mqtt.Client(
        CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv311,
        clean_session=clean,
    )  # fmt: skip
    c.max_queued_messages_set(0)
    c.max_inflight_messages_set(200)
    if username:
        c.username_pw_set(username, password)
    if ca_file:
        c.tls_set(ca_certs=ca_file, cert_reqs=ssl.CERT_REQUIRED)
    connected = threading.Event()
    c.on_connect = lambda *_a: connected.set()
    c.connect(host, port, keepalive=30)
    c.loop_start()
    if not connected.wait(10):
        c.loop_stop()
        raise AssertionError(f"no CONNACK from {host}:{port}")
    return c


def publish_all(c: mqtt.Client, messages: Iterable[tuple[str, bytes]], qos: int = 1) -> int:
    """Publish and wait until the broker has taken every message (PUBACK at QoS 1)."""
    infos = [c.publish(t, p, qos=qos) for t, p in messages]
    for info in infos:
        info.wait_for_publish(30)
        assert info.is_published(), "the broker did not take a message within 30 s"
    return len(infos)


class Subscriber:
    """Subscribes to a filter and keeps every message (topic, payload, retained)."""

    def __init__(self, host: str, port: int, topic_filter: str, **kw: Any) -> None:
        self.messages: queue.Queue[tuple[str, bytes, bool]] = queue.Queue()
        self._subscribed = threading.Event()
        self.c = client(host, port, **kw)
        self.c.on_message = lambda _c, _u, m: self.messages.put((m.topic, m.payload, m.retain))
        self.c.on_subscribe = lambda *_a: self._subscribed.set()
        self.c.subscribe(topic_filter, qos=1)
        assert self._subscribed.wait(10), "no SUBACK"

    def collect(
        self, quiet_s: float = 1.0, timeout_s: float = 30.0
    ) -> list[tuple[str, bytes, bool]]:
        """Messages until none came for ``quiet_s`` (or ``timeout_s`` passed)."""
        out = []
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            try:
                out.append(self.messages.get(timeout=quiet_s))
            except queue.Empty:
                break
        return out

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()
