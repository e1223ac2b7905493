"""The ONNX model contract (DESIGN.md, Model): check at load, then classify raw windows.

A model takes one input ``accel`` float32 ``[N, 3, T]`` (raw g, collar axes x, y, z) and
gives one output ``probabilities`` float32 ``[N, C]`` whose rows sum to 1. Everything the
gateway needs to know travels in the file's metadata_props.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from .errors import ModelError

__all__ = [
    "INPUT_NAME",
    "META_CARD",
    "META_CLASSES",
    "META_HOP_S",
    "META_SAMPLE_RATE_HZ",
    "META_TRANSITIONS",
    "META_WINDOW_S",
    "OUTPUT_NAME",
    "Model",
    "ModelContract",
    "check_contract",
    "default_model_path",
    "load_model",
]

INPUT_NAME = "accel"
OUTPUT_NAME = "probabilities"
META_CLASSES = "boutline.classes"
META_SAMPLE_RATE_HZ = "boutline.sample_rate_hz"
META_WINDOW_S = "boutline.window_s"
META_HOP_S = "boutline.hop_s"
META_TRANSITIONS = "boutline.transitions"
META_CARD = "boutline.card"
# Rows must sum to 1 within float32 rounding of a softmax or a forest's vote average.
_ROW_SUM_TOL = 1e-3


@dataclass(frozen=True, slots=True)
class ModelContract:
    """What a model file promises, read from its metadata and graph signature."""

    classes: tuple[str, ...]
    sample_rate_hz: float
    window_s: float
    hop_s: float
    transitions: np.ndarray | None
    card: dict[str, Any] = field(default_factory=dict)

    @property
    def window_len(self) -> int:
        """Samples per window, T."""
        return int(round(self.window_s * self.sample_rate_hz))

    @property
    def hop_len(self) -> int:
        return int(round(self.hop_s * self.sample_rate_hz))


def default_model_path() -> Path:
    """The shipped model inside the installed package (``gateway.models``)."""
    return Path(str(resources.files("gateway.models").joinpath("default.onnx")))


def _meta_float(meta: dict[str, str], key: str, lo: float, hi: float) -> float:
    if key not in meta:
        raise ModelError(f"model metadata lacks {key!r}; re-export the model with `boutline train`")
    try:
        v = float(meta[key])
    except ValueError as exc:
        raise ModelError(f"model metadata {key}={meta[key][:40]!r} is not a number") from exc
    if not math.isfinite(v) or not lo <= v <= hi:
        raise ModelError(f"model metadata {key}={v:g} is outside {lo:g}..{hi:g}")
    return v


def _parse_contract(meta: dict[str, str]) -> ModelContract:
    if META_CLASSES not in meta:
        raise ModelError(f"model metadata lacks {META_CLASSES!r} (JSON list of behaviour names)")
    try:
        classes = json.loads(meta[META_CLASSES])
    except ValueError as exc:
        raise ModelError(f"model metadata {META_CLASSES} is not JSON") from exc
    if (
        not isinstance(classes, list)
        or len(classes) < 2
        or not all(isinstance(c, str) and c for c in classes)
        or len(set(classes)) != len(classes)
    ):
        raise ModelError(f"model metadata {META_CLASSES} must be a list of >= 2 distinct names")
    rate = _meta_float(meta, META_SAMPLE_RATE_HZ, 1.0, 200.0)
    window_s = _meta_float(meta, META_WINDOW_S, 0.5, 120.0)
    hop_s = _meta_float(meta, META_HOP_S, 0.1, window_s)
    if (
        abs(window_s * rate - round(window_s * rate)) > 1e-6
        or abs(hop_s * rate - round(hop_s * rate)) > 1e-6
    ):
        raise ModelError("model window_s and hop_s must be whole numbers of samples at its rate")
    transitions = None
    if META_TRANSITIONS in meta:
        try:
            transitions = np.asarray(json.loads(meta[META_TRANSITIONS]), dtype=np.float64)
        except (ValueError, TypeError) as exc:
            raise ModelError(f"model metadata {META_TRANSITIONS} is not a JSON matrix") from exc
        c = len(classes)
        if transitions.shape != (c, c) or not np.isfinite(transitions).all():
            raise ModelError(f"model metadata {META_TRANSITIONS} must be a finite {c}x{c} matrix")
        if (transitions < 0).any() or not np.allclose(transitions.sum(axis=1), 1.0, atol=1e-3):
            raise ModelError(f"model metadata {META_TRANSITIONS} rows must be probabilities")
    card: dict[str, Any] = {}
    if META_CARD in meta:
        try:
            card = json.loads(meta[META_CARD])
        except ValueError as exc:
            raise ModelError(f"model metadata {META_CARD} is not JSON") from exc
        if not isinstance(card, dict):
            raise ModelError(f"model metadata {META_CARD} must be a JSON object")
    return ModelContract(tuple(classes), rate, window_s, hop_s, transitions, card)


def _session(source: str | Path | bytes) -> Any:
    import onnxruntime as ort  # heavy; imported only when a model is opened

    opts = ort.SessionOptions()
    opts.log_severity_level = 3
    # Two cores on the gateway: one inference thread leaves the other to ingest and storage.
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    # No arena: it keeps the largest batch's intermediates for good (54 MB after one call of
    # 4,096 windows of the default model; 1 MB without it, docs/performance.md, change 9).
    opts.enable_cpu_mem_arena = False
    if isinstance(source, str | Path):
        path = Path(source)
        if not path.is_file():
            raise ModelError(f"model file {path} does not exist; give a path to an .onnx file")
        source = path.read_bytes()
    try:
        return ort.InferenceSession(source, opts, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises its own Fail/InvalidGraph/... types
        raise ModelError(f"model file is not a loadable ONNX model: {str(exc)[:200]}") from exc


class Model:
    """A loaded model that honours the contract. Holds no per-animal state."""

    def __init__(self, session: Any, contract: ModelContract, source: str = "") -> None:
        self._session = session
        self.contract = contract
        self.source = source

    classes = property(lambda self: self.contract.classes)
    sample_rate_hz = property(lambda self: self.contract.sample_rate_hz)
    window_s = property(lambda self: self.contract.window_s)
    hop_s = property(lambda self: self.contract.hop_s)
    window_len = property(lambda self: self.contract.window_len)
    hop_len = property(lambda self: self.contract.hop_len)
    transitions = property(lambda self: self.contract.transitions)
    card = property(lambda self: self.contract.card)

    def predict(self, x: np.ndarray) -> np.ndarray:
        """Class probabilities float32 ``[N, C]`` for raw windows float32 ``[N, 3, T]``."""
        if x.shape[0] == 0:
            return np.zeros((0, len(self.classes)), dtype=np.float32)
        x = np.ascontiguousarray(x, dtype=np.float32)
        try:
            (p,) = self._session.run([OUTPUT_NAME], {INPUT_NAME: x})
        except Exception as exc:
            raise ModelError(f"inference failed: {str(exc)[:200]}") from exc
        return np.asarray(p, dtype=np.float32)


def check_contract(source: str | Path | bytes) -> Model:
    """Open a model and verify the whole contract, or raise ModelError naming the problem."""
    session = _session(source)
    inputs, outputs = session.get_inputs(), session.get_outputs()
    if len(inputs) != 1 or inputs[0].name != INPUT_NAME:
        names = [i.name for i in inputs]
        raise ModelError(f"model must have exactly one input named {INPUT_NAME!r}, has {names}")
    if len(outputs) < 1 or OUTPUT_NAME not in [o.name for o in outputs]:
        names = [o.name for o in outputs]
        raise ModelError(f"model must have an output named {OUTPUT_NAME!r}, has {names}")
    shape = inputs[0].shape
    if len(shape) != 3 or (isinstance(shape[1], int) and shape[1] != 3):
        raise ModelError(f"model input {INPUT_NAME!r} must be [N, 3, T], is {shape}")
    if inputs[0].type != "tensor(float)":
        raise ModelError(f"model input {INPUT_NAME!r} must be float32, is {inputs[0].type}")
    meta = dict(session.get_modelmeta().custom_metadata_map)
    contract = _parse_contract(meta)
    if isinstance(shape[2], int) and shape[2] != contract.window_len:
        raise ModelError(
            f"model input length T={shape[2]} disagrees with window_s x sample_rate_hz"
            f" = {contract.window_len}"
        )
    model = Model(session, contract, str(source) if isinstance(source, str | Path) else "<bytes>")
    # A probe on rest-like input proves the output shape and that rows sum to 1.
    probe = np.zeros((2, 3, contract.window_len), dtype=np.float32)
    probe[:, 2, :] = 1.0
    probe[1] += np.random.default_rng(0).normal(0, 0.2, probe[1].shape).astype(np.float32)
    p = model.predict(probe)
    if p.shape != (2, len(contract.classes)):
        raise ModelError(
            f"model output {OUTPUT_NAME!r} has shape {list(p.shape)} for 2 windows;"
            f" expected [2, {len(contract.classes)}] (one column per class)"
        )
    if not np.isfinite(p).all() or not np.allclose(p.sum(axis=1), 1.0, atol=_ROW_SUM_TOL):
        raise ModelError(f"model output {OUTPUT_NAME!r} rows do not sum to 1: {p.sum(axis=1)}")
    return model


def load_model(path: str | Path | None = None) -> Model:
    """Load and check a model file; ``None`` loads the shipped default."""
    p = Path(path) if path else default_model_path()
    if not p.is_file():
        hint = "" if path else " (the shipped default is missing: reinstall boutline)"
        raise ModelError(f"model file {p} does not exist{hint}")
    try:
        model = check_contract(p)
    except ModelError as exc:  # name the file: the daemon's one error line must say which
        raise ModelError(f"{p}: {exc}") from exc
    model.source = str(p)
    return model
