"""Batched inference over every ready window, and hot reload of the model file.

All windows ready in one tick, from all animals, go to the model in one call (split only at
``model.batch_max``, 1,024): one onnxruntime call for 1,000 windows costs far less than 1,000
calls, and batches of at most 1,024 keep the model's intermediates to a few MB.
The classifier holds no per-animal state, so a new model file can replace the running one
between two ticks without touching any ring buffer.

Hot reload happens on SIGHUP (:meth:`Inference.request_reload`, safe from a signal handler)
or, with ``model.watch``, when the file's modification time or size changes. The new file is
checked against the whole contract first; a broken file, or one with other classes, rate,
window or hop (which the running buffers and smoothers were built for), keeps the old model
running and logs one line saying why.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from .errors import ModelError
from .model import Model, default_model_path, load_model
from .telemetry import Telemetry
from .types import Posteriors, WindowBatch

__all__ = ["Inference", "incompatibility"]

log = logging.getLogger("boutline.infer")

_CHECK_EVERY_S = 2.0  # how often the model file's mtime is looked at


def _stamp(path: Path) -> tuple[float, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_mtime, st.st_size)


def incompatibility(old: Model, new: Model) -> str:
    """Why ``new`` cannot replace ``old`` without a restart ('' when it can)."""
    checks = [
        ("classes", old.classes, new.classes),
        ("sample_rate_hz", old.sample_rate_hz, new.sample_rate_hz),
        ("window_s", old.window_s, new.window_s),
        ("hop_s", old.hop_s, new.hop_s),
    ]
    for name, a, b in checks:
        if a != b:
            return f"{name} is {b!r}, the running model has {a!r}"
    return ""


class Inference:
    """One model, batched calls, hot reload."""

    def __init__(
        self,
        model: Model,
        *,
        path: str | Path | None = None,
        batch_max: int = 1024,
        watch: bool = True,
        telemetry: Telemetry | None = None,
        on_reload: Callable[[Model], None] | None = None,
    ) -> None:
        self.model = model
        self.path = Path(path) if path else (Path(model.source) if model.source else None)
        self.batch_max = int(batch_max)
        self.watch = watch
        self.telemetry = telemetry
        self.on_reload = on_reload
        self._stamp = _stamp(self.path) if self.path else None
        self._reload_requested = False
        self._next_check = 0.0
        self.last_error = ""

    @classmethod
    def open(cls, path: str | Path | None = None, **kw: object) -> Inference:
        """Load a model file (empty/None: the shipped default) and wrap it."""
        p = Path(path) if path else default_model_path()
        return cls(load_model(p), path=p, **kw)  # type: ignore[arg-type]

    def classify(self, batch: WindowBatch) -> list[Posteriors]:
        """Posteriors for every window of the batch, in the batch's order."""
        n = len(batch)
        if n == 0:
            return []
        parts = []
        for a in range(0, n, self.batch_max):
            x = batch.x[a : a + self.batch_max]
            t0 = time.perf_counter()
            parts.append(self.model.predict(x))
            if self.telemetry is not None:
                self.telemetry.inference_seconds.observe(time.perf_counter() - t0)
                self.telemetry.inference_batch.set(x.shape[0])
        p = parts[0] if len(parts) == 1 else np.concatenate(parts)
        if self.telemetry is not None:
            self.telemetry.windows_classified.inc(n)
        t, ready = batch.t_start.tolist(), batch.ready_at.tolist()
        return [Posteriors(animal, t[i], p[i], ready[i]) for i, animal in enumerate(batch.animals)]

    def request_reload(self) -> None:
        """Ask for a reload at the next :meth:`maybe_reload` (from a SIGHUP handler)."""
        self._reload_requested = True

    def maybe_reload(self, now: float | None = None) -> bool:
        """Reload when asked or when the file changed; True when a new model is running."""
        if self.path is None:
            return False
        requested, self._reload_requested = self._reload_requested, False
        if not requested:
            if not self.watch:
                return False
            now = time.monotonic() if now is None else now
            if now < self._next_check:
                return False
            self._next_check = now + _CHECK_EVERY_S
            stamp = _stamp(self.path)
            if stamp is None or stamp == self._stamp:
                return False
            self._stamp = stamp
        else:
            self._stamp = _stamp(self.path)
        return self._reload()

    def _reload(self) -> bool:
        assert self.path is not None
        try:
            new = load_model(self.path)
        except ModelError as exc:
            return self._refuse(f"{exc}")
        why = incompatibility(self.model, new)
        if why:
            return self._refuse(f"{why}; restart the gateway to change it")
        self.model = new
        self.last_error = ""
        if self.telemetry is not None:
            self.telemetry.model_reloads.labels(result="ok").inc()
        log.info("model reloaded from %s", self.path)
        if self.on_reload is not None:
            self.on_reload(new)
        return True

    def _refuse(self, why: str) -> bool:
        self.last_error = why
        if self.telemetry is not None:
            self.telemetry.model_reloads.labels(result="refused").inc()
        log.error("model reload refused, keeping the running model: %s", why)
        return False
