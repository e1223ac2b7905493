"""The model contract (DESIGN.md): models built with onnx.helper, good and broken."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from gateway.errors import ModelError
from gateway.model import check_contract, load_model

CLASSES = ["grazing", "feeding", "ruminating", "resting", "walking"]


def _model(
    *,
    input_name: str = "accel",
    input_shape: tuple = ("N", 3, 100),
    output_name: str = "probabilities",
    softmax: bool = True,
    n_out: int = 5,
    meta: dict[str, str] | None = None,
) -> bytes:
    """A tiny contract-shaped model: mean of each axis -> linear -> softmax."""
    rng = np.random.default_rng(0)
    rank3 = len(input_shape) == 3
    k = input_shape[1] if rank3 else 1
    w = helper.make_tensor("w", TensorProto.FLOAT, [k, n_out], rng.normal(size=k * n_out).tolist())
    axes = helper.make_tensor("axes", TensorProto.INT64, [1], [2 if rank3 else 1])
    nodes = [
        helper.make_node("ReduceMean", [input_name, "axes"], ["m"], keepdims=0 if rank3 else 1),
        helper.make_node("MatMul", ["m", "w"], ["z"]),
        helper.make_node("Softmax", ["z"], [output_name], axis=1)
        if softmax
        else helper.make_node("Identity", ["z"], [output_name]),
    ]
    graph = helper.make_graph(
        nodes,
        "tiny",
        [helper.make_tensor_value_info(input_name, TensorProto.FLOAT, list(input_shape))],
        [helper.make_tensor_value_info(output_name, TensorProto.FLOAT, ["N", n_out])],
        initializer=[w, axes],
    )
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])
    m.ir_version = 9
    props = {
        "boutline.classes": json.dumps(CLASSES),
        "boutline.sample_rate_hz": "10",
        "boutline.window_s": "10",
        "boutline.hop_s": "5",
    }
    props.update(meta or {})
    for k, v in props.items():
        if v is not None:
            m.metadata_props.append(onnx.StringStringEntryProto(key=k, value=v))
    onnx.checker.check_model(m)
    return m.SerializeToString()


def test_a_good_model_is_accepted_and_predicts_rows_that_sum_to_one(tmp_path: Path) -> None:
    p = tmp_path / "ok.onnx"
    p.write_bytes(_model(meta={"boutline.transitions": json.dumps(np.eye(5).tolist())}))
    m = load_model(p)
    assert m.classes == tuple(CLASSES) and m.window_len == 100 and m.hop_len == 50
    x = np.random.default_rng(1).normal(size=(7, 3, 100)).astype(np.float32)
    p_out = m.predict(x)
    assert p_out.shape == (7, 5)
    np.testing.assert_allclose(p_out.sum(axis=1), 1.0, atol=1e-5)
    assert m.predict(np.zeros((0, 3, 100), np.float32)).shape == (0, 5)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"input_name": "x"}, "exactly one input named 'accel'"),
        ({"input_shape": ("N", 300)}, "must be [N, 3, T]"),
        ({"input_shape": ("N", 6, 100)}, "must be [N, 3, T]"),
        ({"input_shape": ("N", 3, 50)}, "T=50 disagrees"),
        ({"output_name": "scores"}, "output named 'probabilities'"),
        ({"softmax": False}, "rows do not sum to 1"),
        ({"n_out": 4}, "expected [2, 5]"),
        ({"meta": {"boutline.classes": None}}, "lacks 'boutline.classes'"),
        ({"meta": {"boutline.classes": "grazing"}}, "not JSON"),
        ({"meta": {"boutline.classes": '["a", "a", "b", "c", "d"]'}}, "distinct names"),
        ({"meta": {"boutline.sample_rate_hz": None}}, "lacks 'boutline.sample_rate_hz'"),
        ({"meta": {"boutline.sample_rate_hz": "fast"}}, "is not a number"),
        ({"meta": {"boutline.hop_s": "20"}}, "outside"),
        ({"meta": {"boutline.transitions": "[[1]]"}}, "finite 5x5 matrix"),
        ({"meta": {"boutline.transitions": json.dumps((np.eye(5) * 2).tolist())}}, "probabilities"),
        ({"meta": {"boutline.card": "[1, 2]"}}, "JSON object"),
    ],
)
def test_contract_breaks_are_refused_with_a_message_naming_the_problem(
    kwargs: dict, message: str
) -> None:
    with pytest.raises(ModelError) as info:
        check_contract(_model(**kwargs))
    assert message in str(info.value)


@pytest.mark.parametrize("content", [b"", b"not an onnx file", bytes(range(256)) * 100])
def test_corrupt_files_are_refused(tmp_path: Path, content: bytes) -> None:
    p = tmp_path / "bad.onnx"
    p.write_bytes(content)
    with pytest.raises(ModelError, match="not a loadable ONNX model"):
        load_model(p)


def test_missing_file_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ModelError, match="does not exist"):
        load_model(tmp_path / "absent.onnx")
