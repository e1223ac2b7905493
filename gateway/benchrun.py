"""The processes of one benchmark run: publishers, the bare subscriber, the gateway under test.

Each runs in a spawned child process of its own (its CPU time and peak RSS are its own) and
talks to the parent over a pipe. A run goes through up to two phases:

1. **backlog**: the consumer registers a persistent session (clean start off, session
   expiry) and disconnects; publishers send the backlog flat out at QoS 1 and the broker
   queues it; on ``go`` the consumer reconnects and drains it as fast as it can. This is the
   gateway catching up after a restart, and it measures the consumer's own capacity: the
   publishers are done before it starts, so they take no CPU from it.
2. **live**: once the consumer has caught up, publishers send the rest either flat out or
   paced, each frame at its send time (real time), while the consumer keeps up.

Messages between parent and child are ``(kind, value)`` tuples: the child sends ``ready``,
optionally ``caught_up``, then ``result`` (or ``error``); the parent sends ``go``.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import threading
import time
from collections import defaultdict
from collections.abc import Callable
from contextlib import suppress
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .bench import SITE, TOPIC_PREFIX, PayloadSet, pid_cpu_s, pid_peak_rss_mb, summarize
from .errors import BoutlineError

__all__ = [
    "Children",
    "ConsumeSpec",
    "GatewaySpec",
    "PublishSpec",
    "bare_main",
    "gateway_main",
    "publisher_main",
    "recv",
    "run_phases",
]


def mqtt_client(client_id: str, protocol: str = "5", persistent: bool = False) -> Any:
    """A paho client; ``persistent`` keeps a 3.1.1 session (MQTT 5 asks at connect)."""
    import paho.mqtt.client as mqtt

    kw: dict[str, Any] = {"client_id": client_id, "protocol": mqtt.MQTTv5}
    if protocol != "5":
        kw.update(protocol=mqtt.MQTTv311, clean_session=not persistent)
    return mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, **kw)


def _serve(body: Callable[[Any, Any], dict[str, Any]], who: str, spec: Any, conn: Any) -> None:
    """Run a child's body: its result or its error goes to the parent, the pipe is closed."""
    try:
        conn.send(("result", body(spec, conn)))
    except Exception as exc:  # noqa: BLE001 - reported to the parent, which raises
        with suppress(OSError):
            conn.send(("error", f"{who}: {type(exc).__name__}: {exc}"))
    finally:
        conn.close()


# ---------------------------------------------------------------------------------- publishers


@dataclass(frozen=True)
class PublishSpec:
    """What one publisher process sends: shard ``k`` of ``p`` collars, herd seconds
    ``[from_s, until_s)`` of a payload set, flat out or paced at real time."""

    host: str
    port: int
    payload_dir: str
    fmt: str
    k: int
    p: int
    from_s: float = 0.0
    until_s: float | None = None
    paced: bool = False
    protocol: str = "3.1.1"  # the publishers' own; the consumer's protocol is the consumer's
    inflight: int = 1000


def _alive(client: Any, timeout_s: float = 0.0) -> None:
    """One turn of a publisher's network loop; raise if the broker has dropped us."""
    import paho.mqtt.client as mqtt

    rc = client.loop(timeout_s)
    if rc not in (mqtt.MQTT_ERR_SUCCESS, mqtt.MQTT_ERR_AGAIN):
        raise BoutlineError(f"a publisher lost the benchmark broker ({mqtt.error_string(rc)})")


