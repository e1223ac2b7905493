"""Grafana dashboards (deploy/grafana/): every query names what the gateway writes, and runs.

The measurements, tags and fields are those of gateway.lineprotocol.SCHEMA, which every point
the gateway's InfluxDB sink writes is checked against. The queries then run, with Grafana's
macros filled in, against a real InfluxDB 1.x holding points made by the gateway's encoder.
"""

from __future__ import annotations

import importlib.util
import json
import random
import re
import time
import urllib.parse
import urllib.request
import uuid
from pathlib import Path

import pytest

from gateway.lineprotocol import SCHEMA, encode, points_for
from gateway.types import BEHAVIOURS

ROOT = Path(__file__).resolve().parents[1]
GRAFANA = ROOT / "deploy" / "grafana"
DASHBOARD_FILES = sorted((GRAFANA / "dashboards").glob("*.json"))
# Functions whose argument must be a number (InfluxQL refuses strings there).
NUMERIC_FUNCS = {
    "mean",
    "median",
    "sum",
    "min",
    "max",
    "spread",
    "stddev",
    "non_negative_derivative",
}
VARIABLES = ("site", "animal", "collar")


def load_builder():
    spec = importlib.util.spec_from_file_location(
        "build_dashboards", GRAFANA / "build_dashboards.py"
    )
    assert spec and spec.loader
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def dashboards() -> dict[str, dict]:
    return {p.name: json.loads(p.read_text(encoding="utf-8")) for p in DASHBOARD_FILES}


def queries(board: dict) -> list[tuple[str, str]]:
    """(where, query) for every panel target and template variable of a dashboard."""
    out = [
        (f"panel {p['title']!r}", t["query"]) for p in board["panels"] for t in p.get("targets", [])
    ]
    out += [(f"variable {v['name']!r}", v["query"]) for v in board["templating"]["list"]]
    return out


def all_queries() -> list[tuple[str, str, str]]:
    return [(name, where, q) for name, b in dashboards().items() for where, q in queries(b)]


def test_the_five_dashboards_are_there_and_built_from_the_script():
    names = {p.stem for p in DASHBOARD_FILES}
    assert names == {"herd-now", "rumination", "alerts", "collars", "gateway"}
    assert load_builder().main(["--check"]) == 0, "run python deploy/grafana/build_dashboards.py"


def test_dashboards_are_grafana_shaped():
    uids = set()
    for name, b in dashboards().items():
        assert b["uid"] not in uids and len(b["uid"]) <= 40, name  # Grafana's uid limit
        uids.add(b["uid"])
        ids = [p["id"] for p in b["panels"]]
        assert len(ids) == len(set(ids)), name
        for p in b["panels"]:
            g = p["gridPos"]
            assert g["x"] + g["w"] <= 24 and g["h"] > 0, (name, p["title"])
            if p["type"] != "text":
                assert p["targets"], (name, p["title"])
                assert p["datasource"]["uid"] == "boutline-influxdb"
        for v in b["templating"]["list"]:
            assert v["datasource"]["uid"] == "boutline-influxdb"


def test_datasource_uid_matches_provisioning():
    import yaml

    prov = yaml.safe_load((GRAFANA / "provisioning" / "datasources" / "boutline.yaml").read_text())
    (ds,) = prov["datasources"]
    assert ds["uid"] == load_builder().DATASOURCE_UID and ds["type"] == "influxdb"
    # Credentials are Grafana environment lookups, never literal values in the file.
    assert ds["secureJsonData"]["password"].startswith("${")
    assert ds["user"].startswith("${")


