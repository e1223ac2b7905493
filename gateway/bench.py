"""The benchmark behind ``boutline bench``: the full gateway path against the physical limit.

Every measurement runs in processes of its own, against a Mosquitto started for it on a free
loopback port (:func:`gateway.servers.start_mosquitto`) and stopped by its pid afterwards:

- **payloads**: a seeded simulated herd (:class:`simulator.herd.Herd`), encoded once as JSON
  and as binary frames into files, so every run publishes exactly the same bytes;
- **publishers**: separate processes, each a shard of the collars, publishing flat out (or
  paced at real time for the latency run);
- **bare subscriber**: paho-mqtt that only parses the topic and decodes each payload, the
  limit any gateway built on paho and our wire format can reach;
- **onnxruntime alone**: the model on the same windows (cut by :class:`gateway.windows.Windows`
  from the same frames), in batches of one window per collar;
- **gateway**: the real daemon, frames in over MQTT to events committed in the SQLite store.

Numbers go through :func:`summarize` (percentiles) and :func:`median_runs` (the median of
repeated runs per figure). Timing is never asserted in tests; this module is where speed is
measured.

>>> summarize([0.010, 0.020, 0.030, 0.040])["p50"]
0.025
>>> median_runs([{"fps": 10.0}, {"fps": 30.0}, {"fps": 20.0}])["fps"]
20.0
"""

from __future__ import annotations

import json
import math
import os
import platform
import shutil
import statistics
import tempfile
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from .errors import BoutlineError, ConfigError

__all__ = [
    "BENCH_MOSQUITTO",
    "FORMATS",
    "PHASES",
    "TARGETS",
    "BenchOptions",
    "PayloadSet",
    "bench_broker",
    "build_payloads",
    "decode_speed",
    "evaluate_targets",
    "format_table",
    "herd_windows",
    "median_runs",
    "onnx_alone",
    "pid_cpu_s",
    "pid_children",
    "pid_peak_rss_mb",
    "pid_rss_mb",
    "profile_summary",
    "run_bench",
    "summarize",
    "tree_cpu_s",
    "tree_mb",
    "warm_up_seconds",
]

FORMATS = ("json", "binary")
TOPIC_PREFIX = "barn"
SITE = "bench"
# A frame per second of ten samples per collar (DESIGN.md; the load shape).
COLLAR_HZ = 10.0
FRAME_S = 1.0

# The broker for a benchmark: no disk persistence, queues large enough that a slow consumer
# makes the broker hold messages instead of dropping them (drops would flatter the consumer).
BENCH_MOSQUITTO = """\
per_listener_settings false
listener {port} 127.0.0.1
allow_anonymous true
persistence false
log_dest stdout
log_type error
log_type warning
max_queued_messages {max_queued}
max_queued_bytes 0
max_inflight_messages {max_inflight}
"""

_INDEX_DTYPE = np.dtype(
    [
        ("collar", "<i4"),
        ("sent", "<f8"),  # seconds since the herd's start the frame left the collar
        ("json_off", "<i8"),
        ("json_len", "<i4"),
        ("binary_off", "<i8"),
        ("binary_len", "<i4"),
        ("samples", "<i4"),
    ]
)


# ---------------------------------------------------------------------------------- statistics


def summarize(values: Iterable[float] | np.ndarray) -> dict[str, float | int | None]:
    """Count, mean, p50, p90, p99 and max of latency samples (seconds); None when empty.

    Percentiles are linear between order statistics (numpy's default ``linear`` method):
    rank ``q / 100 * (n - 1)``, interpolated between its neighbours.
    """
    x = np.sort(np.asarray(list(values) if not isinstance(values, np.ndarray) else values, float))
    x = x[np.isfinite(x)]
    n = int(x.size)
    out: dict[str, float | int | None] = {"n": n}
    if n == 0:
        out.update(mean=None, p50=None, p90=None, p99=None, max=None)
        return out
    out["mean"] = float(x.mean())
    for q in (50, 90, 99):
        rank = q / 100.0 * (n - 1)
        lo = int(math.floor(rank))
        hi = min(lo + 1, n - 1)
        out[f"p{q}"] = float(x[lo] + (x[hi] - x[lo]) * (rank - lo))
    out["max"] = float(x[-1])
    return out


