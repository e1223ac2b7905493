"""Own-baseline alerts: each rule, not-ready reasons, lifecycle with hysteresis, no duplicates.

The animal here is regular on purpose (the same hour, every hour), so every number the rules
see can be worked out by hand; tests/test_alerts_validation.py drives them with the simulator.
"""

from __future__ import annotations

import json
import math
import sqlite3

import pytest

from gateway.alerts import CAUTION, AlertBook, AlertEngine, Rule
from gateway.budgets import BudgetLedger, DayClock
from gateway.collarhealth import CollarHealth
from gateway.config import AlertsSettings
from gateway.lineprotocol import points_for
from gateway.outbox import fact_of
from gateway.sink_mqtt import Topics, messages_for
from gateway.types import NO_DATA, BoutClosed, CollarGravity, Frame, StateChanged

H = 3600.0
DAY = 86400.0
T0 = 1772323200.0  # 2026-03-01T00:00Z
# The rules as first specified: the 24-h rumination reading alone, held 3 h; walking in a
# 2-h window against 2x the mean of the same hours on 7 days, the ratio alone.
FIRST_RULES = {
    "rumination_hold_h": 3,
    "rumination_sustained_drop": 0.0,
    "activity_window_h": 2,
    "activity_ratio": 2.0,
    "activity_min_z": 0.0,
    "activity_min_active_h": 0,
    "activity_baseline_days": 7,
}


def hour(animal: str, h0: float, rum_min: float = 20.0, walk_min: float = 3.0) -> list[BoutClosed]:
    """One hour: ruminating, resting, 2 min at the trough, then walking."""
    a = h0 + rum_min * 60
    c = h0 + H - walk_min * 60
    b = c - 120.0
    out = [BoutClosed(animal, "ruminating", h0, a, 0.9)] if rum_min else []
    out += [
        BoutClosed(animal, "resting", a, b, 0.9),
        BoutClosed(animal, "feeding", b, c, 0.9),
        BoutClosed(animal, "walking", c, h0 + H, 0.9),
    ]
    return out


class Farm:
    """A ledger and engine on an in-memory database, fed hour by hour."""

    def __init__(self, **cfg) -> None:
        self.conn = sqlite3.connect(":memory:")
        self.cfg = AlertsSettings(**cfg)
        self.ledger = BudgetLedger(DayClock("UTC"))
        self.ledger.ensure_schema(self.conn)
        self.engine = AlertEngine(self.cfg, self.ledger)
        self.engine.ensure_schema(self.conn)
        self.t = T0
        self.alerts: list = []

    def run_hours(self, n: int, collars: CollarHealth | None = None, **kw) -> list:
        new = []
        for _ in range(n):
            self.ledger.listener(self.conn, hour("cow-1", self.t, **kw))
            self.t += H
            self.ledger.finalize(self.conn, self.t)
            new += self.engine.evaluate(self.conn, self.t, collars)
        self.alerts += new
        return new

    def readiness(self) -> dict[str, str]:
        return {r["rule"]: r["reason"] for r in AlertBook.readiness(self.conn)}


def test_no_alert_without_baseline_and_the_reason_is_kept() -> None:
    farm = Farm()
    assert farm.run_hours(4 * 24, rum_min=5.0) == []  # a big drop, but only 3 days known
    why = farm.readiness()
    assert "3 day(s) with >= 80 % coverage" in why[Rule.RUMINATION_DROP]
    assert "5 needed" in why[Rule.RUMINATION_DROP]
    assert "earlier day(s), 5 needed" in why[Rule.ACTIVITY_RISE]


