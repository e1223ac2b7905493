"""Own-baseline alerts: decision support for the farmer, never a diagnosis.

Each rule compares an animal (or its collar) with its own recent past and gives a
:class:`Finding`; :class:`AlertBook` turns findings into an alert lifecycle (raised, updated,
cleared) with hysteresis (a rule raises at one threshold and clears at a milder one) and at
most one open alert per rule and animal or collar, so a re-evaluation never duplicates one.

Rules (thresholds in ``[alerts]`` of the config; sources beside the defaults there):

- ``rumination_drop``: rumination in the last 24 fully accounted hours, per covered time,
  at least ``rumination_drop`` (25 %) below the median of the animal's previous
  ``baseline_days`` (7) full days with at least ``min_coverage`` classified, and at least
  ``rumination_min_z`` (2) of her own day-to-day spreads below it; or a slow decline: the
  mean of the last ``rumination_sustained_h`` (48) hours at least
  ``rumination_sustained_drop`` (12 %) below the mean of her 7 days before them and
  ``rumination_sustained_min_z`` (1.5) of her spread for a two-day mean below it. A drop of
  20-30 % against the cow's own 7-10 day baseline, or a z-score of 2-3, is the usual rule
  (FIELD.md, health signals); 12 % over two days is about 2 SDs for a cow whose daily
  rumination varies by 8 % (within-cow variation 5-10 %, from memory).
- ``activity_rise`` (possible heat): walking time in the last ``activity_window_h`` (8)
  hours at least ``activity_ratio`` (2.2x) the mean of the same clock hours on up to
  ``activity_baseline_days`` (14) previous days, at least ``activity_min_z`` (3) of her
  own spread for those hours above it, with walking in ``activity_min_active_h`` (7) of
  the hours; FIELD.md cites about 2.8-fold activity for 8-9 h in estrus (Lovendahl &
  Chagunda 2010). The earlier default (a 2-h window, 2x, ratio only) is
  ``activity_window_h = 2``, ``activity_ratio = 2``, ``activity_min_z = 0``,
  ``activity_min_active_h = 0``, ``activity_baseline_days = 7``.
- ``prolonged_inactivity``: no feeding, grazing or walking for ``inactive_h`` hours while the
  collar reports.
- ``collar_silent``: no frame for ``silent_min`` minutes.
- ``battery_low``: battery below ``battery_low_v`` (clears above ``battery_clear_v``).
- ``collar_rotated``: the collar's roll about the neck (roll = atan2(gy, gz), NXP AN3461)
  has stayed ``rotation_deg`` away from its baseline of the previous two days for every one
  of the last ``rotation_hold_h`` hours: the collar slipped or turned.

Time that is not accounted for yet (a bout still open) is never read as missing behaviour:
the behaviour rules look at whole hours up to where the animal's bouts have closed.
Without enough baseline (too few days, or too little coverage) a rule gives no alert and
says why (``readiness``), so the report can show it.
"""

from __future__ import annotations

import json
import math
import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import date, timedelta
from enum import StrEnum
from typing import Any

import numpy as np

from .analyticsdb import animal_clause, create_tables
from .budgets import ACTIVE_BEHAVIOURS, DAY_S, HOUR_COLUMNS, HOUR_S, BudgetLedger, DailyBudget
from .lineprotocol import SCHEMA, Point, register_converter
from .types import CAUTION, NO_DATA

__all__ = [
    "CAUTION",
    "Alert",
    "AlertBook",
    "AlertEngine",
    "Finding",
    "Rule",
    "TITLES",
]


class Rule(StrEnum):
    RUMINATION_DROP = "rumination_drop"
    ACTIVITY_RISE = "activity_rise"
    PROLONGED_INACTIVITY = "prolonged_inactivity"
    COLLAR_SILENT = "collar_silent"
    BATTERY_LOW = "battery_low"
    COLLAR_ROTATED = "collar_rotated"


TITLES = {
    Rule.RUMINATION_DROP: "Rumination down",
    Rule.ACTIVITY_RISE: "Activity up (possible heat)",
    Rule.PROLONGED_INACTIVITY: "Inactive for a long time",
    Rule.COLLAR_SILENT: "Collar silent",
    Rule.BATTERY_LOW: "Collar battery low",
    Rule.COLLAR_ROTATED: "Collar slipped or turned",
}
# How much worse a finding must get before an open alert is re-sent as "updated".
_UPDATE_STEP = {
    Rule.RUMINATION_DROP: 0.05,  # five points deeper
    Rule.ACTIVITY_RISE: 0.5,  # half a fold higher
    Rule.PROLONGED_INACTIVITY: 2.0,  # two more hours
    Rule.COLLAR_SILENT: 1.0,  # silent one more silent_min period
    Rule.BATTERY_LOW: 0.1,  # 0.1 V lower
    Rule.COLLAR_ROTATED: 10.0,  # ten more degrees
}
_COL = {c: i for i, c in enumerate(HOUR_COLUMNS)}
_CLASSIFIED = [i for c, i in _COL.items() if c != NO_DATA]


