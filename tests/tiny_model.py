"""A small contract-valid ONNX model for gateway tests (tests only, never shipped).

It reads the mean of the x axis over the window and picks the class whose level is nearest:
class ``c`` for a mean x of ``c * LEVEL_G``. So a test chooses the behaviour of a window by
the x value it sends, and knows what the model must answer. The logits are linear in the
mean: ``-K (m - c L)^2 = 2 K c L m - K (c L)^2 - K m^2``, and the last term is the same for
every class, so it drops out of the softmax.
"""

from __future__ import annotations

import json

import numpy as np
import onnx
from onnx import TensorProto, helper

__all__ = ["CLASSES", "LEVEL_G", "level_acc", "level_model"]

CLASSES = ("grazing", "feeding", "ruminating", "resting", "walking")
LEVEL_G = 0.2
_K = 400.0  # sharpness: 0.1 g off a level still leaves the right class at p > 0.99


def level_model(
    *,
    classes: tuple[str, ...] = CLASSES,
    sample_rate_hz: float = 10.0,
    window_s: float = 10.0,
    hop_s: float = 5.0,
    transitions: np.ndarray | None = None,
    stay: float = 0.95,
    reverse: bool = False,
) -> bytes:
    """The model as ONNX bytes; ``reverse`` maps class c to the level of class C-1-c."""
    c = len(classes)
    levels = np.arange(c)[::-1] * LEVEL_G if reverse else np.arange(c) * LEVEL_G
    w = np.zeros((3, c), dtype=np.float32)
    w[0] = 2 * _K * levels
    b = (-_K * levels**2).astype(np.float32)
    nodes = [
        helper.make_node("ReduceMean", ["accel", "axes"], ["m"], keepdims=0),
        helper.make_node("MatMul", ["m", "w"], ["z0"]),
        helper.make_node("Add", ["z0", "b"], ["z"]),
        helper.make_node("Softmax", ["z"], ["probabilities"], axis=1),
    ]
    t_len = int(round(sample_rate_hz * window_s))
    graph = helper.make_graph(
        nodes,
        "level",
        [helper.make_tensor_value_info("accel", TensorProto.FLOAT, ["N", 3, t_len])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, ["N", c])],
        initializer=[
            helper.make_tensor("axes", TensorProto.INT64, [1], [2]),
            helper.make_tensor("w", TensorProto.FLOAT, [3, c], w.ravel().tolist()),
            helper.make_tensor("b", TensorProto.FLOAT, [c], b.tolist()),
        ],
    )
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])
    m.ir_version = 9
    if transitions is None:
        transitions = np.full((c, c), (1 - stay) / (c - 1))
        np.fill_diagonal(transitions, stay)
    props = {
        "boutline.classes": json.dumps(list(classes)),
        "boutline.sample_rate_hz": f"{sample_rate_hz:g}",
        "boutline.window_s": f"{window_s:g}",
        "boutline.hop_s": f"{hop_s:g}",
        "boutline.transitions": json.dumps(np.asarray(transitions).tolist()),
        "boutline.card": json.dumps({"purpose": "gateway tests: class from the mean of x"}),
    }
    for k, v in props.items():
        m.metadata_props.append(onnx.StringStringEntryProto(key=k, value=v))
    onnx.checker.check_model(m)
    return m.SerializeToString()


def level_acc(behaviour: str, n: int, classes: tuple[str, ...] = CLASSES) -> np.ndarray:
    """``n`` samples [n, 3] float32 that the level model reads as ``behaviour``."""
    acc = np.zeros((n, 3), dtype=np.float32)
    acc[:, 0] = classes.index(behaviour) * LEVEL_G
    acc[:, 2] = 0.98
    return acc
