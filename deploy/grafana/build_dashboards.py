"""Write Boutline's Grafana dashboards (deploy/grafana/dashboards/*.json) from one description.

    python deploy/grafana/build_dashboards.py          # rewrite the JSON files
    python deploy/grafana/build_dashboards.py --check  # exit 1 if a file differs

Every query is InfluxQL over the measurements of gateway/lineprotocol.py SCHEMA (written by
the gateway's InfluxDB sink, v1 API); tests/test_deploy_dashboards.py checks each query names
a measurement, tags and fields the gateway writes, and runs it against a real InfluxDB 1.x.
Behaviour codes map to names in the order of gateway.types.BEHAVIOURS (the ``code`` field).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

from gateway.types import BEHAVIOURS

__all__ = ["DASHBOARDS", "DATASOURCE_UID", "dashboards", "main"]

OUT = Path(__file__).parent / "dashboards"
DATASOURCE_UID = "boutline-influxdb"
DS = {"type": "influxdb", "uid": DATASOURCE_UID}
CAUTION = (
    "Alerts are decision support, not a diagnosis: examine the animal and consult a"
    " veterinarian; local regulations and licensed veterinary practice prevail."
)
# Colours people read at a glance; a class the model adds later gets Grafana's palette.
_COLOURS = {
    "grazing": "green",
    "feeding": "yellow",
    "ruminating": "blue",
    "resting": "purple",
    "walking": "orange",
}
SITE = '"site" =~ /^$site$/'
ANIMAL = '"animal" =~ /^$animal$/'
COLLAR = '"collar" =~ /^$collar$/'


def behaviour_mappings() -> list[dict[str, Any]]:
    """``code`` (index in BEHAVIOURS, -1 no data) to the behaviour's name and colour."""
    options = {
        str(i): {"text": b, "color": _COLOURS.get(b, "text"), "index": i}
        for i, b in enumerate(BEHAVIOURS)
    }
    options["-1"] = {"text": "no data", "color": "gray", "index": len(BEHAVIOURS)}
    return [{"type": "value", "options": options}]


def target(query: str, ref: str = "A", fmt: str = "time_series", alias: str = "") -> dict:
    t = {"refId": ref, "datasource": DS, "rawQuery": True, "query": query, "resultFormat": fmt}
    if alias:
        t["alias"] = alias
    return t


def panel(kind: str, title: str, targets: list[dict], *, w: int, h: int, desc: str = "", **extra):
    p: dict[str, Any] = {
        "type": kind,
        "title": title,
        "description": desc,
        "datasource": DS,
        "targets": targets,
        "gridPos": {"w": w, "h": h},
        "fieldConfig": {"defaults": {}, "overrides": []},
        "options": {},
    }
    for key, value in extra.items():
        if key in ("defaults", "overrides"):
            p["fieldConfig"][key] = value
        else:
            p[key] = value
    return p


def variable(name: str, label: str, query: str) -> dict:
    return {
        "type": "query",
        "name": name,
        "label": label,
        "datasource": DS,
        "query": query,
        "definition": query,
        "refresh": 2,  # on time range change: new animals and collars appear by themselves
        "includeAll": True,
        "multi": True,
        "current": {"text": "All", "value": "$__all"},
        "sort": 1,
    }


SITE_VAR = variable("site", "Site", 'SHOW TAG VALUES FROM "gateway_stats" WITH KEY = "site"')
ANIMAL_VAR = variable(
    "animal", "Animal", f'SHOW TAG VALUES FROM "daily_budget" WITH KEY = "animal" WHERE {SITE}'
)
COLLAR_VAR = variable(
    "collar", "Collar", f'SHOW TAG VALUES FROM "collar_health" WITH KEY = "collar" WHERE {SITE}'
)


def dashboard(
    uid: str,
    title: str,
    desc: str,
    panels: list[dict],
    variables: list[dict],
    *,
    time_from: str,
    refresh: str,
) -> dict:
    x = y = row_h = 0
    for i, p in enumerate(panels, start=1):  # lay panels out left to right on a 24-column grid
        if x + p["gridPos"]["w"] > 24:
            x, y, row_h = 0, y + row_h, 0
        p["id"] = i
        p["gridPos"].update({"x": x, "y": y})
        x += p["gridPos"]["w"]
        row_h = max(row_h, p["gridPos"]["h"])
    return {
        "uid": uid,
        "title": title,
        "description": desc,
        "tags": ["boutline"],
        "editable": True,
        "graphTooltip": 1,
        "schemaVersion": 39,
        "version": 1,
        "timezone": "browser",
        "refresh": refresh,
        "time": {"from": time_from, "to": "now"},
        "templating": {"list": variables},
        "annotations": {"list": []},
        "links": [
            {
                "type": "dashboards",
                "tags": ["boutline"],
                "asDropdown": False,
                "title": "Boutline",
                "includeVars": True,
                "keepTime": False,
            }
        ],
        "panels": panels,
    }


