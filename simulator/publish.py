"""Publish a simulated herd to an MQTT broker: real time, at a speed factor, or flat out.

Each process owns the collars ``i % processes == k`` of the herd (simulator.herd shards),
generates their frames in vectorised blocks and publishes them on
``<prefix>/<site>/collars/<collar>/accel`` with paho-mqtt 2.x. Pacing follows the time each
frame leaves its collar: frame sent at simulated second ``s`` goes out at wall time
``s / speed`` after the start (flat out: as fast as the broker takes them). The number of
messages handed to paho but not yet written (QoS 0) or acknowledged (QoS 1) is bounded, so a
slow broker slows the publisher down instead of filling memory.

Every run is bounded by ``duration_s`` of simulated time and optionally by wall time.
"""

from __future__ import annotations

import contextlib
import multiprocessing as mp
import os
import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from gateway.errors import BrokerAuthError, BrokerError, ConfigError

from .herd import Herd

__all__ = ["PublishResult", "publish", "publish_shard"]

_MAX_PENDING = 5000  # messages handed to paho and not yet out (backpressure)
_REPORT_EVERY_S = 0.5


@dataclass
class PublishResult:
    """What a publishing run did."""

    frames: int
    bytes: int
    collars: int
    simulated_s: float
    wall_s: float
    stopped_by: str  # "duration" | "wall" | "interrupt"

    @property
    def frames_per_s(self) -> float:
        return self.frames / self.wall_s if self.wall_s > 0 else 0.0


class _Link:
    """A paho client that counts what left, with connection errors translated."""

    def __init__(self, host: str, port: int, client_id: str, qos: int, timeout_s: float) -> None:
        import paho.mqtt.client as mqtt

        self.qos = qos
        self.done = 0
        self._lock = threading.Lock()
        self._connected = threading.Event()
        self._reason: str | None = None
        self._auth_refused = False
        self.client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv311
        )
        # Credentials as for the gateway, from the environment (inherited by worker processes):
        # a demo herd logs in to a broker that refuses anonymous clients (deploy/mosquitto/acl).
        if os.environ.get("BOUTLINE_MQTT_USERNAME"):
            self.client.username_pw_set(
                os.environ["BOUTLINE_MQTT_USERNAME"], os.environ.get("BOUTLINE_MQTT_PASSWORD", "")
            )
        self.client.max_inflight_messages_set(1000)
        self.client.max_queued_messages_set(0)
        self.client.on_connect = self._on_connect
        self.client.on_publish = self._on_publish
        try:
            self.client.connect(host, port, keepalive=30)
        except (OSError, ValueError) as exc:
            raise BrokerError(
                f"cannot reach the MQTT broker at {host}:{port} ({exc}); check --host and"
                " --port and that the broker is running"
            ) from exc
        self.client.loop_start()
        if not self._connected.wait(timeout_s) or self._reason:
            self.close()
            if self._auth_refused:
                raise BrokerAuthError(
                    f"the broker at {host}:{port} refused the connection ({self._reason});"
                    " check the credentials and the broker's access rules"
                )
            raise BrokerError(
                f"the broker at {host}:{port} did not accept the connection within"
                f" {timeout_s:g} s ({self._reason or 'no answer'}); check that it is an MQTT"
                " broker"
            )

    def _on_connect(self, client, userdata, flags, reason_code, properties=None) -> None:
        if reason_code.is_failure:
            self._reason = str(reason_code)
            self._auth_refused = reason_code.value in (0x86, 0x87, 4, 5)
        self._connected.set()

    def _on_publish(self, client, userdata, mid, reason_code=None, properties=None) -> None:
        with self._lock:
            self.done += 1

    def publish(self, topic: str, payload: bytes) -> None:
        info = self.client.publish(topic, payload, qos=self.qos)
        if info.rc != 0:
            raise BrokerError(
                f"publishing to the broker failed (paho rc {info.rc}); the connection was lost"
            )

    def drain(self, sent: int, timeout_s: float) -> bool:
        """Wait until everything handed to paho is out (and acknowledged at QoS 1)."""
        deadline = time.monotonic() + timeout_s
        while self.done < sent and time.monotonic() < deadline:
            time.sleep(0.01)
        return self.done >= sent

    def close(self) -> None:
        with contextlib.suppress(Exception):
            self.client.disconnect()
        with contextlib.suppress(Exception):
            self.client.loop_stop()


