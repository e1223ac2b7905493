"""Alerts against the simulator's health and fertility scenarios (issue: herd analytics, 3).

The simulator's ground-truth behaviour intervals are turned into closed bouts and replayed
hour by hour through the real budget ledger and alert engine (no classifier, so the run takes
seconds). Injected events and their effects come from simulator/health.py, with the sources
it names (FIELD.md, health and fertility signals):

- illness: rumination falling 20-40 % against the cow's own recent days over 2-4 days
  (from memory, FIELD.md);
- estrus: activity ~2.8-fold for 8-9 h (Lovendahl & Chagunda 2010, J Dairy Sci) and
  rumination -17 % that day (Reith & Hoy 2012, J Dairy Sci).

Targets (the issue): an alert within 24 h of onset for >= 90 % of illness and estrus cases,
and <= 1 false alert per 100 healthy cow-days. What "onset" means is in the ground truth:

- estrus: ``onset``, the start of the 8-9 h of restlessness; an alert counts from then
  until 24 h later;
- illness: its rumination falls over 2-4 days, so it has two instants. ``onset`` is where
  the decline starts; ``clinical_onset`` is where the cut first reaches 20 %, the bottom
  of the drop FIELD.md gives for illness in general (20-40 % [M]). An alert counts from
  ``onset`` (earlier is better: published rumination indices flag cases days before the
  diagnosis, Stangaferro et al. 2016, FIELD.md) until 24 h after ``clinical_onset``.

Only cases whose ``onset`` leaves the rules a full baseline (``baseline_days`` + 1 days of
data) count; before that no alert is possible, by design, and the report says why. False
alerts are alerts of any rule on animals without an event, after that baseline period, per
100 of their cow-days.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass

import pytest

from gateway.alerts import AlertEngine, Rule
from gateway.budgets import BudgetLedger, DayClock
from gateway.config import AlertsSettings
from gateway.types import BoutClosed
from simulator.herd import Herd

H = 3600.0
DAY = 86400.0
# Which alerts answer which event: illness shows in rumination (and a cow that stops getting
# up); estrus in activity (FIELD.md, health and fertility signals).
ANSWERS = {
    "illness": {Rule.RUMINATION_DROP, Rule.PROLONGED_INACTIVITY},
    "estrus": {Rule.ACTIVITY_RISE, Rule.RUMINATION_DROP},
}


@dataclass
class Outcome:
    detected: dict[str, tuple[int, int]]  # kind -> (alerted within 24 h, eligible cases)
    eventually: dict[str, int]  # kind -> alerted at any time while the event lasted
    false_alerts: int
    healthy_cow_days: float

    @property
    def false_per_100(self) -> float:
        return 100.0 * self.false_alerts / self.healthy_cow_days

    def rate(self, kind: str) -> float:
        hit, n = self.detected[kind]
        return hit / n if n else float("nan")

    def __str__(self) -> str:
        parts = [
            f"{k}: {h}/{n} within 24 h ({self.eventually[k]} while it lasted)"
            for k, (h, n) in self.detected.items()
        ]
        return (
            ", ".join(parts)
            + f"; {self.false_alerts} false alerts in {self.healthy_cow_days:.0f} healthy cow-days"
            + f" ({self.false_per_100:.1f} per 100)"
        )


def replay(herd: Herd, cfg: AlertsSettings) -> list:
    """Ground-truth bouts through the ledger and the engine, evaluated every hour."""
    obs = sorted(herd.observations(), key=lambda o: o[3])
    bouts = [BoutClosed(a, b, s, e, 1.0) for a, _c, s, e, b in obs]
    conn = sqlite3.connect(":memory:", isolation_level=None)
    ledger = BudgetLedger(DayClock("UTC"))
    ledger.ensure_schema(conn)
    engine = AlertEngine(cfg, ledger)
    engine.ensure_schema(conn)
    alerts, i, t = [], 0, herd.start + H
    conn.execute("BEGIN")
    while t <= herd.end:
        j = i
        while j < len(bouts) and bouts[j].end <= t:
            j += 1
        ledger.listener(conn, bouts[i:j])
        i = j
        ledger.finalize(conn, t)
        alerts += engine.evaluate(conn, t)
        t += H
    conn.execute("COMMIT")
    return alerts


def score(herd: Herd, alerts: list, cfg: AlertsSettings) -> Outcome:
    ready = herd.start + (cfg.baseline_days + 1) * DAY
    raised = [a for a in alerts if a.status == "raised"]
    detected, eventually = {}, {}

    def hits(cases: list, rules: set, until) -> int:
        return sum(
            any(
                a.animal == e.animal and a.rule in rules and e.onset <= a.at <= until(e)
                for a in raised
            )
            for e in cases
        )

    for kind, rules in ANSWERS.items():
        cases = [e for e in herd.events if e.kind == kind and e.onset >= ready]
        detected[kind] = (hits(cases, rules, lambda e: e.clinical_onset + DAY), len(cases))
        eventually[kind] = hits(cases, rules, lambda e: max(e.end, e.onset + DAY))
    sick = {e.animal for e in herd.events}
    healthy = [a for a in herd.animal_ids if a not in sick]
    false = [a for a in raised if a.animal in healthy and a.at >= ready]
    return Outcome(detected, eventually, len(false), len(healthy) * (herd.end - ready) / DAY)


@pytest.fixture(scope="module")
def outcome() -> Outcome:
    cfg = AlertsSettings()
    herd = Herd(100, scenario="mixed", seed=2027, days=21, illness_share=0.2, estrus_share=0.2)
    out = score(herd, replay(herd, cfg), cfg)
    print(f"\nalert validation (defaults): {out}")
    return out


def test_the_validation_has_enough_cases(outcome: Outcome) -> None:
    # enough cases and healthy days that a rate of 90 % and 1 per 100 cow-days can be told
    for kind in ANSWERS:
        assert outcome.detected[kind][1] >= 10, outcome
    assert outcome.healthy_cow_days >= 500, outcome


def test_illness_is_alerted_while_it_lasts(outcome: Outcome) -> None:
    # the drop reaches 20-40 % of the cow's own rumination (FIELD.md): once it is there, the
    # rumination rule must see it in nine cases out of ten
    hit, n = outcome.eventually["illness"], outcome.detected["illness"][1]
    assert hit >= 0.9 * n, outcome


def test_alert_within_24_h_for_90_percent_and_at_most_1_false_per_100_cow_days(
    outcome: Outcome,
) -> None:
    assert outcome.rate("illness") >= 0.9, outcome
    assert outcome.rate("estrus") >= 0.9, outcome
    assert outcome.false_per_100 <= 1.0, outcome
