"""Escaping against real servers: awkward names go in and come back unchanged.

InfluxDB 1.6 (Debian's influxdb, v1 dialect) and VictoriaMetrics (v2 write API, v2 dialect)
are the references here: what they read back is the truth the escaping must meet.
"""

from __future__ import annotations

import uuid

import pytest
from influxhttp import create_database, export, http, rows

from gateway.lineprotocol import Point, encode

pytestmark = pytest.mark.integration

NAMES = [
    "cow 1",
    "a,b",
    "k=v",
    'say "hi"',
    "back\\slash",
    "Müller-Kuh ß 牛",
    "tab\there",
    " lead and trail ",
    "=,= ,",
    "emoji 🐄",
    "x" * 300,  # a long tag value (VictoriaMetrics drops label *names* past 256 bytes)
]


def _points(run: str) -> list[Point]:
    pts = []
    for i, name in enumerate(NAMES):
        key = name.replace('"', "'")[:64]  # a double quote in a field key is refused by design
        pts.append(
            Point(
                f"esc {name}",
                {f"tag {name[:64]}": name, "run": run},
                {f"f {key}": float(i) + 0.25, "n": i, "s": name},
                1_767_225_600_000 + i,
            )
        )
    return pts


def test_influxdb1_reads_back_every_name_unchanged(influxdb1):
    db = f"esc_{uuid.uuid4().hex[:8]}"
    create_database(influxdb1.url, db)
    points = _points("r1")
    http(f"{influxdb1.url}/write?db={db}&precision=ms", encode(points, "v1"))
    got = {(m, t): cols for m, t, cols in rows(influxdb1.url, db)}
    want = {(p.measurement, p.time_ms): {**p.tags, **p.fields} for p in points}
    assert got == want


def test_victoria_reads_back_every_name_unchanged(victoria):
    run = uuid.uuid4().hex
    points = _points(run)
    http(f"{victoria.url}/api/v2/write?org=o&bucket=b&precision=ms", encode(points, "v2"))
    got = {}
    for row in export(victoria.url, f'{{run="{run}"}}'):
        labels = row["metric"]
        got[(labels.pop("__name__"), row["timestamps"][0])] = (labels, row["values"][0])
    for p in points:
        # VictoriaMetrics names a series <measurement>_<field>; it stores no string fields.
        for k, v in p.fields.items():
            if isinstance(v, str):
                continue
            assert got[(f"{p.measurement}_{k}", p.time_ms)] == (dict(p.tags), v)
