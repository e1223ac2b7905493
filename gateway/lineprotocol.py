r"""InfluxDB line protocol: the point model, escaping, and the schema of every measurement.

A fact (an event, a daily budget, an alert, a collar-health sample, a gateway stat) becomes
one or more :class:`Point` by the converter registered for its ``kind``. Every point is
checked against :data:`SCHEMA`, the one description of measurements, tags, fields and
timestamps; docs/line-protocol.md renders the same table (a test keeps them equal).

A point's series key (measurement + tags) plus its timestamp is unique per fact, so a batch
that is sent twice overwrites itself: at-least-once delivery, exactly-once storage.

Timestamps are integer milliseconds since the Unix epoch (UTC), written with ``precision=ms``.

Escaping (line-protocol rules): measurement escapes comma and space; tag keys, tag values and
field keys escape comma, equals sign and space; string field values are double-quoted with
``"`` and ``\`` escaped. Backslashes in names are where servers differ: InfluxDB 1.x keeps
``\\`` as two characters, InfluxDB 2.x/3.x and VictoriaMetrics read it as one. Two dialects:

- ``v1`` writes backslashes as they are, which every parser reads back unchanged, and
  refuses a name in which a backslash is followed by a space, comma, equals sign or another
  backslash, or ends the name (no encoding of those is read the same by all servers);
- ``v2`` escapes backslashes as ``\\`` (InfluxDB 2.x/3.x, VictoriaMetrics).

>>> p = Point("bout", {"site": "home farm", "animal": "cow,17"}, {"duration_s": 61.5, "n": 3}, 1767225600000)
>>> p.line()
'bout,animal=cow\\,17,site=home\\ farm duration_s=61.5,n=3i 1767225600000'
"""

from __future__ import annotations

import contextlib
import importlib
import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

from .types import BEHAVIOURS, NO_DATA

__all__ = [
    "PRECISION",
    "SCHEMA",
    "Dialect",
    "FieldSpec",
    "Measurement",
    "Point",
    "converter_kinds",
    "encode",
    "points_for",
    "register_converter",
    "schema_markdown",
    "simple_converter",
    "to_ms",
]

PRECISION = "ms"
Dialect = Literal["v1", "v2"]
Scalar = float | int | bool | str

# InfluxDB 1.x refuses series keys over 65535 bytes; nothing of ours comes near it.
_MAX_NAME_BYTES = 65535
# int64 range of InfluxDB integer fields.
_INT_MIN, _INT_MAX = -(2**63), 2**63 - 1

_MEASUREMENT_ESC = {",": "\\,", " ": "\\ "}
_KEY_ESC = {",": "\\,", " ": "\\ ", "=": "\\="}
_TABLES: dict[tuple[str, Dialect], dict[int, str]] = {
    ("measurement", "v1"): str.maketrans(_MEASUREMENT_ESC),
    ("measurement", "v2"): str.maketrans({**_MEASUREMENT_ESC, "\\": "\\\\"}),
    ("key", "v1"): str.maketrans(_KEY_ESC),
    ("key", "v2"): str.maketrans({**_KEY_ESC, "\\": "\\\\"}),
}
_STRING_ESC = str.maketrans({"\\": "\\\\", '"': '\\"'})


def to_ms(t: float) -> int:
    """Unix seconds (float) to the integer milliseconds written in every point."""
    if not math.isfinite(t):
        raise ValueError(f"timestamp {t!r} is not a finite number of seconds")
    return int(round(t * 1000.0))


def _check_name(s: str, what: str) -> None:
    if not isinstance(s, str) or not s:
        raise ValueError(f"{what} must be a non-empty string, got {s!r}")
    if "\n" in s or "\r" in s:
        raise ValueError(f"{what} {s[:40]!r} holds a line break; line protocol cannot carry it")
    if len(s.encode("utf-8")) > _MAX_NAME_BYTES:
        raise ValueError(f"{what} is longer than {_MAX_NAME_BYTES} bytes")


