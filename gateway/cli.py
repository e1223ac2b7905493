"""The ``boutline`` command line: one root app, each command in gateway/commands/.

Errors a user can fix print one line ``Error: ...`` and exit 1; a part that is not built yet
says so and exits 2. Heavy libraries are imported inside the commands, so ``--help`` is quick.
"""

from __future__ import annotations

import sys

import typer

from . import __version__
from .commands import bench, config, demo, evaluate, model, report, run, simulate, train
from .errors import BoutlineError, ConfigError, NotBuiltError
from .types import CAUTION

__all__ = ["app", "main"]

app = typer.Typer(
    name="boutline",
    help=(
        "Boutline: behaviour monitoring of cattle on a barn gateway. Collar accelerometer"
        " frames over MQTT become behaviour bouts, daily time budgets and own-baseline"
        f" alerts, stored locally and sent to InfluxDB and MQTT. {CAUTION}\n\n"
        "Example: boutline demo"
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"boutline {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(
        False, "--version", callback=_version, is_eager=True, help="Print the version and exit."
    ),
) -> None:
    """Boutline command line."""


app.command("demo")(demo.demo)
app.command("run")(run.run)
app.add_typer(simulate.app, name="simulate")
app.command("train")(train.train)
app.command("evaluate")(evaluate.evaluate)
app.add_typer(model.app, name="model")
app.add_typer(report.app, name="report")
app.add_typer(config.app, name="config")
app.command("bench")(bench.bench)


def main(argv: list[str] | None = None) -> None:
    """Console entry point: run the app, turning our errors into one line and an exit code.

    Usage errors (unknown option, bad value) are reported by the CLI framework itself in
    standalone mode; only our own errors are translated here.
    """
    try:
        app(args=argv, standalone_mode=True)
    except NotBuiltError as exc:
        typer.echo(f"Not built yet: {exc}", err=True)
        sys.exit(2)
    except ConfigError as exc:
        for problem in exc.problems:
            typer.echo(f"Error: {problem}", err=True)
        sys.exit(1)
    except BoutlineError as exc:
        typer.echo(f"Error: {exc}", err=True)
        sys.exit(1)


if __name__ == "__main__":
    main()
