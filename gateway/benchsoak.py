"""The soak run behind ``boutline bench --soak``: a herd for days at a speed factor through
the real daemon, with the broker and the database restarted now and then.

What runs, every process started here and stopped by its pid:

- Mosquitto with persistence (:func:`gateway.servers.start_mosquitto`), restarted every
  ``broker_every_s`` wall seconds (SIGTERM, so it saves the queued QoS 1 messages);
- InfluxDB 1.x (:func:`gateway.servers.start_influxdb1`), stopped for ``db_down_s`` every
  ``db_every_s`` wall seconds; the gateway's outbox keeps the facts until it is back;
- ``boutline run`` as a process of its own, from a config written for the run (InfluxDB v1
  output, MQTT output, /healthz and /metrics on a free loopback port);
- publishers streaming a seeded :class:`simulator.herd.Herd` paced at ``speed`` herd seconds
  per wall second, QoS 1, riding out the broker restarts (paho keeps unacknowledged QoS 1
  messages and sends them again after reconnecting: collars that buffer);
- a subscriber counting the closed bouts the gateway publishes on MQTT.

The report: frames published and taken in, events produced (the gateway's counters) against
events stored (SQLite rows) and delivered (InfluxDB points, MQTT messages), and the gateway's
RSS over time with its growth per simulated day.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable
from contextlib import suppress
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .bench import pid_rss_mb, tree_cpu_s, tree_mb
from .benchrun import Children, mqtt_client, recv
from .errors import BoutlineError, ConfigError

__all__ = ["SoakOptions", "format_soak", "growth_per_day", "run_soak"]

SITE = "soak"
PREFIX = "barn"


@dataclass
class SoakOptions:
    """Options of ``boutline bench --soak``."""

    collars: int = 100
    days: float = 7.0
    speed: float = 50.0  # herd seconds per wall second: a week in 3.4 hours
    frame_s: float = 1.0  # herd seconds per frame: 2 halves the frame rate at the same samples
    broker_every_s: float = 600.0  # wall seconds between broker restarts
    db_every_s: float = 900.0  # wall seconds between database outages
    db_down_s: float = 60.0
    fmt: str = "json"
    publishers: int = 2
    seed: int = 1
    sample_every_s: float = 10.0
    workdir: str = ""

    def check(self) -> None:
        """Raise ConfigError on options that cannot give a soak run."""
        if not 1 <= self.collars <= 10_000:
            raise ConfigError("soak collars must be between 1 and 10000")
        if not 0 < self.days <= 30:
            raise ConfigError("soak days must be between 0 and 30 (the clock rule's limit)")
        if not 1 <= self.speed <= 1000:
            raise ConfigError("soak speed must be between 1 and 1000 herd seconds per second")
        if not 0.1 <= self.frame_s <= 60:
            raise ConfigError("soak frame length must be between 0.1 and 60 s")
        if self.fmt not in ("json", "binary"):
            raise ConfigError(f"format {self.fmt!r} is not json or binary")
        if min(self.broker_every_s, self.db_every_s) < 30 or self.db_down_s < 0:
            raise ConfigError("restarts at most every 30 s, and a database outage of >= 0 s")


def growth_per_day(days: np.ndarray, rss_mb: np.ndarray) -> float | None:
    """Least-squares slope of RSS over the second half of the run, MB per simulated day.

    The first half holds the warm-up (buffers, the model, caches filling); a leak shows as a
    slope that stays positive after it.
    """
    half = days >= days.max() / 2 if len(days) else days.astype(bool)
    d, r = days[half], rss_mb[half]
    if len(d) < 3 or float(d.max() - d.min()) <= 0:
        return None
    return float(np.polyfit(d, r, 1)[0])


# ----------------------------------------------------------------------------- publishers


_INFLIGHT = 100  # QoS 1 messages a soak publisher has on the wire, unacknowledged


@dataclass(frozen=True)
class _PubSpec:
    host: str
    port: int
    collars: int
    seed: int
    start: float
    days: float
    speed: float
    fmt: str
    k: int
    p: int
    frame_s: float = 1.0


def _soak_publish(spec: _PubSpec, conn: Any) -> dict[str, Any]:
    from simulator.herd import Herd

    from .types import Frame
    from .wire import collar_topic, encode_binary, encode_json

    herd = Herd(
        spec.collars,
        seed=spec.seed,
        start=spec.start,
        days=spec.days,
        frame_s=spec.frame_s,
        shard=(spec.k, spec.p),
    ).endless()
    ids = [herd.collar_ids[i] for i in herd.local]
    topics = [collar_topic(PREFIX, SITE, c) for c in ids]
    client = mqtt_client(f"soak-pub-{spec.k}", "3.1.1", persistent=True)
    acked = [0]
    client.on_publish = lambda *_a: acked.__setitem__(0, acked[0] + 1)
    client.max_inflight_messages_set(_INFLIGHT)
    client.reconnect_delay_set(0.5, 4.0)
    client.connect(spec.host, spec.port, keepalive=30)
    client.loop_start()
    conn.send(("ready", len(ids)))
    wall0 = float(conn.recv())
    sent = 0
    last = time.monotonic()
    for block in herd.blocks():
        seqs = (block.seq % 2**32).tolist()
        for j, r in enumerate(block.row.tolist()):
            due = wall0 + (float(block.sent[j]) - spec.start) / spec.speed
            while (wait := due - time.time()) > 0:
                time.sleep(min(wait, 0.05))
            # Never more unacknowledged than paho's in-flight window, broker there or away:
            # paho walks all its unacknowledged messages at every PUBACK, so a deep window
            # costs the publisher more CPU than the gateway it is meant to load (100 is
            # plenty on loopback: a 1 ms round trip still allows 100,000 messages/s).
            while sent - acked[0] >= _INFLIGHT:
                time.sleep(0.002)
            f = Frame(ids[r], seqs[j], float(block.t[j]), herd.hz, block.acc[j],
                      float(block.battery_v[j]))  # fmt: skip
            payload = encode_json(f) if spec.fmt == "json" else encode_binary(f)
            # QoS 1 while disconnected: paho keeps it and sends it after the reconnect
            client.publish(topics[r], payload, 1)
            sent += 1
            if time.monotonic() - last > 1.0:
                last = time.monotonic()
                conn.send(("progress", (sent, acked[0], float(block.sent[j]) - spec.start)))
    deadline = time.monotonic() + 300.0
    while acked[0] < sent and time.monotonic() < deadline:
        time.sleep(0.1)
    client.disconnect()
    client.loop_stop()
    return {"sent": sent, "acked": acked[0]}


def soak_publisher_main(spec: _PubSpec, conn: Any) -> None:
    """Child process entry: one shard of the soak herd."""
    from .benchrun import _serve

    _serve(_soak_publish, "soak publisher", spec, conn)


# ------------------------------------------------------------------- the MQTT bout counter


class _BoutCounter:
    """Counts distinct closed bouts published by the gateway (QoS 1, persistent session)."""

    def __init__(self, host: str, port: int) -> None:
        self.seen: set[tuple[str, str, float]] = set()
        self.messages = 0
        self._lock = threading.Lock()
        c = mqtt_client("soak-bout-counter", "3.1.1", persistent=True)
        c.on_connect = lambda cl, *_a: cl.subscribe(f"{PREFIX}/{SITE}/events/bouts", qos=1)
        c.on_message = self._on_message
        c.reconnect_delay_set(0.5, 4.0)
        c.connect(host, port, keepalive=30)
        self.client = c
        self.thread = threading.Thread(target=c.loop_forever, kwargs={"retry_first_connection": True}, daemon=True)  # fmt: skip
        self.thread.start()

    def _on_message(self, _c: Any, _u: Any, msg: Any) -> None:
        with suppress(ValueError, KeyError, TypeError):
            b = json.loads(msg.payload)
            with self._lock:
                self.messages += 1
                self.seen.add((b["animal"], b["behaviour"], float(b["start"])))

    def close(self) -> None:
        self.client.disconnect()
        self.thread.join(10.0)


# --------------------------------------------------------------------------- the daemon


def _config(root: Path, mqtt_port: int, influx_url: str, http_port: int, o: SoakOptions) -> Path:
    past_s = min(30 * 86400.0, (o.days + 1.0) * 86400.0)
    text = f"""\
