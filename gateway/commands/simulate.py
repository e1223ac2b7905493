"""``boutline simulate``: publish a synthetic herd to a broker, or record it to files."""

from __future__ import annotations

import functools
import inspect
import math
import time
from pathlib import Path

import typer

from ..errors import ConfigError

__all__ = ["app"]

app = typer.Typer(
    help=(
        "Publish a synthetic herd to an MQTT broker (real time, accelerated or flat out), or"
        " record labelled recordings for training. Simulated animals only: the herds, collars"
        " and health events are invented.\n\n"
        "Example: boutline simulate record --herd 10 --days 1 --out rec/"
    ),
    no_args_is_help=True,
)

# Options both subcommands share (one definition, so they cannot drift apart).
_SCENARIO = typer.Option(
    "housed", "--scenario", help="housed (freestall, trough), pasture, or mixed (half each)."
)
_SEED = typer.Option(0, "--seed", help="Seed: the same seed gives the same herd, frame for frame.")
_HZ = typer.Option(10.0, "--hz", help="Collar sample rate in Hz (10, 12.5 and 25 are usual).")
_RANGE = typer.Option(4.0, "--range-g", help="Accelerometer range in g: 2, 4 or 8.")
_ROLL = typer.Option(
    True,
    "--random-roll/--fixed-roll",
    help="Turn each collar to a random angle about the neck (with drift and slips), or fit "
    "every collar upright.",
)
_LOSS = typer.Option(
    1.0, "--loss", help="Scale of bursty frame loss (1 = about 1 % of frames; 0 = none)."
)
_SILENCE = typer.Option(
    0.05, "--silence", help="Chance per collar and day of dropping out for a while (0..1)."
)
_ILLNESS = typer.Option(
    0.0, "--illness-share", help="Share of animals that fall ill (rumination -20..40 %)."
)
_ESTRUS = typer.Option(
    0.0, "--estrus-share", help="Share of animals in estrus (activity ~2.8-fold for ~8-9 h)."
)
_CALVING = typer.Option(0.0, "--calving-share", help="Share of animals that calve.")
_REFIT = typer.Option(
    0.0, "--refit-share", help="Share of animals whose collar is replaced by a spare once."
)
_START = typer.Option(
    None,
    "--start",
    help="First simulated instant: ISO 8601 UTC (2026-03-01T00:00:00Z) or unix seconds.",
)


def _start(text: str | None, default: float) -> float:
    if text is None:
        return default
    from ..recordings import parse_time

    try:
        value = parse_time(text)
    except ValueError as exc:
        raise ConfigError(
            f"--start {text!r} is not a time; give ISO 8601 UTC like 2026-03-01T00:00:00Z"
            " or unix seconds"
        ) from exc
    if not math.isfinite(value) or value <= 0:
        raise ConfigError(f"--start {text!r} must be after 1970-01-01")
    return value


# (parameter name, type, option, Herd keyword) of the options both subcommands take
_HERD_OPTIONS = (
    ("scenario", str, _SCENARIO, "scenario"),
    ("seed", int, _SEED, "seed"),
    ("hz", float, _HZ, "hz"),
    ("range_g", float, _RANGE, "range_g"),
    ("roll", bool, _ROLL, "random_roll"),
    ("loss", float, _LOSS, "loss"),
    ("silence", float, _SILENCE, "silence_per_day"),
    ("illness", float, _ILLNESS, "illness_share"),
    ("estrus", float, _ESTRUS, "estrus_share"),
    ("calving", float, _CALVING, "calving_share"),
    ("refit", float, _REFIT, "refit_share"),
    ("start", str | None, _START, "start"),
)


def _with_herd_options(fn):
    """Add the shared herd options to a command; it receives them as ``herd`` keywords
    for simulator.herd.Herd (``start`` still as given, to be parsed by the command)."""
    sig = inspect.signature(fn)
    own = [p for p in sig.parameters.values() if p.name != "herd_opts"]
    extra = [
        inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=opt, annotation=tp)
        for name, tp, opt, _ in _HERD_OPTIONS
    ]

    @functools.wraps(fn)
    def wrapper(**kw):
        opts = {key: kw.pop(name) for name, _, _, key in _HERD_OPTIONS}
        return fn(**kw, herd_opts=opts)

    wrapper.__signature__ = sig.replace(parameters=own + extra)
    return wrapper


