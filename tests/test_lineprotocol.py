"""Line protocol: escaping in both dialects, hostile values, the schema and its document."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest

from gateway.alerts import Alert
from gateway.budgets import DailyBudget
from gateway.collarhealth import CollarStatus
from gateway.lineprotocol import (
    SCHEMA,
    Point,
    converter_kinds,
    encode,
    points_for,
    register_converter,
    schema_markdown,
    to_ms,
)
from gateway.outbox import GatewayAlert, GatewayStats, fact_of
from gateway.types import BEHAVIOURS, BoutClosed, StateChanged

DOC = Path(__file__).parent.parent / "docs" / "line-protocol.md"
T = 1767225600.0  # 2026-01-01T00:00:00Z


def line(measurement, tags, fields, dialect="v1", t=1000):
    return Point(measurement, tags, fields, t).line(dialect)


# Expected texts follow the special-character rules of the InfluxDB line protocol reference
# (measurement: comma, space; tag keys/values and field keys: comma, equals, space; string
# fields: double quote, backslash), checked against InfluxDB 1.6 and VictoriaMetrics in
# tests/test_lineprotocol_servers.py.
@pytest.mark.parametrize(
    ("point", "v1", "v2"),
    [
        (("m", {}, {"v": 1.5}), "m v=1.5 1000", "m v=1.5 1000"),
        (("a b,c", {}, {"v": 1}), r"a\ b\,c v=1i 1000", r"a\ b\,c v=1i 1000"),
        (("e=q", {}, {"v": True}), "e=q v=true 1000", "e=q v=true 1000"),
        (("m", {"t k,=": "x y,z=w"}, {"v": 1.0}), r"m,t\ k\,\==x\ y\,z\=w v=1.0 1000", None),
        (("m", {"t": "a\\b"}, {"v": 1.0}), r"m,t=a\b v=1.0 1000", r"m,t=a\\b v=1.0 1000"),
        (("m", {"t": 'say "hi"'}, {"v": 1.0}), r'm,t=say\ "hi" v=1.0 1000', None),
        (("m", {}, {"s": 'q"uo\\te'}), r'm s="q\"uo\\te" 1000', None),
        (("kühe", {"hof": "Müller"}, {"größe": 2.0}), "kühe,hof=Müller größe=2.0 1000", None),
        (("m", {"b": "2", "a": "1"}, {"v": -3}), "m,a=1,b=2 v=-3i 1000", None),
        (("m", {"t": ""}, {"v": 0.0}), "m v=0.0 1000", None),
    ],
)
def test_escaping_matches_the_line_protocol_rules(point, v1, v2):
    assert line(*point) == v1
    assert line(*point, dialect="v2") == (v2 or v1)


@pytest.mark.parametrize(
    ("measurement", "tags", "fields", "message"),
    [
        ("", {}, {"v": 1.0}, "non-empty"),
        ("#m", {}, {"v": 1.0}, "comment"),
        ("m", {}, {}, "no fields"),
        ("m", {"t": "a\nb"}, {"v": 1.0}, "line break"),
        ("m", {}, {"s": "two\nlines"}, "line break"),
        ("m\r", {}, {"v": 1.0}, "line break"),
        ("m", {}, {"v": float("nan")}, "not finite"),
        ("m", {}, {"v": float("inf")}, "not finite"),
        ("m", {}, {"v": 2**63}, "int64"),
        ("m", {}, {"v": None}, "type"),
        ("m", {}, {"v": [1, 2]}, "type"),
        ("m", {}, {'f"k': 1.0}, "double quote"),
        ("m", {"t": "x" * 70000}, {"v": 1.0}, "longer"),
    ],
)
def test_points_that_cannot_be_written_are_refused_with_a_reason(
    measurement, tags, fields, message
):
    with pytest.raises(ValueError, match=message):
        Point(measurement, tags, fields, 0).line("v2")


@pytest.mark.parametrize("name", ["a\\", "a\\ b", "a\\,b", "a\\=b", "a\\\\b"])
def test_v1_dialect_refuses_backslashes_servers_read_differently(name):
    with pytest.raises(ValueError, match="backslash"):
        line("m", {"t": name}, {"v": 1.0})
    assert line("m", {"t": name}, {"v": 1.0}, dialect="v2").startswith("m,t=")


def test_timestamps_are_integer_milliseconds():
    assert to_ms(T) == 1767225600000
    assert to_ms(T + 0.0004) == 1767225600000 and to_ms(T + 0.0006) == 1767225600001
    with pytest.raises(ValueError, match="finite"):
        to_ms(float("nan"))
    with pytest.raises(ValueError, match="int"):
        Point("m", {}, {"v": 1.0}, 1.5).line()  # type: ignore[arg-type]


def test_encode_joins_lines():
    ps = [Point("m", {}, {"v": 1.0}, 1), Point("m", {}, {"v": 2.0}, 2)]
    assert encode(ps) == b"m v=1.0 1\nm v=2.0 2"


def _facts():
    budget = DailyBudget(
        "cow 1", "2026-01-01", T, T + 86400, {"grazing": 480.0, "ruminating": 441.0},
        {"grazing": 9}, {"grazing": 53.3}, 12.0, True,
    )  # fmt: skip
    return [
        BoutClosed("cow 1", "grazing", T, T + 600.0, 0.8, 5.0),
        StateChanged("cow 1", "ruminating", T + 600.0, 0.9, "grazing"),
        StateChanged("cow 1", "no_data", T + 900.0, 0.0, None),
        budget,
        Alert("a1", "rumination_drop", "cow 1", "C1", "raised", T, T, "Rumination down",
              "rumination 32 % under baseline", {"value": 300.0, "baseline": 441.0, "z": -2.5}),
        CollarStatus("C1", "cow 1", T, T - 3600, T, 3600, 36, 0, 1.0, 0.01, 3.6, T, None, 60),
        GatewayStats(T, 100, 2, 50, 3, 0.5, 0, 60.0),
        GatewayAlert("outbox_full", "dropped 5", T, 5),
    ]  # fmt: skip


def test_every_fact_kind_converts_to_points_that_match_the_schema():
    seen = set()
    for fact in _facts():
        for p in points_for(fact_of(fact), "home-farm"):
            SCHEMA[p.measurement].check(p)
            assert p.tags["site"] == "home-farm"
            assert p.line("v1") and p.line("v2")
            seen.add(p.measurement)
    assert seen == set(SCHEMA)
    assert set(converter_kinds()) >= {m.kind for m in SCHEMA.values()}


def test_converted_values():
    bout, state, nodata, budget = (points_for(fact_of(f), "s")[0] for f in _facts()[:4])
    assert bout.fields == {"duration_s": 600.0, "mean_confidence": 0.8, "no_data_s": 5.0}
    assert bout.time_ms == to_ms(T) and bout.tags["behaviour"] == "grazing"
    assert state.fields["code"] == BEHAVIOURS.index("ruminating")
    assert state.fields["previous"] == "grazing" and state.time_ms == to_ms(T + 600)
    assert nodata.fields["code"] == -1 and "previous" not in nodata.fields
    # 480 + 441 classified minutes of a 1440-minute day
    assert budget.fields["coverage"] == pytest.approx(921 / 1440)
    assert budget.fields["grazing_bouts"] == 9 and budget.fields["walking_min"] == 0.0
    assert budget.fields["final"] is True and budget.time_ms == to_ms(T)


def test_a_float_field_given_as_int_is_written_as_float():
    # InfluxDB 1.x would refuse 1i after 1.0 in the same field (type conflict).
    b = BoutClosed("c", "walking", 0.0, 60.0, 1)
    p = points_for(fact_of(b), "s")[0]
    assert p.fields["mean_confidence"] == 1.0 and type(p.fields["mean_confidence"]) is float
    assert "mean_confidence=1.0" in p.line()


@pytest.mark.parametrize(
    ("fact", "error"),
    [
        ({"kind": "nobody_knows"}, LookupError),
        ({"kind": "bout_closed", "animal": "c"}, KeyError),
        ({**fact_of(BoutClosed("c", "grazing", 0, 1, 0.5)), "animal": ""}, ValueError),
        ({**fact_of(StateChanged("c", "grazing", 0, 0.5)), "confidence": "high"}, ValueError),
        ({**fact_of(GatewayStats(0, 1, 2, 3, 4, 5.0, 6, 7.0)), "extra": 1}, None),
    ],
)
def test_bad_facts_raise(fact, error):
    if error is None:  # unknown attributes of a fact are ignored, like unknown JSON keys
        assert points_for(fact, "s")
        return
    with pytest.raises(error):
        points_for(fact, "s")


def test_registry_refuses_silent_replacement_but_lets_defaults_go():
    def mine(fact, site):
        return []

    with pytest.raises(ValueError, match="already registered"):
        register_converter("bout_closed", mine)
    # defaults of the module give way to a module that knows its facts better
    original = points_for.__globals__["_CONVERTERS"]["daily_budget"]
    try:
        register_converter("daily_budget", mine)
        assert points_for({"kind": "daily_budget"}, "s") == []
        with pytest.raises(ValueError, match="already registered"):
            register_converter("daily_budget", original)
    finally:
        register_converter("daily_budget", original, replace=True, default=True)


def test_points_outside_the_schema_are_refused():
    def rogue(fact, site):
        return [Point("not_in_schema", {}, {"v": 1.0}, 0)]

    def wrong_tags(fact, site):
        return [Point("bout", {"site": site}, {"duration_s": 1.0}, 0)]

    register_converter("rogue", rogue)
    register_converter("rogue2", wrong_tags)
    with pytest.raises(ValueError, match="not in SCHEMA"):
        points_for({"kind": "rogue"}, "s")
    with pytest.raises(ValueError, match="tags"):
        points_for({"kind": "rogue2"}, "s")


def test_every_schema_key_is_its_tags_plus_time():
    for m in SCHEMA.values():
        assert m.key.startswith(",".join([m.name, *m.tags]) + " + ")
        assert "site" in m.tags and m.fields


def test_the_document_holds_the_schema_exactly():
    text = DOC.read_text(encoding="utf-8")
    block = re.search(r"<!-- schema:begin -->\n(.*?)<!-- schema:end -->", text, re.S)
    assert block, "docs/line-protocol.md lost its schema markers"
    assert block.group(1).strip() == schema_markdown().strip(), (
        "docs/line-protocol.md is out of date: paste gateway.lineprotocol.schema_markdown()"
    )
    fact = fact_of(dataclasses.replace(_facts()[0]))
    assert points_for(fact, "home-farm")[0].line() in text  # the worked example is real


def test_a_forwarding_process_uses_the_owners_converter_without_importing_it():
    # A fresh interpreter, as `python -m gateway.outbox` is: only lineprotocol is imported.
    import subprocess
    import sys

    script = (
        "import sys\n"
        "from gateway.lineprotocol import points_for\n"
        "assert 'gateway.collarhealth' not in sys.modules\n"
        "fact = {'kind': 'collar_health', 'collar_id': 'C1', 'animal': None, 'at': 60.0,\n"
        "        'frame_rate_hz': 1.0, 'loss': 0.0, 'last_seen': 59.0, 'recent_frames': 60}\n"
        "print(points_for(fact, 's')[0].line())\n"
    )
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True)
    # gateway/collarhealth.py's converter: collar_id and "at", an unassigned collar named so
    assert out.stdout.strip() == (
        "collar_health,animal=unassigned,collar=C1,site=s frame_rate_hz=1.0,loss=0.0,"
        "last_seen=59.0,frames=60i 60000"
    )