def herd_now() -> dict:
    minutes = ", ".join(f'last("{b}_min") AS "{b}"' for b in BEHAVIOURS)
    return dashboard(
        "boutline-herd-now",
        "Boutline: herd now",
        "What each animal is doing now, its last 24 hours, and today's time budget.",
        [
            panel(
                "table",
                "Current behaviour",
                [
                    target(
                        'SELECT last("code") AS "behaviour", "confidence" FROM "animal_state"'
                        f' WHERE {SITE} AND {ANIMAL} AND $timeFilter GROUP BY "animal"',
                        fmt="table",
                    )
                ],
                w=10,
                h=14,
                desc="Latest behaviour per animal; 'since' is when that behaviour began.",
                overrides=[
                    {
                        "matcher": {"id": "byName", "options": "behaviour"},
                        "properties": [
                            {"id": "mappings", "value": behaviour_mappings()},
                            {"id": "custom.cellOptions", "value": {"type": "color-background"}},
                        ],
                    },
                    {
                        "matcher": {"id": "byName", "options": "confidence"},
                        "properties": [
                            {"id": "unit", "value": "percentunit"},
                            {"id": "decimals", "value": 0},
                        ],
                    },
                    {
                        "matcher": {"id": "byName", "options": "Time"},
                        "properties": [
                            {"id": "displayName", "value": "since"},
                            {"id": "unit", "value": "dateTimeFromNow"},
                        ],
                    },
                ],
                options={"sortBy": [{"displayName": "animal", "desc": False}]},
            ),
            panel(
                "state-timeline",
                "Behaviour, last 24 hours",
                [
                    target(
                        'SELECT "code" FROM "animal_state"'
                        f' WHERE {SITE} AND {ANIMAL} AND $timeFilter GROUP BY "animal"',
                        alias="$tag_animal",
                    )
                ],
                w=14,
                h=14,
                desc="One row per animal; each colour holds until the next change of behaviour.",
                defaults={"mappings": behaviour_mappings(), "color": {"mode": "thresholds"}},
                options={"showValue": "never", "mergeValues": True, "rowHeight": 0.8},
            ),
            panel(
                "table",
                "Today's minutes per behaviour",
                [
                    target(
                        f'SELECT {minutes}, last("coverage") AS "coverage" FROM "daily_budget"'
                        f' WHERE {SITE} AND {ANIMAL} AND time > now() - 25h GROUP BY "animal"',
                        fmt="table",
                    )
                ],
                w=24,
                h=10,
                desc=(
                    "Minutes so far in the current local day (site time zone). Coverage is the"
                    " share of the day classified; a low coverage means missing collar data,"
                    " not a quiet animal."
                ),
                defaults={"unit": "m", "decimals": 0},
                overrides=[
                    {
                        "matcher": {"id": "byName", "options": "coverage"},
                        "properties": [{"id": "unit", "value": "percentunit"}],
                    },
                    {
                        "matcher": {"id": "byName", "options": "Time"},
                        "properties": [{"id": "custom.hidden", "value": True}],
                    },
                ],
            ),
        ],
        [SITE_VAR, ANIMAL_VAR],
        time_from="now-24h",
        refresh="30s",
    )