[site]
id = "{SITE}"
[mqtt]
host = "127.0.0.1"
port = {mqtt_port}
client_id = "soak-gateway"
[model]
watch = false
[windows]
clock_past_s = {past_s:.0f}
[store]
data_dir = "{root / "data"}"
[influx]
enabled = true
api = "v1"
url = "{influx_url}"
database = "boutline"
flush_interval_s = 2.0
retry_max_s = 10.0
[http]
enabled = true
port = {http_port}
[limits]
max_frame_rate_hz = {min(1000.0, o.speed * 1.5):g}
"""
    path = root / "boutline.toml"
    path.write_text(text)
    return path


def _get(url: str, timeout_s: float = 5.0) -> tuple[int, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=timeout_s) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as exc:
        with exc:
            return exc.code, exc.read()
    except (urllib.error.URLError, OSError):
        return 0, b""


def _metrics(port: int) -> dict[str, float]:
    """The gateway's /metrics as ``name{labels}`` -> value (Prometheus text format)."""
    status, body = _get(f"http://127.0.0.1:{port}/metrics")
    out: dict[str, float] = {}
    if status != 200:
        return out
    for line in body.decode(errors="replace").splitlines():
        if line and not line.startswith("#"):
            name, _, value = line.rpartition(" ")
            with suppress(ValueError):
                out[name] = float(value)
    return out