def _escape(s: str, table: str, dialect: Dialect, specials: str, what: str) -> str:
    if dialect == "v1" and "\\" in s:
        for i, ch in enumerate(s):
            if ch == "\\" and (i + 1 == len(s) or s[i + 1] in specials + "\\"):
                raise ValueError(
                    f"{what} {s[:40]!r}: a backslash before {specials!r}, another backslash or"
                    " at the end is read differently by InfluxDB 1.x and 2.x/3.x; rename it"
                )
    return s.translate(_TABLES[(table, dialect)])


def _field_value(v: Scalar, key: str) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        if not _INT_MIN <= v <= _INT_MAX:
            raise ValueError(f"field {key!r} = {v} is outside the int64 range")
        return f"{v}i"
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"field {key!r} = {v!r} is not finite; line protocol has no NaN/inf")
        return repr(v)
    if isinstance(v, str):
        if "\n" in v or "\r" in v:
            raise ValueError(f"string field {key!r} holds a line break; write it on one line")
        return '"' + v.translate(_STRING_ESC) + '"'
    raise ValueError(f"field {key!r} has type {type(v).__name__}; use float, int, bool or str")


@dataclass(frozen=True, slots=True)
class Point:
    """One line-protocol point. Tags with empty values are left out (line protocol has none)."""

    measurement: str
    tags: Mapping[str, str]
    fields: Mapping[str, Scalar]
    time_ms: int

    def line(self, dialect: Dialect = "v1") -> str:
        """The point as one line of line protocol, escaped for ``dialect``."""
        _check_name(self.measurement, "measurement")
        if self.measurement.startswith("#"):
            raise ValueError(f"measurement {self.measurement[:40]!r} starts with '#' (a comment)")
        parts = [_escape(self.measurement, "measurement", dialect, ",= ", "measurement")]
        for k in sorted(self.tags):  # sorted tags: the form servers store, and cheaper for them
            v = self.tags[k]
            if v == "":
                continue
            _check_name(k, "tag key")
            _check_name(v, f"tag {k!r} value")
            parts.append(
                f"{_escape(k, 'key', dialect, ',= ', 'tag key')}"
                f"={_escape(v, 'key', dialect, ',= ', f'tag {k!r} value')}"
            )
        if not self.fields:
            raise ValueError(f"point {self.measurement!r} has no fields; a point needs one")
        fields = []
        for k, v in self.fields.items():
            _check_name(k, "field key")
            if '"' in k:
                raise ValueError(f"field key {k!r} holds a double quote; servers disagree on it")
            fields.append(f"{_escape(k, 'key', dialect, ',= ', 'field key')}={_field_value(v, k)}")
        if not isinstance(self.time_ms, int) or isinstance(self.time_ms, bool):
            raise ValueError(f"time_ms must be an int (milliseconds), got {self.time_ms!r}")
        return f"{','.join(parts)} {','.join(fields)} {self.time_ms}"


def encode(points: Iterable[Point], dialect: Dialect = "v1") -> bytes:
    """Points as a line-protocol request body (UTF-8, one point per line)."""
    return "\n".join(p.line(dialect) for p in points).encode("utf-8")


# --------------------------------------------------------------------------- schema


FieldType = Literal["float", "int", "bool", "string"]
_PY_TYPES: dict[str, Callable[[Any], Scalar]] = {
    "float": float,
    "int": int,
    "bool": bool,
    "string": str,
}


@dataclass(frozen=True, slots=True)
class FieldSpec:
    type: FieldType
    doc: str
    unit: str = ""
    required: bool = True