def rumination() -> dict:
    budget = ", ".join(f'"{b}_min" AS "{b}"' for b in BEHAVIOURS)
    return dashboard(
        "boutline-rumination",
        "Boutline: rumination per day",
        "Daily rumination minutes per animal over weeks, with each day's coverage and time budget.",
        [
            panel(
                "timeseries",
                "Rumination minutes per day",
                [
                    target(
                        'SELECT "ruminating_min" FROM "daily_budget"'
                        f' WHERE {SITE} AND {ANIMAL} AND $timeFilter GROUP BY "animal"',
                        alias="$tag_animal",
                    )
                ],
                w=24,
                h=12,
                desc=(
                    "One point per animal and local day. Band: the reference interval 304-471"
                    " min/d of healthy cows (Braun, Tschoner & Hassig 2014, BMC Vet Res). Compare"
                    " each animal with its own recent days first; an alert says when it drops."
                ),
                defaults={
                    "unit": "m",
                    "min": 0,
                    "custom": {
                        "drawStyle": "line",
                        "pointSize": 6,
                        "showPoints": "always",
                        "thresholdsStyle": {"mode": "area"},
                    },
                    "thresholds": {
                        "mode": "absolute",
                        "steps": [
                            {"color": "transparent", "value": None},
                            {"color": "rgba(50, 116, 217, 0.08)", "value": 304},
                            {"color": "transparent", "value": 471},
                        ],
                    },
                },
            ),
            panel(
                "timeseries",
                "Coverage per day",
                [
                    target(
                        'SELECT "coverage" FROM "daily_budget"'
                        f' WHERE {SITE} AND {ANIMAL} AND $timeFilter GROUP BY "animal"',
                        alias="$tag_animal",
                    )
                ],
                w=12,
                h=9,
                desc="Share of each day that was classified; a day below 0.8 is not a baseline day.",
                defaults={"unit": "percentunit", "min": 0, "max": 1},
            ),
            panel(
                "timeseries",
                "Time budget per day",
                [
                    target(
                        f'SELECT {budget}, "no_data_min" AS "no data" FROM "daily_budget"'
                        f" WHERE {SITE} AND {ANIMAL} AND $timeFilter",
                    )
                ],
                w=12,
                h=9,
                desc="Minutes per behaviour per day, stacked (pick one animal above).",
                defaults={
                    "unit": "m",
                    "custom": {"drawStyle": "bars", "stacking": {"mode": "normal"}},
                },
            ),
        ],
        [SITE_VAR, ANIMAL_VAR],
        time_from="now-8w",
        refresh="15m",
    )


def alerts() -> dict:
    return dashboard(
        "boutline-alerts",
        "Boutline: alerts",
        CAUTION,
        [
            panel(
                "text",
                "Read this first",
                [],
                w=24,
                h=3,
                options={"mode": "markdown", "content": f"**{CAUTION}**"},
            ),
            panel(
                "table",
                "Animal alerts",
                [
                    target(
                        'SELECT "value", "baseline", "change_pct", "score", "message" FROM "alert"'
                        f' WHERE {SITE} AND {ANIMAL} AND $timeFilter GROUP BY "animal", "rule"',
                        fmt="table",
                    )
                ],
                w=24,
                h=12,
                desc=f"Each alert compares the animal with its own baseline. {CAUTION}",
                overrides=[
                    {
                        "matcher": {"id": "byName", "options": "change_pct"},
                        "properties": [{"id": "unit", "value": "percent"}],
                    }
                ],
                options={"sortBy": [{"displayName": "Time", "desc": True}]},
            ),
            panel(
                "timeseries",
                "Alerts per day by rule",
                [
                    target(
                        'SELECT count("value") FROM "alert"'
                        f' WHERE {SITE} AND {ANIMAL} AND $timeFilter GROUP BY time(1d), "rule" fill(0)',
                        alias="$tag_rule",
                    )
                ],
                w=12,
                h=9,
                defaults={"custom": {"drawStyle": "bars", "stacking": {"mode": "normal"}}},
            ),
            panel(
                "table",
                "Gateway alerts",
                [
                    target(
                        'SELECT "dropped", "message" FROM "gateway_alert"'
                        f' WHERE {SITE} AND $timeFilter GROUP BY "cause"',
                        fmt="table",
                    )
                ],
                w=12,
                h=9,
                desc="For the operator: e.g. the outbox was full and points were dropped.",
            ),
        ],
        [SITE_VAR, ANIMAL_VAR],
        time_from="now-30d",
        refresh="5m",
    )