def median_runs(runs: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """Per key, the median over runs of the numeric values (None where no run has one).

    Booleans become "all runs" (a target met in every run); other values come from the first
    run that has them.
    """
    keys: list[str] = []
    for r in runs:
        keys.extend(k for k in r if k not in keys)
    out: dict[str, Any] = {}
    for k in keys:
        vals = [r.get(k) for r in runs]
        present = [v for v in vals if v is not None]
        if present and all(isinstance(v, bool) for v in present):
            out[k] = all(present)
        elif present and all(isinstance(v, int | float) for v in present):
            med = statistics.median(present)
            out[k] = float(med)
        elif present:
            out[k] = present[0]
        else:
            out[k] = None
    return out


def _status_mb(pid: int, key: str) -> float | None:
    """A kB field of /proc/PID/status (proc(5)) in MB, None if the process is gone."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(key):
                return int(line.split()[1]) / 1024.0
    except OSError:
        return None
    return None


def pid_peak_rss_mb(pid: int) -> float | None:
    """Peak resident set size (VmHWM) of a process in MB, None if it is gone.

    Not ``ru_maxrss``: a spawned child inherits that from the parent it was forked from.
    """
    return _status_mb(pid, "VmHWM:")


def pid_rss_mb(pid: int) -> float | None:
    """Resident set size (VmRSS) of a process now, in MB; None if it is gone."""
    return _status_mb(pid, "VmRSS:")


def pid_children(pid: int) -> list[int]:
    """The direct children of ``pid`` (the gateway's MQTT ingest process: [process] ingest)."""
    try:
        return [int(c) for c in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except (OSError, ValueError):
        return []


def tree_mb(pid: int, per_pid: Callable[[int], float | None]) -> float | None:
    """``per_pid`` (pid_rss_mb, pid_peak_rss_mb) summed over a process and its children:
    the gateway with its ingest process. Shared library pages count in each. None if
    ``pid`` is gone."""
    own = per_pid(pid)
    if own is None:
        return None
    return own + sum(per_pid(c) or 0.0 for c in pid_children(pid))


def tree_cpu_s(pid: int) -> float:
    """CPU seconds of a process and its children so far."""
    return pid_cpu_s(pid) + sum(pid_cpu_s(c) for c in pid_children(pid))


def pid_cpu_s(pid: int | None) -> float:
    """User + system CPU seconds of a process so far (0.0 if it is gone)."""
    if pid is None:
        return 0.0
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    # fields after the command name: state is [0], utime [11], stime [12] (proc(5))
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


# ------------------------------------------------------------------------------------ payloads


@dataclass(frozen=True)
class PayloadSet:
    """A simulated herd's frames encoded as JSON and as binary, in send order, on disk.

    ``index`` has one row per frame: collar index, send time (seconds since ``start``), and
    where the JSON and binary bytes sit in their files.
    """

    path: Path
    collar_ids: tuple[str, ...]
    seconds: float
    start: float
    seed: int
    frames: int
    samples: int

    @property
    def collars(self) -> int:
        return len(self.collar_ids)

    @classmethod
    def open(cls, path: Path) -> PayloadSet:
        meta = json.loads((path / "meta.json").read_text())
        return cls(
            path=path,
            collar_ids=tuple(meta["collar_ids"]),
            seconds=float(meta["seconds"]),
            start=float(meta["start"]),
            seed=int(meta["seed"]),
            frames=int(meta["frames"]),
            samples=int(meta["samples"]),
        )

    def index(self) -> np.ndarray:
        return np.load(self.path / "index.npy")

    def data(self, fmt: str) -> bytes:
        return (self.path / f"{fmt}.bin").read_bytes()

    def topics(self) -> list[str]:
        from .wire import collar_topic

        return [collar_topic(TOPIC_PREFIX, SITE, c) for c in self.collar_ids]

    def payloads(self, fmt: str, until_s: float | None = None) -> Iterator[tuple[int, bytes]]:
        """``(collar index, payload)`` in send order, up to ``until_s`` seconds of herd time."""
        idx, data = self.index(), self.data(fmt)
        off, ln = idx[f"{fmt}_off"], idx[f"{fmt}_len"]
        for i in range(len(idx)):
            if until_s is not None and idx["sent"][i] >= until_s:
                break
            yield int(idx["collar"][i]), data[off[i] : off[i] + ln[i]]

    def count(self, until_s: float | None = None) -> tuple[int, int]:
        """Frames and samples sent before ``until_s`` seconds of herd time."""
        idx = self.index()
        sel = idx if until_s is None else idx[idx["sent"] < until_s]
        return int(len(sel)), int(sel["samples"].sum())


def build_payloads(
    path: Path,
    collars: int,
    seconds: float,
    *,
    seed: int = 1,
    start: float | None = None,
    progress: Callable[[float], None] | None = None,
) -> PayloadSet:
    """Simulate ``collars`` collars for ``seconds`` and write both encodings under ``path``.

    The herd starts ``seconds`` + 60 s before now unless ``start`` is given, so every frame
    is in the recent past for the gateway's clock rule however fast it is replayed.
    """
    from simulator.herd import Herd

    from .types import Frame
    from .wire import encode_binary, encode_json

    if collars < 1 or seconds <= 0:
        raise ConfigError("a benchmark herd needs at least one collar and a positive duration")
    path.mkdir(parents=True, exist_ok=True)
    start = float(math.floor(time.time() - seconds - 60.0)) if start is None else float(start)
    herd = Herd(
        collars, seed=seed, start=start, hz=COLLAR_HZ, frame_s=FRAME_S, days=seconds / 86400.0
    )
    ids = [herd.collar_ids[i] for i in herd.local]
    rows: list[tuple] = []
    j_off = b_off = 0
    with open(path / "json.bin", "wb") as fj, open(path / "binary.bin", "wb") as fb:
        for block in herd.blocks():
            if len(block) == 0:
                continue
            seqs = (block.seq % 2**32).tolist()
            for j, (r, t, v, sent) in enumerate(
                zip(
                    block.row.tolist(),
                    block.t.tolist(),
                    block.battery_v.tolist(),
                    block.sent.tolist(),
                    strict=True,
                )
            ):
                frame = Frame(ids[r], seqs[j], t, herd.hz, block.acc[j], v)
                pj, pb = encode_json(frame), encode_binary(frame, range_g=herd.sensor.range_g)
                fj.write(pj)
                fb.write(pb)
                rows.append((r, sent - start, j_off, len(pj), b_off, len(pb), frame.n))
                j_off += len(pj)
                b_off += len(pb)
            if progress is not None:
                progress(min(1.0, float(block.sent[-1] - start) / seconds))
    index = np.array(rows, dtype=_INDEX_DTYPE)
    np.save(path / "index.npy", index)
    meta = {
        "collar_ids": ids,
        "seconds": float(seconds),
        "start": start,
        "seed": seed,
        "frames": int(len(index)),
        "samples": int(index["samples"].sum()) if len(index) else 0,
        "collar_hz": COLLAR_HZ,
        "frame_s": FRAME_S,
    }
    (path / "meta.json").write_text(json.dumps(meta))
    return PayloadSet.open(path)


# -------------------------------------------------------------------------------------- broker


@contextmanager
def bench_broker(workdir: Path, max_queued: int = 2_000_000) -> Iterator[Any]:
    """A Mosquitto of the benchmark's own, stopped by its pid however the block ends."""
    from .servers import start_mosquitto

    workdir.mkdir(parents=True, exist_ok=True)
    template = workdir / "bench-mosquitto.conf.in"
    template.write_text(BENCH_MOSQUITTO)
    srv = start_mosquitto(
        workdir, template, max_queued=max(1000, int(max_queued)), max_inflight=1000
    )
    try:
        yield srv
    finally:
        srv.stop()


# --------------------------------------------------------------------- decode and model alone


def decode_speed(payloads: PayloadSet, limit: int = 50_000, passes: int = 5) -> dict[str, Any]:
    """CPU microseconds per frame of :func:`gateway.wire.decode`, JSON and binary, on the
    same frames: the median of ``passes`` passes over the first ``limit`` of each.
    """
    from .wire import decode

    ids = payloads.collar_ids
    out: dict[str, Any] = {}
    for fmt in FORMATS:
        items = []
        for c, p in payloads.payloads(fmt):
            items.append((ids[c], p))
            if len(items) >= limit:
                break
        per: list[float] = []
        for _ in range(passes):
            # CPU time, not wall time: on a shared machine being descheduled is not decoding
            t0 = time.process_time()
            for cid, p in items:
                decode(p, cid)
            per.append((time.process_time() - t0) / max(1, len(items)) * 1e6)
        out[f"{fmt}_decode_us"] = statistics.median(per)
        out[f"{fmt}_bytes_per_frame"] = (
            sum(len(p) for _, p in items) / len(items) if items else None
        )
    j, b = out["json_decode_us"], out["binary_decode_us"]
    out["binary_speedup"] = j / b if b else None
    return out


def herd_windows(
    payloads: PayloadSet, model: Any, until_s: float | None = None, fmt: str = "binary"
) -> np.ndarray:
    """The windows the gateway cuts from these frames (gateway.windows), ``[N, 3, T]``."""
    from .windows import Windows
    from .wire import decode

    w = Windows(
        sample_rate_hz=model.sample_rate_hz, window_len=model.window_len, hop_len=model.hop_len
    )
    ids = payloads.collar_ids
    xs: list[np.ndarray] = []
    for i, (c, p) in enumerate(payloads.payloads(fmt, until_s)):
        frame = decode(p, ids[c])
        if frame:
            w.push(frame, ids[c])
        if i % 5000 == 4999:
            xs.append(w.collect().batch.x)
    xs.append(w.collect().batch.x)
    return np.concatenate(xs)


def onnx_alone(
    payloads: PayloadSet,
    model_path: str | None = None,
    until_s: float | None = None,
    min_time_s: float = 2.0,
) -> dict[str, Any]:
    """onnxruntime alone on the herd's windows, one window per collar per call.

    Batches of one window per collar (capped at the default ``batch_max``) are what the
    gateway's inference sees when the whole herd's hop comes due together.
    """
    from .config import ModelSettings
    from .model import load_model

    model = load_model(model_path)
    x = herd_windows(payloads, model, until_s)
    if len(x) == 0:
        return {"windows": 0, "windows_per_s": None, "frames_per_s_equivalent": None}
    batch = max(1, min(payloads.collars, ModelSettings().batch_max, len(x)))
    model.predict(x[:batch])  # warm-up: the first call allocates
    done, t0, cpu0 = 0, time.perf_counter(), time.process_time()
    while True:
        for i in range(0, len(x), batch):
            done += len(model.predict(x[i : i + batch]))
        elapsed = time.perf_counter() - t0
        if elapsed >= min_time_s:
            break
    cpu = time.process_time() - cpu0
    wps = done / elapsed
    return {
        "windows": int(len(x)),
        "batch": batch,
        "windows_per_s": wps,
        "us_per_window": 1e6 / wps,
        "cpu_us_per_window": 1e6 * cpu / done,
        # one window per collar per hop stands for a hop's worth of that collar's frames
        "frames_per_s_equivalent": wps * model.hop_s / FRAME_S,
    }


# --------------------------------------------------------------------------------- profiles


def profile_summary(path: Path, top: int = 15) -> dict[str, Any]:
    """Where a py-spy raw profile (folded stacks, one ``frame;frame;... count`` a line) spent
    its samples: the functions with the most samples of their own, and per module."""
    own: dict[str, int] = {}
    modules: dict[str, int] = {}
    total = 0
    for line in path.read_text(errors="replace").splitlines():
        stack, _, count = line.rpartition(" ")
        if not stack or not count.isdigit():
            continue
        n = int(count)
        total += n
        leaf = stack.rsplit(";", 1)[-1]
        name, _, where = leaf.partition(" (")
        where = where.rsplit(":", 1)[0].rstrip(")").split("/site-packages/")[-1]
        key = f"{name} ({where})"
        own[key] = own.get(key, 0) + n
        module = where or "?"
        modules[module] = modules.get(module, 0) + n

    def share(d: dict[str, int]) -> list[tuple[str, float]]:
        ranked = sorted(d.items(), key=lambda kv: -kv[1])[:top]
        return [(k, round(100.0 * v / total, 1)) for k, v in ranked]

    return {"samples": total, "own_percent": share(own), "module_percent": share(modules)}


# --------------------------------------------------------------------------------- targets


@dataclass(frozen=True)
class Target:
    name: str
    text: str


TARGETS = (
    Target("headroom_10000", "10,000 collars in real time with >= 1.5x headroom"),
    Target("ratio_bare_json", "gateway throughput >= 0.6 of the bare subscriber (JSON)"),
    Target("binary_speedup", "binary decode >= 2x faster than JSON"),
    Target("p99_latency_1000", "p99 window-to-stored latency <= 250 ms at 1,000 collars"),
    Target("rss_10000", "peak RSS <= 250 MB at 10,000 collars"),
    Target("cost_flat", "CPU per frame flat from 100 to 10,000 collars (max/min <= 1.25)"),
)


def evaluate_targets(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Each target with the measured figure and whether it is met (None: not measured)."""
    by_n = {int(r["collars"]): r for r in rows}

    def get(n: int, key: str) -> float | None:
        v = by_n.get(n, {}).get(key)
        return None if v is None else float(v)

    def verdict(name: str, value: float | None, ok: Callable[[float], bool], unit: str):
        text = next(t.text for t in TARGETS if t.name == name)
        met = None if value is None else bool(ok(value))
        return {"target": name, "text": text, "measured": value, "unit": unit, "met": met}

    cpus = [v for n in by_n if (v := get(n, "cpu_s_per_1000_frames"))]
    spread = max(cpus) / min(cpus) if len(cpus) >= 2 and 100 in by_n and 10000 in by_n else None
    json_rows = [r for r in rows if r.get("format") == "json"]
    ratios = [float(r["ratio_bare"]) for r in json_rows if r.get("ratio_bare") is not None]
    speedups = [float(r["binary_speedup"]) for r in rows if r.get("binary_speedup") is not None]
    rss = [v for k in ("peak_rss_mb", "realtime_peak_rss_mb") if (v := get(10000, k))]
    return [
        verdict("headroom_10000", get(10000, "headroom"), lambda v: v >= 1.5, "x"),
        verdict("ratio_bare_json", min(ratios) if ratios else None, lambda v: v >= 0.6, ""),
        verdict("binary_speedup", min(speedups) if speedups else None, lambda v: v >= 2.0, "x"),
        verdict("p99_latency_1000", get(1000, "latency_p99_ms"), lambda v: v <= 250.0, "ms"),
        verdict("rss_10000", max(rss) if rss else None, lambda v: v <= 250.0, "MB"),
        verdict("cost_flat", spread, lambda v: v <= 1.25, ""),
    ]


# ---------------------------------------------------------------------------------- output


_COLUMNS = (
    ("collars", "collars", "{:.0f}"),
    ("format", "fmt", "{}"),
    ("protocol", "mqtt", "{}"),
    ("frames_per_s", "frames/s", "{:,.0f}"),
    ("samples_per_s", "samples/s", "{:,.0f}"),
    ("headroom", "x real time", "{:.2f}"),
    ("cpu_bound_frames_per_s", "1-core fr/s", "{:,.0f}"),
    ("bare_frames_per_s", "bare fr/s", "{:,.0f}"),
    ("ratio_bare", "/bare", "{:.2f}"),
    ("onnx_frames_per_s", "onnx fr/s", "{:,.0f}"),
    ("ratio_onnx", "/onnx", "{:.2f}"),
    ("latency_p50_ms", "p50 ms", "{:.0f}"),
    ("latency_p99_ms", "p99 ms", "{:.0f}"),
    ("cpu_s_per_1000_frames", "CPU s/1k fr", "{:.3f}"),
    ("peak_rss_mb", "RSS MB", "{:.0f}"),
)


def format_table(rows: list[dict[str, Any]], targets: list[dict[str, Any]]) -> str:
    """The results as a plain-text table, then each target with its figure and verdict."""
    head = [c[1] for c in _COLUMNS]
    body = [
        [("-" if r.get(k) is None else fmt.format(r[k])) for k, _, fmt in _COLUMNS] for r in rows
    ]
    widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(head)]
    lines = ["  ".join(h.rjust(w) for h, w in zip(head, widths, strict=True))]
    lines += ["  ".join(c.rjust(w) for c, w in zip(b, widths, strict=True)) for b in body]
    lines.append("")
    for t in targets:
        mark = {True: "met   ", False: "MISSED", None: "n/a   "}[t["met"]]
        val = "not measured" if t["measured"] is None else f"{t['measured']:.3g}{t['unit']}"
        lines.append(f"{mark} {t['text']}: {val}")
    return "\n".join(lines)


# ------------------------------------------------------------------------------------- bench

PHASES = ("decode", "bare", "onnx", "gateway", "latency")


@dataclass
class BenchOptions:
    """Options of ``boutline bench`` (see its --help)."""

    collars: tuple[int, ...] = (100, 1000, 10000)
    seconds: float = 30.0  # herd seconds of a flat-out run (more for small herds: min_frames)
    latency_seconds: float = 30.0  # herd seconds published in real time for the latency
    min_frames: int = 60_000  # a flat-out run drains at least this many frames
    repeats: int = 3
    fmt: str = "json"
    protocol: str = "5"  # MQTT version of the gateway and the bare subscriber
    publishers: int = 2
    seed: int = 1
    model: str = ""
    profile_dir: str = ""  # py-spy profiles of the gateway's first flat-out run per size
    workdir: str = ""
    keep: bool = False
    phases: tuple[str, ...] = PHASES

    def check(self) -> None:
        """Raise ConfigError on options that cannot give a benchmark."""
        if self.fmt not in FORMATS:
            raise ConfigError(f"format {self.fmt!r} is not one of {', '.join(FORMATS)}")
        if self.protocol not in ("5", "3.1.1"):
            raise ConfigError(f"protocol {self.protocol!r} is not 5 or 3.1.1")
        if not self.collars or any(n < 1 or n > 100_000 for n in self.collars):
            raise ConfigError("collars must be whole numbers from 1 to 100000, e.g. 100,1000")
        if not 1 <= self.repeats <= 50:
            raise ConfigError("repeats must be between 1 and 50")
        if not 1 <= self.publishers <= 16:
            raise ConfigError("publishers must be between 1 and 16")
        if not (0 < self.seconds <= 3600 and 0 < self.latency_seconds <= 3600):
            raise ConfigError("seconds and latency seconds must be between 0 and 3600")
        unknown = set(self.phases) - set(PHASES)
        if unknown or not self.phases:
            raise ConfigError(f"phases must be among {', '.join(PHASES)}")

    def flat_seconds(self, collars: int) -> float:
        return float(max(self.seconds, math.ceil(self.min_frames / collars)))


def warm_up_seconds(model_window_s: float) -> float:
    """Herd seconds before every animal's smoother emits decisions: a window, the lag and
    a margin. Until then no window's outcome is in the store, so latency waits for it."""
    from .config import SmoothingSettings

    return SmoothingSettings().lag_s + model_window_s + 10.0


def _machine() -> dict[str, Any]:
    import onnxruntime

    return {
        "cpus": os.cpu_count(),
        "python": platform.python_version(),
        "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "onnxruntime": onnxruntime.__version__,
        "load_avg_at_start": os.getloadavg(),
        "note": "shared machine: figures are medians of repeated runs and still noisy",
    }


def run_bench(
    opts: BenchOptions,
    progress: Callable[[str], None] | None = None,
    on_row: Callable[[dict[str, Any]], None] | None = None,
) -> dict[str, Any]:
    """Every phase for every herd size, ``opts.repeats`` times; the whole report as a dict.

    Rows hold the median over repeats of each figure, and the repeats themselves;
    ``on_row(report)`` is called after each herd size (to save what is done so far).
    """
    from .model import load_model

    opts.check()
    say = progress or (lambda _m: None)
    model = load_model(opts.model or None)
    warm = warm_up_seconds(model.window_s)
    root = Path(opts.workdir) if opts.workdir else Path(tempfile.mkdtemp(prefix="boutline-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    rows: list[dict[str, Any]] = []
    report: dict[str, Any] = {
        "machine": _machine(),
        "options": asdict(opts),
        "model": {"source": model.source, "window_s": model.window_s, "hop_s": model.hop_s},
        "warm_up_s": warm,
        "rows": rows,
    }
    try:
        for n in opts.collars:
            flat_s = opts.flat_seconds(n)
            herd_s = max(flat_s, warm + opts.latency_seconds if "latency" in opts.phases else 0)
            say(f"{n} collars: simulating {herd_s:g} s of the herd")
            payloads = build_payloads(root / f"herd-{n}", n, herd_s, seed=opts.seed)
            runs = []
            for rep in range(opts.repeats):
                tag = f"{n} collars, run {rep + 1}/{opts.repeats}"
                runs.append(
                    _one_repeat(opts, payloads, root / f"run-{n}-{rep}", flat_s, warm, tag, say)
                )
            rows.append(
                {
                    "collars": n,
                    "format": opts.fmt,
                    "protocol": opts.protocol,
                    **median_runs(runs),
                    "errors": [e for r in runs for e in r.get("errors", [])],
                    "runs": runs,
                }
            )
            report["targets"] = evaluate_targets(rows)
            if on_row is not None:
                on_row(report)
            if not opts.keep:
                shutil.rmtree(root / f"herd-{n}", ignore_errors=True)
        report["targets"] = evaluate_targets(rows)
        return report
    finally:
        if not opts.keep and not opts.workdir:
            shutil.rmtree(root, ignore_errors=True)


def _drain(
    consumer: str, payloads: PayloadSet, workdir: Path, opts: BenchOptions, fmt: str,
    until_s: float, **gw: Any,
) -> dict[str, Any]:  # fmt: skip
    """One backlog-drain run of the bare subscriber or the gateway on a broker of its own."""
    from . import benchrun as br

    expected, samples = payloads.count(until_s)
    with bench_broker(workdir / "broker", max_queued=expected + 1000) as srv:
        if consumer == "bare":
            spec: Any = br.ConsumeSpec(
                srv.host, srv.port, expected, backlog=expected, protocol=opts.protocol
            )
            target = br.bare_main
        else:
            spec = br.GatewaySpec(
                srv.host, srv.port, expected, backlog=expected, protocol=opts.protocol,
                data_dir=str(workdir / "data"), model=opts.model, collars=payloads.collars,
                replay=True, **gw,
            )  # fmt: skip
            target = br.gateway_main
        out = br.run_phases(
            target, spec, payloads, srv, fmt=fmt, publishers=opts.publishers,
            backlog_until_s=until_s,
        )  # fmt: skip
    out["expected"], out["expected_samples"] = expected, samples
    return out


def _wait_profile(path: Path, timeout_s: float = 20.0) -> dict[str, Any] | None:
    """py-spy writes its file once the sampled process has exited."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if path.is_file() and path.stat().st_size > 0:
            time.sleep(0.5)  # let it finish writing
            return {"file": str(path), **profile_summary(path)}
        time.sleep(0.2)
    return None


def _realtime(
    payloads: PayloadSet, workdir: Path, opts: BenchOptions, warm: float
) -> dict[str, Any]:
    """The gateway catches up a warm-up backlog, then takes the herd in real time."""
    from . import benchrun as br

    backlog, _ = payloads.count(warm)
    expected, _ = payloads.count(warm + opts.latency_seconds)
    with bench_broker(workdir / "broker", max_queued=expected + 1000) as srv:
        spec = br.GatewaySpec(
            srv.host, srv.port, expected, backlog=backlog, protocol=opts.protocol,
            data_dir=str(workdir / "data"), model=opts.model, collars=payloads.collars,
            replay=False, latency=True,
        )  # fmt: skip
        return br.run_phases(
            br.gateway_main, spec, payloads, srv, fmt=opts.fmt, publishers=opts.publishers,
            backlog_until_s=warm, live=(warm, warm + opts.latency_seconds, True),
        )  # fmt: skip


def _one_repeat(
    opts: BenchOptions,
    payloads: PayloadSet,
    workdir: Path,
    flat_s: float,
    warm: float,
    tag: str,
    say: Callable[[str], None],
) -> dict[str, Any]:
    """Every phase once; a phase that fails is recorded under ``errors`` and the rest go on."""
    out: dict[str, Any] = {"errors": []}
    phases: list[tuple[str, str, Callable[[], dict[str, Any]]]] = [
        ("decode", "decode timing", lambda: _phase_decode(payloads)),
        *[
            (
                "bare",
                f"bare subscriber, {fmt}",
                partial(_phase_bare, payloads, workdir, opts, fmt, flat_s),
            )
            for fmt in FORMATS
        ],  # fmt: skip
        ("onnx", "onnxruntime alone", lambda: _phase_onnx(payloads, opts, flat_s)),
        (
            "gateway",
            f"gateway, draining {flat_s:g} s of the herd flat out",
            lambda: _phase_gateway(payloads, workdir, opts, flat_s, tag, out),
        ),
        (
            "latency",
            f"gateway in real time for {opts.latency_seconds:g} s after warm-up",
            lambda: _phase_latency(payloads, workdir, opts, warm),
        ),
    ]
    try:
        for name, what, run in phases:
            if name not in opts.phases:
                continue
            say(f"{tag}: {what}")
            try:
                out.update(run())
            except BoutlineError as exc:
                out["errors"].append(f"{what}: {exc}")
        out["bare_frames_per_s"] = out.get(f"bare_{opts.fmt}_frames_per_s")
        fps, n = out.get("frames_per_s"), payloads.collars
        bare, onnx = out.get("bare_frames_per_s"), out.get("onnx_frames_per_s")
        out["headroom"] = fps / (n / FRAME_S) if fps else None
        out["ratio_bare"] = fps / bare if fps and bare else None
        out["ratio_onnx"] = fps / onnx if fps and onnx else None
        cpu = out.get("cpu_s_per_1000_frames")
        # frames/s the gateway's CPU time per frame allows on one whole core: the figure a
        # quiet machine approaches (the measured one loses whatever other processes take)
        out["cpu_bound_frames_per_s"] = 1000.0 / cpu if cpu else None
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    return out


def _phase_decode(payloads: PayloadSet) -> dict[str, Any]:
    from . import benchrun as br

    return dict(br.run_child(br.decode_main, (str(payloads.path), 50_000)))


def _phase_bare(
    payloads: PayloadSet, workdir: Path, opts: BenchOptions, fmt: str, flat_s: float
) -> dict[str, Any]:
    b = _drain("bare", payloads, workdir / f"bare-{fmt}", opts, fmt, flat_s)
    return {
        f"bare_{fmt}_frames_per_s": b["frames_per_s"],
        f"bare_{fmt}_cpu_s_per_1000_frames": b["cpu_s_per_1000_frames"],
        f"bare_{fmt}_complete": b["complete"],
    }


def _phase_onnx(payloads: PayloadSet, opts: BenchOptions, flat_s: float) -> dict[str, Any]:
    from . import benchrun as br

    o = br.run_child(br.onnx_main, (str(payloads.path), opts.model, flat_s))
    return {
        "onnx_windows_per_s": o["windows_per_s"],
        "onnx_us_per_window": o.get("us_per_window"),
        "onnx_frames_per_s": o["frames_per_s_equivalent"],
    }


def _phase_gateway(
    payloads: PayloadSet, workdir: Path, opts: BenchOptions, flat_s: float, tag: str,
    out: dict[str, Any],
) -> dict[str, Any]:  # fmt: skip
    n = payloads.collars
    prof = ""
    if opts.profile_dir and tag.endswith(f"run 1/{opts.repeats}"):
        Path(opts.profile_dir).mkdir(parents=True, exist_ok=True)
        prof = str(Path(opts.profile_dir) / f"gateway-{n}-{opts.fmt}.txt")
    g = _drain("gateway", payloads, workdir / "gateway", opts, opts.fmt, flat_s, profile=prof)
    fps = g["frames_per_s"]
    res = {
        "frames": g["frames"],
        "messages": g["messages"],
        "expected": g["expected"],
        "complete": g["complete"],
        "frames_per_s": fps,
        "samples_per_s": fps * g["expected_samples"] / g["expected"] if fps else None,
        "cpu_s_per_1000_frames": g["cpu_s_per_1000_frames"],
        "broker_cpu_s_per_1000_frames": 1000.0 * g["broker_cpu_s"] / max(1, g["messages"]),
        "peak_rss_mb": g["peak_rss_mb"],
        "pipeline_peak_rss_mb": g["pipeline_peak_rss_mb"],
        "ingest_peak_rss_mb": g["ingest_peak_rss_mb"],
        "ingest": g["ingest"],
        "ingest_cpu_s_per_1000_frames": 1000.0 * g["ingest_cpu_s"] / max(1, g["messages"]),
        "windows": g["windows"],
        "events_stored": g["events_stored"],
        "queue_dropped": g["queue_dropped"],
        "rejects": g["rejects"],
        "stage_seconds": g["stage_seconds"],
        "inference_seconds": g["inference_seconds"],
        "disk_write_mb": g["disk_write_bytes"] / 1e6,
    }
    if prof:
        res["profile"] = _wait_profile(Path(prof))
    return res


def _phase_latency(
    payloads: PayloadSet, workdir: Path, opts: BenchOptions, warm: float
) -> dict[str, Any]:
    r = _realtime(payloads, workdir / "realtime", opts, warm)
    lat = r["latency"]

    def ms(v: float | None) -> float | None:
        return None if v is None else 1000.0 * v

    live_msgs = r["messages"] - payloads.count(warm)[0]
    live_s = r["t_end"] - (r["t_caught_up"] or r["t_end"])
    return {
        "latency_p50_ms": ms(lat["p50"]),
        "latency_p99_ms": ms(lat["p99"]),
        "latency_max_ms": ms(lat["max"]),
        "latency_windows": lat["n"],
        "realtime_complete": r["complete"],
        "realtime_queue_dropped": r["queue_dropped"],
        "realtime_rejects": r["rejects"],
        "realtime_peak_rss_mb": r["peak_rss_mb"],
        "realtime_pipeline_peak_rss_mb": r["pipeline_peak_rss_mb"],
        "realtime_ingest_peak_rss_mb": r["ingest_peak_rss_mb"],
        "realtime_cpu_s_per_1000_frames": r["cpu_s_per_1000_frames"],
        "realtime_publishers_behind_s": r["publishers_behind_s"],
        "realtime_frames_per_s": live_msgs / live_s if live_s > 0 else None,
        "realtime_disk_write_mb": r["disk_write_bytes"] / 1e6,
    }