@dataclass(frozen=True, slots=True)
class Measurement:
    """What one measurement holds; :meth:`point` builds a point and checks it against this."""

    name: str
    kind: str  # the fact kind it is made from
    doc: str
    tags: Mapping[str, str]  # tag -> meaning; every tag is part of the series key
    fields: Mapping[str, FieldSpec]
    time: str  # what the timestamp is

    @property
    def key(self) -> str:
        """The series key plus timestamp that is unique per fact."""
        return f"{','.join([self.name, *self.tags])} + {self.time}"

    def check(self, p: Point) -> None:
        """Raise ValueError unless ``p`` has exactly this measurement's tags and fields of its types."""
        if set(p.tags) != set(self.tags) or not all(p.tags.values()):
            raise ValueError(
                f"{self.name}: tags {sorted(p.tags)} do not match the schema {sorted(self.tags)}"
                " (all required, non-empty)"
            )
        for k, spec in self.fields.items():
            v = p.fields.get(k)
            if v is None:
                if spec.required:
                    raise ValueError(f"{self.name}: required field {k!r} is missing")
            elif type(v) is not _PY_TYPES[spec.type]:
                raise ValueError(f"{self.name}: field {k!r} = {v!r} is not a {spec.type}")
        unknown = set(p.fields) - set(self.fields)
        if unknown:
            raise ValueError(f"{self.name}: fields {sorted(unknown)} are not in the schema")

    def point(self, t: float, tags: Mapping[str, str], fields: Mapping[str, Any]) -> Point:
        """A point of this measurement at unix seconds ``t``; values coerced to the schema's types.

        Every schema tag must be given (non-empty); unknown tags or fields, missing required
        fields and values of the wrong kind raise ValueError. ``None`` fields are left out.
        """
        out: dict[str, Scalar] = {}
        for k, v in fields.items():
            spec = self.fields.get(k)
            if v is None:
                continue
            if spec is None:
                raise ValueError(f"{self.name}: field {k!r} is not in the schema")
            if (spec.type == "string") != isinstance(v, str):
                raise ValueError(f"{self.name}: field {k!r} must be a {spec.type}, got {v!r}")
            # A float field sent once as 0 (int) would be a type conflict in InfluxDB 1.x.
            out[k] = _PY_TYPES[spec.type](v)
        p = Point(self.name, {k: str(v) for k, v in tags.items()}, out, to_ms(t))
        self.check(p)
        return p


def _budget_fields() -> dict[str, FieldSpec]:
    specs: dict[str, FieldSpec] = {}
    for b in BEHAVIOURS:
        specs[f"{b}_min"] = FieldSpec("float", f"minutes of {b} in the day", "min")
        specs[f"{b}_bouts"] = FieldSpec("int", f"{b} bouts starting in the day")
        specs[f"{b}_mean_bout_min"] = FieldSpec(
            "float", f"mean length of those {b} bouts", "min", required=False
        )
    specs[f"{NO_DATA}_min"] = FieldSpec("float", "minutes known unclassified", "min")
    specs["coverage"] = FieldSpec("float", "classified share of the day, 0..1")
    specs["final"] = FieldSpec("bool", "the day is over and complete; false: provisional")
    return specs