@dataclass(slots=True)
class Finding:
    """One rule's reading of one animal or collar at one instant."""

    rule: str
    subject: str  # the animal for behaviour rules, the collar for collar rules
    animal: str
    collar: str = ""
    ready: bool = True
    reason: str = ""  # why the rule cannot judge (not ready)
    raise_: bool = False  # at or past the raise threshold
    clear: bool = False  # back inside the clear threshold
    severity: float = 0.0  # bigger is worse; drives "updated"
    at: float = 0.0  # the instant the reading is for (end of its window)
    hold_s: float = 0.0  # the raise condition must hold this long before it raises
    message: str = ""  # what was seen, one sentence
    advice: str = ""  # what to do, added while the alert is open
    evidence: dict[str, Any] = field(default_factory=dict)


@dataclass(slots=True)
class Alert:
    """An alert transition (a fact for the sinks, the MQTT alert topic and reports)."""

    id: str
    rule: str
    animal: str
    collar: str
    status: str  # raised | updated | cleared
    raised_at: float
    at: float
    title: str
    message: str
    evidence: dict[str, Any]
    caution: str = CAUTION
    kind: str = field(default="alert", init=False)

    def to_json(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "rule": self.rule,
            "animal": self.animal,
            "collar": self.collar,
            "status": self.status,
            "raised_at": self.raised_at,
            "at": self.at,
            "title": self.title,
            "message": self.message,
            "evidence": self.evidence,
            "caution": self.caution,
        }


def _pct(x: float) -> str:
    return f"{100 * x:.0f} %"


# ---------------------------------------------------------------------------------------
# behaviour rules: pure functions of an animal's hourly bins and days


def rumination_finding(
    cfg: Any,
    animal: str,
    window_end: float,
    hours: np.ndarray,
    days: Sequence[DailyBudget],
) -> Finding:
    """Rumination in the last 24 h, and over the last ``rumination_sustained_h`` hours, vs
    her own days. ``hours``: rows of seconds per hour, the last ending at ``window_end``
    (24 rows at least; the sustained reading needs ``rumination_sustained_h`` of them).

    Two readings raise it: the last 24 h ``rumination_drop`` below the median of her days
    (and ``rumination_min_z`` of her own spread), or a slow decline, the mean of the last
    ``rumination_sustained_h`` hours ``rumination_sustained_drop`` below the mean of her
    days before them. An illness takes days to reach its full drop (FIELD.md: 20-40 %
    against her own recent days [M]); two days a little down say more than one day.
    """
    f = Finding(Rule.RUMINATION_DROP, animal, animal)
    day = _rumination_reading(cfg, hours[-24:], days, window_end)
    if isinstance(day, str):
        return _not_ready(f, day)
    value, cov, base_days, per_day = day
    baseline = float(np.median(per_day))
    drop = 1.0 - value / baseline if baseline > 0 else 0.0
    # spread of her own days, robust (MAD scaled to an SD), never below 5 % of the baseline
    sd = max(1.4826 * float(np.median(np.abs(np.asarray(per_day) - baseline))), 0.05 * baseline)
    z = (baseline - value) / sd if sd > 0 else 0.0
    day_raise = drop >= cfg.rumination_drop and z >= cfg.rumination_min_z
    f.evidence = {
        "value": round(value, 1),
        "baseline": round(baseline, 1),
        "unit": "min per 24 h of classified time",
        "drop": round(drop, 4),
        "z": round(z, 2),
        "threshold": cfg.rumination_drop,
        "min_z": cfg.rumination_min_z,
        "clear_below": cfg.rumination_clear,
        "coverage": round(cov, 4),
        "window_start": window_end - DAY_S,
        "window_end": window_end,
        "baseline_days": [b.day for b in base_days],
        "baseline_values": [round(v, 1) for v in per_day],
    }
    message = (
        f"{animal}: rumination {value:.0f} min in the last 24 h, {_pct(max(drop, 0))} below"
        f" her median of {baseline:.0f} min/day over {len(base_days)} recent days."
    )
    n_s = cfg.rumination_sustained_h
    slow_raise, slow_clear, slow_drop = False, True, 0.0
    slow = None
    if cfg.rumination_sustained_drop > 0 and hours.shape[0] >= n_s:
        slow = _rumination_reading(cfg, hours[-n_s:], days, window_end)
    if slow is not None and not isinstance(slow, str):
        s_value, s_cov, s_days, s_per_day = slow
        s_base = float(np.mean(s_per_day))  # the mean: steadier than a median of 7
        slow_drop = 1.0 - s_value / s_base if s_base > 0 else 0.0
        # her day-to-day SD (never below 5 % of the baseline), shrunk for a mean of days
        s_sd = max(float(np.std(s_per_day, ddof=1)), 0.05 * s_base) / math.sqrt(n_s / 24.0)
        s_z = (s_base - s_value) / s_sd if s_sd > 0 else 0.0
        slow_raise = (
            slow_drop >= cfg.rumination_sustained_drop and s_z >= cfg.rumination_sustained_min_z
        )
        slow_clear = slow_drop < cfg.rumination_sustained_clear
        f.evidence |= {
            "sustained_value": round(s_value, 1),
            "sustained_baseline": round(s_base, 1),
            "sustained_drop": round(slow_drop, 4),
            "sustained_z": round(s_z, 2),
            "sustained_h": n_s,
            "sustained_threshold": cfg.rumination_sustained_drop,
            "sustained_min_z": cfg.rumination_sustained_min_z,
            "sustained_clear_below": cfg.rumination_sustained_clear,
            "sustained_coverage": round(s_cov, 4),
            "sustained_window_start": window_end - n_s * HOUR_S,
            "sustained_baseline_days": [b.day for b in s_days],
        }
        if slow_raise and not day_raise:
            message = (
                f"{animal}: rumination {s_value:.0f} min/day over the last {n_s} h,"
                f" {_pct(max(slow_drop, 0))} below her mean of {s_base:.0f} min/day over"
                f" {len(s_days)} days before (last 24 h: {_pct(max(drop, 0))} below)."
            )
    elif cfg.rumination_sustained_drop > 0:
        f.evidence["sustained_not_judged"] = slow or f"fewer than {n_s} h known"
    f.raise_ = day_raise or slow_raise
    f.clear = drop < cfg.rumination_clear and slow_clear
    f.severity = max(drop, slow_drop)
    f.evidence["raised_by"] = [k for k, v in (("24 h", day_raise), (f"{n_s} h", slow_raise)) if v]
    f.at, f.hold_s = window_end, (cfg.rumination_hold_h - 1) * HOUR_S
    f.message = message
    f.advice = "Look at her feed intake and general condition."
    return f


