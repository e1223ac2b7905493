"""The Herd iterable: reproducible by seed, the same in any shard, in send order, and strict
about impossible parameters."""

from __future__ import annotations

import doctest

import numpy as np
import pytest

from gateway.cli import main
from gateway.errors import ConfigError
from gateway.types import BEHAVIOURS, Frame
from simulator import health, herd, rand, record, schedule, sensor, signal
from simulator.herd import Herd


def _key(f: Frame) -> tuple[str, int]:
    return (f.collar_id, f.seq)


def test_same_seed_same_frames_other_seed_other_frames() -> None:
    a = Herd(5, scenario="mixed", seed=3).take(300)
    b = Herd(5, scenario="mixed", seed=3).take(300)
    c = Herd(5, scenario="mixed", seed=4).take(300)
    assert [_key(f) for f in a] == [_key(f) for f in b]
    assert all(np.array_equal(x.acc, y.acc) and x.t == y.t for x, y in zip(a, b, strict=True))
    same = [np.array_equal(x.acc, y.acc) for x, y in zip(a, c, strict=False)]
    assert not any(same)


def test_shards_and_subsets_make_the_same_collars() -> None:
    kw = dict(n_animals=7, scenario="mixed", seed=11, days=120 / 86400)
    whole = {_key(f): f for f in Herd(**kw)}
    parts = {}
    for k in range(3):
        parts.update({_key(f): f for f in Herd(**kw, shard=(k, 3))})
    assert parts.keys() == whole.keys()
    for key, f in whole.items():
        assert np.array_equal(parts[key].acc, f.acc) and parts[key].t == f.t
    # an animal's behaviour does not depend on the herd's size either
    small = Herd(**{**kw, "n_animals": 3})
    big = Herd(**kw)
    first = [o for o in small.observations() if o[0] == "cow-001"]
    assert first and first == [o for o in big.observations() if o[0] == "cow-001"]


def test_frames_come_in_send_order_with_contiguous_collar_times() -> None:
    h = Herd(20, seed=2, loss=0.0, silence_per_day=0.0, days=300 / 86400)
    frames = list(h)
    sent = np.concatenate([b.sent for b in h.blocks()])
    assert (np.diff(sent) >= 0).all()
    assert len(frames) == len(sent)
    by_collar: dict[str, list[Frame]] = {}
    for f in frames:
        by_collar.setdefault(f.collar_id, []).append(f)
    assert len(by_collar) == 20
    for fs in by_collar.values():
        assert [f.seq for f in fs] == list(range(fs[0].seq, fs[0].seq + len(fs)))
        assert all(abs(b.t - a.t_end) < 1e-6 for a, b in zip(fs, fs[1:], strict=False))
        assert 298 <= len(fs) <= 301  # one frame a second for 300 s (clock offsets +/- 0.5 s)


@pytest.mark.parametrize(("hz", "n"), [(10.0, 10), (12.5, 12), (25.0, 25)])
def test_sample_rates(hz: float, n: int) -> None:
    frames = Herd(2, seed=1, hz=hz).take(6)
    assert all(f.hz == hz and f.acc.shape == (n, 3) and f.acc.dtype == np.float32 for f in frames)
    assert all(f.battery_v is not None and 3.3 <= f.battery_v <= 4.15 for f in frames)
    assert frames[0].t >= 1772323200.0 - 1.0


def test_take_stops_at_the_end_of_a_finite_herd() -> None:
    h = Herd(2, seed=1, days=10 / 86400, loss=0.0, silence_per_day=0.0)
    assert 16 <= len(h.take(10_000)) <= 22


def test_ground_truth_shapes() -> None:
    h = Herd(4, scenario="mixed", seed=5, days=1)
    obs = h.observations()
    assert {o[4] for o in obs} <= set(BEHAVIOURS)
    for animal, collar, s, e, _ in obs:
        assert h.collar_ids[h.animal_ids.index(animal)] == collar and e > s
    budgets = h.budgets()
    assert len(budgets) == 4 * 5  # one UTC day, five behaviours, four animals
    per_animal: dict[str, float] = {}
    for animal, day, _b, minutes in budgets:
        assert day == "2026-03-01"
        per_animal[animal] = per_animal.get(animal, 0.0) + minutes
    assert all(abs(v - 1440.0) < 0.01 for v in per_animal.values())
    assert [a["to"] for a in h.assignments] == [""] * 4
    assert h.to_json()["animals"][1]["scenario"] == "pasture"
    with pytest.raises(ConfigError, match="endless"):
        Herd(2).observations()