_SITE = "site id (settings.site.id)"
SCHEMA: dict[str, Measurement] = {
    m.name: m
    for m in (
        Measurement(
            name="bout",
            kind="bout_closed",
            doc="A behaviour bout that has ended.",
            tags={"site": _SITE, "animal": "animal id", "behaviour": "behaviour of the bout"},
            fields={
                "duration_s": FieldSpec("float", "end - start", "s"),
                "mean_confidence": FieldSpec("float", "mean smoothed confidence, 0..1"),
                "no_data_s": FieldSpec("float", "unclassified seconds bridged inside", "s"),
            },
            time="bout start",
        ),
        Measurement(
            name="animal_state",
            kind="state_changed",
            doc="An animal's current behaviour changed.",
            tags={"site": _SITE, "animal": "animal id", "behaviour": "the new behaviour"},
            fields={
                "code": FieldSpec(
                    "int",
                    "index of behaviour in " + ", ".join(BEHAVIOURS) + f" (0..); -1 for {NO_DATA}",
                ),
                "confidence": FieldSpec("float", "smoothed confidence, 0..1"),
                "previous": FieldSpec(
                    "string", "behaviour before, absent at start", required=False
                ),
            },
            time="since (the first hop of the new behaviour)",
        ),
        Measurement(
            name="daily_budget",
            kind="daily_budget",
            doc=(
                "One animal's time budget for one local day. Provisional budgets are sent"
                " during the day and overwrite each other (same key); the final one last."
            ),
            tags={"site": _SITE, "animal": "animal id"},
            fields=_budget_fields(),
            time="start of the local day (site.timezone, site.day_start_hour)",
        ),
        Measurement(
            name="alert",
            kind="alert",
            doc="An own-baseline alert on one animal (decision support, not a diagnosis).",
            tags={"site": _SITE, "animal": "animal id", "rule": "what fired, e.g. rumination_drop"},
            fields={
                "value": FieldSpec("float", "the observed value the rule looked at"),
                "baseline": FieldSpec("float", "the animal's own baseline for it"),
                "change_pct": FieldSpec("float", "(value - baseline) / baseline * 100", "%"),
                "score": FieldSpec("float", "z-score against the baseline", required=False),
                "message": FieldSpec("string", "one line for people"),
            },
            time="when the alert was raised",
        ),
        Measurement(
            name="collar_health",
            kind="collar_health",
            doc="How one collar is reporting over an interval.",
            tags={"site": _SITE, "collar": "collar id", "animal": "animal wearing it"},
            fields={
                "frame_rate_hz": FieldSpec("float", "frames received per second", "Hz"),
                "loss": FieldSpec("float", "share of expected frames missing (seq gaps), 0..1"),
                "battery_v": FieldSpec("float", "last battery voltage", "V", required=False),
                "last_seen": FieldSpec("float", "gateway time of the last frame", "unix s"),
                "frames": FieldSpec("int", "frames received in the interval"),
            },
            time="end of the interval",
        ),
        Measurement(
            name="gateway_stats",
            kind="gateway_stats",
            doc="Gateway counters, sampled every minute (totals since the gateway started).",
            tags={"site": _SITE},
            fields={
                "frames_in": FieldSpec("int", "collar frames accepted"),
                "rejects": FieldSpec("int", "payloads or frames rejected"),
                "windows": FieldSpec("int", "windows classified"),
                "events": FieldSpec("int", "events emitted"),
                "inference_s": FieldSpec("float", "time spent in inference", "s"),
                "backlog": FieldSpec("int", "largest undelivered backlog of any sink"),
                "uptime_s": FieldSpec("float", "seconds since the gateway started", "s"),
            },
            time="sample time",
        ),
        Measurement(
            name="gateway_alert",
            kind="gateway_alert",
            doc="Something the gateway operator must know (e.g. the outbox dropped points).",
            tags={"site": _SITE, "cause": "what happened, e.g. outbox_full"},
            fields={
                "dropped": FieldSpec("int", "points lost because of it (0 if none)"),
                "message": FieldSpec("string", "one line for people"),
            },
            time="when it happened",
        ),
    )
}


# --------------------------------------------------------------------------- converters

Converter = Callable[[Mapping[str, Any], str], list[Point]]
_CONVERTERS: dict[str, Converter] = {}
_DEFAULTS: set[str] = set()  # kinds whose converter is this module's default


def register_converter(
    kind: str, fn: Converter, *, replace: bool = False, default: bool = False
) -> Converter:
    """Register ``fn(fact, site) -> [Point]`` for facts of ``kind``; returns ``fn``.

    Other modules add their own kinds this way, or replace a default of this module (the
    defaults read facts whose attributes carry the schema's names). Points must match a
    measurement in :data:`SCHEMA`; :func:`points_for` checks them.
    """
    taken = kind in _CONVERTERS and kind not in _DEFAULTS and _CONVERTERS[kind] is not fn
    if taken and not replace:
        raise ValueError(f"a converter for {kind!r} is already registered; pass replace=True")
    _CONVERTERS[kind] = fn
    (_DEFAULTS.add if default else _DEFAULTS.discard)(kind)
    return fn


def converter_kinds() -> list[str]:
    return sorted(_CONVERTERS)


# The module that owns a fact kind and registers its converter when imported. A process that
# forwards facts without having imported it (python -m gateway.outbox) loads it on first use.
_PROVIDERS = {
    "daily_budget": "gateway.budgets",
    "alert": "gateway.alerts",
    "collar_health": "gateway.collarhealth",
}


def _converter(kind: Any) -> Converter | None:
    if not isinstance(kind, str):
        return None
    provider = _PROVIDERS.pop(kind, None)
    if provider is not None and (kind not in _CONVERTERS or kind in _DEFAULTS):
        with contextlib.suppress(ModuleNotFoundError):  # not in this build: default or none
            importlib.import_module(provider)
    return _CONVERTERS.get(kind)


