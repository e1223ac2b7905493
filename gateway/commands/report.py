"""``boutline report``: budgets, bouts, alerts and collar health from the store; pictures."""

from __future__ import annotations

from pathlib import Path

import typer

app = typer.Typer(
    help=(
        "Daily budgets, bouts, alerts and collar health from the store, as tables, CSV or"
        " JSON; actograms and the herd rumination trend as PNG. Alerts are decision support:"
        " examine the animal and consult a veterinarian.\n\n"
        "Example: boutline report budgets --animal cow-007 --from 2026-03-01 --to 2026-03-07"
    ),
    no_args_is_help=True,
)

_CONFIG = typer.Option(None, "--config", "-c", help="TOML config (data dir, time zone, day start).")
_DATA = typer.Option(None, "--data-dir", help="Store directory (or file); default: store.data_dir.")
_ANIMAL = typer.Option(None, "--animal", "-a", help="Only this animal; repeat for several.")
_FROM = typer.Option(None, "--from", help="First local day, YYYY-MM-DD (inclusive).")
_TO = typer.Option(None, "--to", help="Last local day, YYYY-MM-DD (inclusive).")
_FORMAT = typer.Option("table", "--format", "-f", help="table, csv or json.")


def _open(config: Path | None, data_dir: Path | None):
    from ..config import load_settings
    from ..report import ReportSource

    return ReportSource.open(load_settings(config), data_dir)


def _check_format(fmt: str) -> str:
    from ..errors import ConfigError
    from ..report import FORMATS

    if fmt not in FORMATS:
        raise ConfigError(f"--format {fmt!r}: allowed: {', '.join(FORMATS)}")
    return fmt


def _emit(rows: list[dict], fmt: str, title: str, empty: str) -> None:
    from ..report import render

    if not rows and fmt == "table":
        typer.echo(empty)
        return
    typer.echo(render(rows, fmt, title=title), nl=False)


@app.command("budgets")
def budgets(
    animal: list[str] = _ANIMAL,
    first: str = _FROM,
    last: str = _TO,
    fmt: str = _FORMAT,
    detail: bool = typer.Option(False, "--detail", help="Add bouts and mean bout length."),
    config: Path = _CONFIG,
    data_dir: Path = _DATA,
) -> None:
    """Daily time budgets: minutes per behaviour as seen, no-data, coverage, status.

    A day with partial coverage shows the minutes that were seen and its coverage; it is
    never scaled up. Status: open (day in progress), final, or partial (final, but under
    alerts.min_coverage). Default days: the last 7 with data.

    Example: boutline report budgets --animal cow-007 --from 2026-03-01 --to 2026-03-07
    """
    from ..report import budget_rows

    _check_format(fmt)
    with _open(config, data_dir) as src:
        animals = src.check_animals(animal)
        d0, d1 = src.day_range(first, last, 7)
        rows = budget_rows(src, animals, d0, d1, detail=detail or fmt != "table")
    _emit(rows, fmt, f"Daily time budgets {d0} to {d1} (minutes)", f"No budgets from {d0} to {d1}.")


@app.command("bouts")
def bouts(
    animal: list[str] = _ANIMAL,
    first: str = _FROM,
    last: str = _TO,
    fmt: str = _FORMAT,
    no_data: bool = typer.Option(True, "--no-data/--no-no-data", help="Include no-data stretches."),
    config: Path = _CONFIG,
    data_dir: Path = _DATA,
) -> None:
    """Closed behaviour bouts (and no-data stretches) overlapping the days; default: the last day.

    Example: boutline report bouts --animal cow-007 --from 2026-03-02 --format csv > bouts.csv
    """
    from ..report import bout_rows

    _check_format(fmt)
    with _open(config, data_dir) as src:
        animals = src.check_animals(animal)
        d0, d1 = src.day_range(first, last, 1)
        rows = bout_rows(src, animals, d0, d1, no_data=no_data)
    if fmt == "table":
        rows = [{k: v for k, v in r.items() if not k.endswith("_unix")} for r in rows]
    _emit(rows, fmt, f"Bouts {d0} to {d1}", f"No bouts from {d0} to {d1}.")