def test_rumination_drop_raises_after_the_hold_updates_then_clears() -> None:
    farm = Farm(**FIRST_RULES)
    assert farm.run_hours(8 * 24) == []  # 480 min/day, every day the same
    assert farm.readiness().get(Rule.RUMINATION_DROP) is None
    new = farm.run_hours(24, rum_min=10.0)  # rumination halves
    raised = [a for a in new if a.rule == Rule.RUMINATION_DROP]
    # the drop grows by 10/480 an hour: raised at 29 %, re-sent each time 5 points deeper
    assert [a.status for a in raised] == ["raised", "updated", "updated", "updated"]
    assert [round(a.evidence["drop"], 3) for a in raised] == [0.292, 0.354, 0.417, 0.479]
    first = raised[0]
    ev = first.evidence
    # 25 % is reached after 12 hours at half the rumination; held for 3 evaluations (hold)
    assert ev["baseline"] == 480.0 and ev["drop"] >= 0.25
    assert first.at - T0 == 8 * DAY + 14 * H  # 12 h to reach 25 %, held over 3 evaluations
    assert ev["window_end"] - ev["window_start"] == DAY
    assert len(ev["baseline_days"]) == 7 and ev["coverage"] == 1.0
    assert first.caution == CAUTION and "veterinarian" in first.caution
    assert "below her median of 480 min/day" in first.message
    assert all(a.id == first.id for a in raised)  # one alert, no duplicates
    # recovery: back to 20 min/h; clears once the 24 h window is within 15 % again
    later = [a for a in farm.run_hours(24) if a.rule == Rule.RUMINATION_DROP]
    assert [a.status for a in later] == ["cleared"]
    assert later[0].evidence["drop"] < 0.15 and later[0].message.startswith(
        "Rumination down: cleared"
    )
    (row,) = AlertBook.read(farm.conn, animal="cow-1")
    assert row["status"] == "cleared" and row["cleared_at"] == later[0].at


def test_hysteresis_keeps_a_wavering_alert_open() -> None:
    farm = Farm(rumination_hold_h=1)
    farm.run_hours(8 * 24)
    farm.run_hours(24, rum_min=10.0)
    # hovering between the clear (15 %) and raise (25 %) thresholds: no clear, no new raise
    new = [a for a in farm.run_hours(48, rum_min=16.0) if a.rule == Rule.RUMINATION_DROP]
    assert [a.status for a in new] == []


def test_a_slow_decline_raises_on_the_two_day_mean() -> None:
    # 15 % less rumination for days: never 25 % in one day, but two days 15 % down say more
    # (illness: a drop of 20-40 % reached over days, FIELD.md [M])
    raised = {}
    for name, cfg in (("default", {}), ("first", FIRST_RULES)):
        farm = Farm(**cfg)
        farm.run_hours(8 * 24)
        new = [a for a in farm.run_hours(60, rum_min=17.0) if a.rule == Rule.RUMINATION_DROP]
        raised[name] = [a for a in new if a.status == "raised"]
    assert raised["first"] == []  # the 24-h reading alone never sees it
    (a,) = raised["default"]
    ev = a.evidence
    assert ev["raised_by"] == ["48 h"] and ev["drop"] < 0.25
    # 0.15 x 39/48 first reaches 12 % after 39 h at 17 min/h; held for 6 evaluations
    assert a.at - T0 == 8 * DAY + 44 * H
    assert ev["sustained_drop"] == pytest.approx(0.15 * 44 / 48, abs=1e-3)
    assert ev["sustained_baseline"] == 480.0 and len(ev["sustained_baseline_days"]) == 7
    assert ev["sustained_z"] >= 1.5 and ev["sustained_window_start"] == a.at - 48 * H
    assert "over the last 48 h" in a.message and "below her mean of 480 min/day" in a.message


def test_a_slow_decline_clears_once_both_readings_are_back() -> None:
    farm = Farm()
    farm.run_hours(8 * 24)
    farm.run_hours(60, rum_min=17.0)
    later = [a for a in farm.run_hours(48) if a.rule == Rule.RUMINATION_DROP]
    assert [a.status for a in later] == ["cleared"]
    ev = later[0].evidence
    assert ev["sustained_drop"] < 0.06 and ev["drop"] < 0.15


def test_first_rule_activity_rise_possible_heat() -> None:
    # estrus: activity ~2.8-fold for 8-9 h (Lovendahl & Chagunda 2010, FIELD.md)
    farm = Farm(**FIRST_RULES)
    farm.run_hours(8 * 24)
    new = [a for a in farm.run_hours(9, walk_min=8.4) if a.rule == Rule.ACTIVITY_RISE]
    assert [a.status for a in new][:1] == ["raised"]
    ev = new[0].evidence
    assert ev["baseline"] == 6.0 and ev["value"] == pytest.approx(16.8)
    assert ev["ratio"] == pytest.approx(2.8) and ev["unit"] == "min walking per 2 h"
    assert new[0].at - T0 == 8 * DAY + 3 * H  # the 2-h window full of it, held for 2 h
    assert "Possible heat" in new[0].message
    after = [a for a in farm.run_hours(6) if a.rule == Rule.ACTIVITY_RISE]
    assert [a.status for a in after] == ["cleared"]


