"""A step progress bar (rich) for the model commands; quiet when output is not a terminal."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager

__all__ = ["step_progress"]


@contextmanager
def step_progress(title: str, total: int) -> Iterator[Callable[[str], None]]:
    """Yield ``advance(description)``: one step done, now working on ``description``."""
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    console = Console(stderr=True)
    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        console=console,
        transient=True,
        disable=not console.is_terminal,
    ) as bar:
        task = bar.add_task(title, total=total)

        def advance(description: str) -> None:
            bar.update(task, advance=1, description=f"{title}: {description}")

        yield advance
