"""Reports from the store: budgets, bouts, alerts, collar health; actograms and trends.

Every report reads the store file read-only. Filters name animals and local days
(``--from``/``--to``, inclusive, in the site's days: ``site.timezone``, ``site.day_start_hour``);
an unknown animal or an impossible range is one clear error. Partial days are reported with
their coverage and the minutes that were seen: never scaled up to a full day.

Rows are plain dicts, so one table serves the terminal (rich), CSV and JSON.
Pictures (matplotlib, the optional ``plots`` extra):

- actogram: one row per day, time of day across, each bout drawn in its behaviour's colour,
  no-data left blank: a day's rhythm (milkings, feed deliveries, the night rest) shows at a
  glance, and so does a day that broke it;
- herd rumination trend: the herd's median daily rumination with its interquartile band, from
  days with enough coverage only, and how many animals each day counts.
"""

from __future__ import annotations

import csv
import io
import json
import math
import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any

from .alerts import TITLES, AlertBook, Rule
from .budgets import BudgetLedger, DailyBudget, DayClock
from .collarhealth import CollarHealth
from .config import Settings
from .errors import ConfigError, StoreError
from .store import STORE_FILE, Store
from .types import BEHAVIOURS, NO_DATA

__all__ = [
    "FORMATS",
    "PLOTS_HINT",
    "ReportSource",
    "actogram",
    "alert_rows",
    "bout_rows",
    "budget_rows",
    "collar_rows",
    "load_pyplot",
    "parse_day",
    "readiness_rows",
    "render",
    "rumination_trend",
    "trend_rows",
]

FORMATS = ("table", "csv", "json")
PLOTS_HINT = "plots need matplotlib: pip install 'boutline[plots]'"
# Colours of the behaviours in pictures (colour-blind safe palette, Okabe & Ito [M]).
COLOURS = {
    "grazing": "#009E73",
    "feeding": "#E69F00",
    "ruminating": "#0072B2",
    "resting": "#CC79A7",
    "walking": "#D55E00",
}
_OTHER_COLOUR = "#999999"
_MAX_DAYS = 3660  # ten years: a longer range is a typo


def parse_day(text: str, option: str) -> date:
    """An ISO day ``YYYY-MM-DD`` from an option, or a ConfigError saying what is wrong."""
    try:
        if len(text) != 10:
            raise ValueError
        return date.fromisoformat(text)
    except ValueError:
        raise ConfigError(f"{option} {text[:40]!r} is not a day; write YYYY-MM-DD") from None


