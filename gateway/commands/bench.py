"""``boutline bench``: throughput, latency and memory of the full gateway path, against the
bare-subscriber and onnxruntime-alone limits (gateway/bench.py, docs/performance.md)."""

from __future__ import annotations

import json
from pathlib import Path

import typer

__all__ = ["bench"]


def _collars(text: str) -> tuple[int, ...]:
    from ..errors import ConfigError

    try:
        values = tuple(int(x.replace("_", "")) for x in text.split(",") if x.strip())
    except ValueError as exc:
        raise ConfigError(
            f"--collars {text[:60]!r} is not a list of whole numbers; write e.g. 100,1000,10000"
        ) from exc
    if not values:
        raise ConfigError("--collars is empty; write e.g. 100,1000,10000")
    return values


def _phases(text: str) -> tuple[str, ...]:
    from ..bench import PHASES
    from ..errors import ConfigError

    values = tuple(x.strip() for x in text.split(",") if x.strip())
    bad = [v for v in values if v not in PHASES]
    if bad or not values:
        raise ConfigError(f"--phases {text[:60]!r}: choose from {','.join(PHASES)}")
    return values


def _write(out: Path, report: dict) -> None:
    try:
        out.write_text(json.dumps(report, indent=1, default=str) + "\n")
    except OSError as exc:
        from ..errors import BoutlineError

        raise BoutlineError(f"cannot write {out} ({exc.strerror}); give another --out") from exc


def _soak(days: float, speed: float, frame_s: float, fmt: str, seed: int, out: Path) -> None:
    import sys

    from ..benchsoak import SoakOptions, format_soak, run_soak

    opts = SoakOptions(days=days, speed=speed, frame_s=frame_s, fmt=fmt, seed=seed)
    opts.check()
    report = run_soak(opts, progress=lambda m: print(m, file=sys.stderr, flush=True))
    typer.echo(format_soak(report))
    _write(out, report)
    typer.echo(f"\nreport: {out}")


def bench(
    collars: str = typer.Option(
        "100,1000,10000", "--collars", help="Herd sizes to measure, comma-separated."
    ),
    seconds: float = typer.Option(
        30.0,
        "--seconds",
        help="Herd seconds per flat-out run (small herds get more, for 60,000 frames at least).",
    ),
    latency_seconds: float = typer.Option(
        30.0, "--latency-seconds", help="Herd seconds published in real time for the latency."
    ),
    repeats: int = typer.Option(3, "--repeats", help="Runs per herd size; the table is medians."),
    fmt: str = typer.Option("json", "--format", help="Payloads the gateway gets: json or binary."),
    protocol: str = typer.Option(
        "5", "--protocol", help="MQTT version of the gateway and bare subscriber: 5 or 3.1.1."
    ),
    publishers: int = typer.Option(2, "--publishers", help="Publisher processes."),
    phases: str = typer.Option(
        "decode,bare,onnx,gateway,latency",
        "--phases",
        help="What to measure: decode, bare, onnx, gateway (flat out), latency (real time).",
    ),
    model: Path | None = typer.Option(None, "--model", help="ONNX model; default: the shipped."),
    seed: int = typer.Option(1, "--seed", help="Seed of the simulated herd."),
    profile: Path | None = typer.Option(
        None,
        "--profile",
        help="Directory for py-spy profiles of the gateway (pip install py-spy); summary in JSON.",
    ),
    out: Path = typer.Option(
        Path("bench.json"), "--out", "-o", help="JSON report with every run and the medians."
    ),
    soak: bool = typer.Option(
        False,
        "--soak",
        help="Instead: the soak run, 100 collars through `boutline run` for --soak-days at"
        " --soak-speed, with broker restarts and database outages (outside CI).",
    ),
    soak_days: float = typer.Option(7.0, "--soak-days", help="Simulated days of the soak."),
    soak_speed: float = typer.Option(
        50.0, "--soak-speed", help="Herd seconds per wall second in the soak."
    ),
    soak_frame_s: float = typer.Option(
        1.0,
        "--soak-frame-s",
        help="Herd seconds per collar frame in the soak (2: half the frames, same samples).",
    ),
) -> None:
    """Measure gateway throughput, latency and memory against the bare-subscriber limit.

    Starts its own Mosquitto on a free loopback port, publishes a simulated herd from
    separate processes and runs the real gateway (decode, windows, inference, smoothing,
    bouts, SQLite store). For every herd size: sustained frames/s draining a backlog flat
    out, window-to-stored latency p50/p99 in real time, CPU seconds per 1,000 frames and
    peak RSS; beside them a bare paho-mqtt subscriber that only decodes, and onnxruntime
    alone on the same windows, with each ratio. Prints a table and the targets, writes JSON.
    A benchmark, not a test: quote medians of repeated runs on a quiet machine.

    Example: boutline bench --collars 100,1000 --repeats 3 --out bench.json
    """
    from ..bench import BenchOptions, format_table, run_bench
    from ._progress import step_progress

    if soak:
        _soak(soak_days, soak_speed, soak_frame_s, fmt, seed, out)
        return
    opts = BenchOptions(
        collars=_collars(collars),
        seconds=seconds,
        latency_seconds=latency_seconds,
        repeats=repeats,
        fmt=fmt,
        protocol=protocol,
        publishers=publishers,
        seed=seed,
        model=str(model) if model else "",
        profile_dir=str(profile) if profile else "",
        phases=_phases(phases),
    )
    opts.check()
    per_repeat = len(opts.phases) + (1 if "bare" in opts.phases else 0)
    total = len(opts.collars) * (1 + opts.repeats * per_repeat)
    with step_progress("bench", total) as advance:
        # what is measured so far is saved after each herd size: a long run may be cut short
        report = run_bench(opts, progress=advance, on_row=lambda partial: _write(out, partial))
    text = format_table(report["rows"], report["targets"])
    typer.echo(text)
    for row in report["rows"]:
        for err in row["errors"]:
            typer.echo(f"Warning: {row['collars']} collars: {err}", err=True)
    _write(out, report)
    typer.echo(f"\nreport: {out} (medians of {opts.repeats} run(s) per herd size)")