@app.command("alerts")
def alerts(
    animal: list[str] = _ANIMAL,
    first: str = _FROM,
    last: str = _TO,
    fmt: str = _FORMAT,
    config: Path = _CONFIG,
    data_dir: Path = _DATA,
) -> None:
    """Alerts open at some time in the days (default: the last 30), with their evidence;
    then the rules that could not judge an animal yet, and why (e.g. too few baseline days).

    Alerts are decision support, not a diagnosis: examine the animal and consult a
    veterinarian; local regulations and licensed veterinary practice prevail.

    Example: boutline report alerts --from 2026-03-01 --format json
    """
    import json

    from ..alerts import CAUTION
    from ..report import alert_rows, readiness_rows, render

    _check_format(fmt)
    with _open(config, data_dir) as src:
        animals = src.check_animals(animal)
        d0, d1 = src.day_range(first, last, 30)
        rows = alert_rows(src, animals, d0, d1)
        waiting = readiness_rows(src, animals)
    if fmt == "json":
        doc = {"caution": CAUTION, "alerts": rows, "not_judged": waiting}
        typer.echo(json.dumps(doc, indent=2, ensure_ascii=False))
        return
    if fmt == "csv":
        typer.echo(render(rows, "csv"), nl=False)
        return
    table = [{k: r[k] for k in ("raised", "animal", "title", "status", "cleared", "message")}
             for r in rows]  # fmt: skip
    _emit(table, fmt, f"Alerts {d0} to {d1}", f"No alerts from {d0} to {d1}.")
    if waiting:
        cols = ("animal", "subject", "title", "why")
        typer.echo(render([{k: w[k] for k in cols} for w in waiting], "table",
                          title="Not judged at the last check (no alert possible yet)"), nl=False)  # fmt: skip
    typer.echo(CAUTION)


@app.command("collars")
def collars(
    animal: list[str] = _ANIMAL,
    fmt: str = _FORMAT,
    config: Path = _CONFIG,
    data_dir: Path = _DATA,
) -> None:
    """Collar health as last saved by the gateway: last seen, frame rate, loss, battery, roll.

    Example: boutline report collars --format csv
    """
    from ..report import collar_rows

    _check_format(fmt)
    with _open(config, data_dir) as src:
        animals = src.check_animals(animal)
        rows = collar_rows(src, animals)
    _emit(rows, fmt, "Collar health", "No collar health saved yet.")


@app.command("actogram")
def actogram(
    animal: list[str] = _ANIMAL,
    first: str = _FROM,
    last: str = _TO,
    out_dir: Path = typer.Option(Path("."), "--out-dir", "-o", help="Directory for the PNGs."),
    config: Path = _CONFIG,
    data_dir: Path = _DATA,
) -> None:
    """24 h actogram per animal as PNG: one row per day, behaviour over the time of day.

    Needs matplotlib (pip install 'boutline[plots]'). Default: every animal, last 14 days.
    Writes actogram-<animal>.png into --out-dir.

    Example: boutline report actogram --animal cow-007 --from 2026-03-01 --out-dir plots
    """
    from ..report import actogram as draw
    from ..report import load_pyplot
    from ._progress import step_progress

    load_pyplot()  # say how to install matplotlib before any work
    with _open(config, data_dir) as src:
        animals = src.check_animals(animal) or src.animals()
        d0, d1 = src.day_range(first, last, 14)
        with step_progress("actograms", len(animals)) as advance:
            for a in animals:
                safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in a)
                info = draw(src, a, d0, d1, out_dir / f"actogram-{safe}.png")
                advance(a)
                typer.echo(f"{info['file']}: {a}, {info['days']} days, {info['bouts_drawn']} bouts")


@app.command("trend")
def trend(
    animal: list[str] = _ANIMAL,
    first: str = _FROM,
    last: str = _TO,
    out: Path = typer.Option(Path("rumination-trend.png"), "--out", "-o", help="PNG file."),
    fmt: str = typer.Option(
        "", "--format", "-f", help="Also print the numbers: table, csv or json."
    ),
    config: Path = _CONFIG,
    data_dir: Path = _DATA,
) -> None:
    """Herd rumination trend as PNG: median and middle half of the herd per day.

    Only days with at least alerts.min_coverage classified count; the lower panel shows how
    many animals each day counts and how many were left out. Needs matplotlib
    (pip install 'boutline[plots]'). Default: the last 30 days.

    Example: boutline report trend --from 2026-03-01 --out trend.png
    """
    from ..report import rumination_trend

    if fmt:
        _check_format(fmt)
    with _open(config, data_dir) as src:
        animals = src.check_animals(animal)
        d0, d1 = src.day_range(first, last, 30)
        rows = rumination_trend(src, animals, d0, d1, out)
    typer.echo(f"{out}: herd rumination {d0} to {d1}, {len(rows)} days")
    if fmt:
        _emit(rows, fmt, "Herd rumination per day (minutes)", "No days.")
