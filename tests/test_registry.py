"""Collar -> animal registry: validity periods, file formats, unknown collars, the cap."""

from __future__ import annotations

import math
from datetime import UTC, datetime

import pytest

from gateway.errors import DataError
from gateway.registry import (
    Assignment,
    Registry,
    load_assignments,
    parse_assignments_csv,
    parse_assignments_toml,
    parse_time,
)
from gateway.wire import Reason, Rejection

T_MAR = datetime(2026, 3, 1, tzinfo=UTC).timestamp()

CSV = """collar,animal,from,to
# the collar moved from cow-17 to cow-22 on 1 March
C0001,cow-17,2026-01-01T00:00:00Z,2026-03-01T00:00:00Z
C0001,cow-22,2026-03-01T00:00:00Z,
C0002,cow-18,2026-01-01T00:00:00+01:00,
"""


def test_csv_periods_keep_each_cows_history_apart() -> None:
    items = parse_assignments_csv(CSV)
    assert len(items) == 3
    reg = Registry(items)
    assert reg.resolve("C0001", T_MAR - 1) == "cow-17"
    assert reg.resolve("C0001", T_MAR) == "cow-22"  # half-open: the new cow from the instant
    assert reg.resolve("C0001", T_MAR - 3600) == "cow-17"  # cached answer re-checked by time
    # an offset in the time is honoured: 00:00+01:00 is 23:00 UTC the day before
    c2 = next(a for a in items if a.collar == "C0002")
    assert c2.valid_from == datetime(2025, 12, 31, 23, tzinfo=UTC).timestamp()
    assert c2.valid_to == math.inf


def test_before_first_assignment_is_refused_not_adopted() -> None:
    reg = Registry(parse_assignments_csv(CSV))
    r = reg.resolve("C0001", T_MAR - 200 * 86400)
    assert isinstance(r, Rejection) and r.reason == Reason.UNKNOWN_COLLAR


def test_toml_matches_csv(tmp_path) -> None:
    text = """
[[assignment]]
collar = "C0001"
animal = "cow-17"
from = 2026-01-01T00:00:00Z
to = "2026-03-01T00:00:00Z"

[[assignment]]
collar = "C0001"
animal = "cow-22"
from = 2026-03-01T00:00:00Z
"""
    p = tmp_path / "herd.toml"
    p.write_text(text)
    from_toml = load_assignments(p)
    c = tmp_path / "herd.csv"
    c.write_text(CSV)
    assert from_toml == [a for a in load_assignments(c) if a.collar == "C0001"]


def test_unknown_collars_adopt_or_refuse() -> None:
    assert Registry([], unknown_collars="adopt").resolve("C9", 1.0) == "C9"
    r = Registry([], unknown_collars="refuse").resolve("C9", 1.0)
    assert isinstance(r, Rejection) and r.reason == Reason.UNKNOWN_COLLAR and r.collar_id == "C9"


def test_collar_cap_counts_overflow_and_keeps_tracked_collars() -> None:
    reg = Registry([], max_collars=2)
    assert reg.resolve("A", 1.0) == "A"
    assert reg.resolve("B", 1.0) == "B"
    r = reg.resolve("C", 1.0)
    assert isinstance(r, Rejection) and r.reason == Reason.COLLAR_CAP
    assert reg.resolve("A", 2.0) == "A"  # already tracked collars go on
    assert reg.overflow == 1 and reg.tracked == 2


def test_overlapping_assignments_are_refused_at_load() -> None:
    with pytest.raises(DataError, match="two animals at once"):
        Registry([Assignment("C1", "a", 0, 100), Assignment("C1", "b", 50)])
    with pytest.raises(DataError, match="two collars at once"):
        Registry([Assignment("C1", "a", 0), Assignment("C2", "a", 10)])


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("collar,cow,from,to\nC1,a,2026-01-01,\n", "header"),
        ("collar,animal,from,to\nC1,a,yesterday,\n", "ISO 8601"),
        ("collar,animal,from,to\nC1,a,,\n", "'from' is empty"),
        ("collar,animal,from,to\nbad id,a,2026-01-01,\n", "collar"),
        ("collar,animal,from,to\nC1,a b,2026-01-01,\n", "animal"),
        ("collar,animal,from,to\nC1,a,2026-02-01,2026-01-01\n", "not after"),
        ("collar,animal,from,to\nC1,a,2026-01-01,,x,y\n", "4 fields"),
        ("collar,animal,from,to\n" + "C1," + "x" * 5000 + ",2026-01-01,\n", "animal"),
    ],
)
def test_malformed_csv_says_which_line_and_what(text: str, message: str) -> None:
    with pytest.raises(DataError, match=message):
        parse_assignments_csv(text, "herd.csv")


@pytest.mark.parametrize(
    "text",
    [
        "[[assignment]\n",  # broken TOML
        'assignment = "x"\n',
        '[[assignment]]\ncollar = "C1"\nanimal = "a"\nfrom = 2026-01-01T00:00:00Z\ncolour = "red"\n',
        '[[assignment]]\ncollar = 7\nanimal = "a"\nfrom = 2026-01-01T00:00:00Z\n',
        '[[assignment]]\ncollar = "C1"\nanimal = "a"\nfrom = 17\n',
        "[other]\nx = 1\n",
    ],
)
def test_malformed_toml_is_a_data_error(text: str) -> None:
    with pytest.raises(DataError):
        parse_assignments_toml(text)


def test_unreadable_and_binary_files(tmp_path) -> None:
    with pytest.raises(DataError, match="cannot read"):
        load_assignments(tmp_path / "missing.csv")
    p = tmp_path / "bin.csv"
    p.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(DataError, match="UTF-8"):
        load_assignments(p)


def test_parse_time_naive_is_utc() -> None:
    assert parse_time("2026-01-01T00:00:00", "x") == datetime(2026, 1, 1, tzinfo=UTC).timestamp()
    assert parse_time("2026-01-01T00:00:00Z", "x") == parse_time("2026-01-01T01:00:00+01:00", "x")