@pytest.mark.parametrize(("board", "where", "query"), all_queries())
def test_query_names_a_measurement_tags_and_fields_the_gateway_writes(board, where, query):
    froms = re.findall(r'\bFROM "([^"]+)"', query)
    assert len(froms) == 1, f'{board} {where}: one FROM "measurement" per query: {query}'
    m = SCHEMA.get(froms[0])
    assert m is not None, f"{board} {where}: {froms[0]!r} is not a measurement the gateway writes"
    # Aliases (AS "name") are column names of the result, not names in the database.
    names = set(re.findall(r'"([^"]+)"', re.sub(r'\bAS "[^"]+"', "", query))) - {m.name}
    unknown = names - set(m.tags) - set(m.fields)
    assert not unknown, f"{board} {where}: {sorted(unknown)} not tags/fields of {m.name}"
    if query.startswith("SELECT"):
        used = names & set(m.fields)
        assert used, f"{board} {where}: selects no field of {m.name}"
        assert "$timeFilter" in query or "time > now() -" in query, f"{where}: no time bound"
        for func, arg in re.findall(r'(\w+)\(\s*(?:last\()?"([^"]+)"', query):
            if func in NUMERIC_FUNCS or f'"{arg}") *' in query:
                assert m.fields[arg].type in ("float", "int"), f"{where}: {func}({arg}) on a string"
        grouped = re.findall(r"GROUP BY (.*?)(?: fill\(|$)", query)
        for g in grouped:
            for tag in re.findall(r'"([^"]+)"', g):
                assert tag in m.tags, f"{where}: GROUP BY {tag!r}, which is not a tag of {m.name}"
    else:
        assert query.startswith("SHOW TAG VALUES"), query
        (key,) = re.findall(r'WITH KEY = "([^"]+)"', query)
        assert key in m.tags


def test_behaviour_mappings_decode_the_gateway_state_code():
    # The code a state point carries, made by the gateway's own converter, maps back to the
    # behaviour's name in every dashboard that shows it.
    mappings = []

    def walk(node):
        if isinstance(node, dict):
            if node.get("type") == "value" and "options" in node:
                mappings.append(node["options"])
            for v in node.values():
                walk(v)
        elif isinstance(node, list):
            for v in node:
                walk(v)

    walk(dashboards())
    assert len(mappings) >= 2  # table and state timeline of the herd-now dashboard
    for behaviour in (*BEHAVIOURS, "no_data"):
        fact = {
            "kind": "state_changed",
            "animal": "a",
            "behaviour": behaviour,
            "since": 1e9,
            "confidence": 0.9,
        }
        (point,) = points_for(fact, "home-farm")
        for options in mappings:
            assert options[str(point.fields["code"])]["text"] == behaviour.replace("_", " ")


def test_alert_dashboard_carries_the_caution():
    b = dashboards()["alerts.json"]
    text = json.dumps(b)
    for words in ("decision support", "examine the animal", "veterinarian", "local regulations"):
        assert words in text


# --------------------------------------------------------------------------- real InfluxDB

SITES = ["home farm", "hill,farm"]  # a space and a comma: tag escaping on the way in
ANIMALS = ["cow 1", "cow=2", "kuh-3"]
COLLARS = {"cow 1": "C-001", "cow=2": "C-002", "kuh-3": "C-003"}


def fields_for(name: str, rng: random.Random, **given):
    """A value of the schema's type for every field of a measurement (``given`` wins)."""
    out = {}
    for k, f in SCHEMA[name].fields.items():
        if k in given:
            out[k] = given[k]
        elif f.type == "float":
            out[k] = rng.uniform(30, 500) if f.unit == "min" else rng.uniform(0.05, 1.0)
        elif f.type == "int":
            out[k] = rng.randint(0, 20)
        elif f.type == "bool":
            out[k] = rng.random() < 0.5
        else:
            out[k] = f"{k} text"
    return out


def sample_points(now_s: float) -> list:
    """Three weeks of every measurement for two sites and three animals, via the schema."""
    rng = random.Random(7)
    points = []
    today = now_s - now_s % 86400
    stats = SCHEMA["gateway_stats"]
    for site in SITES:
        totals = dict.fromkeys(stats.fields, 0)
        for i in range(21 * 24 * 6, -1, -1):  # gateway stats every 10 minutes, totals grow
            step = fields_for("gateway_stats", rng)
            totals = {k: totals[k] + step[k] for k in stats.fields}
            totals["uptime_s"] = float(21 * 86400 - i * 600)
            points.append(stats.point(now_s - i * 600, {"site": site}, totals))
        cause = {"site": site, "cause": "outbox_full"}
        points.append(
            SCHEMA["gateway_alert"].point(now_s - 3600, cause, fields_for("gateway_alert", rng))
        )
        for animal in ANIMALS:
            tags = {"site": site, "animal": animal}
            for day in range(21, -1, -1):
                budget = fields_for("daily_budget", rng, coverage=rng.uniform(0.6, 1.0))
                points.append(SCHEMA["daily_budget"].point(today - day * 86400, tags, budget))
            for h in range(48, 0, -1):  # through the gateway's own converters
                b = BEHAVIOURS[h % len(BEHAVIOURS)]
                t = now_s - h * 1800
                state = {
                    "kind": "state_changed",
                    "animal": animal,
                    "behaviour": b,
                    "since": t,
                    "confidence": 0.8,
                }
                bout = {
                    "kind": "bout_closed",
                    "animal": animal,
                    "behaviour": b,
                    "start": t,
                    "end": t + 1700,
                    "mean_confidence": 0.8,
                }
                points += points_for(state, site) + points_for(bout, site)
            rule = {**tags, "rule": "rumination_drop"}
            points.append(SCHEMA["alert"].point(now_s - 7200, rule, fields_for("alert", rng)))
            collar = {**tags, "collar": COLLARS[animal]}
            for h in range(72, -1, -1):
                health = fields_for(
                    "collar_health", rng, battery_v=3.9 - h * 0.001, last_seen=now_s - h * 3600
                )
                points.append(SCHEMA["collar_health"].point(now_s - h * 3600, collar, health))
    return points