def _rumination_reading(
    cfg: Any, hours: np.ndarray, days: Sequence[DailyBudget], window_end: float
) -> tuple[float, float, list[DailyBudget], list[float]] | str:
    """Rumination per 24 h of classified time in ``hours`` (ending at ``window_end``), its
    coverage, and her baseline days before the window with their values; or why not."""
    span_h = hours.shape[0]
    classified = float(hours[:, _CLASSIFIED].sum())
    cov = classified / (span_h * HOUR_S)
    if cov < cfg.min_coverage:
        return f"last {span_h} h only {_pct(cov)} classified, {_pct(cfg.min_coverage)} needed"
    value = float(hours[:, _COL["ruminating"]].sum()) / classified * 1440.0
    base_days = _baseline_days(cfg, days, window_end - span_h * HOUR_S)
    if len(base_days) < cfg.min_baseline_days:
        return (
            f"{len(base_days)} day(s) with >= {_pct(cfg.min_coverage)} coverage in the last"
            f" {cfg.lookback_days} days, {cfg.min_baseline_days} needed"
        )
    per_day = [b.minutes.get("ruminating", 0.0) / b.classified_min * 1440.0 for b in base_days]
    return value, cov, base_days, per_day


def _baseline_days(cfg: Any, days: Sequence[DailyBudget], before: float) -> list[DailyBudget]:
    """The latest ``baseline_days`` days ending by ``before`` with enough coverage."""
    first = before - cfg.lookback_days * DAY_S
    good = [
        b
        for b in days
        if b.end <= before + 1e-6 and b.start >= first - 1e-6 and b.coverage >= cfg.min_coverage
    ]
    good.sort(key=lambda b: b.start)
    return good[-cfg.baseline_days :]


# An hour with at least this much walking counts as an hour she was on her feet and moving.
_ACTIVE_HOUR_S = 60.0
# Her same-hours spread is taken from 5-14 values: never below 30 % of the baseline, so a
# cow with a few steady days is not read as certain (common practice, no source).
_ACTIVITY_SD_FLOOR = 0.3


