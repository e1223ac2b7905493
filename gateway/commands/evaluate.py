"""``boutline evaluate``: score a model on labelled recordings."""

from __future__ import annotations

from pathlib import Path

import typer

from ._progress import step_progress

__all__ = ["evaluate"]


def evaluate(
    model: Path = typer.Argument(..., help="Model file (.onnx) to score."),
    recordings: Path = typer.Argument(
        ..., help="Recording directory: raw/ or compact/, observations.csv, assignments.csv."
    ),
    out: Path | None = typer.Option(
        None,
        "--out",
        "-o",
        help="Write OUT.report.md, OUT.report.json and OUT.confusion.png as well.",
    ),
    min_share: float = typer.Option(
        0.8, help="Share of a window one behaviour must cover for the window to be scored."
    ),
) -> None:
    """Score a model on labelled recordings: per-class metrics and the confusion matrix.

    Windows are cut with the model's own rate, length and hop. Scores mean something only
    on animals the model was not trained on. Behaviours the model does not know are
    skipped and counted.

    Example: boutline evaluate models/default.onnx recordings/ --out eval/default
    """
    from ..errors import ConfigError
    from ..evaluation import evaluate_on_recordings, render_markdown, write_report
    from ..model import load_model
    from ..recordings import open_recordings

    if not 0.5 <= min_share <= 1.0:
        raise ConfigError(f"--min-share {min_share:g} must be within 0.5..1")
    m = load_model(model)
    n_collars = len(open_recordings(recordings).collars)
    with step_progress("scoring", n_collars) as advance:
        report = evaluate_on_recordings(m, recordings, min_share=min_share, progress=advance)
    typer.echo(render_markdown(report))
    if out is not None:
        written = write_report(report, out)
        typer.echo(f"report: {', '.join(str(p) for p in written)}")
