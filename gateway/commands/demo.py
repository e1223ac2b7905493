"""``boutline demo``: a simulated herd through the real gateway, on an embedded broker.

Without ``--broker`` an amqtt broker starts in this process on 127.0.0.1 (a free port), so
the demo needs nothing but ``pip install boutline``. The simulator publishes the herd over
MQTT at a speed factor; the gateway subscribes exactly as ``boutline run`` does (ingest,
registry, windows, one model call per tick, smoothing, bouts, SQLite store). A live table
shows each animal's behaviour and today's minutes; the end prints a summary and the store.
"""

from __future__ import annotations

import contextlib
import math
import re
import signal
import threading
import time
from collections import defaultdict
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import typer

__all__ = ["EmbeddedBroker", "HerdView", "demo", "parse_duration", "run_demo"]

SITE = "demo-farm"
_FRAME_S = 5.0  # seconds of samples per frame: keeps an accelerated herd within amqtt's pace
_DURATION_RE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([smhd]?)\s*$")


def parse_duration(text: str) -> float:
    """Seconds from ``90``, ``90s``, ``45m``, ``6h`` or ``2d``.

    >>> parse_duration("6h"), parse_duration("90"), parse_duration("1.5d")
    (21600.0, 90.0, 129600.0)
    """
    from ..errors import ConfigError

    m = _DURATION_RE.match(text)
    if not m:
        raise ConfigError(f"--duration {text!r}: write a number with s, m, h or d, e.g. 6h")
    value = float(m.group(1)) * {"": 1, "s": 1, "m": 60, "h": 3600, "d": 86400}[m.group(2)]
    if not 0 < value <= 30 * 86400:
        raise ConfigError(f"--duration {text!r}: give more than 0 and at most 30d")
    return value


class EmbeddedBroker:
    """An amqtt broker on loopback, in a thread with its own event loop (MQTT 3.1.1)."""

    def __init__(self, host: str = "127.0.0.1", port: int = 0) -> None:
        from ..servers import free_port

        self.host = host
        self.port = port or free_port(host)
        self._loop: Any = None
        self._thread: threading.Thread | None = None
        self._ready = threading.Event()
        self._error: BaseException | None = None

    def start(self, timeout_s: float = 15.0) -> EmbeddedBroker:
        import asyncio
        import logging

        from ..errors import BrokerError

        # amqtt logs every connection at INFO and a warning per plugin default; not our news
        for name in ("amqtt", "transitions"):
            logging.getLogger(name).setLevel(logging.ERROR)

        def main() -> None:
            from amqtt.broker import Broker

            loop = asyncio.new_event_loop()
            self._loop = loop
            asyncio.set_event_loop(loop)
            config = {
                "listeners": {"default": {"type": "tcp", "bind": f"{self.host}:{self.port}"}},
                # anonymous loopback clients only; no $SYS topics, no packet logging
                "plugins": {
                    "amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}
                },
            }
            try:
                broker = Broker(config, loop=loop)
                loop.run_until_complete(broker.start())
            except BaseException as exc:  # noqa: BLE001 - reported to the starting thread
                self._error = exc
                self._ready.set()
                loop.close()
                return
            self._ready.set()
            try:
                loop.run_forever()
            finally:
                with contextlib.suppress(Exception):
                    loop.run_until_complete(broker.shutdown())
                loop.close()

        self._thread = threading.Thread(target=main, name="amqtt-broker", daemon=True)
        self._thread.start()
        if not self._ready.wait(timeout_s) or self._error is not None:
            raise BrokerError(
                f"the embedded broker could not start on {self.host}:{self.port}"
                f" ({self._error or 'timeout'}); give one with --broker HOST:PORT"
            )
        return self

    def stop(self) -> None:
        if self._loop is not None and self._thread is not None:
            self._loop.call_soon_threadsafe(self._loop.stop)
            self._thread.join(10)
            self._thread = None


@dataclass
class _Animal:
    behaviour: str = "-"
    since: float = 0.0
    confidence: float = 0.0
    minutes: dict[str, dict[str, float]] = field(default_factory=lambda: defaultdict(dict))