def publish_shard(
    *,
    host: str,
    port: int,
    site: str,
    prefix: str,
    herd_kwargs: dict,
    shard: tuple[int, int],
    speed: float | None,
    fmt: str,
    qos: int,
    duration_s: float,
    max_wall_s: float | None = None,
    report: Callable[[int, int, float], None] | None = None,
    stop: threading.Event | None = None,
    connect_timeout_s: float = 10.0,
) -> PublishResult:
    """Publish one shard of a herd; ``report(frames, bytes, simulated_s)`` now and then."""
    from gateway.types import Frame
    from gateway.wire import collar_topic, encode_binary, encode_json

    herd = Herd(**herd_kwargs, days=duration_s / 86400.0, shard=shard).endless()
    ids = [herd.collar_ids[i] for i in herd.local]
    topics = [collar_topic(prefix, site, c) for c in ids]
    range_g = herd.sensor.range_g
    k, p = shard
    link = _Link(host, port, f"boutline-sim-{site}-{k}of{p}-{herd.seed}", qos, connect_timeout_s)
    sent = nbytes = 0
    sim_s = 0.0
    stopped_by = "duration"
    wall0 = time.monotonic()
    last_report = wall0
    try:
        for block in herd.blocks():
            if not len(block):
                continue
            seqs = (block.seq % 2**32).tolist()
            rows = block.row.tolist()
            ts = block.t.tolist()
            volts = block.battery_v.tolist()
            sent_at = (block.sent - herd.start).tolist()
            for j, r in enumerate(rows):
                if speed is not None:
                    lag = wall0 + sent_at[j] / speed - time.monotonic()
                    if lag > 0:
                        time.sleep(lag)
                while sent - link.done > _MAX_PENDING:
                    time.sleep(0.001)
                frame = Frame(ids[r], seqs[j], ts[j], herd.hz, block.acc[j], volts[j])
                payload = (
                    encode_json(frame) if fmt == "json" else encode_binary(frame, range_g=range_g)
                )
                link.publish(topics[r], payload)
                sent += 1
                nbytes += len(payload)
                now = time.monotonic()
                if now - last_report >= _REPORT_EVERY_S:
                    last_report = now
                    sim_s = sent_at[j]
                    if report:
                        report(sent, nbytes, sim_s)
                    if stop is not None and stop.is_set():
                        stopped_by = "interrupt"
                        break
                    if max_wall_s is not None and now - wall0 >= max_wall_s:
                        stopped_by = "wall"
                        break
            else:
                sim_s = float(block.sent[-1] - herd.start)
                continue
            break
        if stopped_by == "duration":
            sim_s = duration_s
        if not link.drain(sent, timeout_s=30.0):
            raise BrokerError(
                f"{sent - link.done} of {sent} messages were still not out after 30 s;"
                " the broker is too slow or the connection stalled"
            )
    finally:
        link.close()
    wall = time.monotonic() - wall0
    if report:
        report(sent, nbytes, sim_s)
    return PublishResult(sent, nbytes, len(ids), sim_s, wall, stopped_by)


def _child(kw: dict, k: int, q) -> None:
    """Process entry: publish one shard, send progress and the result (or error) home."""

    def report(frames: int, nbytes: int, sim_s: float) -> None:
        q.put(("progress", k, frames, nbytes, sim_s))

    try:
        kw = dict(kw)
        p = kw.pop("processes")
        res = publish_shard(**kw, shard=(k, p), report=report)
        q.put(("done", k, res))
    except Exception as exc:  # noqa: BLE001 - the parent re-raises it as one error line
        q.put(("error", k, exc))