def collars() -> dict:
    by_collar = f"WHERE {SITE} AND {COLLAR} AND $timeFilter"

    def per_collar(title: str, field: str, defaults: dict, w: int) -> dict:
        query = (
            f'SELECT mean("{field}") FROM "collar_health" {by_collar}'
            ' GROUP BY time($__interval), "collar" fill(none)'
        )
        return panel(
            "timeseries", title, [target(query, alias="$tag_collar")], w=w, h=9, defaults=defaults
        )

    return dashboard(
        "boutline-collars",
        "Boutline: collar health and battery",
        "Battery, frame rate, frame loss and last contact per collar.",
        [
            panel(
                "table",
                "Collars now",
                [
                    target(
                        'SELECT last("battery_v") AS "battery_v", last("frame_rate_hz") AS'
                        ' "frame_rate_hz", last("loss") AS "loss", last("last_seen") * 1000 AS'
                        f' "last_seen" FROM "collar_health" {by_collar} GROUP BY "collar", "animal"',
                        fmt="table",
                    )
                ],
                w=24,
                h=10,
                overrides=[
                    {
                        "matcher": {"id": "byName", "options": "battery_v"},
                        "properties": [
                            {"id": "unit", "value": "volt"},
                            {"id": "decimals", "value": 2},
                        ],
                    },
                    {
                        "matcher": {"id": "byName", "options": "loss"},
                        "properties": [{"id": "unit", "value": "percentunit"}],
                    },
                    {
                        "matcher": {"id": "byName", "options": "last_seen"},
                        "properties": [{"id": "unit", "value": "dateTimeFromNow"}],
                    },
                    {
                        "matcher": {"id": "byName", "options": "Time"},
                        "properties": [{"id": "custom.hidden", "value": True}],
                    },
                ],
            ),
            per_collar("Battery", "battery_v", {"unit": "volt"}, w=12),
            per_collar("Frame loss", "loss", {"unit": "percentunit", "min": 0}, w=12),
            per_collar("Frame rate", "frame_rate_hz", {"unit": "hertz", "min": 0}, w=24),
        ],
        [SITE_VAR, COLLAR_VAR],
        time_from="now-7d",
        refresh="5m",
    )


def gateway() -> dict:
    where = f'FROM "gateway_stats" WHERE {SITE} AND $timeFilter'
    group = 'GROUP BY time($__interval), "site" fill(none)'

    def rate(field: str) -> str:
        # Totals since the gateway started; the derivative skips the drop at a restart.
        return f'SELECT non_negative_derivative(last("{field}"), 1s) {where} {group}'

    def rates(title: str, *fields: str, desc: str = "") -> dict:
        targets = [
            target(rate(f), chr(ord("A") + i), alias=f"{f} $tag_site") for i, f in enumerate(fields)
        ]
        return panel("timeseries", title, targets, w=12, h=9, desc=desc, defaults={"unit": "reqps"})

    return dashboard(
        "boutline-gateway",
        "Boutline: gateway throughput and backlog",
        "Frames, rejects, windows and events per second; inference time; the sinks' backlog.",
        [
            rates("Frames and windows per second", "frames_in", "windows"),
            rates(
                "Rejects and events per second",
                "rejects",
                "events",
                desc="Rejects by reason: /metrics (boutline_rejects_total) on the gateway.",
            ),
            panel(
                "timeseries",
                "Share of time in inference",
                [target(rate("inference_s"), alias="$tag_site")],
                w=12,
                h=9,
                desc="Seconds of model inference per second of wall time (1.0 = one core busy).",
                defaults={"unit": "percentunit", "min": 0},
            ),
            panel(
                "timeseries",
                "Sink backlog",
                [
                    target(
                        f'SELECT max("backlog") {where} {group}',
                        alias="$tag_site",
                    )
                ],
                w=12,
                h=9,
                desc="Points waiting in the outbox for the slowest sink; it should fall back to 0.",
                defaults={"unit": "short", "min": 0},
            ),
            panel(
                "stat",
                "Uptime",
                [target(f'SELECT last("uptime_s") {where} GROUP BY "site"', alias="$tag_site")],
                w=24,
                h=4,
                defaults={"unit": "s"},
            ),
        ],
        [SITE_VAR],
        time_from="now-24h",
        refresh="1m",
    )


DASHBOARDS = {
    "herd-now": herd_now,
    "rumination": rumination,
    "alerts": alerts,
    "collars": collars,
    "gateway": gateway,
}


def dashboards() -> dict[str, str]:
    """File name -> JSON text of every dashboard."""
    return {
        f"{name}.json": json.dumps(build(), indent=2, ensure_ascii=False) + "\n"
        for name, build in DASHBOARDS.items()
    }


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    check = argv == ["--check"]
    stale = []
    for name, text in dashboards().items():
        path = OUT / name
        if check:
            if not path.exists() or path.read_text(encoding="utf-8") != text:
                stale.append(name)
        else:
            path.write_text(text, encoding="utf-8")
    if stale:
        print(f"Error: {', '.join(stale)} differ; run python deploy/grafana/build_dashboards.py")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