def points_for(fact: Mapping[str, Any], site: str) -> list[Point]:
    """The points for one fact (a dict with ``kind``); raises LookupError/ValueError if it cannot."""
    kind = fact.get("kind")
    fn = _converter(kind)
    if fn is None:
        raise LookupError(f"no line-protocol converter for fact kind {kind!r}")
    points = fn(fact, site)
    for p in points:
        m = SCHEMA.get(p.measurement)
        if m is None:
            raise ValueError(f"{kind!r} made measurement {p.measurement!r}, which is not in SCHEMA")
        m.check(p)
    return points


def simple_converter(measurement: str, time_key: str, tag_keys: Iterable[str] = ()) -> Converter:
    """A converter that copies tags and fields of the schema's names from the fact.

    ``site`` comes from the gateway; ``tag_keys`` are the other tags, ``time_key`` the fact's
    unix-seconds attribute that becomes the timestamp.
    """
    m = SCHEMA[measurement]
    tags_from_fact = tuple(tag_keys)

    def convert(fact: Mapping[str, Any], site: str) -> list[Point]:
        tags = {"site": site, **{k: str(fact[k]) for k in tags_from_fact}}
        return [m.point(fact[time_key], tags, {k: fact.get(k) for k in m.fields})]

    return convert


def _bout(fact: Mapping[str, Any], site: str) -> list[Point]:
    tags = {"site": site, "animal": fact["animal"], "behaviour": fact["behaviour"]}
    fields = {
        "duration_s": float(fact["end"]) - float(fact["start"]),
        "mean_confidence": fact["mean_confidence"],
        "no_data_s": fact.get("no_data_s", 0.0),
    }
    return [SCHEMA["bout"].point(fact["start"], tags, fields)]


def _state(fact: Mapping[str, Any], site: str) -> list[Point]:
    b = fact["behaviour"]
    code = BEHAVIOURS.index(b) if b in BEHAVIOURS else -1
    tags = {"site": site, "animal": fact["animal"], "behaviour": b}
    fields = {"code": code, "confidence": fact["confidence"], "previous": fact.get("previous")}
    return [SCHEMA["animal_state"].point(fact["since"], tags, fields)]


def _budget(fact: Mapping[str, Any], site: str) -> list[Point]:
    """A ``DailyBudget`` fact (gateway/budgets.py): per-behaviour dicts become fields."""
    minutes, bouts = fact["minutes"], fact.get("bouts", {})
    mean = fact.get("mean_bout_min", {})
    length = (float(fact["end"]) - float(fact["start"])) / 60.0
    fields: dict[str, Any] = {f"{NO_DATA}_min": fact["no_data_min"], "final": fact["final"]}
    for b in BEHAVIOURS:
        fields[f"{b}_min"] = minutes.get(b, 0.0)
        fields[f"{b}_bouts"] = bouts.get(b, 0)
        fields[f"{b}_mean_bout_min"] = mean.get(b)
    classified = sum(float(minutes.get(b, 0.0)) for b in BEHAVIOURS)
    fields["coverage"] = min(classified / length, 1.0) if length > 0 else 0.0
    tags = {"site": site, "animal": fact["animal"]}
    return [SCHEMA["daily_budget"].point(fact["start"], tags, fields)]


register_converter("bout_closed", _bout)
register_converter("state_changed", _state)
register_converter("gateway_stats", simple_converter("gateway_stats", "t"))
register_converter("gateway_alert", simple_converter("gateway_alert", "t", ("cause",)))
# A default for the budget ledger's facts; gateway/budgets.py may register its own.
register_converter("daily_budget", _budget, default=True)


# --------------------------------------------------------------------------- docs


def schema_markdown() -> str:
    """The schema as Markdown tables (docs/line-protocol.md holds exactly this text)."""
    out: list[str] = []
    for m in SCHEMA.values():
        out += [f"### `{m.name}`", "", f"{m.doc} Made from facts of kind `{m.kind}`.", ""]
        out += [f"- timestamp: {m.time} (ms)", f"- unique key: `{m.key}`", ""]
        out += ["| column | role | type | unit | meaning |", "|---|---|---|---|---|"]
        out += [f"| `{k}` | tag | string | | {doc} |" for k, doc in m.tags.items()]
        for k, f in m.fields.items():
            opt = "" if f.required else " (optional)"
            out.append(f"| `{k}` | field | {f.type} | {f.unit} | {f.doc}{opt} |")
        out.append("")
    return "\n".join(out)
