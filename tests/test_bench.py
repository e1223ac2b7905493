"""The benchmark machinery on a tiny herd: counting, statistics, payload files, clean-up.

Never a timed assertion: speed is what `boutline bench` reports, not what tests check.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from gateway import bench
from gateway import benchrun as br
from gateway.cli import main
from gateway.wire import Rejection, decode, parse_topic
from simulator.herd import Herd


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory) -> bench.PayloadSet:
    """Four collars for 40 herd seconds, both encodings."""
    return bench.build_payloads(tmp_path_factory.mktemp("herd") / "p", 4, 40.0, seed=3)


@pytest.mark.parametrize("n", [1, 2, 3, 10, 101, 1000])
def test_summarize_matches_numpy_percentile(n: int) -> None:
    x = np.random.default_rng(n).lognormal(-3.0, 1.0, n)
    s = bench.summarize(x)
    assert s["n"] == n
    for q in (50, 90, 99):
        # reference: numpy.percentile, default "linear" method (numpy docs)
        assert s[f"p{q}"] == pytest.approx(float(np.percentile(x, q)), rel=1e-12)
    assert s["max"] == pytest.approx(float(x.max())) and s["mean"] == pytest.approx(x.mean())


def test_summarize_empty_and_non_finite() -> None:
    assert bench.summarize([]) == {
        "n": 0, "mean": None, "p50": None, "p90": None, "p99": None, "max": None,
    }  # fmt: skip
    s = bench.summarize([0.1, float("nan"), 0.3, float("inf")])
    assert s["n"] == 2 and s["p50"] == pytest.approx(0.2)


def test_median_runs_per_key() -> None:
    runs = [
        {"fps": 10.0, "ok": True, "rss": None, "mode": "drain"},
        {"fps": 40.0, "ok": False, "rss": 120.0},
        {"fps": 20.0, "ok": True, "rss": 100.0, "extra": 3},
    ]
    m = bench.median_runs(runs)
    assert m["fps"] == 20.0  # odd count: the middle one
    assert m["rss"] == 110.0  # runs without the figure are left out, even count: mean of two
    assert m["ok"] is False  # a flag holds only if it held in every run
    assert m["mode"] == "drain" and m["extra"] == 3.0


def test_payload_set_holds_the_herd_in_both_encodings(tiny: bench.PayloadSet) -> None:
    herd = Herd(4, seed=3, start=tiny.start, days=40.0 / 86400.0)
    truth = list(herd)
    assert tiny.frames == len(truth) > 100 and tiny.collars == 4
    assert tiny.samples == sum(f.n for f in truth)
    topics = tiny.topics()
    for fmt in bench.FORMATS:
        got = list(tiny.payloads(fmt))
        assert len(got) == len(truth)
        for (c, payload), f in zip(got, truth, strict=True):
            where = parse_topic(topics[c], bench.TOPIC_PREFIX)
            assert not isinstance(where, Rejection) and where == (bench.SITE, f.collar_id)
            frame = decode(payload, f.collar_id)
            assert frame and frame.seq == f.seq and frame.n == f.n
            assert abs(frame.t - f.t) < 1e-3  # both encodings keep milliseconds
            # binary is int16 at range/32767 g per LSB, JSON 4 decimals
            np.testing.assert_allclose(frame.acc, f.acc, atol=2e-4)
    assert 0 < tiny.count(10.0)[0] < tiny.count(20.0)[0] < tiny.count()[0] == tiny.frames


def test_payload_set_refuses_an_empty_herd(tmp_path: Path) -> None:
    with pytest.raises(bench.ConfigError):
        bench.build_payloads(tmp_path, 0, 10.0)


@pytest.mark.integration
def test_bare_subscriber_counts_every_frame_and_the_broker_is_stopped(
    tiny: bench.PayloadSet, tmp_path: Path
) -> None:
    expected, samples = tiny.count()
    with bench.bench_broker(tmp_path / "broker", max_queued=expected + 10) as srv:
        pid = srv.pid
        spec = br.ConsumeSpec(srv.host, srv.port, expected, backlog=expected, idle_timeout_s=5)
        r = br.run_phases(
            br.bare_main, spec, tiny, srv, fmt="json", publishers=2, backlog_until_s=None
        )
    assert r["published"] == expected and r["messages"] == expected
    assert r["frames"] == expected and r["rejects"] == 0 and r["samples"] == samples
    assert r["complete"] and r["frames_per_s"] > 0 and r["peak_rss_mb"] > 0
    assert srv.proc.poll() is not None  # our broker is gone ...
    with pytest.raises(ProcessLookupError):
        os.kill(pid, 0)  # ... by its pid
    assert mp.active_children() == []  # and so are the publishers and the consumer


@pytest.mark.integration
def test_gateway_run_counts_frames_and_stores(tiny: bench.PayloadSet, tmp_path: Path) -> None:
    opts = bench.BenchOptions(collars=(4,), publishers=1)
    r = bench._drain("gateway", tiny, tmp_path, opts, "binary", 40.0)
    assert r["expected"] == tiny.frames == r["messages"] == r["frames"]
    assert r["rejects"] == {} and r["queue_dropped"] == 0
    # 40 s of 4 collars: windows every 5 s once the first 10 s are in
    assert r["windows"] >= 12 and r["store_bytes"] > 0
    assert r["stage_calls"]["handle"] >= 1 and r["stage_calls"]["tick"] >= 1
    assert mp.active_children() == []


def test_latency_probe_on_the_real_gateway(tiny: bench.PayloadSet, tmp_path: Path) -> None:
    """Windows classified after catch-up get window -> commit latencies, nothing else."""
    from gateway.daemon import Gateway
    from gateway.store import Store

    spec = br.GatewaySpec("127.0.0.1", 1, tiny.frames, data_dir=str(tmp_path), replay=True)
    settings = br.bench_settings(spec)
    with Store.open(settings.data_dir) as store:
        gw = Gateway(settings, store=store, speed=None)
        prog = br._Progress(spec, conn=None)
        probe = br._Probe(gw, store, prog, latency=True, settle_s=0.0)
        topics = tiny.topics()
        msgs = [(topics[c], p, time.time()) for c, p in tiny.payloads("binary")]
        half = len(msgs) // 2
        gw.handle(msgs[:half])
        gw.tick()
        assert probe.latencies == []  # not caught up yet: nothing counted
        prog.t_caught_up = time.time() - 60.0
        t0 = time.time()
        gw.handle([(t, p, time.time()) for t, p, _ in msgs[half:]])
        gw.tick()
        gw.close(flush=True)
        elapsed = time.time() - t0
    figures = probe.figures()
    lat = figures["latency"]
    assert prog.msgs == len(msgs) and figures["stage_calls"]["tick"] >= 2
    assert lat["n"] > 0 and 0.0 <= lat["p50"] <= lat["p99"] <= lat["max"] <= elapsed + 1e-3


def test_targets_and_table() -> None:
    rows = [
        {"collars": 100, "format": "json", "cpu_s_per_1000_frames": 0.050, "ratio_bare": 0.7},
        {
            "collars": 1000, "format": "json", "latency_p99_ms": 300.0,
            "cpu_s_per_1000_frames": 0.055, "binary_speedup": 2.4,
        },
        {
            "collars": 10000, "format": "json", "headroom": 1.6, "peak_rss_mb": 260.0,
            "cpu_s_per_1000_frames": 0.070, "frames_per_s": 16000.0,
        },
    ]  # fmt: skip
    verdicts = {t["target"]: t for t in bench.evaluate_targets(rows)}
    assert verdicts["headroom_10000"]["met"] is True
    assert verdicts["ratio_bare_json"]["met"] is True
    assert verdicts["binary_speedup"]["met"] is True
    assert verdicts["p99_latency_1000"]["met"] is False
    assert verdicts["rss_10000"]["met"] is False
    assert verdicts["cost_flat"]["measured"] == pytest.approx(0.070 / 0.050)
    assert verdicts["cost_flat"]["met"] is False
    text = bench.format_table(rows, list(verdicts.values()))
    assert "16,000" in text and "MISSED p99" in text and "met    10,000 collars" in text
    assert bench.evaluate_targets([{"collars": 5}])[0]["met"] is None  # not measured


def test_soak_rss_growth_is_the_second_half_slope() -> None:
    from gateway.benchsoak import growth_per_day

    days = np.linspace(0.0, 7.0, 71)
    warm_then_flat = np.where(days < 1.0, 60.0 + 40.0 * days, 100.0)
    assert growth_per_day(days, warm_then_flat) == pytest.approx(0.0, abs=1e-9)
    leak = 100.0 + 3.0 * days
    assert growth_per_day(days, leak) == pytest.approx(3.0)  # reference: the slope we built in
    assert growth_per_day(days[:2], leak[:2]) is None  # too few points to say


def test_profile_summary_shares(tmp_path: Path) -> None:
    folded = tmp_path / "p.txt"
    folded.write_text(
        "main (a.py:1);work (gateway/wire.py:10);decode (gateway/wire.py:20) 30\n"
        "main (a.py:1);work (gateway/wire.py:12) 10\n"
        "main (a.py:1);loop (/x/site-packages/paho/mqtt/client.py:5) 60\n"
        "garbage line\n"
    )
    s = bench.profile_summary(folded)
    assert s["samples"] == 100
    assert s["own_percent"][0] == ("loop (paho/mqtt/client.py)", 60.0)
    assert dict(s["own_percent"])["decode (gateway/wire.py)"] == 30.0
    assert dict(s["module_percent"]) == {"paho/mqtt/client.py": 60.0, "gateway/wire.py": 40.0}


def test_process_figures_of_this_process_and_of_a_gone_one() -> None:
    assert bench.pid_peak_rss_mb(os.getpid()) > 1.0
    assert bench.pid_cpu_s(os.getpid()) > 0.0
    ctx = mp.get_context("spawn")
    p = ctx.Process(target=time.sleep, args=(0,))
    p.start()
    p.join()
    assert bench.pid_peak_rss_mb(p.pid) is None and bench.pid_cpu_s(p.pid) == 0.0
    assert bench.tree_mb(p.pid, bench.pid_rss_mb) is None


def test_tree_figures_add_the_children() -> None:
    child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        assert child.pid in bench.pid_children(os.getpid())
        own, kid = bench.pid_rss_mb(os.getpid()), bench.pid_rss_mb(child.pid)
        assert own and kid
        total = bench.tree_mb(os.getpid(), bench.pid_rss_mb)
        assert total is not None and total >= own + 0.5 * kid  # RSS moves a little between reads
        assert bench.tree_cpu_s(os.getpid()) >= bench.pid_cpu_s(os.getpid())
    finally:
        child.kill()  # the process started above, by its handle
        child.wait(10)


@pytest.mark.parametrize(
    ("argv", "code", "needle"),
    [
        (["bench", "--collars", "ten"], 1, "--collars 'ten' is not a list"),
        (["bench", "--collars", "0"], 1, "collars must be whole numbers"),
        (["bench", "--format", "xml"], 1, "format 'xml'"),
        (["bench", "--phases", "gateway,magic"], 1, "--phases"),
        (["bench", "--soak", "--soak-days", "0"], 1, "soak days must be between"),
        (["bench", "--soak", "--soak-speed", "5000"], 1, "soak speed must be between"),
        (["bench", "--soak", "--soak-frame-s", "0"], 1, "soak frame length must be between"),
        (["bench", "--soak", "--soak-frame-s", "nan"], 1, "soak frame length must be between"),
    ],
)
def test_cli_refuses_bad_options_in_one_line(
    argv: list[str], code: int, needle: str, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as exc:
        main(argv)
    assert exc.value.code == code
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and needle in err[0]
