"""``boutline simulate``: placeholder until its part is built."""

from __future__ import annotations

import typer

from ..errors import NotBuiltError

app = typer.Typer(
    help="Publish a synthetic herd to a broker, or record labelled recordings for training.\n\nExample: boutline simulate record --herd 10 --days 1 --out rec/",
    no_args_is_help=True,
)


@app.command("publish")
def publish() -> None:
    """Not built yet.

    Example: boutline simulate record --herd 10 --days 1 --out rec/
    """
    raise NotBuiltError("`boutline simulate publish` is not built yet")


@app.command("record")
def record() -> None:
    """Not built yet.

    Example: boutline simulate record --herd 10 --days 1 --out rec/
    """
    raise NotBuiltError("`boutline simulate record` is not built yet")
