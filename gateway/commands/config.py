"""``boutline config``: check a config file and print the effective settings."""

from __future__ import annotations

from pathlib import Path

import typer

app = typer.Typer(
    help="Check configuration files and show effective settings.\n\nExample: boutline config check boutline.toml",
    no_args_is_help=True,
)


@app.command("check")
def check(
    file: Path = typer.Argument(..., help="TOML config file to check."),
) -> None:
    """Check FILE plus BOUTLINE_* environment overrides; print effective settings, secrets masked.

    Example: boutline config check /etc/boutline/boutline.toml
    """
    from ..config import load_settings, to_toml

    settings = load_settings(file)  # ConfigError -> one line per problem, exit 1
    typer.echo(f"# {file}: OK (secrets shown as ****)")
    typer.echo(to_toml(settings))


@app.command("example")
def example() -> None:
    """Print a fully commented config in which every commented value is the default.

    Example: boutline config example > /etc/boutline/boutline.toml
    """
    from ..config import example_toml

    typer.echo(example_toml(), nl=False)