class HerdView:
    """What the table shows, fed by the gateway's tick results (thread-safe)."""

    def __init__(self, classes: tuple[str, ...]) -> None:
        self.classes = classes
        self.animals: dict[str, _Animal] = {}
        self.sim_now = 0.0
        self.alerts: dict[str, list[str]] = {}
        self.alerts_raised = 0
        self._lock = threading.Lock()

    def set_alerts(self, open_alerts: Any) -> None:
        """Open alerts (rows of ``Analytics.open_alerts``), shown by rule per animal."""
        by: dict[str, list[str]] = defaultdict(list)
        for a in open_alerts:
            by[a["animal"] or a["collar"]].append(str(a["rule"]).replace("_", " "))
        with self._lock:
            self.alerts = dict(by)
            self.alerts_raised = max(self.alerts_raised, sum(len(v) for v in by.values()))

    def __call__(self, result: Any) -> None:
        with self._lock:
            for d in result.decisions:
                a = self.animals.setdefault(d.animal, _Animal())
                day = datetime.fromtimestamp(d.t, UTC).strftime("%Y-%m-%d")
                per = a.minutes[day]
                per[d.behaviour] = per.get(d.behaviour, 0.0) + d.duration_s / 60.0
                self.sim_now = max(self.sim_now, d.t + d.duration_s)
            for e in result.events:
                if e.kind == "state_changed":
                    a = self.animals.setdefault(e.animal, _Animal())
                    a.behaviour, a.since, a.confidence = e.behaviour, e.since, e.confidence

    def today(self) -> str:
        return datetime.fromtimestamp(self.sim_now or time.time(), UTC).strftime("%Y-%m-%d")

    def rows(self) -> list[tuple[str, str, float, dict[str, float]]]:
        day = self.today()
        with self._lock:
            return [
                (name, a.behaviour, a.since, dict(a.minutes.get(day, {})))
                for name, a in sorted(self.animals.items())
            ]

    def totals(self) -> dict[str, dict[str, float]]:
        """Minutes per behaviour per animal over the whole run."""
        with self._lock:
            out: dict[str, dict[str, float]] = {}
            for name, a in self.animals.items():
                tot: dict[str, float] = {}
                for per in a.minutes.values():
                    for b, m in per.items():
                        tot[b] = tot.get(b, 0.0) + m
                out[name] = tot
            return out


