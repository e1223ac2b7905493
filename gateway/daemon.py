"""The pipeline loop: ingest -> decode -> registry -> windows -> inference -> tracker -> store.

One thread does all the work after the network thread has queued a message (DESIGN.md, data
flow, one direction):

    Ingest.drain()  ->  Gateway.handle(messages)      decode, registry, ring buffers
    every tick      ->  Gateway.tick()                ready windows -> one model call ->
                                                      smoothing and bouts -> listeners/store

``handle`` is the message handler: tests push ``(topic, payload, receive time)`` straight
into it without a broker, and the same handler runs behind a real broker in ``run``.
Nothing a collar sends raises out of ``handle``: every problem is a Rejection, counted per
reason and logged at most once a minute per reason with the collar id and a truncated payload.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

from .affinity import pin_threads, restore_threads
from .analytics import Analytics
from .bouts import Event, HerdTracker
from .config import Settings
from .errors import StoreError
from .infer import Inference
from .ingest import Ingest, Message, collar_filter
from .ingestproc import ProcessIngest, open_ingest
from .memory import TRIM_EVERY_S, trim_heap, tune_malloc
from .model import Model
from .outbox import GatewayAlert
from .registry import Registry, load_assignments
from .store import Store
from .telemetry import RateLimitedLog, Telemetry
from .types import CollarGravity, Decision, NoDataHop, Posteriors
from .windows import Windows
from .wire import Limits, Reason, Rejection, decode, parse_topic

__all__ = ["Gateway", "TickResult"]

log = logging.getLogger("boutline.gateway")

_DRAIN_MAX = 5000  # messages handled between two looks at the clock
_SILENCE_EVERY_S = 1.0  # how often silent animals are looked for (a pass over all streams)


@dataclass(slots=True)
class TickResult:
    """What one tick produced, handed to every listener (store, outputs, the demo table)."""

    now: float
    events: list[Event] = field(default_factory=list)
    decisions: list[Decision] = field(default_factory=list)
    windows: int = 0
    no_data: int = 0


Listener = Callable[[TickResult], None]


class Gateway:
    """The daemon's state: registry, ring buffers, model, tracker; no network of its own."""

    def __init__(
        self,
        settings: Settings,
        *,
        model: Model | None = None,
        telemetry: Telemetry | None = None,
        speed: float | None = 1.0,
        listeners: Iterable[Listener] = (),
        store: Store | None = None,
        analytics: Analytics | None = None,
    ) -> None:
        tune_malloc()  # before the model and the ring buffers (gateway/memory.py)
        self.settings = settings
        self.telemetry = telemetry or Telemetry()
        tel = self.telemetry
        if model is None:
            self.inference = Inference.open(
                settings.model.path or None,
                batch_max=settings.model.batch_max,
                watch=settings.model.watch,
                telemetry=tel,
            )
        else:
            self.inference = Inference(
                model,
                batch_max=settings.model.batch_max,
                watch=settings.model.watch,
                telemetry=tel,
            )
        self.inference.on_reload = self._model_reloaded
        trim_heap()  # loading a model session leaves ~14 MB free on the heap (docs/performance.md)
        m = self.inference.model
        assignments = (
            load_assignments(settings.site.assignments) if settings.site.assignments else []
        )
        self.registry = Registry(
            assignments,
            unknown_collars=settings.site.unknown_collars,
            max_collars=settings.limits.max_collars,
        )
        self.windows = Windows.for_model(
            m, settings.windows, settings.limits, speed=speed, telemetry=tel
        )
        self.tracker = HerdTracker.from_model(m, settings.smoothing, settings.bouts)
        self.limits = Limits(
            max_payload_bytes=settings.limits.max_payload_bytes,
            max_samples=settings.limits.max_samples,
        )
        self.prefix = settings.mqtt.topic_prefix
        self.site = settings.site.id
        self.listeners: list[Listener] = list(listeners)
        self._bad_log = RateLimitedLog(log, settings.limits.log_every_s)
        self._next_silence = 0.0
        self.rejects: Counter[str] = Counter()
        self.store = store
        self._unstored: list[Event] = []
        self._touched: set[str] = set()
        self._next_commit = 0.0
        self._store_log = RateLimitedLog(log, 60.0)
        self._cap_alerted = False  # the collar cap is raised as a gateway alert once per run
        # Events the store could not take (disk full) go here too, e.g. to MQTT (serve() wires
        # Outputs.publish_live); the store keeps them and writes them once it can.
        self.on_store_failed: Callable[[list[Any]], Any] | None = None
        self._store_failing = False
        if store is not None:
            self._attach_store(store, assignments)
        # Budgets, alerts and collar health (gateway/analytics.py) follow the same store.
        self.analytics = analytics
        if analytics is not None and store is not None:
            analytics.attach(store)

    def _attach_store(self, store: Store, assignments: list[Any]) -> None:
        """Resume open bouts and states from the store; record the assignments in it."""
        states = store.load_states()
        bad = self.tracker.restore(states)
        if states:
            log.info("resumed the state of %d animals from %s", len(states) - len(bad), store.path)
        if bad:
            log.warning("could not resume %d animals (they start afresh): %s", len(bad), bad[:5])
        if assignments:
            store.replace_assignments(
                (
                    a.collar,
                    a.animal,
                    a.valid_from,
                    None if a.valid_to == float("inf") else a.valid_to,
                )
                for a in assignments
            )

    @property
    def model(self) -> Model:
        return self.inference.model

    @property
    def topic_filter(self) -> str:
        return collar_filter(self.prefix, self.site)

    def _model_reloaded(self, new: Model) -> None:
        # Same classes, rate, window and hop (checked by Inference); the transition matrix may
        # have changed, so every smoother moves to the new chain parameters.
        params = HerdTracker.from_model(new, self.settings.smoothing, self.settings.bouts).params
        self.tracker.params = params
        for sm in self.tracker.smoothers.values():
            sm.params = params
        trim_heap()  # what building the new session and dropping the old one left free

    # ------------------------------------------------------------------ frames in

    def handle(self, messages: Iterable[Message]) -> int:
        """Decode and buffer raw messages; returns how many frames were accepted."""
        prefix, site, limits = self.prefix, self.site, self.limits
        windows, registry, analytics = self.windows, self.registry, self.analytics
        future, past = self.settings.windows.clock_future_s, self.settings.windows.clock_past_s
        rejects: Counter[str] = Counter()
        accepted = samples = received = 0
        for topic, payload, rx in messages:
            received += 1
            parsed = parse_topic(topic, prefix)
            if isinstance(parsed, Rejection):
                self._rejected(parsed, payload, rejects)
                continue
            topic_site, collar = parsed
            if topic_site != site:
                self._rejected(
                    Rejection(Reason.BAD_TOPIC, f"site {topic_site!r} is not {site!r}", collar),
                    payload,
                    rejects,
                )
                continue
            frame = decode(payload, collar, limits)
            if isinstance(frame, Rejection):
                self._rejected(frame, payload, rejects)
                continue
            frame.received_at = rx
            # The collar's time decides which assignment applies, unless its clock is wrong.
            t = frame.t if rx - past <= frame.t <= rx + future else rx
            animal = registry.resolve(collar, t)
            if isinstance(animal, Rejection):
                self._rejected(animal, payload, rejects)
                continue
            r = windows.push(frame, animal)
            if r is not None:
                self._rejected(r, payload, rejects)
                continue
            accepted += 1
            samples += frame.n
            if analytics is not None:
                analytics.frame(frame, animal)
        tel = self.telemetry
        tel.messages_in.inc(received)
        tel.frames_in.inc(accepted)
        tel.samples_in.inc(samples)
        for reason, n in rejects.items():
            tel.reject(reason, n)
            self.rejects[reason] += n
        if rejects.get(Reason.COLLAR_CAP):
            tel.collar_overflow.inc(rejects[Reason.COLLAR_CAP])
            if not self._cap_alerted:
                self._collar_cap_alert(rejects[Reason.COLLAR_CAP])
        tel.collars.set(registry.tracked)
        return accepted

    def _collar_cap_alert(self, refused: int) -> None:
        """Say once that the collar cap is reached: a flood of invented ids, or a too-low cap."""
        self._cap_alerted = True
        message = (
            f"tracking limits.max_collars={self.registry.max_collars} collars: frames from"
            " further new collars are refused and counted (boutline_collar_overflow_total);"
            " raise the cap if the herd is that large, else look for a device inventing collar ids"
        )
        log.error("collar cap reached: %s", message)
        if self.store is not None:  # the store hands it to the outputs (MQTT alerts, InfluxDB)
            self._unstored.append(GatewayAlert("collar_cap", message, time.time(), refused))

    def _rejected(self, r: Rejection, payload: bytes, counts: Counter[str]) -> None:
        counts[r.reason] += 1
        self._bad_log.warning(
            str(r.reason),
            "rejected frame from collar %r (%s): %s; payload %r",
            r.collar_id or "?",
            r.reason,
            r.detail,
            bytes(payload[:80]),
        )

    # ------------------------------------------------------------------ windows out

    def tick(self, now: float | None = None) -> TickResult:
        """Classify every ready window in one call, smooth, segment, hand out the result."""
        now = time.time() if now is None else now
        self.inference.maybe_reload()
        if now >= self._next_silence:
            self._next_silence = now + _SILENCE_EVERY_S
            self.windows.flush_silent(now)
        ready = self.windows.collect()
        posts = self.inference.classify(ready.batch)
        if posts:
            self.telemetry.window_latency.set(max(0.0, now - max(p.ready_at for p in posts)))
            if self.analytics is not None:
                self._gravity(ready.batch)
        items: list[Posteriors | NoDataHop] = [*posts, *ready.no_data]
        items.sort(key=lambda i: (i.animal, i.t_start if isinstance(i, Posteriors) else i.t))
        result = TickResult(now, windows=len(posts), no_data=len(ready.no_data))
        result.events = self.tracker.push_many(items, result.decisions)
        self._publish(result)
        self._analytics_tick()
        return result

    def _gravity(self, batch: Any) -> None:
        """Each classified window's mean acceleration, for the collar-rotation check."""
        assert self.analytics is not None
        g = batch.x.mean(axis=2).tolist()  # [N, 3]: the window's static vector, in g
        t = batch.t_start.tolist()
        window_s, collar_of = self.model.window_s, self.windows.collar_of
        for i, animal in enumerate(batch.animals):
            self.analytics.gravity(
                CollarGravity(collar_of(animal), animal, t[i], window_s, tuple(g[i]))
            )

    def _analytics_tick(self) -> None:
        if self.analytics is None:
            return
        try:
            self.analytics.tick()
        except StoreError as exc:  # retried at the next tick
            self._store_log.warning("analytics", "analytics could not write: %s", exc)

    def close(
        self, now: float | None = None, *, flush: bool = True, final: bool = False
    ) -> TickResult:
        """Last tick; then decide pending hops (``flush``) and close open bouts (``final``).

        A daemon's clean shutdown uses ``flush=False``: the smoothers' pending hops go into
        the store's full snapshot and are decided after the restart with their full lag.
        ``final`` ends a demo or a replay: every open bout is closed and stored.
        """
        result = self.tick(now)
        if flush or final:
            more = TickResult(result.now)
            more.events = self.tracker.flush(more.decisions)
            if final:
                for seg in self.tracker.segmenters.values():
                    more.events.extend(seg.close())
            self._publish(more)
            result.events += more.events
            result.decisions += more.decisions
        if self.store is not None:
            self._commit(full=True)
        if self.analytics is not None:
            self._analytics_tick()
            self.analytics.close()
        return result

    def _publish(self, result: TickResult) -> None:
        if self.store is not None:
            self._unstored.extend(result.events)
            self._touched.update(d.animal for d in result.decisions)
            if result.now >= self._next_commit:
                self._commit()
                self._next_commit = result.now + self.settings.store.commit_interval_s
        if not (result.events or result.decisions):
            return
        kinds = Counter(e.kind for e in result.events)
        for kind, n in kinds.items():
            self.telemetry.event(kind, n)
        for listener in self.listeners:
            listener(result)

    def _commit(self, *, full: bool = False) -> None:
        """Events since the last commit plus the touched animals' snapshots, one transaction."""
        assert self.store is not None
        if not (self._unstored or self._touched or full):
            return
        states = self.tracker.snapshot(None if full else self._touched, full=full)
        events, self._unstored, self._touched = self._unstored, [], set()
        try:
            self.store.write_events(events, states)
        except StoreError as exc:  # the store keeps the batch and retries with the next one
            self._store_log.warning("store", "store write failed, retrying with the next: %s", exc)
            if self.on_store_failed is not None:
                if not self._store_failing:  # the operator must know, and the store cannot say it
                    events = [*events, GatewayAlert("store_failing", str(exc), time.time())]
                self.on_store_failed(events)
            self._store_failing = True
        else:
            if self._store_failing:
                log.warning("store writes again (%s)", self.store.path)
            self._store_failing = False

    # ------------------------------------------------------------------ the loop

    def run(
        self,
        stop: threading.Event,
        *,
        ingest: Ingest | ProcessIngest | None = None,
        tick_s: float = 0.1,
        on_tick: Callable[[TickResult], None] | None = None,
    ) -> Ingest | ProcessIngest:
        """Subscribe and work until ``stop`` is set; raises BrokerAuthError if refused."""
        ingest = ingest or open_ingest(
            self.settings, topic_filter=self.topic_filter, telemetry=self.telemetry
        )
        # This thread and the network thread started below share one CPU: their GIL hand-offs
        # across two CPUs cost half the CPU time per frame (gateway/affinity.py). An ingest
        # process (gateway/ingestproc.py) takes the other CPUs.
        pinned = pin_threads(self.settings.process.cpu)
        ingest.start()
        next_tick = time.monotonic() + tick_s
        next_trim = time.monotonic() + TRIM_EVERY_S
        try:
            while not stop.is_set():
                ingest.check()
                wait = max(0.0, min(0.05, next_tick - time.monotonic()))
                msgs = ingest.drain(_DRAIN_MAX, timeout_s=wait)
                if msgs:
                    self.handle(msgs)
                if time.monotonic() >= next_tick:
                    next_tick = time.monotonic() + tick_s
                    r = self.tick()
                    if on_tick is not None:
                        on_tick(r)
                    if next_tick >= next_trim:  # what a tick's small objects left free
                        next_trim = next_tick + TRIM_EVERY_S
                        trim_heap()
        finally:
            ingest.stop()
            # what the network thread had queued before it stopped is still ours to keep
            while msgs := ingest.drain(_DRAIN_MAX, timeout_s=0):
                self.handle(msgs)
            restore_threads(pinned)
        return ingest

    def status(self) -> dict[str, Any]:
        """Plain figures for a status line or summary."""
        snap = self.telemetry.snapshot()
        snap["animals"] = len(self.windows.animals)
        snap["model"] = self.model.source
        return snap