def _publish(spec: PublishSpec, conn: Any) -> dict[str, Any]:
    ps = PayloadSet.open(Path(spec.payload_dir))
    idx = ps.index()
    sent = idx["sent"]
    keep = (idx["collar"] % spec.p == spec.k) & (sent >= spec.from_s)
    if spec.until_s is not None:
        keep &= sent < spec.until_s
    sel = np.flatnonzero(keep)
    data = ps.data(spec.fmt)
    topics = ps.topics()
    off, ln = idx[f"{spec.fmt}_off"][sel], idx[f"{spec.fmt}_len"][sel]
    collar, sent = idx["collar"][sel], sent[sel]
    del idx
    client = mqtt_client(f"bench-pub-{spec.k}-{os.getpid()}", spec.protocol)
    acked = [0]

    def on_publish(_c: Any, _u: Any, _mid: int, _rc: Any, _p: Any) -> None:
        acked[0] += 1

    client.on_publish = on_publish
    client.max_inflight_messages_set(spec.inflight)
    client.connect(spec.host, spec.port, keepalive=60)
    deadline = time.monotonic() + 20.0
    while not client.is_connected():
        client.loop(0.05)
        if time.monotonic() > deadline:
            raise BoutlineError("could not connect to the benchmark broker")
    conn.send(("ready", len(sel)))
    # Keep the connection alive (PINGREQ) while the consumer drains a backlog, which can
    # take minutes: a client that stops calling loop() is dropped by the broker.
    while not conn.poll(0.05):
        _alive(client)
    start_wall = float(conn.recv())
    while (wait := start_wall - time.time()) > 0:
        _alive(client, min(wait, 0.05))
    t_first = time.time()
    n = 0
    late = 0.0
    for i in range(len(sel)):
        if spec.paced:
            due = start_wall + float(sent[i]) - spec.from_s
            while (wait := due - time.time()) > 0:
                _alive(client, min(wait, 0.02))
            late = max(late, -wait)
        while n - acked[0] >= spec.inflight:  # QoS 1: never more than `inflight` unacked
            _alive(client, 0.01)
        client.publish(topics[collar[i]], data[off[i] : off[i] + ln[i]], 1)
        n += 1
        if n & 63 == 0:
            client.loop(0)
    t_published = time.time()
    deadline = time.monotonic() + 120.0
    while acked[0] < n and time.monotonic() < deadline:
        _alive(client, 0.02)
    t_acked = time.time()
    client.disconnect()
    with suppress(Exception):
        client.loop(0.1)
    return {
        "sent": n,
        "acked": acked[0],
        "t_first": t_first,
        "t_published": t_published,
        "t_acked": t_acked,
        "max_behind_s": late,  # paced: how far behind its schedule the publisher fell
    }


def publisher_main(spec: PublishSpec, conn: Any) -> None:
    """Child process entry: one publisher."""
    _serve(_publish, "publisher", spec, conn)


# ----------------------------------------------------------------------------------- consumers


@dataclass(frozen=True)
class ConsumeSpec:
    """What a consumer expects: ``backlog`` messages queued before ``go`` (drained after a
    reconnect), then the rest up to ``expected`` live."""

    host: str
    port: int
    expected: int
    backlog: int = 0
    protocol: str = "5"
    idle_timeout_s: float = 15.0  # no new message for this long after the first: done
    start_timeout_s: float = 60.0  # no first message within this after go: done


class _Progress:
    """Counters shared by a consumer's threads and the watcher that ends its run."""

    def __init__(self, spec: ConsumeSpec, conn: Any) -> None:
        self.spec, self.conn = spec, conn
        self.msgs = 0
        self.first = self.last = 0.0
        self.t_go = 0.0
        self.t_caught_up = 0.0
        self.t_end = 0.0
        self.done = threading.Event()

    def arrived(self, n: int, now: float) -> None:
        if self.msgs == 0:
            self.first = now
        self.msgs += n
        self.last = now

    def watch(self, finished: Callable[[], bool], caught_up: Callable[[], bool]) -> None:
        """Until every expected message is in (``finished``) or the stream went quiet."""
        s = self.spec
        while not self.done.wait(0.02):
            now = time.time()
            if s.backlog and not self.t_caught_up and caught_up():
                self.t_caught_up = now
                self.conn.send(("caught_up", now))
            if finished():
                self.t_end = self.t_end or now
                break
            quiet = now - (self.last or self.t_go)
            if quiet > (s.idle_timeout_s if self.msgs else s.start_timeout_s):
                break
        self.done.set()

    def figures(self, cpu_s: float) -> dict[str, Any]:
        end = self.t_end or self.last
        start = self.first
        span = end - start
        return {
            "messages": self.msgs,
            "t_first": start,
            "t_end": end,
            "t_caught_up": self.t_caught_up or None,
            "complete": self.msgs >= self.spec.expected,
            "frames_per_s": self.msgs / span if self.msgs > 1 and span > 0 else None,
            "cpu_s": cpu_s,
            "cpu_s_per_1000_frames": 1000.0 * cpu_s / self.msgs if self.msgs else None,
            "peak_rss_mb": pid_peak_rss_mb(os.getpid()),
        }


