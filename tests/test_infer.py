"""Batched inference and hot reload, with a small contract-valid ONNX model (tests/tiny_model.py)."""

from __future__ import annotations

import logging
import os
from pathlib import Path

import numpy as np
import pytest
from tiny_model import CLASSES, level_acc, level_model

from gateway.infer import Inference
from gateway.telemetry import Telemetry
from gateway.types import WindowBatch


def batch(behaviours: list[str], animals: list[str] | None = None) -> WindowBatch:
    x = np.stack([level_acc(b, 100).T for b in behaviours])
    n = len(behaviours)
    return WindowBatch(
        animals=animals or [f"cow-{i}" for i in range(n)],
        t_start=1000.0 + 5.0 * np.arange(n),
        x=x,
        missing=np.zeros(n, np.float32),
        ready_at=np.full(n, 2000.0),
    )


@pytest.fixture
def model_file(tmp_path: Path) -> Path:
    p = tmp_path / "m.onnx"
    p.write_bytes(level_model())
    return p


def test_all_ready_windows_go_in_one_call(model_file: Path) -> None:
    tel = Telemetry()
    inf = Inference.open(model_file, telemetry=tel)
    want = [CLASSES[i % 5] for i in range(37)]
    post = inf.classify(batch(want))
    assert tel.value("boutline_inference_seconds_count") == 1.0
    assert tel.value("boutline_windows_classified_total") == 37.0
    assert [CLASSES[int(np.argmax(p.p))] for p in post] == want
    assert post[3].animal == "cow-3" and post[3].t_start == 1015.0 and post[3].ready_at == 2000.0
    np.testing.assert_allclose([p.p.sum() for p in post], 1.0, atol=1e-5)
    empty = WindowBatch(
        [], np.zeros(0), np.zeros((0, 3, 100), np.float32), np.zeros(0, np.float32), np.zeros(0)
    )
    assert inf.classify(empty) == []


def test_batch_max_splits_calls_and_keeps_order(model_file: Path) -> None:
    tel = Telemetry()
    inf = Inference.open(model_file, batch_max=3, telemetry=tel)
    want = [CLASSES[(i * 2) % 5] for i in range(7)]
    post = inf.classify(batch(want))
    assert tel.value("boutline_inference_seconds_count") == 3.0
    assert [CLASSES[int(np.argmax(p.p))] for p in post] == want


def _touch_newer(p: Path) -> None:
    st = p.stat()
    os.utime(p, (st.st_atime + 10, st.st_mtime + 10))


def test_hot_reload_on_file_change_swaps_the_model(model_file: Path) -> None:
    seen = []
    inf = Inference.open(model_file, on_reload=seen.append)
    b = batch(["grazing"])
    assert CLASSES[int(np.argmax(inf.classify(b)[0].p))] == "grazing"
    assert inf.maybe_reload(now=0.0) is False  # unchanged
    model_file.write_bytes(level_model(reverse=True))
    _touch_newer(model_file)
    assert inf.maybe_reload(now=1.0) is False  # checked at most every 2 s
    assert inf.maybe_reload(now=10.0) is True
    assert CLASSES[int(np.argmax(inf.classify(b)[0].p))] == "walking"
    assert len(seen) == 1 and seen[0] is inf.model


def test_sighup_request_reloads_without_a_file_change(model_file: Path) -> None:
    inf = Inference.open(model_file, watch=False)
    old = inf.model
    assert inf.maybe_reload() is False
    inf.request_reload()
    assert inf.maybe_reload() is True and inf.model is not old


@pytest.mark.parametrize(
    ("content", "why"),
    [
        (b"\x08\x01garbage that is not a model", "not a loadable ONNX model"),
        (b"", "not a loadable ONNX model"),
        (level_model(window_s=12.0), "window_s is 12.0"),
        (level_model(classes=("a", "b", "c", "d", "e")), "classes is"),
        (level_model(sample_rate_hz=25.0), "sample_rate_hz is 25.0"),
    ],
)
def test_broken_or_incompatible_file_keeps_the_old_model(
    model_file: Path, caplog: pytest.LogCaptureFixture, content: bytes, why: str
) -> None:
    tel = Telemetry()
    inf = Inference.open(model_file, telemetry=tel)
    old = inf.model
    model_file.write_bytes(content)
    _touch_newer(model_file)
    with caplog.at_level(logging.ERROR, logger="boutline.infer"):
        assert inf.maybe_reload(now=100.0) is False
    assert inf.model is old and why in inf.last_error
    lines = [r for r in caplog.records if r.name == "boutline.infer"]
    assert len(lines) == 1 and "keeping the running model" in lines[0].getMessage()
    assert tel.value("boutline_model_reloads_total", result="refused") == 1.0
    # the old model still answers
    assert CLASSES[int(np.argmax(inf.classify(batch(["resting"]))[0].p))] == "resting"
    # the same broken file is not retried on every tick
    assert inf.maybe_reload(now=200.0) is False and len(caplog.records) == 1


def test_missing_file_after_start_is_not_a_reload(model_file: Path) -> None:
    inf = Inference.open(model_file)
    model_file.unlink()
    assert inf.maybe_reload(now=100.0) is False