@dataclass
class ReportSource:
    """A store file opened read-only, with the site's day clock."""

    store: Store
    conn: sqlite3.Connection
    clock: DayClock
    settings: Settings

    @classmethod
    def open(cls, settings: Settings, data_dir: Path | None = None) -> ReportSource:
        base = Path(data_dir).expanduser() if data_dir else settings.data_dir
        path = base / STORE_FILE if base.is_dir() or not base.suffix else base
        if not path.is_file():
            raise StoreError(
                f"no store at {path}; run the gateway (boutline run or boutline demo) first,"
                " or point --data-dir (or store.data_dir) at its data directory"
            )
        store = Store.open(path, readonly=True)
        try:
            conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        except sqlite3.Error as exc:
            store.close()
            raise StoreError(f"cannot read {path}: {exc}") from exc
        return cls(store, conn, DayClock.from_settings(settings.site), settings)

    def close(self) -> None:
        self.conn.close()
        self.store.close()

    def __enter__(self) -> ReportSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- what is there -------------------------------------------------------------------
    def has(self, table: str) -> bool:
        row = self.conn.execute(
            "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?", (table,)
        ).fetchone()
        return row is not None

    def animals(self) -> list[str]:
        names = {a for a, _, _ in self.store.animals()}
        if self.has("budget_cursor"):
            names.update(r[0] for r in self.conn.execute("SELECT animal FROM budget_cursor"))
        if self.has("collar_health"):
            names.update(
                r[0] for r in self.conn.execute("SELECT DISTINCT animal FROM collar_health") if r[0]
            )
        return sorted(names)

    def check_animals(self, wanted: Sequence[str] | None) -> list[str] | None:
        """``wanted`` if every name is known (None: every animal); else one clear error."""
        if not wanted:
            return None
        known = self.animals()
        unknown = [a for a in wanted if a not in set(known)]
        if unknown:
            shown = ", ".join(k[:40] for k in known[:8]) + (", ..." if len(known) > 8 else "")
            raise ConfigError(
                f"unknown animal {unknown[0][:40]!r}; this store knows {len(known)} animal(s)"
                + (f": {shown}" if known else " (none yet)")
            )
        return list(dict.fromkeys(wanted))

    def last_day(self) -> date:
        """The newest day with anything in it (budgets, bouts, alerts, collars), else today."""
        times = [seen for _, _, seen in self.store.animals()]  # small table, not the bouts
        for table, col in (("alerts", "updated_at"), ("collar_health", "updated_at")):
            if self.has(table):
                times += [r[0] for r in self.conn.execute(f"SELECT MAX({col}) FROM {table}")]
        days = [self.clock.day_of(float(t)) for t in times if t is not None]
        if self.has("budget_days"):
            row = self.conn.execute("SELECT MAX(day) FROM budget_days").fetchone()
            if row and row[0]:
                days.append(date.fromisoformat(row[0]))
        return max(days) if days else self.clock.day_of(datetime.now().timestamp())

    def day_range(
        self, first: str | None, last: str | None, default_days: int
    ) -> tuple[date, date]:
        """Inclusive local days from the options; defaults end at the newest day with data."""
        d1 = parse_day(last, "--to") if last else None
        d0 = parse_day(first, "--from") if first else None
        if d1 is None:
            d1 = max(self.last_day(), d0) if d0 else self.last_day()
        if d0 is None:
            d0 = d1 - timedelta(days=default_days - 1)
        if d0 > d1:
            raise ConfigError(f"--from {d0} is after --to {d1}; give --from on or before --to")
        if (d1 - d0).days >= _MAX_DAYS:
            raise ConfigError(f"--from {d0} to --to {d1} spans more than {_MAX_DAYS} days")
        return d0, d1

    def span(self, d0: date, d1: date) -> tuple[float, float]:
        """Unix seconds from the start of ``d0`` to the end of ``d1``."""
        return self.clock.bounds(d0)[0], self.clock.bounds(d1)[1]

    def local(self, t: float | None) -> str:
        if t is None or not math.isfinite(t):
            return ""
        return datetime.fromtimestamp(t, self.clock.zone).strftime("%Y-%m-%d %H:%M")


# ---------------------------------------------------------------------------------------
# rows


def _budgets(src: ReportSource, animals: list[str] | None, d0: date, d1: date) -> list[DailyBudget]:
    if not src.has("budget_days"):
        return []
    return BudgetLedger(src.clock).read(src.conn, animal=animals, day_from=d0, day_to=d1)


def budget_rows(
    src: ReportSource, animals: list[str] | None, d0: date, d1: date, *, detail: bool = False
) -> list[dict[str, Any]]:
    """One row per animal and day: minutes per behaviour as seen, no-data, coverage, status."""
    min_cov = src.settings.alerts.min_coverage
    rows = []
    for b in _budgets(src, animals, d0, d1):
        status = "final" if b.final else "open"
        if b.final and b.coverage < min_cov:
            status = "partial"
        row: dict[str, Any] = {"animal": b.animal, "day": b.day, "status": status}
        row["coverage_pct"] = round(100 * b.coverage, 1)
        for name in BEHAVIOURS:
            row[f"{name}_min"] = round(b.minutes.get(name, 0.0), 1)
        others = {k: v for k, v in b.minutes.items() if k not in BEHAVIOURS}
        if others:
            row["other_min"] = round(sum(others.values()), 1)
        row["no_data_min"] = round(b.no_data_min, 1)
        row["pending_min"] = round(b.pending_min, 1)
        row["day_min"] = round(b.length_min, 1)
        if detail:
            for name in BEHAVIOURS:
                row[f"{name}_bouts"] = b.bouts.get(name, 0)
                m = b.mean_bout_min.get(name)
                row[f"{name}_mean_bout_min"] = None if m is None else round(m, 1)
        rows.append(row)
    return rows