def _io_write_bytes() -> int:
    """Bytes this process caused to be written to storage so far (proc(5) write_bytes)."""
    try:
        for line in Path("/proc/self/io").read_text().splitlines():
            if line.startswith("write_bytes:"):
                return int(line.split()[1])
    except OSError:
        pass
    return 0


def py_spy() -> str:
    """The py-spy executable (pip install py-spy), or raise saying how to get it."""
    import shutil
    import sys

    found = shutil.which("py-spy") or str(Path(sys.executable).with_name("py-spy"))
    if not os.access(found, os.X_OK):
        raise BoutlineError("--profile needs py-spy; install it with: pip install py-spy")
    return found


def _start_py_spy(out: str) -> None:
    """Sample this process (all threads, 200 Hz) until it exits; folded stacks to ``out``."""
    import subprocess

    argv = [py_spy(), "record", "--pid", str(os.getpid()), "--output", out, "--format", "raw"]
    subprocess.Popen(
        [*argv, "--rate", "200", "--nonblocking"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )


def _session_properties(expiry_s: int = 3600) -> Any:
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = expiry_s
    return props


def _bare(spec: ConsumeSpec, conn: Any) -> dict[str, Any]:
    """paho-mqtt, topic parse and decode of every payload; nothing else. The limit."""
    from .affinity import pin_threads
    from .wire import Rejection, decode, parse_topic

    pin_threads("auto")  # the same one-CPU treatment as the gateway gets
    prog = _Progress(spec, conn)
    counts = {"frames": 0, "samples": 0, "rejects": 0}
    subscribed = threading.Event()
    topic = f"{TOPIC_PREFIX}/+/collars/+/accel"

    def on_connect(client: Any, _u: Any, _f: Any, rc: Any, _p: Any) -> None:
        if not rc.is_failure:
            client.subscribe(topic, qos=1)

    def on_message(_c: Any, _u: Any, msg: Any) -> None:
        prog.arrived(1, time.time())
        where = parse_topic(msg.topic, TOPIC_PREFIX)
        frame = decode(msg.payload, where[1]) if not isinstance(where, Rejection) else where
        if frame:
            counts["frames"] += 1
            counts["samples"] += frame.n
        else:
            counts["rejects"] += 1

    def session() -> tuple[Any, threading.Thread]:
        subscribed.clear()
        client = mqtt_client("bench-bare", spec.protocol, persistent=True)
        client.on_connect, client.on_message = on_connect, on_message
        client.on_subscribe = lambda *_a: subscribed.set()
        if spec.protocol == "5":
            client.connect(
                spec.host, spec.port, keepalive=60, clean_start=False,
                properties=_session_properties(),
            )  # fmt: skip
        else:
            client.connect(spec.host, spec.port, keepalive=60)
        # paho's own loop in a thread of ours: PUBACKs go out from the callback directly
        thread = threading.Thread(target=client.loop_forever, daemon=True)
        thread.start()
        if not subscribed.wait(20.0):
            raise BoutlineError("the bare subscriber could not subscribe")
        return client, thread

    def end(client: Any, thread: threading.Thread) -> None:
        client.disconnect()
        thread.join(10.0)

    if spec.backlog:
        end(*session())  # the broker now keeps a session and queues for it
    else:
        client, thread = session()
    conn.send(("ready", 0))
    kind, _ = conn.recv()
    cpu0 = time.process_time()
    prog.t_go = time.time()
    if spec.backlog:
        client, thread = session()
    try:
        prog.watch(lambda: prog.msgs >= spec.expected, lambda: prog.msgs >= spec.backlog)
        cpu = time.process_time() - cpu0
    finally:
        end(client, thread)
    return {**prog.figures(cpu), **counts}


def bare_main(spec: ConsumeSpec, conn: Any) -> None:
    """Child process entry: the bare subscriber."""
    _serve(_bare, "bare subscriber", spec, conn)


@dataclass(frozen=True)
class GatewaySpec(ConsumeSpec):
    """The gateway under test: its data directory, model and what to measure."""

    data_dir: str = ""
    model: str = ""
    collars: int = 0
    replay: bool = False  # frames arrive faster than real time: no rate limit, no silence flush
    latency: bool = False  # measure window -> stored latency (costs a little CPU)
    settle_s: float = 2.0  # latency counts windows that became ready this long after caught up
    tick_s: float | None = None  # None: the daemon's default (experiments only)
    profile: str = ""  # py-spy raw profile of this process to this file ("" : none)
    cpu: str = "auto"  # [process] cpu of the gateway under test
    commit_interval_s: float | None = None  # None: the store setting's default


def bench_settings(spec: GatewaySpec) -> Any:
    """The gateway's settings for a benchmark: defaults except where the bench must differ."""
    from .config import Settings

    limits: dict[str, Any] = {"max_collars": max(12_000, 2 * spec.collars)}
    if spec.replay:
        # a backlog drained flat out arrives at hundreds of frames/s per collar
        limits["max_frame_rate_hz"] = 1000.0
    return Settings.model_validate(
        {
            "site": {"id": SITE},
            "mqtt": {"host": spec.host, "port": spec.port, "client_id": "bench-gateway",
                     "protocol": spec.protocol},
            "model": {"path": spec.model, "watch": False},
            "store": {"data_dir": spec.data_dir}
            | ({} if spec.commit_interval_s is None else
               {"commit_interval_s": spec.commit_interval_s}),
            "http": {"enabled": False},
            "influx": {"enabled": False},
            "outputs": {"mqtt": False},
            "limits": limits,
            "process": {"cpu": spec.cpu},
        }
    )  # fmt: skip


class _Probe:
    """Instruments one Gateway without changing what it does: time spent per stage, and the
    latency of each window, from its last sample arriving (``WindowBatch.ready_at``) to the
    commit of the first store transaction after the tick that classified it, the commit that
    holds everything the window has caused so far. The smoother's fixed lag (a hop is decided
    ``smoothing.lag_s`` later, by design) comes on top and is not part of it."""

    def __init__(self, gw: Any, store: Any, prog: _Progress, latency: bool, settle_s: float):
        self.prog = prog
        self.seconds: dict[str, float] = defaultdict(float)
        self.calls: dict[str, int] = defaultdict(int)
        self.latencies: list[np.ndarray] = []
        self._pending: list[np.ndarray] = []
        self._latency, self._settle = latency, settle_s
        self.ticks_after_last = 0
        self._wrap(gw, "handle", self._on_handle)
        self._wrap(gw, "tick", self._on_tick)
        self._wrap(gw.inference, "classify", self._on_classify)
        self._wrap(store, "write_events", self._on_write)

    def _wrap(self, obj: Any, name: str, after: Callable[..., None]) -> None:
        inner = getattr(obj, name)
        seconds, calls = self.seconds, self.calls

        def wrapped(*args: Any, **kw: Any) -> Any:
            t0 = time.perf_counter()
            out = inner(*args, **kw)
            seconds[name] += time.perf_counter() - t0
            calls[name] += 1
            after(*args, **kw)
            return out

        setattr(obj, name, wrapped)

    def _on_handle(self, messages: list[Any], *_a: Any, **_k: Any) -> None:
        if messages:
            first = self.prog.msgs == 0
            self.prog.arrived(len(messages), messages[-1][2])
            if first:
                self.prog.first = messages[0][2]
            self.ticks_after_last = 0

    def _on_tick(self, *_a: Any, **_k: Any) -> None:
        self.ticks_after_last += 1

    def _on_classify(self, batch: Any, *_a: Any, **_k: Any) -> None:
        if self._latency and self.prog.t_caught_up and len(batch):
            ready = batch.ready_at
            self._pending.append(ready[ready >= self.prog.t_caught_up + self._settle])

    def _on_write(self, *_a: Any, **_k: Any) -> None:
        if self._pending:
            now = time.time()
            self.latencies.extend(now - r for r in self._pending)
            self._pending = []

    def figures(self) -> dict[str, Any]:
        lat = np.concatenate(self.latencies) if self.latencies else np.zeros(0)
        return {
            "stage_seconds": dict(self.seconds),
            "stage_calls": dict(self.calls),
            "latency": summarize(lat),
            "latency_unstored_windows": int(sum(len(r) for r in self._pending)),
        }


def _gateway(spec: GatewaySpec, conn: Any) -> dict[str, Any]:
    """The real Gateway and Ingest from gateway.daemon, with the SQLite store."""
    from .affinity import pin_threads
    from .daemon import Gateway
    from .ingest import Ingest
    from .ingestproc import open_ingest
    from .store import Store
    from .telemetry import Telemetry

    settings = bench_settings(spec)
    pin_threads(settings.process.cpu)  # as `boutline run` does first, for every thread
    store = Store.open(settings.data_dir, checkpoint_pages=settings.store.checkpoint_pages)
    try:
        gw = Gateway(settings, store=store, speed=None if spec.replay else 1.0)
        tel = gw.telemetry
        if spec.backlog:
            first = Ingest(settings.mqtt, topic_filter=gw.topic_filter, telemetry=Telemetry())
            first.start()
            try:
                if not first.wait_connected(20.0):
                    raise BoutlineError("the gateway could not subscribe to the benchmark broker")
            finally:
                first.stop()
        prog = _Progress(spec, conn)
        probe = _Probe(gw, store, prog, spec.latency, spec.settle_s)
        ingest = open_ingest(settings, topic_filter=gw.topic_filter, telemetry=tel)
        stop = threading.Event()
        cpu: dict[str, float] = {}

        def ingest_pid() -> int | None:
            return getattr(ingest, "pid", None)

        def mark_cpu(at: str) -> None:
            # all threads of this process, and the ingest process if there is one
            cpu[f"ingest{at}"] = pid_cpu_s(ingest_pid())
            cpu[at] = time.process_time() + cpu[f"ingest{at}"]

        def finished() -> bool:
            # everything handled, then a tick (inference, tracker, store) after the last
            return prog.msgs >= spec.expected and probe.ticks_after_last >= 1

        def caught_up() -> bool:
            return prog.msgs >= spec.backlog and probe.ticks_after_last >= 1

        def watcher() -> None:
            try:
                if not spec.backlog and not ingest.wait_connected(20.0):
                    raise BoutlineError("the gateway could not subscribe to the benchmark broker")
                if not spec.backlog:
                    conn.send(("ready", 0))
                    conn.recv()
                    mark_cpu("0")
                    prog.t_go = time.time()
                prog.watch(finished, caught_up)
                mark_cpu("1")
                pid = ingest_pid()
                cpu["ingest_rss"] = (pid_peak_rss_mb(pid) or 0.0) if pid else 0.0
            finally:
                stop.set()

        if spec.backlog:
            conn.send(("ready", 0))
            conn.recv()
            mark_cpu("0")
            prog.t_go = time.time()
        io0 = _io_write_bytes()
        if spec.profile:
            _start_py_spy(spec.profile)
        thread = threading.Thread(target=watcher, daemon=True)
        thread.start()
        gw.run(stop, ingest=ingest, **({} if spec.tick_s is None else {"tick_s": spec.tick_s}))
        thread.join(10.0)
        cpu_s = cpu.get("1", time.process_time()) - cpu.get("0", 0.0)
        snap = tel.snapshot()
        figures = prog.figures(cpu_s)
        # The gateway's memory is both processes': the sum of their peaks (an upper bound;
        # shared library pages count twice).
        figures["pipeline_peak_rss_mb"] = figures["peak_rss_mb"]
        figures["ingest_peak_rss_mb"] = cpu.get("ingest_rss", 0.0)
        figures["peak_rss_mb"] = (figures["peak_rss_mb"] or 0.0) + figures["ingest_peak_rss_mb"]
        figures["ingest"] = "process" if ingest_pid() else "thread"
        # the ingest process's share of the CPU time (0 with the client in a thread)
        figures["ingest_cpu_s"] = cpu.get("ingest1", 0.0) - cpu.get("ingest0", 0.0)
        return {
            **figures,
            **probe.figures(),
            "frames": snap["frames_in"],
            "samples": tel.value("boutline_samples_in_total"),
            "rejects": snap["rejects"],
            "windows": snap["windows_classified"],
            "windows_no_data": snap["windows_no_data"],
            "inference_seconds": snap["inference_seconds"],
            "inference_calls": snap["inference_calls"],
            "queue_dropped": snap["queue_dropped"],
            "events_stored": sum(
                tel.value("boutline_events_total", kind=k) for k in ("state_changed", "bout_closed")
            ),
            "store_bytes": store.size_bytes(),
            # everything the store (and its WAL) wrote while the run lasted: SD-card wear
            "disk_write_bytes": _io_write_bytes() - io0,
        }
    finally:
        store.close()


def gateway_main(spec: GatewaySpec, conn: Any) -> None:
    """Child process entry: the gateway under test."""
    _serve(_gateway, "gateway", spec, conn)


# ------------------------------------------------------------------------------ orchestration


class Children:
    """Processes we started, ended by their own pid (terminate, then kill) on the way out."""

    def __init__(self) -> None:
        self.procs: list[Any] = []

    def start(self, target: Callable[..., None], spec: Any) -> Any:
        # spawn, not fork: a child must not inherit our threads, sockets or memory, and its
        # peak RSS must be its own.
        ctx = mp.get_context("spawn")
        parent, child = ctx.Pipe()
        proc = ctx.Process(target=target, args=(spec, child), daemon=True)
        proc.start()
        child.close()
        self.procs.append(proc)
        return parent

    def close(self) -> None:
        for proc in self.procs:
            proc.join(timeout=5.0)
            if proc.is_alive():
                proc.terminate()
                proc.join(timeout=5.0)
            if proc.is_alive():
                proc.kill()
                proc.join(timeout=5.0)
        self.procs.clear()


def recv(conn: Any, expect: str, timeout_s: float, who: str, skip: tuple[str, ...] = ()) -> Any:
    """The next message from a child, which must be ``expect`` (after any ``skip`` kinds);
    a child's error is raised here."""
    deadline = time.monotonic() + timeout_s
    kind = ""
    while not kind or kind in skip:
        if not conn.poll(max(0.0, deadline - time.monotonic())):
            raise BoutlineError(
                f"{who} sent no {expect} within {timeout_s:g} s; the machine may be overloaded"
            )
        try:
            kind, value = conn.recv()
        except EOFError as exc:
            raise BoutlineError(f"{who} ended without a {expect}") from exc
    if kind == "error":
        raise BoutlineError(str(value))
    if kind != expect:
        raise BoutlineError(f"{who} sent {kind!r} where {expect!r} was expected")
    return value


def _publishers(
    kids: Children, ps: PayloadSet, broker: Any, fmt: str, n: int, **kw: Any
) -> list[Any]:
    conns = [
        kids.start(
            publisher_main, PublishSpec(broker.host, broker.port, str(ps.path), fmt, k, n, **kw)
        )
        for k in range(n)
    ]
    for c in conns:
        recv(c, "ready", 120.0, "a publisher")
    return conns


def _go(conns: list[Any], timeout_s: float) -> list[dict[str, Any]]:
    start = time.time() + 0.2
    for c in conns:
        c.send(start)
    return [recv(c, "result", timeout_s, "a publisher") for c in conns]


def run_phases(
    consumer: Callable[..., None],
    spec: ConsumeSpec,
    payloads: PayloadSet,
    broker: Any,
    *,
    fmt: str,
    publishers: int,
    backlog_until_s: float | None,
    live: tuple[float, float | None, bool] | None = None,
    timeout_s: float = 900.0,
) -> dict[str, Any]:
    """One run: herd seconds ``[0, backlog_until_s)`` (None: all) queued before ``go`` when
    the consumer expects a backlog, then ``live = (from_s, until_s, paced)`` published once
    it has caught up.

    Returns the consumer's figures plus the publishers' and the broker's CPU seconds.
    """

    kids = Children()
    try:
        cconn = kids.start(consumer, spec)
        recv(cconn, "ready", 180.0, "the consumer")
        pub: list[dict[str, Any]] = []
        if spec.backlog:
            pconns = _publishers(
                kids, payloads, broker, fmt, publishers, from_s=0.0, until_s=backlog_until_s
            )
            pub += _go(pconns, timeout_s)
        live_conns = []
        if live is not None:
            live_conns = _publishers(
                kids, payloads, broker, fmt, publishers,
                from_s=live[0], until_s=live[1], paced=live[2],
            )  # fmt: skip
        broker_cpu0 = pid_cpu_s(broker.pid)
        cconn.send(("go", 0))
        if live_conns:
            if spec.backlog:
                recv(cconn, "caught_up", timeout_s, "the consumer")
            pub += _go(live_conns, timeout_s)
        result = recv(cconn, "result", timeout_s, "the consumer", skip=("caught_up",))
        result["broker_cpu_s"] = pid_cpu_s(broker.pid) - broker_cpu0
        result["published"] = sum(p["sent"] for p in pub)
        result["publishers_behind_s"] = max((p["max_behind_s"] for p in pub), default=0.0)
        return result
    finally:
        kids.close()


def _decode(spec: tuple[str, int], conn: Any) -> dict[str, Any]:
    from .bench import decode_speed

    return decode_speed(PayloadSet.open(Path(spec[0])), spec[1])


def decode_main(spec: tuple[str, int], conn: Any) -> None:
    """Child process entry: decode timing on ``(payload_dir, frames)``."""
    _serve(_decode, "decode timing", spec, conn)


def _onnx(spec: tuple[str, str, float | None], conn: Any) -> dict[str, Any]:
    from .bench import onnx_alone

    return onnx_alone(PayloadSet.open(Path(spec[0])), spec[1] or None, spec[2])


def onnx_main(spec: tuple[str, str, float | None], conn: Any) -> None:
    """Child process entry: onnxruntime alone on ``(payload_dir, model, until_s)``."""
    _serve(_onnx, "model timing", spec, conn)


def run_child(target: Callable[..., None], spec: Any, timeout_s: float = 900.0) -> Any:
    """Start ``target(spec)`` in a child process and return its result."""
    kids = Children()
    try:
        return recv(kids.start(target, spec), "result", timeout_s, "a timing process")
    finally:
        kids.close()