def test_heat_is_a_rise_that_lasts() -> None:
    # estrus: activity ~2.8-fold for 8-9 h (Lovendahl & Chagunda 2010, FIELD.md)
    farm = Farm()
    farm.run_hours(8 * 24 + 12)  # 3 min walking every hour: 24 min per 8 h
    new = [a for a in farm.run_hours(9, walk_min=8.4) if a.rule == Rule.ACTIVITY_RISE]
    assert [a.status for a in new][:1] == ["raised"]
    a = new[0]
    ev = a.evidence
    # 2.2x is passed after 6 h of it ((6 x 8.4 + 2 x 3) / 24 = 2.35), held for 2 evaluations
    assert a.at - T0 == 8 * DAY + 19 * H
    assert ev["unit"] == "min walking per 8 h" and ev["baseline"] == 24.0
    assert ev["value"] == pytest.approx(7 * 8.4 + 3.0)
    assert ev["ratio"] == pytest.approx(61.8 / 24.0, abs=1e-3)
    # her same hours never varied: the spread counts as 30 % of the baseline
    assert ev["baseline_sd"] == pytest.approx(7.2) and ev["z"] == pytest.approx(
        37.8 / 7.2, abs=0.01
    )
    assert ev["active_hours"] == 8 and len(ev["baseline_values"]) == 8
    assert "Possible heat" in a.message and "in 8 of those hours" in a.message
    (p,) = points_for(fact_of(a), "farm")
    assert p.fields["score"] == pytest.approx(ev["z"])  # above her usual: positive
    after = [a for a in farm.run_hours(8) if a.rule == Rule.ACTIVITY_RISE]
    assert [a.status for a in after] == ["cleared"]


def test_a_short_burst_of_walking_is_not_heat() -> None:
    for cfg, expect in (({}, []), (FIRST_RULES, ["raised"])):
        farm = Farm(**cfg)
        farm.run_hours(8 * 24)
        farm.run_hours(3, walk_min=8.4)  # 2.8-fold, but for 3 h only
        farm.run_hours(8)
        got = [a.status for a in farm.alerts if a.rule == Rule.ACTIVITY_RISE]
        assert got[:1] == expect, cfg


def test_walking_crowded_into_a_few_hours_is_not_heat() -> None:
    farm = Farm()
    farm.run_hours(8 * 24)
    for _ in range(3):  # 20 min in every other hour, then nothing
        farm.run_hours(1, walk_min=20.0)
        farm.run_hours(1, walk_min=0.0)
    farm.run_hours(2, walk_min=0.0)
    farm.engine._last_end.clear()  # read the last 8 h once more, as findings
    found = farm.engine.animal_findings(farm.conn, "cow-1", farm.t)
    assert [a for a in farm.alerts if a.rule == Rule.ACTIVITY_RISE] == []
    (act,) = [f for f in found if f.rule == Rule.ACTIVITY_RISE]
    # 60 min in 8 h is 2.5x her usual 24, but she walked in 3 of those hours only
    assert act.evidence["value"] == pytest.approx(60.0) and act.evidence["active_hours"] == 3
    assert not act.raise_


def test_the_activity_floor_stops_tiny_baselines_from_firing() -> None:
    farm = Farm(**FIRST_RULES)
    farm.run_hours(8 * 24, walk_min=0.5)  # 1 min walking per 2 h
    new = [a for a in farm.run_hours(6, walk_min=2.0) if a.rule == Rule.ACTIVITY_RISE]
    assert new == []  # 4x, but 4 min against a floor of 5 min per window


