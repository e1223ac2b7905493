"""``boutline evaluate``: placeholder until its part is built."""

from __future__ import annotations

from ..errors import NotBuiltError


def evaluate() -> None:
    """Score a model on labelled recordings

    Example:  per-class metrics and confusion matrix.:boutline evaluate models/default.onnx recordings/
    """
    raise NotBuiltError("`boutline evaluate` is not built yet")