def _influx(url: str, q: str, method: str = "GET") -> dict[str, Any]:
    data = urllib.parse.urlencode({"q": q, "db": "boutline"})
    if method == "POST":
        req = urllib.request.Request(f"{url}/query", data=data.encode(), method="POST")
    else:
        req = urllib.request.Request(f"{url}/query?{data}")
    with urllib.request.urlopen(req, timeout=30) as r:
        return json.loads(r.read())


def _influx_count(url: str) -> int:
    res = _influx(url, f"SELECT count(duration_s) FROM bout WHERE site = '{SITE}'")
    try:
        return int(res["results"][0]["series"][0]["values"][0][1])
    except (KeyError, IndexError):
        return 0


def _boutline_argv() -> list[str]:
    exe = shutil.which("boutline") or str(Path(sys.executable).with_name("boutline"))
    if os.access(exe, os.X_OK):
        return [exe]
    return [sys.executable, "-c", "from gateway.cli import main; main()"]


# ------------------------------------------------------------------------------ the run


def run_soak(opts: SoakOptions, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """The whole soak; returns the report (see the module doc)."""
    from .servers import free_port, start_influxdb1, start_mosquitto

    opts.check()
    say = progress or (lambda _m: None)
    root = Path(opts.workdir or tempfile.mkdtemp(prefix="boutline-soak-"))
    root.mkdir(parents=True, exist_ok=True)
    broker = influx = gateway = counter = None
    kids = Children()
    samples: list[dict[str, Any]] = []
    restarts = {"broker": 0, "database": 0}
    try:
        broker = start_mosquitto(root / "broker")
        influx = start_influxdb1(root / "influx")
        _influx(influx.url, 'CREATE DATABASE "boutline"', method="POST")
        http_port = free_port()
        cfg = _config(root, broker.port, influx.url, http_port, opts)
        log = open(root / "gateway.log", "ab")  # noqa: SIM115 - lives with the process
        gateway = subprocess.Popen(
            [*_boutline_argv(), "run", "--config", str(cfg), "--log-level", "warning"],
            stdout=log, stderr=subprocess.STDOUT,
        )  # fmt: skip
        log.close()
        deadline = time.monotonic() + 90.0
        while _get(f"http://127.0.0.1:{http_port}/healthz")[0] != 200:
            if gateway.poll() is not None or time.monotonic() > deadline:
                raise BoutlineError(f"the gateway did not become ready; see {root}/gateway.log")
            time.sleep(0.5)
        counter = _BoutCounter(broker.host, broker.port)
        start = math.floor(time.time() - opts.days * 86400.0 - 600.0)
        conns = [
            kids.start(
                soak_publisher_main,
                _PubSpec(
                    broker.host,
                    broker.port,
                    opts.collars,
                    opts.seed,
                    float(start),
                    opts.days,
                    opts.speed,
                    opts.fmt,
                    k,
                    opts.publishers,
                    opts.frame_s,
                ),
            )  # fmt: skip
            for k in range(opts.publishers)
        ]
        for c in conns:
            recv(c, "ready", 120.0, "a soak publisher")
        wall0 = time.time() + 0.5
        for c in conns:
            c.send(wall0)
        say(f"soak: {opts.collars} collars for {opts.days:g} days at {opts.speed:g}x")
        results, pub = _drive(opts, conns, broker, influx, gateway, http_port, wall0,
                              samples, restarts, say)  # fmt: skip
        say("soak: publishers done; waiting for the gateway and its outputs to catch up")
        sent = sum(r["acked"] for r in results)
        final = _settle(http_port, sent)
        health = json.loads(_get(f"http://127.0.0.1:{http_port}/healthz")[1] or b"{}")
        gateway.send_signal(signal.SIGTERM)
        gateway.wait(120)
        stored = _stored(root / "data" / "boutline.db")
        time.sleep(1.0)
        report = {
            "options": asdict(opts),
            "wall_s": time.time() - wall0,
            "restarts": restarts,
            "frames": {
                "published": sum(r["sent"] for r in results),
                "acked_by_broker": sent,
                "received": final.get("boutline_messages_in_total", 0.0),
                "accepted": final.get("boutline_frames_in_total", 0.0),
                "queue_dropped": final.get("boutline_queue_dropped_total", 0.0),
            },
            "events": {
                "produced_bouts": final.get('boutline_events_total{kind="bout_closed"}', 0.0),
                "produced_state_changes": final.get(
                    'boutline_events_total{kind="state_changed"}', 0.0
                ),
                "stored_bouts": stored["bouts"] + stored["no_data"],
                "delivered_influx_bouts": _influx_count(influx.url),
                "delivered_mqtt_bouts": len(counter.seen),
                "mqtt_bout_messages": counter.messages,
            },
            "sinks": health.get("sinks", {}),  # read before the gateway stopped
            "rss": _rss_summary(samples),
            "samples": samples,
            "publisher_progress": pub,
        }
        return report
    finally:
        if counter is not None:
            counter.close()
        kids.close()
        if gateway is not None and gateway.poll() is None:
            gateway.send_signal(signal.SIGTERM)
            try:
                gateway.wait(60)
            except subprocess.TimeoutExpired:
                gateway.kill()
                gateway.wait(10)
        for srv in (influx, broker):
            if srv is not None:
                srv.stop()
        if not opts.workdir:
            shutil.rmtree(root, ignore_errors=True)


def _drive(
    opts: SoakOptions, conns: list[Any], broker: Any, influx: Any, gateway: Any,
    http_port: int, wall0: float, samples: list[dict[str, Any]], restarts: dict[str, int],
    say: Callable[[str], None],
) -> tuple[list[dict[str, Any]], list[Any]]:  # fmt: skip
    """Sample, restart the servers on schedule, until every publisher has reported."""
    results: dict[int, dict[str, Any]] = {}
    latest: dict[int, Any] = {}
    next_broker = wall0 + opts.broker_every_s
    next_db = wall0 + opts.db_every_s
    next_sample = wall0
    while len(results) < len(conns):
        if gateway.poll() is not None:
            raise BoutlineError(f"the gateway stopped (exit {gateway.returncode}) during the soak")
        for i, c in enumerate(conns):
            while i not in results and c.poll(0):
                kind, value = c.recv()
                if kind == "progress":
                    latest[i] = value
                elif kind == "result":
                    results[i] = value
                else:
                    raise BoutlineError(str(value))
        now = time.time()
        if now >= next_sample:
            next_sample = now + opts.sample_every_s
            m = _metrics(http_port)
            sim_s = min((v[2] for v in latest.values()), default=0.0)
            samples.append(
                {
                    "wall_s": round(now - wall0, 1),
                    "sim_days": round(sim_s / 86400.0, 4),
                    "rss_mb": tree_mb(gateway.pid, pid_rss_mb),
                    "cpu_s": round(tree_cpu_s(gateway.pid), 2),
                    "frames_in": m.get("boutline_frames_in_total"),
                    "bouts": m.get('boutline_events_total{kind="bout_closed"}'),
                }
            )
            say(f"soak: day {sim_s / 86400.0:.2f} of {opts.days:g}, RSS {samples[-1]['rss_mb']} MB")
        if now >= next_broker:
            next_broker = now + opts.broker_every_s
            broker.restart()
            restarts["broker"] += 1
        if now >= next_db:
            next_db = now + opts.db_every_s
            influx.stop()
            time.sleep(opts.db_down_s)
            influx.start(ready_timeout_s=60.0)
            restarts["database"] += 1
        time.sleep(0.2)
    return [results[i] for i in range(len(conns))], list(latest.values())


def _settle(http_port: int, sent: int, timeout_s: float = 600.0) -> dict[str, float]:
    """Wait until the gateway took every acknowledged frame and its sinks have no backlog."""
    deadline = time.monotonic() + timeout_s
    m: dict[str, float] = {}
    while time.monotonic() < deadline:
        m = _metrics(http_port)
        _, body = _get(f"http://127.0.0.1:{http_port}/healthz")
        with suppress(ValueError):
            sinks = json.loads(body or b"{}").get("sinks", {})
            backlog = sum(int(s.get("backlog", 0)) for s in sinks.values())
            if m.get("boutline_messages_in_total", 0.0) >= sent and backlog == 0:
                time.sleep(3.0)  # one more tick and flush
                return _metrics(http_port) or m
        time.sleep(1.0)
    return m


def _stored(db: Path) -> dict[str, int]:
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return {
            "bouts": int(conn.execute("SELECT count(*) FROM bouts").fetchone()[0]),
            "no_data": int(conn.execute("SELECT count(*) FROM no_data").fetchone()[0]),
        }
    finally:
        conn.close()


def _rss_summary(samples: list[dict[str, Any]]) -> dict[str, Any]:
    pts = [(s["sim_days"], s["rss_mb"]) for s in samples if s["rss_mb"] is not None]
    if not pts:
        return {"first_mb": None, "max_mb": None, "last_mb": None, "growth_mb_per_day": None}
    d, r = np.array([p[0] for p in pts]), np.array([p[1] for p in pts])
    return {
        "first_mb": float(r[0]),
        "max_mb": float(r.max()),
        "last_mb": float(r[-1]),
        "growth_mb_per_day": growth_per_day(d, r),
    }


def format_soak(r: dict[str, Any]) -> str:
    """The soak report as a few lines of text."""
    f, e, rss = r["frames"], r["events"], r["rss"]
    o = r["options"]
    grow = rss["growth_mb_per_day"]
    lines = [
        f"soak: {o['collars']} collars, {o['days']:g} simulated days at {o['speed']:g}x"
        f" ({o.get('frame_s', 1.0):g} s frames)"
        f" in {r['wall_s'] / 60:.0f} min; broker restarted {r['restarts']['broker']}x,"
        f" database down {r['restarts']['database']}x for {o['db_down_s']:g} s",
        f"frames: {f['acked_by_broker']:,.0f} acknowledged by the broker,"
        f" {f['received']:,.0f} received, {f['accepted']:,.0f} accepted,"
        f" {f['queue_dropped']:,.0f} dropped by the queue",
        f"closed bouts: {e['produced_bouts']:,.0f} produced, {e['stored_bouts']:,} stored,"
        f" {e['delivered_influx_bouts']:,} in InfluxDB, {e['delivered_mqtt_bouts']:,} on MQTT"
        f" ({e['mqtt_bout_messages']:,} messages)",
        f"RSS: {rss['first_mb']} MB first, {rss['max_mb']} MB peak, {rss['last_mb']} MB last;"
        f" growth over the second half "
        + ("n/a" if grow is None else f"{grow:+.2f} MB per simulated day"),
    ]
    return "\n".join(lines)