def bout_rows(
    src: ReportSource, animals: list[str] | None, d0: date, d1: date, *, no_data: bool = True
) -> list[dict[str, Any]]:
    """Closed bouts (and no-data stretches) overlapping the days, by animal then start."""
    t0, t1 = src.span(d0, d1)
    names: Iterable[str | None] = animals or [None]
    bouts = []
    for a in names:
        bouts += src.store.bouts(a, t0, t1)
        if no_data:
            bouts += src.store.no_data(a, t0, t1)
    bouts.sort(key=lambda b: (b.animal, b.start))
    return [
        {
            "animal": b.animal,
            "behaviour": b.behaviour,
            "start": src.local(b.start),
            "end": src.local(b.end),
            "duration_min": round(b.duration_s / 60.0, 2),
            "confidence": round(b.mean_confidence, 3) if b.behaviour != NO_DATA else None,
            "no_data_s": round(b.no_data_s, 1),
            "start_unix": b.start,
            "end_unix": b.end,
        }
        for b in bouts
    ]


def alert_rows(
    src: ReportSource, animals: list[str] | None, d0: date, d1: date
) -> list[dict[str, Any]]:
    """Alerts open at some point in the days, oldest first, with evidence and the caution."""
    if not src.has("alerts"):
        return []
    t0, t1 = src.span(d0, d1)
    out = []
    for a in AlertBook.read(src.conn, animal=animals, t0=t0, t1=t1):
        out.append(
            {
                "raised": src.local(a["raised_at"]),
                "animal": a["animal"],
                "collar": a["collar"],
                "rule": a["rule"],
                "title": a["title"],
                "status": a["status"],
                "cleared": src.local(a["cleared_at"]),
                "message": a["message"],
                "evidence": a["evidence"],
                "id": a["id"],
                "caution": a["caution"],
            }
        )
    return out


def readiness_rows(src: ReportSource, animals: list[str] | None) -> list[dict[str, Any]]:
    """Rules that could not judge an animal or collar at their last check, and why."""
    if not src.has("alert_readiness"):
        return []
    return [
        {
            "animal": r["animal"],
            "subject": r["subject"],
            "rule": r["rule"],
            "title": TITLES[Rule(r["rule"])],
            "why": r["reason"],
            "since": src.local(r["checked_at"]),
        }
        for r in AlertBook.readiness(src.conn, animal=animals)
    ]


def collar_rows(src: ReportSource, animals: list[str] | None) -> list[dict[str, Any]]:
    """Each collar's health as last saved by the gateway."""
    if not src.has("collar_health"):
        return []
    out = []
    for s in CollarHealth.read(src.conn, animal=animals):
        out.append(
            {
                "collar": s.collar_id,
                "animal": s.animal,
                "last_seen": src.local(s.last_seen),
                "silent_min": round(s.silent_s / 60.0, 1),
                "frame_rate_hz": round(s.frame_rate_hz, 3),
                "loss_pct": round(100 * s.loss, 2),
                "frames": s.frames,
                "lost": s.lost,
                "battery_v": s.battery_v,
                "roll_deg": None if s.roll_deg is None else round(s.roll_deg, 1),
                "saved": src.local(s.at),
            }
        )
    return out


