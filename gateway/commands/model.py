"""``boutline model``: placeholder until its part is built."""

from __future__ import annotations

import typer

from ..errors import NotBuiltError

app = typer.Typer(
    help="Inspect a model's contract and card.\n\nExample: boutline model info models/default.onnx",
    no_args_is_help=True,
)


@app.command("info")
def info() -> None:
    """Not built yet.

    Example: boutline model info models/default.onnx
    """
    raise NotBuiltError("`boutline model info` is not built yet")
