"""Talk to the test servers' HTTP APIs directly (create a database, query, export)."""

from __future__ import annotations

import json
import urllib.parse
import urllib.request
from typing import Any


def http(url: str, data: bytes | None = None) -> bytes:
    """GET (or POST ``data``) and return the body; HTTP errors raise."""
    req = urllib.request.Request(url, data=data, method="POST" if data is not None else "GET")
    with urllib.request.urlopen(req, timeout=10) as r:
        return r.read()


def create_database(url: str, db: str) -> None:
    """InfluxDB 1.x: CREATE DATABASE (idempotent)."""
    http(f"{url}/query", urllib.parse.urlencode({"q": f'CREATE DATABASE "{db}"'}).encode())


def query(url: str, db: str, q: str) -> dict[str, Any]:
    """InfluxDB 1.x: the first statement's result, times as epoch milliseconds."""
    params = urllib.parse.urlencode({"db": db, "q": q, "epoch": "ms"})
    return json.loads(http(f"{url}/query?{params}"))["results"][0]


def export(url: str, match: str) -> list[dict[str, Any]]:
    """VictoriaMetrics: flush, then every raw series matching the selector."""
    http(f"{url}/internal/force_flush")
    q = urllib.parse.urlencode({"match[]": match})
    return [json.loads(line) for line in http(f"{url}/api/v1/export?{q}").splitlines()]


def rows(url: str, db: str, q: str = "SELECT * FROM /.*/") -> list[tuple[str, int, dict[str, Any]]]:
    """InfluxDB 1.x: (measurement, time ms, non-null columns) of every row the query returns."""
    out = []
    for s in query(url, db, q).get("series", []):
        for row in s["values"]:
            cols = {c: v for c, v in zip(s["columns"], row, strict=True) if v is not None}
            out.append((s["name"], cols.pop("time"), cols))
    return out