def trend_rows(src: ReportSource, animals: list[str] | None, d0: date, d1: date) -> list[dict]:
    """Per day: the herd's rumination (median, quartiles) over days with enough coverage."""
    import numpy as np

    min_cov = src.settings.alerts.min_coverage
    per_day: dict[str, list[float]] = {}
    left_out: dict[str, int] = {}
    for b in _budgets(src, animals, d0, d1):
        if b.coverage >= min_cov:
            per_day.setdefault(b.day, []).append(b.minutes.get("ruminating", 0.0))
        else:
            left_out[b.day] = left_out.get(b.day, 0) + 1
    out = []
    for day in sorted(set(per_day) | set(left_out)):
        v = np.asarray(per_day.get(day, []))
        q = np.percentile(v, [25, 50, 75]) if v.size else [math.nan] * 3
        out.append(
            {
                "day": day,
                "animals": int(v.size),
                "left_out_low_coverage": left_out.get(day, 0),
                "rumination_q1_min": None if not v.size else round(float(q[0]), 1),
                "rumination_median_min": None if not v.size else round(float(q[1]), 1),
                "rumination_q3_min": None if not v.size else round(float(q[2]), 1),
            }
        )
    return out


# ---------------------------------------------------------------------------------------
# output


def render(rows: Sequence[dict[str, Any]], fmt: str, *, title: str = "", width: int = 160) -> str:
    """Rows as a terminal table, CSV or JSON text."""
    if fmt == "json":
        return json.dumps(list(rows), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    cols = list(dict.fromkeys(k for r in rows for k in r))
    if fmt == "csv":
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=cols, lineterminator="\n", extrasaction="ignore")
        w.writeheader()
        for r in rows:
            w.writerow({k: _cell(r.get(k), csv_mode=True) for k in cols})
        return buf.getvalue()
    if fmt != "table":
        raise ConfigError(f"--format {fmt!r}: allowed: {', '.join(FORMATS)}")
    from rich.console import Console
    from rich.table import Table

    table = Table(title=title or None, show_lines=False)
    for c in cols:
        table.add_column(c, overflow="fold")
    for r in rows:
        table.add_row(*(_cell(r.get(c)) for c in cols))
    out = io.StringIO()
    Console(file=out, width=width, no_color=True, highlight=False).print(table)
    return out.getvalue()


def _cell(v: Any, csv_mode: bool = False) -> str:
    if v is None:
        return ""
    if isinstance(v, dict | list):
        return json.dumps(v, sort_keys=True, separators=(",", ":"))
    return str(v)


# ---------------------------------------------------------------------------------------
# pictures


def load_pyplot() -> Any:
    try:
        import matplotlib
    except ImportError as exc:
        raise ConfigError(PLOTS_HINT) from exc
    matplotlib.use("Agg")  # files only; never a window
    import matplotlib.pyplot as plt

    return plt


