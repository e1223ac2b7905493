"""Injected health and fertility events against the changes published for them (FIELD.md)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from gateway.types import BEHAVIOURS
from simulator.health import CLINICAL_DROP
from simulator.herd import Herd
from simulator.schedule import DAY_S, SCENARIOS

R, W = BEHAVIOURS.index("ruminating"), BEHAVIOURS.index("walking")


def _herd(days: int, **shares: float) -> Herd:
    herd = Herd(40, scenario="housed", seed=8, days=days, **shares)
    herd.ensure_schedule(herd.end)
    return herd


def _rum(herd: Herd, i: int, t0: float, t1: float) -> float:
    return float(herd.schedule.minutes(t0, t1)[i, R])


def test_illness_takes_20_to_40_percent_of_rumination() -> None:
    herd = _herd(10, illness_share=0.25)
    ill = [e for e in herd.events if e.kind == "illness"]
    assert len(ill) == 10
    drops, wanted = [], []
    for ev in ill:
        i = ev.animal_index
        onset_day = np.floor((ev.onset - herd.start) / DAY_S)
        base = [_rum(herd, i, herd.start + d * DAY_S, herd.start + (d + 1) * DAY_S)
                for d in range(int(onset_day))]  # fmt: skip
        plateau0 = ev.onset + ev.params["ramp_days"] * DAY_S
        full = [d for d in range(10)
                if herd.start + d * DAY_S >= plateau0
                and herd.start + (d + 1) * DAY_S <= ev.end - 2 * DAY_S]  # fmt: skip
        assert base and full, ev
        sick = [_rum(herd, i, herd.start + d * DAY_S, herd.start + (d + 1) * DAY_S)
                for d in full]  # fmt: skip
        drops.append(1.0 - np.mean(sick) / np.mean(base))
        wanted.append(ev.params["rumination_drop"])
    # FIELD.md (from memory): illness shows as a rumination drop of ~20-40 % vs own recent days
    assert 0.20 <= np.mean(drops) <= 0.40
    # and each animal's drop follows its ground truth (day-to-day noise allowed)
    assert np.mean(np.abs(np.array(drops) - wanted)) < 0.1


def test_illness_is_clinical_once_the_cut_reaches_20_percent() -> None:
    herd = _herd(10, illness_share=0.25)
    after = []
    for ev in [e for e in herd.events if e.kind == "illness"]:
        i, tc = ev.animal_index, ev.clinical_onset
        assert ev.onset < tc <= ev.onset + ev.params["ramp_days"] * DAY_S + 1e-3
        cut = ev.rumination_cut(np.array([tc - 600.0, tc + 600.0]), SCENARIOS["housed"])
        # the bottom of FIELD.md's 20-40 % for illness in general [M]
        assert cut[0] < CLINICAL_DROP <= cut[1] + 1e-9
        onset_day = int(np.floor((ev.onset - herd.start) / DAY_S))
        base = np.mean([_rum(herd, i, herd.start + d * DAY_S, herd.start + (d + 1) * DAY_S)
                        for d in range(onset_day)])  # fmt: skip
        after.append(1.0 - _rum(herd, i, tc, tc + DAY_S) / base)
    # in the 24 h after it her rumination is at least that far down, on average
    assert np.mean(after) >= CLINICAL_DROP
    # estrus and calving are there at once: their clinical onset is the onset
    other = Herd(20, seed=3, days=7, estrus_share=0.1, calving_share=0.1).events
    assert other and all(e.clinical_onset == e.onset for e in other)


def test_estrus_activity_and_rumination() -> None:
    herd = _herd(6, estrus_share=0.5)
    est = [e for e in herd.events if e.kind == "estrus"]
    assert len(est) == 20
    folds_num = folds_den = 0.0
    rum_drops = []
    for ev in est:
        i = ev.animal_index
        # the window falls inside one UTC day (ground truth says so)
        d0 = np.floor(ev.onset / DAY_S) * DAY_S
        assert ev.end <= d0 + DAY_S
        others = [
            k
            for k in range(-6, 7)
            if k != 0 and herd.start <= d0 + k * DAY_S and d0 + (k + 1) * DAY_S <= herd.end
        ]
        w_in = herd.schedule.minutes(ev.onset, ev.end)[i, W]
        w_base = np.mean([herd.schedule.minutes(ev.onset + k * DAY_S, ev.end + k * DAY_S)[i, W]
                          for k in others])  # fmt: skip
        folds_num += w_in
        folds_den += w_base
        before = [k for k in others if k < 0]
        if before:  # her usual for these hours is what the days before showed
            w_usual = np.mean([herd.schedule.minutes(ev.onset + k * DAY_S, ev.end + k * DAY_S)
                               [i, W] for k in before])  # fmt: skip
            # Lovendahl & Chagunda 2010 (FIELD.md): ~2.8-fold
            assert 2.5 <= w_in / w_usual <= 3.1, ev
        r_day = _rum(herd, i, d0, d0 + DAY_S)
        r_base = np.mean([_rum(herd, i, d0 + k * DAY_S, d0 + (k + 1) * DAY_S) for k in others])
        rum_drops.append(1.0 - r_day / r_base)
        # Lovendahl & Chagunda 2010, J Dairy Sci (FIELD.md): ~8-9 h (cows 8.1, heifers 9.2)
        assert 8.0 <= (ev.end - ev.onset) / 3600.0 <= 9.3
    # Lovendahl & Chagunda 2010 (FIELD.md): activity ~2.8-fold during estrus (walking here)
    assert 2.0 <= folds_num / folds_den <= 3.6
    # Reith & Hoy 2012, J Dairy Sci (FIELD.md): rumination -17 % on the day of estrus
    assert 0.10 <= np.mean(rum_drops) <= 0.25


def test_calving_rumination_before_and_after() -> None:
    herd = _herd(8, calving_share=0.5)
    calv = [e for e in herd.events if e.kind == "calving"]
    before, after = [], []
    for ev in calv:
        i, c = ev.animal_index, ev.onset
        base = [_rum(herd, i, c + k * DAY_S, c + (k + 1) * DAY_S) for k in range(-8, 8)
                if k not in (-1, 0) and herd.start <= c + k * DAY_S
                and c + (k + 1) * DAY_S <= herd.end]  # fmt: skip
        assert len(base) >= 3
        before.append(_rum(herd, i, c - DAY_S, c) - np.mean(base))
        after.append(_rum(herd, i, c, c + DAY_S) - np.mean(base))
    # Schirmann et al. 2013, J Dairy Sci (FIELD.md): -63 +/- 30 min in the 24 h before,
    # -133 +/- 35 min in the 24 h after calving
    assert -63 - 30 <= np.mean(before) <= -63 + 30
    assert -133 - 35 <= np.mean(after) <= -133 + 35


def test_events_are_in_the_herd_json_with_their_sources() -> None:
    herd = Herd(20, seed=3, days=7, illness_share=0.1, estrus_share=0.1, calving_share=0.1)
    doc = json.loads(json.dumps(herd.to_json()))
    kinds = [e["kind"] for e in doc["events"]]
    assert sorted(kinds) == ["calving"] * 2 + ["estrus"] * 2 + ["illness"] * 2
    assert len({e["animal"] for e in doc["events"]}) == 6  # one event per animal
    for e in doc["events"]:
        assert herd.start <= e["onset"] < e["end"] <= herd.end + 8 * DAY_S
        assert e["source"] and e["params"]
    assert doc["parameters"]["shares"] == {"illness": 0.1, "estrus": 0.1, "calving": 0.1}


def test_no_events_unless_asked() -> None:
    assert Herd(30, seed=1, days=3).events == []


@pytest.mark.parametrize("share", [-0.1, 1.5, float("nan")])
def test_bad_shares_are_refused(share: float) -> None:
    from gateway.errors import ConfigError

    with pytest.raises(ConfigError, match="illness share"):
        Herd(10, illness_share=share)