BAD = [
    ({"n_animals": -5}, "herd size -5 is not possible"),
    ({"n_animals": 0}, "herd size 0"),
    ({"n_animals": 2.5}, "herd size 2.5"),
    ({"hz": 0.0}, "sample rate 0.0 Hz is not possible"),
    ({"hz": float("nan")}, "sample rate nan"),
    ({"scenario": "moon"}, "unknown scenario 'moon'"),
    ({"days": 0}, "days 0 must be > 0"),
    ({"days": -1.0}, "days -1.0"),
    ({"range_g": 3.0}, "range 3.0 g"),
    ({"seed": -1}, "seed -1"),
    ({"frame_s": 0.0}, "frame length"),
    ({"hz": 200.0, "frame_s": 10.0}, "at most 1024 samples"),
    ({"loss": -1.0}, "loss scale"),
    ({"illness_share": 0.6, "estrus_share": 0.6}, "add up to more than 1"),
    ({"shard": (2, 2)}, "shard"),
    ({"collars": [99]}, "collar indices"),
    # oversized
    ({"n_animals": 10**9}, "over the limit of 100000"),
    ({"days": 1e9}, "more than a year"),
    ({"hz": 1e6}, "sample rate 1000000.0 Hz"),
    ({"start": 1e20}, "between 1970 and 2100"),
    ({"start": float("inf")}, "start inf"),
    ({"loss": 1e300}, "loss scale"),
]


@pytest.mark.parametrize(("kw", "message"), BAD)
def test_impossible_parameters_are_one_clear_sentence(kw: dict, message: str) -> None:
    args = {"n_animals": 3, **kw}
    with pytest.raises(ConfigError, match=message.replace("(", r"\(")) as ei:
        Herd(**args)
    assert str(ei.value).endswith(".") and "\n" not in str(ei.value)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--herd", "-4"], "herd size -4 is not possible"),
        (["--hz", "0"], "sample rate 0.0 Hz"),
        (["--scenario", "mars"], "unknown scenario 'mars'"),
        (["--days", "0"], "days 0.0 must be > 0"),
        (["--range-g", "16"], "range 16.0 g"),
        (["--format", "xml"], "unknown format 'xml'"),
        (["--start", "yesterday"], "--start 'yesterday' is not a time"),
        (["--processes", "-2"], "--processes -2"),
    ],
)
def test_cli_record_bad_input_is_one_error_line(tmp_path, capsys, argv, message) -> None:
    out = tmp_path / "rec"
    with pytest.raises(SystemExit) as ei:
        main(["simulate", "record", "--out", str(out), "--days", "0.001", *argv])
    assert ei.value.code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("Error: ") and message in err[0], err
    assert not out.exists()  # nothing written


def test_cli_publish_bad_input_is_one_error_line(capsys) -> None:
    with pytest.raises(SystemExit) as ei:
        main(["simulate", "publish", "--herd", "-1", "--port", "1"])
    assert ei.value.code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["Error: herd size -1 is not possible; give a whole number of animals >= 1."]


def test_refits_hand_an_animal_to_a_spare_collar() -> None:
    from gateway.registry import Registry, parse_assignments_csv

    h = Herd(10, seed=6, days=1, refit_share=0.3, loss=0.0, silence_per_day=0.0)
    assert h.collar_ids[10:] == ["C0011", "C0012", "C0013"] and len(h.refits) == 3
    rows = h.assignments
    text = "collar,animal,from,to\n" + "".join(
        f"{r['collar']},{r['animal']},{r['from']},{r['to']}\n" for r in rows
    )
    reg = Registry(parse_assignments_csv(text))  # the gateway's own checks: no overlaps
    b = h.generate(0.0, 86400.0, samples=False)
    for ref in h.refits:
        old, new = h.collar_ids.index(ref["old_collar"]), h.collar_ids.index(ref["new_collar"])
        at = ref["at"]
        old_sent = b.sent[b.row == np.flatnonzero(h.local == old)[0]]
        new_rows = b.row == np.flatnonzero(h.local == new)[0]
        assert old_sent.max() <= at < b.sent[new_rows].min() <= at + 3.0
        assert b.seq[new_rows][0] == 0  # a collar counts its frames from its own start
        assert reg.resolve(ref["new_collar"], at + 60.0) == ref["animal"]
        assert reg.resolve(ref["old_collar"], at - 60.0) == ref["animal"]
        obs = [o for o in h.observations() if o[0] == ref["animal"]]
        assert {o[1] for o in obs} == {ref["old_collar"], ref["new_collar"]}
        assert all((o[3] <= at) if o[1] == ref["old_collar"] else (o[2] >= at) for o in obs)
    # an animal behaves the same whether or not its collar was replaced
    plain = Herd(10, seed=6, days=1)
    assert [o[2:] for o in plain.observations()] == [
        o[2:] for o in _merge_at_refits(h.observations())
    ]


def _merge_at_refits(obs: list[tuple]) -> list[tuple]:
    out: list[tuple] = []
    for o in obs:
        if out and out[-1][0] == o[0] and out[-1][4] == o[4] and abs(out[-1][3] - o[2]) < 1e-6:
            out[-1] = (o[0], o[1], out[-1][2], o[3], o[4])
        else:
            out.append(o)
    return out


@pytest.mark.parametrize("module", [herd, rand, record, schedule, sensor, signal, health])
def test_docstring_examples_run(module) -> None:
    res = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert res.failed == 0