def actogram(src: ReportSource, animal: str, d0: date, d1: date, out: Path) -> dict[str, Any]:
    """Draw one animal's actogram over the days into ``out`` (PNG); returns what it drew."""
    plt = load_pyplot()
    from matplotlib.patches import Patch

    days = [d0 + timedelta(days=i) for i in range((d1 - d0).days + 1)]
    budgets = {b.day: b for b in _budgets(src, [animal], d0, d1)}
    t0, t1 = src.span(d0, d1)
    bouts = src.store.bouts(animal, t0, t1)
    fig_h = 1.2 + 0.32 * len(days)
    fig, ax = plt.subplots(figsize=(11, fig_h))
    drawn = 0
    for row, d in enumerate(days):
        s, e = src.clock.bounds(d)
        length_h = (e - s) / 3600.0
        per: dict[str, list[tuple[float, float]]] = {}
        for b in bouts:
            a, z = max(b.start, s), min(b.end, e)
            if z > a:
                per.setdefault(b.behaviour, []).append(((a - s) / 3600.0, (z - a) / 3600.0))
        y = len(days) - 1 - row
        for beh, spans in per.items():
            ax.broken_barh(spans, (y + 0.1, 0.8), color=COLOURS.get(beh, _OTHER_COLOUR), lw=0)
            drawn += len(spans)
        ax.plot([length_h, length_h], [y + 0.1, y + 0.9], color="black", lw=0.5)
        b = budgets.get(d.isoformat())
        cov = f"{100 * b.coverage:.0f} %" if b else "no data"
        ax.text(24.3, y + 0.5, cov, va="center", fontsize=7)
    ax.set_yticks([len(days) - 1 - i + 0.5 for i in range(len(days))])
    ax.set_yticklabels([d.isoformat() for d in days], fontsize=7)
    hour0 = src.clock.day_start_hour
    ticks = list(range(0, 25, 3))
    ax.set_xticks(ticks)
    ax.set_xticklabels([f"{(hour0 + h) % 24:02d}" for h in ticks])
    ax.set_xlim(0, 25.5)
    ax.set_ylim(0, len(days))
    ax.set_xlabel(f"local time ({src.clock.timezone}); right: coverage of the day")
    ax.set_title(f"{animal}: behaviour over the day, one row per day (blank: no data)")
    fig.legend(
        handles=[Patch(color=c, label=b) for b, c in COLOURS.items()],
        loc="lower center",
        ncol=5,
        fontsize=7,
        frameon=False,
    )
    fig.tight_layout(rect=(0, 0.45 / fig_h, 1, 1))
    _save(fig, out)
    plt.close(fig)
    return {"animal": animal, "days": len(days), "bouts_drawn": drawn, "file": str(out)}


def rumination_trend(
    src: ReportSource, animals: list[str] | None, d0: date, d1: date, out: Path
) -> list[dict[str, Any]]:
    """Draw the herd's daily rumination (median and quartiles) into ``out`` (PNG)."""
    plt = load_pyplot()
    rows = trend_rows(src, animals, d0, d1)
    fig, (ax, axn) = plt.subplots(
        2, 1, figsize=(10, 5), sharex=True, gridspec_kw={"height_ratios": [3, 1]}
    )
    good = [r for r in rows if r["animals"]]
    x = [date.fromisoformat(r["day"]) for r in good]
    if good:
        ax.fill_between(
            x,
            [r["rumination_q1_min"] for r in good],
            [r["rumination_q3_min"] for r in good],
            color=COLOURS["ruminating"],
            alpha=0.25,
            label="middle half of the herd",
        )
        ax.plot(
            x,
            [r["rumination_median_min"] for r in good],
            color=COLOURS["ruminating"],
            marker="o",
            label="herd median",
        )
    ax.set_ylabel("rumination, min/day")
    ax.set_title(
        f"Herd rumination per day (days with >= {100 * src.settings.alerts.min_coverage:.0f} %"
        " coverage; minutes as seen)"
    )
    ax.legend(fontsize=8, frameon=False)
    xs = [date.fromisoformat(r["day"]) for r in rows]
    axn.bar(xs, [r["animals"] for r in rows], color="#555555", label="animals counted")
    axn.bar(
        xs,
        [r["left_out_low_coverage"] for r in rows],
        bottom=[r["animals"] for r in rows],
        color="#BBBBBB",
        label="left out: low coverage",
    )
    axn.set_ylabel("animals")
    top = max((r["animals"] + r["left_out_low_coverage"] for r in rows), default=1)
    axn.set_ylim(0, top * 1.6)
    axn.legend(fontsize=7, frameon=False, ncol=2, loc="upper left")
    fig.autofmt_xdate()
    fig.tight_layout()
    _save(fig, out)
    plt.close(fig)
    return rows


def _save(fig: Any, out: Path) -> None:
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(out, dpi=110, format="png")
    except OSError as exc:
        raise ConfigError(f"cannot write {out} ({exc.strerror}); check the path") from exc
