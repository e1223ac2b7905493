"""``boutline report``: placeholder until its part is built."""

from __future__ import annotations

import typer

from ..errors import NotBuiltError

app = typer.Typer(
    help="Bouts, daily budgets, alerts and collar health from the store.\n\nExample: boutline report budgets --animal cow-007",
    no_args_is_help=True,
)


@app.command("budgets")
def budgets() -> None:
    """Not built yet.

    Example: boutline report budgets --animal cow-007
    """
    raise NotBuiltError("`boutline report budgets` is not built yet")


@app.command("bouts")
def bouts() -> None:
    """Not built yet.

    Example: boutline report budgets --animal cow-007
    """
    raise NotBuiltError("`boutline report bouts` is not built yet")


@app.command("alerts")
def alerts() -> None:
    """Not built yet.

    Example: boutline report budgets --animal cow-007
    """
    raise NotBuiltError("`boutline report alerts` is not built yet")


@app.command("collars")
def collars() -> None:
    """Not built yet.

    Example: boutline report budgets --animal cow-007
    """
    raise NotBuiltError("`boutline report collars` is not built yet")