def activity_finding(
    cfg: Any,
    animal: str,
    window_end: float,
    window: np.ndarray,
    earlier: Sequence[tuple[float, np.ndarray | None]],
) -> Finding:
    """Walking in ``window`` (rows = the last hours) vs the same hours on earlier days.

    ``earlier`` holds ``(window_end on that day, rows or None)`` for k = 1, 2, ... days back.
    Raised when walking is ``activity_ratio`` times her mean for these hours, at least
    ``activity_min_z`` of her own spread above it, and she walked in at least
    ``activity_min_active_h`` of the window's hours: heat is a rise that lasts (about
    2.8-fold for 8-9 h, Lovendahl & Chagunda 2010, FIELD.md), a chance walk is not.
    """
    f = Finding(Rule.ACTIVITY_RISE, animal, animal)
    n_h = window.shape[0]
    span = n_h * HOUR_S
    cov = float(window[:, _CLASSIFIED].sum()) / span
    if cov < cfg.min_coverage:
        return _not_ready(
            f, f"last {n_h} h only {_pct(cov)} classified, {_pct(cfg.min_coverage)} needed"
        )
    walk = window[:, _COL["walking"]]
    index = float(walk.sum()) / 60.0
    active_h = int((walk >= _ACTIVE_HOUR_S).sum())
    base: list[float] = []
    used: list[float] = []
    want = min(cfg.activity_baseline_days, cfg.lookback_days)
    for end_k, rows in earlier:
        if rows is None or float(rows[:, _CLASSIFIED].sum()) / span < cfg.min_coverage:
            continue
        base.append(float(rows[:, _COL["walking"]].sum()) / 60.0)
        used.append(end_k)
        if len(base) == want:
            break
    if len(base) < cfg.min_baseline_days:
        return _not_ready(
            f,
            f"the same {n_h} h had >= {_pct(cfg.min_coverage)} coverage on"
            f" {len(base)} earlier day(s), {cfg.min_baseline_days} needed",
        )
    baseline = float(np.mean(base))
    ref = max(baseline, cfg.activity_floor_min)
    ratio = index / ref
    sd = max(float(np.std(base, ddof=1)), _ACTIVITY_SD_FLOOR * ref)
    z = (index - ref) / sd
    f.raise_ = (
        ratio >= cfg.activity_ratio
        and z >= cfg.activity_min_z
        and active_h >= cfg.activity_min_active_h
    )
    f.clear = ratio < cfg.activity_clear_ratio
    f.severity = ratio
    f.at, f.hold_s = window_end, (cfg.activity_hold_h - 1) * HOUR_S
    f.evidence = {
        "value": round(index, 2),
        "baseline": round(baseline, 2),
        "unit": f"min walking per {n_h} h",
        "ratio": round(ratio, 3),
        "z": round(z, 2),
        "baseline_sd": round(sd, 2),
        "active_hours": active_h,
        "floor": cfg.activity_floor_min,
        "threshold": cfg.activity_ratio,
        "min_z": cfg.activity_min_z,
        "min_active_hours": cfg.activity_min_active_h,
        "clear_below": cfg.activity_clear_ratio,
        "coverage": round(cov, 4),
        "window_start": window_end - span,
        "window_end": window_end,
        "baseline_window_ends": used,
        "baseline_values": [round(v, 2) for v in base],
    }
    f.message = (
        f"{animal}: {index:.0f} min walking in the last {n_h} h (in {active_h} of those hours),"
        f" {ratio:.1f}x her usual {baseline:.1f} min for these hours."
    )
    f.advice = "Possible heat: watch her for signs of estrus."
    return f


def inactivity_finding(
    cfg: Any, animal: str, now: float, cursor: dict[str, Any] | None, silent: bool
) -> Finding:
    """Hours since the animal last fed, grazed or walked."""
    f = Finding(Rule.PROLONGED_INACTIVITY, animal, animal)
    if silent:
        return _not_ready(f, "the collar is silent")
    if cursor is None or cursor.get("inactive_since") is None:
        return _not_ready(f, "no closed bout yet")
    if cursor.get("state") == NO_DATA:
        return _not_ready(f, "no data at the moment")
    if cursor.get("state") in ACTIVE_BEHAVIOURS and (cursor.get("state_since") or 0) >= (
        cursor["inactive_since"] or 0
    ):
        stretch = 0.0
    else:
        stretch = max(now - float(cursor["inactive_since"]), 0.0) / HOUR_S
    f.raise_ = stretch >= cfg.inactive_h
    f.clear = stretch < cfg.inactive_h / 2
    f.severity = stretch
    f.at = now
    f.evidence = {
        "value": round(stretch, 2),
        "unit": "h without feeding, grazing or walking",
        "threshold": cfg.inactive_h,
        "since": cursor["inactive_since"],
        "state": cursor.get("state"),
    }
    f.message = f"{animal}: no feeding, grazing or walking for {stretch:.1f} h."
    f.advice = "Check on her: can she get up, does she eat?"
    return f


def _not_ready(f: Finding, reason: str) -> Finding:
    f.ready, f.reason = False, reason
    return f


# ---------------------------------------------------------------------------------------
# collar rules


