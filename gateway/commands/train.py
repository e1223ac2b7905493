"""``boutline train``: train a behaviour model from labelled recordings, ONNX out."""

from __future__ import annotations

import time
from pathlib import Path

import typer

from ._progress import step_progress

__all__ = ["train"]


def train(
    recordings: Path = typer.Argument(
        ..., help="Recording directory: raw/ or compact/, observations.csv, assignments.csv."
    ),
    out: Path = typer.Option(
        Path("model.onnx"), "--out", "-o", help="Model file to write; the report goes beside it."
    ),
    holdout: Path | None = typer.Option(
        None, help="Recording directory of other animals to score the final model on."
    ),
    rate: float = typer.Option(10.0, help="Model sample rate in Hz; recordings are resampled."),
    window: float = typer.Option(10.0, help="Window length in seconds."),
    hop: float = typer.Option(5.0, help="Hop between window starts in seconds."),
    min_share: float = typer.Option(
        0.8, help="Share of a window one behaviour must cover for the window to be labelled."
    ),
    classes: str = typer.Option(
        "grazing,feeding,ruminating,resting,walking",
        help="Comma-separated class names, in output order.",
    ),
    classifier: str = typer.Option("forest", help="forest (random forest) or mlp."),
    trees: int = typer.Option(40, help="Trees in the random forest."),
    folds: int = typer.Option(5, help="Cross-validation folds grouped by animal; 0 skips it."),
    max_windows: int = typer.Option(
        60_000, help="Cap on windows used for fitting (split evenly over classes, seeded)."
    ),
    neck_axis: str = typer.Option("x", help="Collar axis along the neck: x, y or z."),
    seed: int = typer.Option(0, help="Seed for sampling, folds and the classifier."),
    jobs: int = typer.Option(2, help="CPU threads for fitting."),
) -> None:
    """Train a behaviour model from labelled recordings (animal-grouped cross-validation; ONNX out).

    Windows are cut at the model's length and hop and labelled when one observed behaviour
    covers at least --min-share of them; the rest are counted in the report. Features are
    computed by the same ONNX graph the gateway runs, and the classifier is appended to it,
    so the output file takes raw windows in g. Writes OUT, OUT.report.md, OUT.report.json
    and (with matplotlib) OUT.confusion.png.

    Example: boutline train recordings/ --holdout other-herd/ --out models/my-herd.onnx
    """
    from ..errors import ConfigError
    from ..evaluation import write_report
    from ..train import TrainConfig, train_from_recordings

    axes = {"x": 0, "y": 1, "z": 2}
    if neck_axis not in axes:
        raise ConfigError(f"--neck-axis {neck_axis!r} must be x, y or z")
    names = tuple(c.strip().lower() for c in classes.split(",") if c.strip())
    config = TrainConfig(
        rate_hz=rate,
        window_s=window,
        hop_s=hop,
        min_share=min_share,
        classes=names,
        classifier=classifier,
        trees=trees,
        folds=folds,
        max_windows=max_windows,
        seed=seed,
        jobs=jobs,
        neck_axis=axes[neck_axis],
    )
    defaults = TrainConfig()
    # The card records the command with every setting that differs from the defaults.
    parts = [f"boutline train {recordings.name}"]
    if holdout is not None:
        parts.append(f"--holdout {holdout.name}")
    parts.append(f"--out {out.name}")
    for opt, value, default in (
        ("rate", rate, defaults.rate_hz),
        ("window", window, defaults.window_s),
        ("hop", hop, defaults.hop_s),
        ("min-share", min_share, defaults.min_share),
        ("classes", ",".join(names), ",".join(defaults.classes)),
        ("classifier", classifier, defaults.classifier),
        ("trees", trees, defaults.trees),
        ("folds", folds, defaults.folds),
        ("max-windows", max_windows, defaults.max_windows),
        ("neck-axis", neck_axis, "x"),
        ("seed", seed, defaults.seed),
    ):
        if value != default:
            parts.append(f"--{opt} {value}")
    command = " ".join(parts)
    started = time.monotonic()
    from ..recordings import open_recordings

    n_collars = len(open_recordings(recordings).collars)
    steps = n_collars + (folds or 0) + 1 + (1 if holdout else 0)
    with step_progress("training", steps) as advance:
        result = train_from_recordings(
            recordings, config, holdout=holdout, command=command, progress=advance
        )
    out.parent.mkdir(parents=True, exist_ok=True)
    try:
        out.write_bytes(result.onnx_bytes)
    except OSError as exc:
        raise ConfigError(f"cannot write {out}: {exc.strerror}; choose another --out") from exc
    written = write_report(result.report, out)
    r = result.report
    typer.echo(f"model: {out} ({len(result.onnx_bytes) / 1e6:.2f} MB)")
    data = r["data"]
    typer.echo(
        f"data: {data['animals']} animals, {data['windows_labelled']} labelled windows,"
        f" {sum(data['dropped'].values())} dropped or skipped (see the report)"
    )
    if "cross_validation" in r:
        cv, b = r["cross_validation"], r["baseline"]
        typer.echo(
            f"cross-validation ({cv['folds']} folds by animal): macro-F1 {cv['macro_f1']:.3f},"
            f" accuracy {cv['accuracy']:.3f}; majority baseline macro-F1 {b['macro_f1']:.3f}"
        )
    if "holdout" in r:
        h = r["holdout"]
        recall = min(v["recall"] for v in h["per_class"].values())
        typer.echo(
            f"held-out animals: macro-F1 {h['macro_f1']:.3f}, lowest class recall {recall:.3f}"
        )
    typer.echo(f"report: {', '.join(str(p) for p in written)}")
    typer.echo(f"took {time.monotonic() - started:.0f} s")