def _hhmm(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%H:%M") if t > 0 else "-"


def _table(view: HerdView, status: dict[str, Any], title: str) -> Any:
    from rich.table import Table

    from ..types import NO_DATA

    table = Table(title=title, caption=status.get("caption", ""), expand=False)
    table.add_column("animal")
    table.add_column("behaviour")
    table.add_column("since", justify="right")
    for c in view.classes:
        table.add_column(c[:10], justify="right")
    table.add_column("no data", justify="right")
    table.add_column("alerts")
    for name, behaviour, since, minutes in view.rows():
        cells = [f"{minutes.get(c, 0.0):.0f}" for c in view.classes]
        table.add_row(
            name,
            behaviour,
            _hhmm(since),
            *cells,
            f"{minutes.get(NO_DATA, 0.0):.0f}",
            ", ".join(view.alerts.get(name, [])),
        )
    return table


def run_demo(
    *,
    herd: int = 20,
    speed: float | None = 60.0,
    duration_s: float = 7200.0,
    broker: str | None = None,
    seed: int = 2026,
    scenario: str = "housed",
    data_dir: Path | None = None,
    model: Path | None = None,
    live: bool = True,
    max_wall_s: float | None = None,
    console: Any = None,
) -> dict[str, Any]:
    """Run the demo; returns its summary (also printed).

    The first Ctrl-C ends it with the summary, wherever it comes (start-up included).
    """
    from rich.console import Console
    from rich.live import Live

    from simulator.herd import Herd
    from simulator.publish import publish_shard

    from ..analytics import Analytics
    from ..config import Settings
    from ..daemon import Gateway
    from ..errors import ConfigError
    from ..ingestproc import open_ingest
    from ..store import STORE_FILE, Store
    from ..telemetry import Telemetry

    console = console or Console()
    if herd < 1 or herd > 2000:
        raise ConfigError(f"--herd {herd}: give 1 to 2000 animals")
    if speed is not None and not 0 < speed <= 100_000:
        raise ConfigError(f"--speed {speed:g}: give more than 0 (1 = real time), or --flat-out")
    interrupt = threading.Event()
    with _first_ctrl_c_sets(interrupt):
        embedded = None
        if broker:
            host, _, port_text = broker.rpartition(":")
            if not host or not port_text.isdigit() or not 0 < int(port_text) < 65536:
                raise ConfigError(f"--broker {broker!r}: write HOST:PORT, e.g. 127.0.0.1:1883")
            port = int(port_text)
        else:
            embedded = EmbeddedBroker().start()
            host, port = embedded.host, embedded.port
        stamp = datetime.now(UTC).strftime("%Y%m%d-%H%M%S")
        data_dir = Path(data_dir or Path("boutline-demo") / f"run-{stamp}")
        # Sent in the past so the herd's last frame is "now": the collar clocks stay plausible.
        start = math.floor((time.time() - duration_s) / 60.0) * 60.0
        rate = 4.0 * (speed or 10_000.0) / _FRAME_S  # frames per collar per second, with headroom
        herd_kwargs = {
            "n_animals": herd,
            "seed": seed,
            "scenario": scenario,
            "start": start,
            "frame_s": _FRAME_S,
        }
        data_dir.mkdir(parents=True, exist_ok=True)
        assignments = data_dir / "assignments.csv"
        rows = Herd(**herd_kwargs).assignments
        assignments.write_text(
            "collar,animal,from,to\n"
            + "".join(f"{r['collar']},{r['animal']},{r['from']},{r['to']}\n" for r in rows)
        )
        settings = Settings.model_validate(
            {
                "site": {"id": SITE, "unknown_collars": "adopt", "assignments": str(assignments)},
                "mqtt": {
                    "host": host,
                    "port": port,
                    "protocol": "3.1.1" if embedded else "5",
                    "client_id": f"boutline-demo-{stamp}",
                    "reconnect_min_s": 0.5,
                    "reconnect_max_s": 5.0,
                    "session_expiry_s": 0,  # a demo leaves no session behind on a real broker
                },
                "model": {"path": str(model) if model else "", "watch": False},
                "windows": {"clock_past_s": min(30 * 86400.0, duration_s + 86400.0)},
                "limits": {"max_frame_rate_hz": min(1000.0, rate), "max_collars": max(herd, 1)},
                "store": {"data_dir": str(data_dir)},
                "outputs": {"mqtt": False},
                "http": {"enabled": False},
            }
        )
        telemetry = Telemetry()
        store = Store.open(settings.data_dir / STORE_FILE)
        gateway = pub_thread = gw_thread = None
        stop_pub, stop_gw = threading.Event(), threading.Event()
        pub_state: dict[str, Any] = {"frames": 0, "sim_s": 0.0, "result": None, "error": None}
        gw_error: list[BaseException] = []
        wall0 = time.monotonic()
        try:
            analytics = Analytics(settings, speed=speed)
            gateway = Gateway(
                settings, store=store, speed=speed, telemetry=telemetry, analytics=analytics
            )
            view = HerdView(gateway.model.classes)
            gateway.listeners.append(view)
            ingest = open_ingest(settings, topic_filter=gateway.topic_filter, telemetry=telemetry)

            next_alerts = [0.0]

            def alerts_now(result: Any) -> None:  # in the gateway's thread, which owns the store
                if time.monotonic() >= next_alerts[0]:
                    next_alerts[0] = time.monotonic() + 1.0
                    view.set_alerts(analytics.open_alerts())

            def gw_main() -> None:
                try:
                    gateway.run(stop_gw, ingest=ingest, tick_s=0.25, on_tick=alerts_now)
                except BaseException as exc:  # noqa: BLE001 - shown by the main thread
                    gw_error.append(exc)

            gw_thread = threading.Thread(target=gw_main, name="gateway", daemon=True)
            gw_thread.start()
            deadline = time.monotonic() + 15.0
            while not ingest.wait_connected(0.25) and not interrupt.is_set():
                if gw_error:
                    raise gw_error[0]
                if time.monotonic() > deadline:
                    raise ConfigError(
                        f"the gateway could not subscribe at {host}:{port}; is the broker up?"
                    )

            def report(frames: int, nbytes: int, sim_s: float) -> None:
                pub_state["frames"], pub_state["sim_s"] = frames, sim_s

            def pub_main() -> None:
                try:
                    pub_state["result"] = publish_shard(
                        host=host,
                        port=port,
                        site=SITE,
                        prefix=settings.mqtt.topic_prefix,
                        herd_kwargs=herd_kwargs,
                        shard=(0, 1),
                        speed=speed,
                        fmt="json",
                        qos=1,
                        duration_s=duration_s,
                        max_wall_s=max_wall_s,
                        report=report,
                        stop=stop_pub,
                    )
                except BaseException as exc:  # noqa: BLE001 - shown by the main thread
                    pub_state["error"] = exc

            pace = "flat out" if speed is None else f"{speed:g}x"
            title = f"Boutline demo: {herd} animals on {SITE}, {pace}; minutes today per behaviour"
            if not interrupt.is_set():
                pub_thread = threading.Thread(target=pub_main, name="simulator", daemon=True)
                pub_thread.start()
                if not live:
                    console.print(f"{title}; store {data_dir}; Ctrl-C ends")

            def status() -> dict[str, Any]:
                s = gateway.status()
                sim = view.sim_now
                return {
                    "caption": (
                        f"herd clock {_hhmm(sim)} {view.today() if sim else ''} | published"
                        f" {pub_state['frames']} frames, received {s['frames_in']:.0f}, rejected"
                        f" {sum(s['rejects'].values()):.0f} | windows {s['windows_classified']:.0f}"
                        f" | Ctrl-C ends"
                    )
                }

            try:
                with (
                    Live(
                        _table(view, status(), title),
                        console=console,
                        refresh_per_second=2,
                        transient=False,
                        auto_refresh=False,
                    )
                    if live and not interrupt.is_set()
                    else contextlib.nullcontext() as lv
                ):
                    while pub_thread and pub_thread.is_alive() and not gw_error:
                        pub_thread.join(0.5)
                        if interrupt.is_set():
                            break
                        if lv is not None:
                            lv.update(_table(view, status(), title), refresh=True)
                    if not interrupt.is_set():
                        _wait_drained(gateway, pub_state, gw_error, interrupt)
                    if lv is not None:
                        lv.update(_table(view, status(), title), refresh=True)
            except KeyboardInterrupt:  # a second Ctrl-C: the default handler is back
                interrupt.set()
                stop_pub.set()
            if pub_state["error"] is not None:
                raise pub_state["error"]
            if gw_error:
                raise gw_error[0]
        finally:
            stop_pub.set()
            if pub_thread is not None:
                pub_thread.join(35)
            stop_gw.set()
            if gw_thread is not None:
                gw_thread.join(15)
            summary: dict[str, Any] = {}
            if gateway is not None:
                with contextlib.suppress(Exception):
                    gateway.close(final=True)
                summary = _summary(gateway, view, store, pub_state, time.monotonic() - wall0)
                summary["interrupted"] = interrupt.is_set()
            store.close()
            if embedded is not None:
                embedded.stop()
        _print_summary(console, summary, view)
        return summary


@contextlib.contextmanager
def _first_ctrl_c_sets(interrupt: threading.Event) -> Iterator[None]:
    """Inside, the first Ctrl-C sets ``interrupt`` (the demo then ends with its summary).

    Start-up (the model, the ingest process, the subscription) is never cut in the middle;
    the run stops at its next check. A second Ctrl-C raises KeyboardInterrupt as usual.
    Outside the main thread, where signals cannot be caught, nothing changes.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def on_sigint(signum: int, frame: Any) -> None:
        interrupt.set()
        signal.signal(signal.SIGINT, signal.default_int_handler)

    old = signal.signal(signal.SIGINT, on_sigint)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, old)


def _wait_drained(
    gateway: Any,
    pub_state: dict[str, Any],
    gw_error: list,
    interrupt: threading.Event,
    timeout_s: float = 30.0,
) -> None:
    """After the last frame is published, let the gateway take what is still on its way."""
    deadline = time.monotonic() + timeout_s
    tel = gateway.telemetry
    while time.monotonic() < deadline and not gw_error and not interrupt.is_set():
        if tel.value("boutline_messages_in_total") >= pub_state["frames"]:
            break
        time.sleep(0.1)
    time.sleep(0.5)  # one more tick for the last windows


def _summary(gateway: Any, view: HerdView, store: Any, pub_state: dict, wall_s: float) -> dict:
    s = gateway.status()
    bouts = store.counts()["bouts"] if store else 0
    return {
        "animals": len(view.animals),
        "frames_published": pub_state["result"].frames
        if pub_state["result"]
        else pub_state["frames"],
        "frames_in": s["frames_in"],
        "rejects": s["rejects"],
        "windows_classified": s["windows_classified"],
        "bouts_stored": bouts,
        "minutes": view.totals(),
        "store": str(Path(store.path).resolve()),
        "wall_s": wall_s,
        "simulated_s": pub_state["sim_s"],
    }


def _print_summary(console: Any, summary: dict[str, Any], view: HerdView) -> None:
    from rich.table import Table

    from ..types import CAUTION

    if not summary:
        return
    console.print()
    if summary["minutes"]:  # none if Ctrl-C came before the first window
        t = Table(title="Minutes per behaviour over the run (smoothed, per animal)")
        t.add_column("animal")
        for c in view.classes:
            t.add_column(c, justify="right")
        for name, per in sorted(summary["minutes"].items()):
            t.add_row(name, *(f"{per.get(c, 0.0):.0f}" for c in view.classes))
        console.print(t)
    rejects = ", ".join(f"{k} {v:.0f}" for k, v in summary["rejects"].items()) or "none"
    console.print(
        f"{'Interrupted' if summary.get('interrupted') else 'Done'}: {summary['animals']} animals,"
        f" {summary['frames_in']:.0f} of {summary['frames_published']} frames taken"
        f" (rejected: {rejects}), {summary['windows_classified']:.0f} windows classified,"
        f" {summary['bouts_stored']} bouts stored in {summary['wall_s']:.0f} s."
    )
    console.print(f"Store: {summary['store']}")
    console.print(CAUTION)


def demo(
    herd: int = typer.Option(20, "--herd", help="Number of simulated animals."),
    speed: float = typer.Option(60.0, "--speed", help="Simulated seconds per real second."),
    flat_out: bool = typer.Option(False, "--flat-out", help="Publish as fast as possible."),
    duration: str = typer.Option("2h", "--duration", help="Simulated time: 90m, 6h, 2d."),
    broker: str = typer.Option("", "--broker", help="HOST:PORT of a broker; default: embedded."),
    seed: int = typer.Option(2026, "--seed", help="Herd seed (same seed, same herd)."),
    scenario: str = typer.Option("housed", "--scenario", help="housed, pasture or mixed."),
    data_dir: Path = typer.Option(
        None, "--data-dir", help="Store directory; default: new one under ./boutline-demo."
    ),
    model: Path = typer.Option(None, "--model", help="ONNX model; default: the shipped one."),
    no_table: bool = typer.Option(False, "--no-table", help="No live table (for logs and CI)."),
) -> None:
    """Run a simulated herd through the real gateway on an embedded broker; live herd table and summary.

    Example: boutline demo --herd 20 --speed 60 --duration 2h
    """
    run_demo(
        herd=herd,
        speed=None if flat_out else speed,
        duration_s=parse_duration(duration),
        broker=broker or None,
        seed=seed,
        scenario=scenario,
        data_dir=data_dir,
        model=model,
        live=not no_table,
    )