def collar_findings(cfg: Any, status: Any, track: Any, now: float) -> list[Finding]:
    """Silent, battery and rotation findings of one collar (``CollarStatus`` + its track)."""
    c, a = status.collar_id, status.animal
    out = []
    silent_s = max(now - status.last_seen, 0.0)
    f = Finding(Rule.COLLAR_SILENT, c, a, c)
    f.raise_ = silent_s >= cfg.silent_min * 60.0
    f.clear = silent_s < cfg.silent_min * 30.0
    f.severity = silent_s / (cfg.silent_min * 60.0)
    f.evidence = {
        "value": round(silent_s / 60.0, 1),
        "unit": "min since the last frame",
        "threshold": cfg.silent_min,
        "last_seen": status.last_seen,
    }
    f.message = f"collar {c} ({a or 'no animal'}): no frame for {silent_s / 60:.0f} min."
    f.advice = "Check the collar is on the animal and within radio range."
    out.append(f)
    f = Finding(Rule.BATTERY_LOW, c, a, c)
    if status.battery_v is None:
        out.append(_not_ready(f, "the collar reports no battery voltage"))
    else:
        v = float(status.battery_v)
        f.raise_ = v < cfg.battery_low_v
        f.clear = v > cfg.battery_clear_v
        f.severity = cfg.battery_low_v - v
        f.evidence = {
            "value": v,
            "unit": "V",
            "threshold": cfg.battery_low_v,
            "clear_above": cfg.battery_clear_v,
            "at": status.battery_at,
        }
        f.message = f"collar {c} ({a or 'no animal'}): battery {v:.2f} V."
        f.advice = "Plan a battery change."
        out.append(f)
    out.append(rotation_finding(cfg, status, track, now))
    return out


# Baseline of the roll: the two days before the hold window; at least 12 hours with data.
_ROLL_BASE_H = 48
_ROLL_MIN_BASE_H = 12