def _http(url: str, data: bytes | None = None) -> tuple[int, bytes]:
    req = urllib.request.Request(url, data=data, method="POST" if data is not None else "GET")
    with urllib.request.urlopen(req, timeout=30) as r:
        return r.status, r.read()


def influxql(server, db: str, q: str) -> dict:
    _, body = _http(
        f"{server.url}/query?" + urllib.parse.urlencode({"db": db, "q": q, "epoch": "ms"})
    )
    (result,) = json.loads(body)["results"]
    return result


def grafana_macros(query: str, **values: str) -> str:
    """Fill in what Grafana would: time filter, interval, and the template variables."""
    q = query.replace("$timeFilter", "time > now() - 60d").replace("$__interval", "1h")
    for name in VARIABLES:
        q = q.replace(f"${name}", re.escape(values.get(name, "")) if name in values else ".*")
    return q


@pytest.fixture(scope="module")
def loaded_db(influxdb1):
    db = f"dash_{uuid.uuid4().hex[:8]}"
    _http(
        f"{influxdb1.url}/query", urllib.parse.urlencode({"q": f'CREATE DATABASE "{db}"'}).encode()
    )
    points = sample_points(time.time())
    for i in range(0, len(points), 5000):
        status, body = _http(
            f"{influxdb1.url}/write?db={db}&precision=ms", encode(points[i : i + 5000], "v1")
        )
        assert status == 204, body
    return influxdb1, db


@pytest.mark.integration
@pytest.mark.parametrize(("board", "where", "query"), all_queries())
def test_query_runs_and_finds_the_gateway_points(loaded_db, board, where, query):
    server, db = loaded_db
    result = influxql(server, db, grafana_macros(query))
    assert "error" not in result, f"{board} {where}: {result.get('error')}\n{query}"
    series = result.get("series", [])
    assert series, f"{board} {where}: no data\n{grafana_macros(query)}"
    for s in series:
        assert s["values"], (where, s)
        assert any(v is not None for row in s["values"] for v in row[1:]), (where, s)


@pytest.mark.integration
@pytest.mark.parametrize(
    ("board", "where", "query"),
    [q for q in all_queries() if "$animal" in q[2] or "$collar" in q[2]],
)
def test_template_variables_select_one_animal_or_collar(loaded_db, board, where, query):
    server, db = loaded_db
    animal, site = "cow=2", "hill,farm"
    result = influxql(
        server, db, grafana_macros(query, site=site, animal=animal, collar=COLLARS[animal])
    )
    assert "error" not in result, result
    rows = []
    for s in result["series"]:
        tags = s.get("tags", {})
        cols = s["columns"]
        rows += [dict(zip(cols, row, strict=True)) | tags for row in s["values"]]
    assert rows, f"{where}: nothing for {animal!r}"
    for row in rows:
        for key, want in (("animal", animal), ("collar", COLLARS[animal]), ("site", site)):
            if key in row:
                assert row[key] == want, (where, row)


def test_rumination_band_is_the_published_reference_interval():
    # Braun, Tschoner & Hassig 2014, BMC Vet Res (FIELD.md): reference interval 304-471 min/d.
    board = dashboards()["rumination.json"]
    (p,) = [p for p in board["panels"] if p["title"] == "Rumination minutes per day"]
    steps = [s["value"] for s in p["fieldConfig"]["defaults"]["thresholds"]["steps"]]
    assert steps == [None, 304, 471]
    assert "304-471" in p["description"] and "Braun" in p["description"]