def test_low_coverage_is_not_judged() -> None:
    farm = Farm()
    farm.run_hours(8 * 24)
    for _ in range(24):  # half of every hour missing, and no rumination in the rest
        farm.ledger.listener(
            farm.conn,
            [
                BoutClosed("cow-1", "resting", farm.t, farm.t + 30 * 60, 0.9),
                BoutClosed("cow-1", NO_DATA, farm.t + 30 * 60, farm.t + H, 0.0),
            ],
        )
        farm.t += H
        farm.engine.evaluate(farm.conn, farm.t)
    why = farm.readiness()
    assert why[Rule.RUMINATION_DROP] == "last 24 h only 50 % classified, 80 % needed"
    # the drop never reached 25 % of the covered time before coverage fell under 80 %
    assert AlertBook.read(farm.conn) == []


def test_open_bouts_are_not_taken_for_missing_rumination() -> None:
    farm = Farm()
    farm.run_hours(8 * 24)
    # a long bout is still open: its hours are not accounted yet and must not count as 0
    farm.t += 5 * H
    assert farm.engine.evaluate(farm.conn, farm.t) == []
    assert farm.readiness().get(Rule.RUMINATION_DROP) is None


def test_prolonged_inactivity_and_collar_silence_exclude_each_other() -> None:
    farm = Farm()
    farm.run_hours(24)
    conn, t = farm.conn, farm.t
    farm.ledger.listener(conn, [StateChanged("cow-1", "resting", t, 0.9)])
    assert farm.engine.evaluate(conn, t + 11 * H) == []
    (a,) = farm.engine.evaluate(conn, t + 12 * H + 60)
    assert (a.rule, a.status) == (Rule.PROLONGED_INACTIVITY, "raised")
    assert a.evidence["since"] == t and a.evidence["value"] == pytest.approx(12.02, abs=0.01)
    farm.ledger.listener(conn, [BoutClosed("cow-1", "resting", t, t + 13 * H, 0.9),
                                StateChanged("cow-1", "walking", t + 13 * H, 0.9)])  # fmt: skip
    (c,) = farm.engine.evaluate(conn, t + 13 * H + 60)
    assert (c.rule, c.status) == (Rule.PROLONGED_INACTIVITY, "cleared")


def collar_frames(ch: CollarHealth, t0: float, t1: float, battery: float = 4.0) -> None:
    seq = int(t0)
    for t in range(int(t0), int(t1), 60):
        ch.update(Frame("C1", seq, float(t), 10.0, _ACC, battery, float(t)), animal="cow-1")
        seq += 60  # one frame a minute is kept here; the others count as lost, which is fine


_ACC = __import__("numpy").zeros((10, 3), "float32")


def test_collar_silent_and_battery_low_with_hysteresis() -> None:
    farm = Farm()
    ch = CollarHealth()
    collar_frames(ch, T0, T0 + H, battery=3.55)
    assert farm.engine.evaluate(farm.conn, T0 + H, ch) == []
    silent = farm.engine.evaluate(farm.conn, T0 + 2 * H + 60, ch)
    assert [(a.rule, a.status, a.collar) for a in silent] == [(Rule.COLLAR_SILENT, "raised", "C1")]
    assert silent[0].animal == "cow-1" and silent[0].evidence["threshold"] == 60.0
    collar_frames(ch, T0 + 3 * H, T0 + 3 * H + 120, battery=3.45)
    got = farm.engine.evaluate(farm.conn, T0 + 3 * H + 120, ch)
    assert sorted((a.rule, a.status) for a in got) == [
        (Rule.BATTERY_LOW, "raised"),
        (Rule.COLLAR_SILENT, "cleared"),
    ]
    collar_frames(ch, T0 + 4 * H, T0 + 4 * H + 60, battery=3.55)  # above 3.5, below 3.6
    assert farm.engine.evaluate(farm.conn, T0 + 4 * H + 60, ch) == []
    collar_frames(ch, T0 + 5 * H, T0 + 5 * H + 60, battery=4.1)  # a new battery
    (a,) = farm.engine.evaluate(farm.conn, T0 + 5 * H + 60, ch)
    assert (a.rule, a.status) == (Rule.BATTERY_LOW, "cleared")


def gravity_at(roll_deg: float, pitch_deg: float) -> tuple[float, float, float]:
    # gravity seen through head pitch and collar roll (NXP AN3461 conventions, FIELD.md)
    p, r = math.radians(pitch_deg), math.radians(roll_deg)
    return (-math.sin(p), math.cos(p) * math.sin(r), math.cos(p) * math.cos(r))


