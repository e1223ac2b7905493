"""``boutline train``: placeholder until its part is built."""

from __future__ import annotations

from ..errors import NotBuiltError


def train() -> None:
    """Train a behaviour model from labelled recordings (animal-grouped cross-validation; ONNX out).

    Example: boutline train recordings/ --out models/my-herd.onnx
    """
    raise NotBuiltError("`boutline train` is not built yet")