def publish(
    *,
    host: str = "127.0.0.1",
    port: int = 1883,
    site: str = "demo-farm",
    prefix: str = "barn",
    herd_kwargs: dict,
    speed: float | None = 1.0,
    fmt: str = "json",
    qos: int = 0,
    processes: int = 1,
    duration_s: float = 60.0,
    max_wall_s: float | None = None,
    progress: Callable[[int, int, float], None] | None = None,
) -> PublishResult:
    """Publish a herd from ``processes`` processes; returns the combined result.

    ``progress(frames, bytes, simulated_s)`` gets totals over all processes (simulated time
    is the slowest process's). ``speed=None`` publishes flat out.
    """
    problems = []
    if fmt not in ("json", "binary"):
        problems.append(f"unknown frame format {fmt!r}; choose json or binary.")
    if qos not in (0, 1):
        problems.append(f"QoS {qos!r} is not supported; choose 0 or 1.")
    if speed is not None and not (0 < speed <= 1e6):
        problems.append(f"speed {speed!r} must be > 0 (1 = real time), or use --flat-out.")
    if not isinstance(processes, int) or not 1 <= processes <= 64:
        problems.append(f"processes {processes!r} must be 1..64.")
    if not 0 < duration_s <= 366 * 86400:
        problems.append(f"duration {duration_s!r} s must be > 0 and at most a year.")
    if max_wall_s is not None and max_wall_s <= 0:
        problems.append(f"wall-time limit {max_wall_s!r} s must be > 0.")
    if not isinstance(port, int) or not 0 < port < 65536:
        problems.append(f"port {port!r} must be 1..65535.")
    from gateway.wire import COLLAR_ID_RE

    if not COLLAR_ID_RE.fullmatch(site):
        problems.append(f"site {site!r} must be 1-64 of A-Z a-z 0-9 _ . -.")
    if not prefix.strip("/") or any(c in prefix for c in "+#"):
        problems.append(f"topic prefix {prefix!r} must be non-empty, without + or #.")
    if problems:
        raise ConfigError(problems[0], problems)
    Herd(**herd_kwargs, days=duration_s / 86400.0)  # parameter check before any process starts
    kw = dict(
        host=host, port=port, site=site, prefix=prefix.strip("/"), herd_kwargs=herd_kwargs,
        speed=speed, fmt=fmt, qos=qos, duration_s=duration_s, max_wall_s=max_wall_s,
    )  # fmt: skip
    if processes == 1:
        return publish_shard(**kw, shard=(0, 1), report=progress)
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    procs = [
        ctx.Process(target=_child, args=(dict(kw, processes=processes), k, q), daemon=True)
        for k in range(processes)
    ]
    wall0 = time.monotonic()
    for pr in procs:
        pr.start()
    latest = {k: (0, 0, 0.0) for k in range(processes)}
    results: dict[int, PublishResult] = {}
    error: Exception | None = None
    try:
        while len(results) < processes and error is None:
            try:
                msg = q.get(timeout=1.0)
            except queue.Empty:
                dead = [k for k, pr in enumerate(procs) if not pr.is_alive() and k not in results]
                if dead:
                    # a child may have put its result just before exiting: read once more
                    with contextlib.suppress(queue.Empty):
                        msg = q.get(timeout=2.0)
                        _take(msg, latest, results)
                        continue
                    raise BrokerError(
                        f"publishing process {dead[0]} ended without a result"
                    ) from None
                continue
            error = _take(msg, latest, results)
            if progress:
                progress(
                    sum(v[0] for v in latest.values()),
                    sum(v[1] for v in latest.values()),
                    min(v[2] for v in latest.values()),
                )
    finally:
        for pr in procs:
            pr.join(timeout=5.0 if error is None else 0.5)
            if pr.is_alive():
                pr.terminate()
                pr.join(timeout=5.0)
    if error is not None:
        raise error
    wall = time.monotonic() - wall0
    rs = list(results.values())
    stopped = "duration" if all(r.stopped_by == "duration" for r in rs) else rs[0].stopped_by
    return PublishResult(
        frames=sum(r.frames for r in rs),
        bytes=sum(r.bytes for r in rs),
        collars=sum(r.collars for r in rs),
        simulated_s=min(r.simulated_s for r in rs),
        wall_s=wall,
        stopped_by=stopped,
    )


def _take(msg: tuple, latest: dict, results: dict) -> Exception | None:
    kind, k = msg[0], msg[1]
    if kind == "progress":
        latest[k] = (msg[2], msg[3], msg[4])
    elif kind == "done":
        res: PublishResult = msg[2]
        results[k] = res
        latest[k] = (res.frames, res.bytes, res.simulated_s)
    else:
        return msg[2]
    return None