def rotation_finding(cfg: Any, status: Any, track: Any, now: float) -> Finding:
    c, a = status.collar_id, status.animal
    f = Finding(Rule.COLLAR_ROTATED, c, a, c)
    h = int(now // HOUR_S)  # the hour in progress is not used
    hold = max(int(math.ceil(cfg.rotation_hold_h)), 1)
    base_hours = [k for k in range(h - hold - _ROLL_BASE_H, h - hold) if k in track.roll_hours]
    if len(base_hours) < _ROLL_MIN_BASE_H:
        return _not_ready(
            f, f"{len(base_hours)} h of orientation data in the baseline, {_ROLL_MIN_BASE_H} needed"
        )
    base = track.roll_deg(h - hold - _ROLL_BASE_H, h - hold)
    recent = [track.roll_deg(k, k + 1) for k in range(h - hold, h)]
    if base is None or any(r is None for r in recent):
        return _not_ready(f, f"orientation data missing in the last {hold} h")
    diffs = [_wrap(r - base) for r in recent]  # type: ignore[operator]
    least = min(abs(d) for d in diffs)
    now_roll = track.roll_deg(h - hold, h)
    total = abs(_wrap(now_roll - base)) if now_roll is not None else least
    f.raise_ = least >= cfg.rotation_deg
    f.clear = total < cfg.rotation_deg / 2
    f.severity = total
    f.evidence = {
        "value": round(now_roll, 1) if now_roll is not None else None,
        "baseline": round(base, 1),
        "unit": "degrees of roll about the neck",
        "change": round(total, 1),
        "least_hourly_change": round(least, 1),
        "threshold": cfg.rotation_deg,
        "hold_h": hold,
    }
    f.message = (
        f"collar {c} ({a or 'no animal'}): turned {total:.0f} degrees about the neck for"
        f" {hold} h or more."
    )
    f.advice = "Check its fit; behaviour may be misread until it is refitted."
    return f


def _wrap(d: float) -> float:
    return (d + 180.0) % 360.0 - 180.0


# ---------------------------------------------------------------------------------------
# lifecycle


_SCHEMA = """
CREATE TABLE IF NOT EXISTS alerts (
    id TEXT PRIMARY KEY,
    rule TEXT NOT NULL,
    subject TEXT NOT NULL,
    animal TEXT NOT NULL,
    collar TEXT NOT NULL,
    status TEXT NOT NULL,
    raised_at REAL NOT NULL,
    updated_at REAL NOT NULL,
    cleared_at REAL,
    severity REAL NOT NULL,
    title TEXT NOT NULL,
    message TEXT NOT NULL,
    evidence TEXT NOT NULL
);
CREATE UNIQUE INDEX IF NOT EXISTS alerts_open ON alerts (rule, subject) WHERE cleared_at IS NULL;
CREATE INDEX IF NOT EXISTS alerts_animal ON alerts (animal, raised_at);
CREATE TABLE IF NOT EXISTS alert_history (
    id TEXT NOT NULL,
    status TEXT NOT NULL,
    at REAL NOT NULL,
    message TEXT NOT NULL,
    evidence TEXT NOT NULL,
    PRIMARY KEY (id, at, status)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS alert_readiness (
    rule TEXT NOT NULL,
    subject TEXT NOT NULL,
    animal TEXT NOT NULL,
    ready INTEGER NOT NULL,
    reason TEXT NOT NULL,
    checked_at REAL NOT NULL,
    PRIMARY KEY (rule, subject)
) WITHOUT ROWID;
"""


@dataclass(slots=True)
class _Open:
    id: str
    raised_at: float
    severity: float  # as last sent


class AlertBook:
    """Open alerts and their lifecycle, kept in the store's database."""

    def __init__(self) -> None:
        self._open: dict[tuple[str, str], _Open] | None = None
        self._since: dict[tuple[str, str], float] = {}  # raise condition true since
        self._ready: dict[tuple[str, str], tuple[bool, str]] = {}  # as last written

    @staticmethod
    def ensure_schema(conn: sqlite3.Connection) -> None:
        create_tables(conn, _SCHEMA, "alert")

    def _load(self, conn: sqlite3.Connection) -> dict[tuple[str, str], _Open]:
        if self._open is None:
            self._open = {
                (r, s): _Open(i, ra, sev)
                for i, r, s, ra, sev in conn.execute(
                    "SELECT id, rule, subject, raised_at, severity FROM alerts"
                    " WHERE cleared_at IS NULL"
                )
            }
        return self._open

    def apply(
        self, conn: sqlite3.Connection, findings: Iterable[Finding], now: float
    ) -> list[Alert]:
        """Turn findings into transitions; write them; return the alerts to send."""
        open_ = self._load(conn)
        out: list[Alert] = []
        ready_rows = []
        for f in findings:
            key = (f.rule, f.subject)
            if self._ready.get(key) != (f.ready, f.reason):  # write changes only
                self._ready[key] = (f.ready, f.reason)
                ready_rows.append((f.rule, f.subject, f.animal, int(f.ready), f.reason, now))
            if not f.ready:
                continue  # cannot judge: an open alert stays as it is
            streak = self._since.setdefault if f.raise_ else self._since.pop
            since = streak(key, f.at)
            cur = open_.get(key)
            if cur is None:
                if f.raise_ and f.at - since >= f.hold_s - 1e-6:
                    aid = f"{f.rule}/{f.subject}/{int(now)}"
                    open_[key] = _Open(aid, now, f.severity)
                    out.append(self._write(conn, aid, f, "raised", now, now))
            elif f.clear:
                del open_[key]
                out.append(self._write(conn, cur.id, f, "cleared", cur.raised_at, now))
            elif f.severity >= cur.severity + _UPDATE_STEP[Rule(f.rule)]:
                cur.severity = f.severity
                out.append(self._write(conn, cur.id, f, "updated", cur.raised_at, now))
        conn.executemany(
            "INSERT OR REPLACE INTO alert_readiness VALUES (?, ?, ?, ?, ?, ?)", ready_rows
        )
        return out

    def _write(
        self, conn: sqlite3.Connection, aid: str, f: Finding, status: str, raised: float, now: float
    ) -> Alert:
        title = TITLES[Rule(f.rule)]
        if status == "cleared":
            message = f"{title}: cleared. {f.message}"
        else:
            message = f"{f.message} {f.advice}".strip()
        ev = json.dumps(f.evidence, sort_keys=True, allow_nan=False, default=_json_default)
        if status == "raised":
            conn.execute(
                "INSERT INTO alerts VALUES (?, ?, ?, ?, ?, ?, ?, ?, NULL, ?, ?, ?, ?)",
                (
                    aid,
                    f.rule,
                    f.subject,
                    f.animal,
                    f.collar,
                    status,
                    raised,
                    now,
                    f.severity,
                    title,
                    message,
                    ev,
                ),
            )
        else:
            conn.execute(
                "UPDATE alerts SET status = ?, updated_at = ?, severity = ?, message = ?,"
                " evidence = ?, cleared_at = CASE WHEN ? = 'cleared' THEN ? END WHERE id = ?",
                (status, now, f.severity, message, ev, status, now, aid),
            )
        conn.execute(
            "INSERT OR REPLACE INTO alert_history VALUES (?, ?, ?, ?, ?)",
            (aid, status, now, message, ev),
        )
        return Alert(
            aid, f.rule, f.animal, f.collar, status, raised, now, title, message, f.evidence
        )

    @staticmethod
    def read(
        conn: sqlite3.Connection,
        *,
        animal: str | Iterable[str] | None = None,
        t0: float | None = None,
        t1: float | None = None,
        open_only: bool = False,
    ) -> list[dict[str, Any]]:
        """Alerts (one row each, latest state) overlapping ``[t0, t1)``, oldest first."""
        conds, args = [], []
        if animal is not None:
            cond, names = animal_clause("animal", animal)
            conds.append(cond)
            args += names
        if t1 is not None:
            conds.append("raised_at < ?")
            args.append(t1)
        if t0 is not None:
            conds.append("(cleared_at IS NULL OR cleared_at >= ?)")
            args.append(t0)
        if open_only:
            conds.append("cleared_at IS NULL")
        where = (" WHERE " + " AND ".join(conds)) if conds else ""
        cols = (
            "id",
            "rule",
            "animal",
            "collar",
            "status",
            "raised_at",
            "updated_at",
            "cleared_at",
            "title",
            "message",
            "evidence",
        )
        rows = conn.execute(
            f"SELECT {', '.join(cols)} FROM alerts{where} ORDER BY raised_at, id", args
        ).fetchall()
        out = []
        for r in rows:
            d = dict(zip(cols, r, strict=True))
            d["evidence"] = json.loads(d["evidence"])
            d["caution"] = CAUTION
            out.append(d)
        return out

    @staticmethod
    def readiness(
        conn: sqlite3.Connection, *, animal: str | Iterable[str] | None = None
    ) -> list[dict[str, Any]]:
        """Rules that could not judge at their last check, with the reason and since when."""
        sql = (
            "SELECT rule, subject, animal, reason, checked_at FROM alert_readiness WHERE ready = 0"
        )
        args: list[Any] = []
        if animal is not None:
            cond, args = animal_clause("animal", animal)
            sql += f" AND {cond}"
        keys = ("rule", "subject", "animal", "reason", "checked_at")
        return [dict(zip(keys, r, strict=True)) for r in conn.execute(sql + " ORDER BY 3, 1", args)]


def _json_default(o: Any) -> Any:
    if isinstance(o, np.generic):
        return o.item()
    raise TypeError(f"not JSON: {type(o).__name__}")


# ---------------------------------------------------------------------------------------
# the engine


class _HourCache:
    """Each animal's recent hourly bins in memory, refreshed from the store incrementally.

    Bins below the hour of the animal's cursor never change again (events arrive in time
    order), so a refresh reads only the hours from the cursor's hour at the last read on.
    """

    def __init__(self, n_hours: int) -> None:
        self.n = n_hours
        self._rings: dict[str, tuple[np.ndarray, np.ndarray, list[int]]] = {}

    def get(
        self,
        conn: sqlite3.Connection,
        ledger: BudgetLedger,
        animal: str,
        h_from: int,
        h_to: int,
        through: float,
    ) -> np.ndarray:
        """Seconds per column for hours ``[h_from, h_to)`` (zeros where nothing is known)."""
        entry = self._rings.get(animal)
        if entry is None:
            entry = (
                np.zeros((self.n, len(HOUR_COLUMNS))),
                np.full(self.n, -1, dtype=np.int64),
                [h_from],
            )
            self._rings[animal] = entry
        ring, tags, nxt = entry
        for row in ledger.hour_rows(conn, animal, max(nxt[0], h_to - self.n)):
            slot = row[0] % self.n
            ring[slot] = row[1:]
            tags[slot] = row[0]
        nxt[0] = int(through // HOUR_S)
        hs = np.arange(h_from, h_to)
        slots = hs % self.n
        ok = tags[slots] == hs
        return np.where(ok[:, None], ring[slots], 0.0)


class AlertEngine:
    """Runs every rule over every animal and collar; the daemon calls ``evaluate`` on a timer.

    Behaviour rules are judged on whole hours, so they run once per new hour; collar rules
    run on every call.
    """

    def __init__(self, cfg: Any, ledger: BudgetLedger) -> None:
        self.cfg = cfg
        self.ledger = ledger
        self.book = AlertBook()
        self._last_end: dict[str, float] = {}
        self._days: dict[str, tuple[str, list[DailyBudget]]] = {}
        self._times: dict[float, list[float]] = {}
        self._hours = _HourCache(
            max((cfg.lookback_days + 2) * 24 + cfg.activity_window_h, cfg.rumination_sustained_h)
            + 2
        )

    def ensure_schema(self, conn: sqlite3.Connection) -> None:
        self.book.ensure_schema(conn)

    def forget(self) -> None:
        """Drop what is held in memory (after a rolled-back write): re-read from the store."""
        self.book = AlertBook()
        self._last_end.clear()
        self._days.clear()

    def evaluate(
        self, conn: sqlite3.Connection, now: float, collars: Any | None = None
    ) -> list[Alert]:
        """Evaluate due rules at ``now``; write and return alert transitions."""
        if not self.cfg.enabled:
            return []
        findings: list[Finding] = []
        silent_animals: set[str] = set()
        if collars is not None:
            for st in collars.snapshot(now):
                cf = collar_findings(self.cfg, st, collars.tracks[st.collar_id], now)
                findings.extend(cf)
                if cf[0].raise_ and st.animal:
                    silent_animals.add(st.animal)
        for animal in self.ledger.animals(conn):
            findings.extend(self.animal_findings(conn, animal, now, animal in silent_animals))
        return self.book.apply(conn, findings, now)

    def animal_findings(
        self, conn: sqlite3.Connection, animal: str, now: float, silent: bool = False
    ) -> list[Finding]:
        cur = self.ledger.cursor(conn, animal)
        out = [inactivity_finding(self.cfg, animal, now, cur, silent)]
        if cur is None or cur.get("through") is None:
            return out
        end = math.floor(min(now, cur["through"]) / HOUR_S) * HOUR_S
        if self._last_end.get(animal) == end:
            return out  # no new whole hour since the last look
        self._last_end[animal] = end
        n_w = self.cfg.activity_window_h
        # one read covers the last 24 h and the same hours on every lookback day
        h_end = int(end // HOUR_S)
        h0 = (
            h_end
            - max((self.cfg.lookback_days + 1) * 24 + n_w, self.cfg.rumination_sustained_h)
            - 1
        )
        big = self._hours.get(conn, self.ledger, animal, h0, h_end, cur["through"])
        days = self._recent_days(conn, animal, end - DAY_S)
        n_r = max(24, self.cfg.rumination_sustained_h)
        out.append(rumination_finding(self.cfg, animal, end, big[-n_r:], days))
        earlier: list[tuple[float, np.ndarray | None]] = []
        for e_k in self._same_times(end):
            i = int(e_k // HOUR_S) - h0
            rows = big[i - n_w : i] if i - n_w >= 0 else None
            earlier.append((e_k, rows if rows is not None and rows.any() else None))
        out.append(activity_finding(self.cfg, animal, end, big[-n_w:], earlier))
        return out

    def _same_times(self, end: float) -> list[float]:
        """Window ends at the same local clock time 1..lookback days before ``end``."""
        hit = self._times.get(end)
        if hit is None:
            clock = self.ledger.clock
            hit = [
                math.floor(clock.same_time_days_before(end, k) / HOUR_S) * HOUR_S
                for k in range(1, self.cfg.lookback_days + 1)
            ]
            if len(self._times) > 64:
                self._times.clear()
            self._times[end] = hit
        return hit

    def _recent_days(
        self, conn: sqlite3.Connection, animal: str, before: float
    ) -> list[DailyBudget]:
        clock = self.ledger.clock
        last = clock.day_of(before) - timedelta(days=1)
        key = last.isoformat()
        hit = self._days.get(animal)
        if hit is None or hit[0] != key:
            first: date = last - timedelta(days=self.cfg.lookback_days)
            days = self.ledger.read(conn, animal=animal, day_from=first, day_to=last)
            self._days[animal] = hit = (key, days)
        return hit[1]


# ---------------------------------------------------------------------------------------
# line protocol: the ``alert`` measurement (docs/line-protocol.md)

# Rules judged against a fixed limit, not a baseline: their "baseline" field is that limit.
_LIMIT_RULES = {
    Rule.PROLONGED_INACTIVITY,
    Rule.COLLAR_SILENT,
    Rule.BATTERY_LOW,
}


def _alert_points(fact: dict[str, Any], site: str) -> list[Point]:
    """An Alert fact as one ``alert`` point, keyed by when it was raised.

    Its later transitions (updated, cleared) overwrite the same point, so InfluxDB holds
    each alert once, in its latest state; the state leads the message.
    """
    ev, rule = fact.get("evidence") or {}, Rule(fact["rule"])
    value = float(ev.get("value") or 0.0)
    if rule in _LIMIT_RULES:
        baseline = float(ev["threshold"])
    elif rule is Rule.COLLAR_ROTATED:
        value, baseline = float(ev.get("change", 0.0)), float(ev["threshold"])
    else:
        baseline = float(ev["baseline"])
    change = (value - baseline) / baseline * 100.0 if baseline else 0.0
    # signed like the change: rumination's z counts below the baseline, activity's above it
    z = float(ev["z"]) if "z" in ev else None
    score = None if z is None else (z if rule is Rule.ACTIVITY_RISE else -z)
    fields = {
        "value": value,
        "baseline": baseline,
        "change_pct": change,
        "score": score,
        "message": f"{fact['status']}: {fact['message']} {fact.get('caution') or CAUTION}",
    }
    tags = {"site": site, "animal": fact["animal"] or fact["collar"], "rule": fact["rule"]}
    return [SCHEMA["alert"].point(fact["raised_at"], tags, fields)]


register_converter("alert", _alert_points)