def test_collar_rotated_needs_a_lasting_change() -> None:
    farm = Farm()
    ch = CollarHealth()

    def hours(h0: int, n: int, roll: float) -> None:
        for h in range(h0, h0 + n):
            for k, pitch in enumerate((60.0, 2.0, -8.0, 38.0)):  # grazing, ruminating, lying
                t = T0 + h * H + 900 * k
                ch.add_gravity(CollarGravity("C1", "cow-1", t, 5.0, gravity_at(roll, pitch)))
            collar_frames(ch, T0 + h * H, T0 + (h + 1) * H)

    hours(0, 48, 10.0)
    assert farm.engine.evaluate(farm.conn, T0 + 48 * H, ch) == []
    hours(48, 1, 70.0)  # one odd hour is not a slip
    hours(49, 1, 10.0)
    assert farm.engine.evaluate(farm.conn, T0 + 50 * H, ch) == []
    hours(50, 3, 70.0)
    got = [
        a for a in farm.engine.evaluate(farm.conn, T0 + 53 * H, ch) if a.rule == Rule.COLLAR_ROTATED
    ]
    assert [a.status for a in got] == ["raised"]
    assert got[0].evidence["change"] == pytest.approx(60.0, abs=3.0)
    hours(53, 3, 12.0)  # refitted
    got = [
        a for a in farm.engine.evaluate(farm.conn, T0 + 56 * H, ch) if a.rule == Rule.COLLAR_ROTATED
    ]
    assert [a.status for a in got] == ["cleared"]


def test_open_alerts_survive_a_restart_without_duplicates() -> None:
    farm = Farm(rumination_hold_h=1)
    farm.run_hours(8 * 24)
    farm.run_hours(14, rum_min=10.0)
    (open_,) = AlertBook.read(farm.conn, open_only=True)
    farm.engine = AlertEngine(farm.cfg, farm.ledger)  # a restarted gateway
    new = farm.run_hours(3, rum_min=10.0)
    assert {a.status for a in new} <= {"updated"} and {a.id for a in new} <= {open_["id"]}
    assert len(AlertBook.read(farm.conn, open_only=True)) == 1


def test_an_alert_as_line_protocol_and_mqtt() -> None:
    farm = Farm()
    farm.run_hours(8 * 24)
    alert = [a for a in farm.run_hours(24, rum_min=10.0) if a.status == "raised"][0]
    fact = fact_of(alert)
    json.dumps(fact)  # plain JSON all the way down
    (p,) = points_for(fact, "farm")
    assert p.measurement == "alert" and p.tags == {
        "site": "farm",
        "animal": "cow-1",
        "rule": "rumination_drop",
    }
    assert p.fields["baseline"] == 480.0 and p.fields["change_pct"] < -25.0
    assert p.fields["message"].startswith("raised: ") and "veterinarian" in p.fields["message"]
    assert p.time_ms == round(alert.raised_at * 1000)
    (m,) = messages_for(fact, Topics("barn", "farm"))
    body = json.loads(m.payload)
    assert m.topic == "barn/farm/alerts" and body["status"] == "raised"
    assert body["evidence"]["baseline"] == 480.0 and "veterinarian" in body["caution"]


def test_settings_refuse_thresholds_without_hysteresis() -> None:
    with pytest.raises(ValueError, match="hysteresis"):
        AlertsSettings(rumination_drop=0.2, rumination_clear=0.25)
    with pytest.raises(ValueError, match="min_baseline_days"):
        AlertsSettings(baseline_days=5, min_baseline_days=6)
    with pytest.raises(ValueError, match="hysteresis"):
        AlertsSettings(rumination_sustained_drop=0.1, rumination_sustained_clear=0.1)
    with pytest.raises(ValueError, match="activity_min_active_h"):
        AlertsSettings(activity_window_h=2)  # 7 active hours cannot fit in 2
    AlertsSettings(rumination_sustained_drop=0.0, rumination_sustained_clear=0.5)  # off


def test_the_caution_is_the_command_lines() -> None:
    from gateway.cli import CAUTION as CLI_CAUTION

    assert CAUTION == CLI_CAUTION
