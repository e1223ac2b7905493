"""``boutline run``: the gateway daemon, from a TOML config with environment overrides."""

from __future__ import annotations

import contextlib
import logging
import signal
import threading
import time
from pathlib import Path
from typing import Any

import typer

__all__ = ["run", "serve"]

log = logging.getLogger("boutline.run")

_STATUS_EVERY_S = 60.0  # one status line a minute in the journal


def run(
    config: Path | None = typer.Option(
        None, "--config", "-c", help="TOML config file; without it, defaults and BOUTLINE_* env."
    ),
    log_level: str = typer.Option("info", "--log-level", help="debug, info, warning or error."),
) -> None:
    """Run the gateway daemon: subscribe to the collar topics, classify, store, forward.

    SIGHUP reloads the model file; SIGTERM or Ctrl-C stops cleanly (open bouts and pending
    hops are kept in the store and resumed at the next start).

    Example: boutline run --config /etc/boutline/boutline.toml
    """
    from ..config import load_settings
    from ..errors import ConfigError

    level = getattr(logging, log_level.upper(), None)
    if not isinstance(level, int):
        raise ConfigError(f"--log-level {log_level!r}: use debug, info, warning or error")
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    settings = load_settings(config)
    stop = threading.Event()

    def _stop(signum: int, frame: Any) -> None:
        log.info("signal %d: stopping", signum)
        stop.set()

    previous = {s: signal.signal(s, _stop) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        serve(settings, stop)
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


def serve(settings: Any, stop: threading.Event, *, install_sighup: bool = True) -> dict[str, Any]:
    """Store, outputs, HTTP and the pipeline loop until ``stop``; returns the last status."""
    from ..affinity import pin_threads, restore_threads
    from ..analytics import Analytics
    from ..daemon import Gateway
    from ..http import Health, HttpEndpoint
    from ..ingestproc import open_ingest
    from ..outbox import Outputs
    from ..store import STORE_FILE, Store
    from ..systemd import Notifier

    notifier = Notifier()
    store = Store.open(
        settings.data_dir / STORE_FILE,
        checkpoint_pages=settings.store.checkpoint_pages,
        retention_days=settings.store.retention_days,
    )
    outputs = http = None
    # Before any thread starts, so that all of them inherit it (gateway/affinity.py)
    pinned = pin_threads(settings.process.cpu)
    try:
        analytics = Analytics(settings, speed=1.0)
        gateway = Gateway(settings, store=store, analytics=analytics)
        tel = gateway.telemetry
        outputs = Outputs.from_settings(settings, store.path, registry=tel.registry)
        store.add_listener(outputs.listener)
        gateway.on_store_failed = outputs.publish_live  # disk full: MQTT still hears of it
        analytics.add_fact_listener(outputs.listener)
        for problem in outputs.start():
            log.warning("output not working yet (retrying in the background): %s", problem)
        ingest = open_ingest(settings, topic_filter=gateway.topic_filter, telemetry=tel)
        if settings.http.enabled:
            health = Health(
                broker_connected=ingest.connected.is_set,
                model_loaded=lambda: gateway.model is not None,
                outputs=outputs,
            )
            http = HttpEndpoint.from_settings(settings.http, health, tel.registry).start()
        if install_sighup and threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGHUP, lambda s, f: gateway.inference.request_reload())
        log.info(
            "gateway up: site %s, model %s (%s), broker %s:%s, store %s",
            settings.site.id,
            gateway.model.source,
            ", ".join(gateway.model.classes),
            settings.mqtt.host,
            settings.mqtt.port,
            store.path,
        )
        next_status = time.monotonic() + _STATUS_EVERY_S
        ready_sent = False

        def on_tick(result: Any) -> None:
            nonlocal next_status, ready_sent
            if not ready_sent and ingest.subscribed.is_set():
                notifier.ready(f"subscribed to {gateway.topic_filter}")
                ready_sent = True
            notifier.ping()
            if time.monotonic() >= next_status:
                next_status = time.monotonic() + _STATUS_EVERY_S
                s = gateway.status()
                line = (
                    f"{s['animals']} animals, {s['frames_in']:.0f} frames,"
                    f" {sum(s['rejects'].values()):.0f} rejected,"
                    f" {s['windows_classified']:.0f} windows"
                )
                notifier.status(line)
                log.info("status: %s", line)

        try:
            gateway.run(stop, ingest=ingest, on_tick=on_tick)
        finally:
            notifier.stopping()
            gateway.close(flush=False)
        return gateway.status()
    finally:
        if http is not None:
            http.stop()
        if outputs is not None:
            with contextlib.suppress(Exception):
                outputs.stop()
        store.close()
        notifier.close()
        restore_threads(pinned)
