"""Gateway counters: frames in, rejects by reason, windows, inference time, events by kind.

Throughput, drops and rejects go to counters, not to log lines. Each :class:`Telemetry` owns
its own prometheus-client registry, so several gateways (tests, the demo) never share series;
the HTTP side exposes ``telemetry.registry`` as it is.

>>> t = Telemetry()
>>> t.reject("bad_json"); t.reject("bad_json"); t.frames_in.inc(3)
>>> t.value("boutline_rejects_total", reason="bad_json"), t.value("boutline_frames_in_total")
(2.0, 3.0)
"""

from __future__ import annotations

from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram

from .ratelog import RateLimitedLog

__all__ = ["RateLimitedLog", "Telemetry"]

# Inference call durations: a batch of a few windows takes ~1 ms, thousands take ~100 ms.
_INFER_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)


class Telemetry:
    """All counters of one gateway, in one prometheus-client registry."""

    def __init__(self, registry: CollectorRegistry | None = None) -> None:
        self.registry = registry or CollectorRegistry(auto_describe=True)
        r = self.registry
        self.messages_in = Counter(
            "boutline_messages_in", "MQTT messages received on collar topics", registry=r
        )
        self.frames_in = Counter(
            "boutline_frames_in", "collar frames decoded and accepted", registry=r
        )
        self.samples_in = Counter(
            "boutline_samples_in", "accelerometer samples in accepted frames", registry=r
        )
        self.rejects = Counter(
            "boutline_rejects", "payloads or frames rejected, by reason", ["reason"], registry=r
        )
        self.clock_substituted = Counter(
            "boutline_clock_substituted",
            "frames whose collar time was outside the clock bounds and was replaced",
            registry=r,
        )
        self.queue_dropped = Counter(
            "boutline_queue_dropped",
            "messages dropped because the ingest queue stayed full",
            registry=r,
        )
        self.queue_depth = Gauge(
            "boutline_queue_depth", "messages waiting for the decoder", registry=r
        )
        self.collars = Gauge("boutline_collars_tracked", "collars that sent a frame", registry=r)
        self.collar_overflow = Counter(
            "boutline_collar_overflow",
            "frames from new collars refused because max_collars was reached",
            registry=r,
        )
        self.windows_classified = Counter(
            "boutline_windows_classified", "windows sent to the model", registry=r
        )
        self.windows_no_data = Counter(
            "boutline_windows_no_data",
            "hops not classified because too much of the window was missing",
            registry=r,
        )
        self.inference_seconds = Histogram(
            "boutline_inference_seconds",
            "duration of one batched inference call",
            buckets=_INFER_BUCKETS,
            registry=r,
        )
        self.inference_batch = Gauge(
            "boutline_inference_batch_windows", "windows in the last inference call", registry=r
        )
        self.window_latency = Gauge(
            "boutline_window_latency_seconds",
            "gateway time from a window's last sample arriving to its posterior",
            registry=r,
        )
        self.events = Counter("boutline_events", "events emitted, by kind", ["kind"], registry=r)
        self.model_reloads = Counter(
            "boutline_model_reloads", "model hot reloads, by result", ["result"], registry=r
        )
        self.broker_connected = Gauge(
            "boutline_broker_connected", "1 while connected to the broker", registry=r
        )
        self.broker_reconnects = Counter(
            "boutline_broker_reconnects", "successful (re)connections to the broker", registry=r
        )

    def reject(self, reason: str, n: int = 1) -> None:
        self.rejects.labels(reason=str(reason)).inc(n)

    def event(self, kind: str, n: int = 1) -> None:
        self.events.labels(kind=kind).inc(n)

    def value(self, name: str, **labels: str) -> float:
        """Current value of a sample (``*_total`` for counters); 0.0 if never set."""
        v = self.registry.get_sample_value(name, labels or None)
        return 0.0 if v is None else float(v)

    def rejects_by_reason(self) -> dict[str, float]:
        """Reject counts keyed by reason, only reasons seen."""
        out: dict[str, float] = {}
        for metric in self.rejects.collect():
            for s in metric.samples:
                if s.name.endswith("_total"):
                    out[s.labels["reason"]] = s.value
        return out

    def snapshot(self) -> dict[str, Any]:
        """The main figures as plain numbers (for summaries and `boutline run` status lines)."""
        return {
            "frames_in": self.value("boutline_frames_in_total"),
            "messages_in": self.value("boutline_messages_in_total"),
            "rejects": self.rejects_by_reason(),
            "windows_classified": self.value("boutline_windows_classified_total"),
            "windows_no_data": self.value("boutline_windows_no_data_total"),
            "inference_calls": self.value("boutline_inference_seconds_count"),
            "inference_seconds": self.value("boutline_inference_seconds_sum"),
            "queue_dropped": self.value("boutline_queue_dropped_total"),
            "collars": self.value("boutline_collars_tracked"),
        }