@app.command("record")
@_with_herd_options
def record(
    out: Path = typer.Option(..., "--out", "-o", help="Directory to write the recording to."),
    herd: int = typer.Option(10, "--herd", help="Number of animals (one collar each)."),
    days: float = typer.Option(1.0, "--days", help="Simulated days (fractions allowed)."),
    fmt: str = typer.Option(
        "both", "--format", help="csv (raw/<collar>.csv), npz (compact/<collar>.npz) or both."
    ),
    processes: int = typer.Option(
        0, "--processes", help="Worker processes (0 = one per CPU core)."
    ),
    overwrite: bool = typer.Option(
        False, "--overwrite", help="Replace an earlier recording in --out."
    ),
    herd_opts: dict | None = None,
) -> None:
    """Record a labelled synthetic herd to files for training and evaluation.

    Writes raw/<collar>.csv (t,ax,ay,az on the collar's clock), compact/<collar>.npz,
    observations.csv (behaviour intervals), assignments.csv, truth_budgets.csv and
    herd.json (parameters and injected health events with their ground truth).

    Example: boutline simulate record --herd 100 --days 1 --scenario mixed --seed 1 --out rec/
    """
    from simulator.herd import DEFAULT_START
    from simulator.record import record as do_record

    from ._progress import step_progress

    if processes < 0:
        raise ConfigError(f"--processes {processes} must be 0 (one per core) or more")
    kwargs = dict(herd_opts or {})
    kwargs["start"] = _start(kwargs.get("start"), DEFAULT_START)
    hz = kwargs.get("hz", 10.0)
    t0 = time.monotonic()
    with step_progress("recording collars", max(herd, 1)) as advance:
        summary = do_record(
            out,
            n_animals=herd,
            days=days,
            fmt=fmt,
            processes=processes or None,
            overwrite=overwrite,
            progress=lambda done, total: advance(f"{done}/{total}") if done else None,
            **kwargs,
        )
    typer.echo(
        f"recorded {summary['animals']} animals ({summary['collars']} collars) x {days:g} d at {hz:g} Hz to {summary['out']}:"
        f" {summary['samples']} samples ({summary['kept_share']:.1%} kept after frame loss"
        f" and silences), {summary['observations']} observation intervals,"
        f" in {time.monotonic() - t0:.0f} s"
    )


@app.command("publish")
@_with_herd_options
def publish(
    host: str = typer.Option("127.0.0.1", "--host", help="MQTT broker host."),
    port: int = typer.Option(1883, "--port", help="MQTT broker port."),
    site: str = typer.Option("demo-farm", "--site", help="Site name in the topics."),
    topic_prefix: str = typer.Option("barn", "--topic-prefix", help="First topic level(s)."),
    herd: int = typer.Option(10, "--herd", help="Number of collars (one per animal)."),
    speed: float = typer.Option(
        1.0, "--speed", help="Simulated seconds per wall second (1 = real time)."
    ),
    flat_out: bool = typer.Option(False, "--flat-out", help="Publish as fast as possible."),
    fmt: str = typer.Option("json", "--format", help="Frame encoding: json or binary."),
    qos: int = typer.Option(0, "--qos", help="MQTT QoS: 0 or 1."),
    processes: int = typer.Option(1, "--processes", help="Publishing processes (large herds)."),
    duration: float = typer.Option(
        60.0, "--duration", help="Simulated seconds to publish; the run stops after them."
    ),
    max_wall: float | None = typer.Option(
        None, "--max-wall", help="Stop after this many wall-clock seconds at the latest."
    ),
    frame_s: float = typer.Option(1.0, "--frame-s", help="Seconds of samples per frame."),
    herd_opts: dict | None = None,
) -> None:
    """Publish a synthetic herd's collar frames to an MQTT broker.

    Topics are <prefix>/<site>/collars/<collar>/accel. In real time the herd starts now; at
    a speed factor or flat out it starts --duration ago, so every frame is in the recent past
    for the gateway's clock check. Stops after --duration simulated seconds (or --max-wall).

    Example: boutline simulate publish --herd 1000 --speed 10 --duration 600 --processes 2
    """
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn

    from simulator.publish import publish as do_publish

    now = math.floor(time.time())
    accelerated = flat_out or speed != 1.0
    default_start = now - duration if accelerated else now
    kwargs = dict(herd_opts or {})
    kwargs["start"] = _start(kwargs.get("start"), default_start)
    kwargs.update(n_animals=herd, frame_s=frame_s)
    console = Console(stderr=True)
    with Progress(
        TextColumn("publishing"),
        BarColumn(),
        TextColumn("{task.fields[frames]} frames, {task.completed:.0f}/{task.total:.0f} s"),
        console=console,
        transient=True,
        disable=not console.is_terminal,
    ) as bar:
        task = bar.add_task("publish", total=duration, frames=0)
        try:
            res = do_publish(
                host=host,
                port=port,
                site=site,
                prefix=topic_prefix,
                herd_kwargs=kwargs,
                speed=None if flat_out else speed,
                fmt=fmt,
                qos=qos,
                processes=processes,
                duration_s=duration,
                max_wall_s=max_wall,
                progress=lambda f, b, s: bar.update(task, completed=s, frames=f),
            )
        except KeyboardInterrupt:
            typer.echo("Interrupted; frames already handed to the broker were sent.", err=True)
            raise typer.Exit(130) from None
    typer.echo(
        f"sent {res.frames} frames ({res.bytes / 1e6:.1f} MB, {fmt}, QoS {qos}) from"
        f" {res.collars} collars: {res.simulated_s:.0f} simulated s in {res.wall_s:.1f} s"
        f" wall, {res.frames_per_s:.0f} frames/s; stopped by {res.stopped_by}"
    )
