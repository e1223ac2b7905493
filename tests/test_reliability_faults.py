"""Faults with real servers: the broker, the gateway and the database die; the disk fills; the
model file is broken.

``boutline run`` runs as its own process (tests/daemonproc.py) wherever the fault is the
gateway's own death or start-up; a simulated herd comes from ``boutline simulate publish``.
The figures each test prints are the ones docs/reliability.md reports.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from daemonproc import Daemon, finish, publish_herd, write_assignments
from influxhttp import create_database, rows
from polling import wait_for

from gateway.config import Settings
from gateway.model import default_model_path
from gateway.store import Store

pytestmark = pytest.mark.integration

WINDOW_S, HOP_S = 10.0, 5.0  # the shipped model's window and hop (models/MODEL_CARD.md)


def _base(site: str, broker, tmp: Path, herd: int, **sections: dict) -> dict:
    cfg: dict = {
        "site": {
            "id": site,
            "assignments": str(write_assignments(tmp / "assignments.csv", herd)),
            "unknown_collars": "refuse",
        },
        "mqtt": {"host": broker.host, "port": broker.port, "client_id": f"gw-{site}"},
        "model": {"watch": False},
        "outputs": {"mqtt": False},
        "limits": {"max_frame_rate_hz": 1000.0},  # accelerated herds send faster than collars
    }
    for k, v in sections.items():
        cfg[k] = {**cfg.get(k, {}), **v}
    return cfg


def _influx(url: str, db: str) -> dict:
    return {"enabled": True, "api": "v1", "url": url, "database": db,
            "flush_interval_s": 0.2, "retry_max_s": 1.0, "timeout_s": 2.0}  # fmt: skip


def _influx_bouts(url: str, db: str) -> tuple[set, int]:
    """(animal, behaviour, start ms) of every bout point, and how many points there are."""
    got = rows(url, db, 'SELECT "duration_s", animal, behaviour FROM "bout"')
    return {(c["animal"], c["behaviour"], t) for _, t, c in got}, len(got)


def _store_bouts(data_dir: Path) -> list:
    with Store.open(data_dir, readonly=True) as store:
        return store.bouts() + store.no_data()


def _rows(bouts: list) -> set:
    return {(b.animal, b.behaviour, b.start, b.end, b.mean_confidence, b.no_data_s) for b in bouts}


def _keys(bouts: list) -> set:
    return {(b.animal, b.behaviour, round(b.start * 1000)) for b in bouts}


# ------------------------------------------------------------------------------ model file


@pytest.mark.parametrize("broken", ["missing", "garbage", "truncated", "empty"])
def test_a_broken_model_at_start_up_is_one_clear_error_and_exit_1(
    tmp_path: Path, mosquitto, broken: str
) -> None:
    model = tmp_path / "model.onnx"
    if broken == "garbage":
        model.write_bytes(os.urandom(5000))
    elif broken == "truncated":
        model.write_bytes(default_model_path().read_bytes()[:20000])
    elif broken == "empty":
        model.write_bytes(b"")
    cfg = _base("model-start", mosquitto, tmp_path, 1, model={"path": str(model)})
    gw = Daemon(tmp_path, cfg)
    gw.start(ready=False)
    assert gw.wait_exit(60) == 1
    errors = [ln for ln in gw.log.splitlines() if ln.startswith("Error:")]
    assert len(errors) == 1 and str(model) in errors[0], gw.log
    assert "Traceback" not in gw.log
    assert not gw.ready()


@pytest.mark.slow
def test_a_broken_model_at_hot_reload_keeps_the_old_one(tmp_path: Path, mosquitto) -> None:
    model = tmp_path / "model.onnx"
    good = default_model_path().read_bytes()
    model.write_bytes(good)
    site = "model-reload"
    cfg = _base("model-reload", mosquitto, tmp_path, 2, model={"path": str(model), "watch": True})
    gw = Daemon(tmp_path, cfg).start()
    try:
        start = float(int(time.time())) - 5 * 600

        def feed() -> float:
            """Ten more minutes of the herd (flat out); the windows classified from them."""
            nonlocal start
            before = gw.value("boutline_windows_classified_total")
            finish(publish_herd(mosquitto.host, mosquitto.port, site, herd=2, duration_s=600,
                                start=start, seed=5))  # fmt: skip
            start += 600
            gw.wait_quiet("boutline_windows_classified_total")
            return gw.value("boutline_windows_classified_total") - before

        assert feed() > 0
        # 1. the file is overwritten with garbage: the watcher sees it within 2 s
        model.write_bytes(os.urandom(len(good)))
        assert wait_for(lambda: gw.value("boutline_model_reloads_total", result="refused") == 1, 20)
        assert feed() > 0  # still classifying, with the old model
        # 2. the file is gone and an operator sends SIGHUP
        model.unlink()
        os.kill(gw.pid, signal.SIGHUP)
        assert wait_for(lambda: gw.value("boutline_model_reloads_total", result="refused") == 2, 20)
        assert feed() > 0 and gw.healthz()["model_loaded"]
        # 3. a good file again: taken
        model.write_bytes(good)
        assert wait_for(lambda: gw.value("boutline_model_reloads_total", result="ok") == 1, 20)
        assert feed() > 0
    finally:
        rc = gw.stop()
    assert rc == 0
    refusals = [ln for ln in gw.log.splitlines() if "model reload refused" in ln]
    assert len(refusals) == 2 and "keeping the running model" in refusals[0]
    assert "Traceback" not in gw.log


# ------------------------------------------------------------------------------ gateway killed


@pytest.mark.slow
def test_gateway_killed_mid_stream_loses_no_committed_event_and_doubles_nothing(
    tmp_path: Path, mosquitto, influxdb1
) -> None:
    site, db, herd = "fault-kill", "fault_kill", 4
    create_database(influxdb1.url, db)
    cfg = _base(site, mosquitto, tmp_path, herd, influx=_influx(influxdb1.url, db))
    gw = Daemon(tmp_path, cfg).start()
    # 90 minutes of the herd flat out (bouts to commit), then the same herd live, in real time.
    history_s, live_s = 5400.0, 24.0
    s1 = float(int(time.time())) - history_s - 600
    herd_kw = {"herd": herd, "seed": 41, "frame_s": 5.0}
    finish(publish_herd(mosquitto.host, mosquitto.port, site, duration_s=history_s, start=s1,
                        **herd_kw))  # fmt: skip
    gw.wait_quiet("boutline_frames_in_total")
    pub = publish_herd(mosquitto.host, mosquitto.port, site, duration_s=live_s, speed=1.0,
                       start=s1 + history_s, **herd_kw)  # fmt: skip
    try:
        time.sleep(8.3)  # mid-frame and mid-window for some animals, whatever the phase
        windows_before = gw.value("boutline_windows_classified_total")
        gw.kill()
        # the store as the killed gateway left it: intact, and what it had committed
        db_file = gw.data_dir / "boutline.db"
        with sqlite3.connect(f"file:{db_file}?mode=ro", uri=True) as c:
            assert c.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        committed = _store_bouts(gw.data_dir)
        time.sleep(2.0)  # frames published meanwhile wait in the broker (persistent session)
        gw = Daemon(tmp_path, cfg).start()
        finish(pub)
        gw.wait_quiet("boutline_frames_in_total")
        assert wait_for(lambda: gw.value("boutline_sink_backlog", sink="influx") == 0, 60)
        windows_after = gw.value("boutline_windows_classified_total")
    finally:
        if pub.poll() is None:
            pub.kill()
            pub.communicate()
        rc = gw.stop()
    assert rc == 0
    final = _store_bouts(gw.data_dir)
    assert _rows(committed) <= _rows(final) and len(committed) > 0
    keys, points = _influx_bouts(influxdb1.url, db)
    assert keys == _keys(final) and points == len(final)  # once each, none missing

    # classification lost: the windows the frames make (worked out without broker or kill)
    # that neither gateway run classified
    expected = _windows_offline(cfg, [(s1, history_s), (s1 + history_s, live_s)], herd_kw)
    lost = expected - windows_before - windows_after
    print(f"\ngateway SIGKILL: {lost:.0f} of {expected:.0f} windows not classified, {herd} animals")
    # the ring buffer (under one window of samples per animal) is what dies with the process;
    # windows overlap (10 s every 5 s), so its samples belong to at most window/hop windows
    assert 0 <= lost <= herd * WINDOW_S / HOP_S


def _windows_offline(cfg: dict, parts: list[tuple[float, float]], herd_kw: dict) -> float:
    """Windows classified when the same herd's frames go straight into a gateway."""
    from gateway.daemon import Gateway
    from gateway.wire import collar_topic, encode_binary
    from simulator.herd import Herd

    gw = Gateway(Settings.model_validate({**cfg, "influx": {}}), speed=None)
    for start, seconds in parts:
        herd = Herd(herd_kw["herd"], seed=herd_kw["seed"], frame_s=herd_kw["frame_s"],
                    start=start, days=seconds / 86400.0, loss=0.0, silence_per_day=0.0)  # fmt: skip
        frames = list(herd)
        site = cfg["site"]["id"]
        for k in range(0, len(frames), 200):
            gw.handle(
                (collar_topic("barn", site, f.collar_id), encode_binary(f), f.t_end)
                for f in frames[k : k + 200]
            )
            gw.tick(now=frames[min(k + 199, len(frames) - 1)].t_end)
    gw.close(flush=False)
    return gw.telemetry.value("boutline_windows_classified_total")


# ------------------------------------------------------------------------------ database down


@pytest.mark.slow
def test_database_down_for_a_simulated_day(tmp_path: Path, mosquitto, influxdb1_private) -> None:
    site, db, herd, day = "fault-db", "fault_db", 2, 86400.0
    create_database(influxdb1_private.url, db)
    influxdb1_private.stop()
    cfg = _base(site, mosquitto, tmp_path, herd, influx=_influx(influxdb1_private.url, db))
    gw = Daemon(tmp_path, cfg).start()
    try:
        # a whole day of the herd while the database is away, driven flat out
        t_pub = time.monotonic()
        sent = finish(publish_herd(mosquitto.host, mosquitto.port, site, herd=herd,
                                   duration_s=day, seed=51), timeout_s=300)  # fmt: skip
        gw.wait_quiet("boutline_frames_in_total", sent, timeout_s=240)
        day_s = time.monotonic() - t_pub
        health = gw.healthz()
        backlog = gw.value("boutline_sink_backlog", sink="influx")
        assert health["ready"] and health["sinks"]["influx"]["state"] == "failing"
        assert "embedded store" in health["message"]
        assert gw.value("boutline_sink_up", sink="influx") == 0.0
        stored_during = len(_store_bouts(gw.data_dir))
        t0 = time.monotonic()
        influxdb1_private.start()
        assert wait_for(lambda: gw.value("boutline_sink_backlog", sink="influx") == 0, 120)
        drain_s = time.monotonic() - t0
        assert gw.healthz()["sinks"]["influx"]["state"] == "ok"

        def settled() -> bool:
            # On loaded cores the pipeline may still be storing the day's last bouts when the
            # backlog first reads 0: compare only once the store and the backlog are both still.
            n = len(_store_bouts(gw.data_dir))
            time.sleep(1.0)
            backlog_now = gw.value("boutline_sink_backlog", sink="influx")
            return backlog_now == 0 and len(_store_bouts(gw.data_dir)) == n

        assert wait_for(settled, 120)
        final = _store_bouts(gw.data_dir)
        keys, points = _influx_bouts(influxdb1_private.url, db)
    finally:
        rc = gw.stop()
    assert rc == 0
    print(f"\ndatabase down a simulated day: {backlog:.0f} facts waited, {len(final)} bouts"
          f" ({stored_during} stored during the outage) in {day_s:.0f} s, delivered in"
          f" {drain_s:.1f} s")  # fmt: skip
    assert stored_during >= herd * 5 and backlog >= stored_during
    assert keys == _keys(final) and points == len(final)  # every bout once, none missing


# ------------------------------------------------------------------------------ broker killed


class _Publisher(threading.Thread):
    """One paced QoS 1 publisher with a persistent session: what a collar gateway does.

    paho keeps unacknowledged messages of a persistent session and sends them again after a
    reconnect, and queues what is published while the broker is away.
    """

    def __init__(self, broker, messages: list[tuple[str, bytes]], rate: float) -> None:
        super().__init__(daemon=True)
        import paho.mqtt.client as mqtt

        self.messages, self.rate = messages, rate
        self.hold = threading.Event()  # set: pause between two messages
        self.sent = 0
        self.c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="fault-collars",
                             protocol=mqtt.MQTTv311, clean_session=False)  # fmt: skip
        self.c.max_queued_messages_set(0)
        self.c.reconnect_delay_set(0.1, 0.5)
        self.c.connect(broker.host, broker.port, keepalive=10)
        self.acked: set[int] = set()
        self.c.on_publish = lambda _c, _u, mid, _rc, _p: self.acked.add(mid)
        self.c.loop_start()
        self.mids: list[int] = []

    def run(self) -> None:
        t0 = time.monotonic()
        for i, (topic, payload) in enumerate(self.messages):
            while self.hold.is_set():
                time.sleep(0.01)
                t0 = time.monotonic() - i / self.rate
            lag = t0 + i / self.rate - time.monotonic()
            if lag > 0:
                time.sleep(lag)
            self.mids.append(self.c.publish(topic, payload, qos=1).mid)
            self.sent = i + 1

    def acknowledged(self) -> int:
        """Messages the broker acknowledged (PUBACK), of those published so far."""
        return sum(1 for mid in self.mids if mid in self.acked)

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


@pytest.mark.slow
def test_broker_killed_mid_stream_and_while_the_gateway_is_away(
    tmp_path: Path, mosquitto_private
) -> None:
    from gateway.daemon import Gateway, TickResult
    from gateway.wire import collar_topic, encode_binary
    from simulator.herd import Herd

    broker, site, herd_n = mosquitto_private, "fault-broker", 4
    cfg = _base(site, broker, tmp_path, herd_n,
                mqtt={"reconnect_min_s": 0.2, "reconnect_max_s": 1.0})  # fmt: skip
    start = float(int(time.time())) - 3 * 3600
    herd = Herd(herd_n, seed=61, start=start, frame_s=5.0, days=1800 / 86400.0, loss=0.0,
                silence_per_day=0.0)  # fmt: skip
    frames = list(herd)
    messages = [(collar_topic("barn", site, f.collar_id), encode_binary(f)) for f in frames]

    results: list[TickResult] = []
    gw = Gateway(Settings.model_validate(cfg), speed=None, listeners=[results.append])
    stop = threading.Event()
    errors: list[BaseException] = []

    def serve() -> None:
        try:
            gw.run(stop)
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    def connected() -> bool:
        return gw.telemetry.value("boutline_broker_connected") == 1.0

    runner = threading.Thread(target=serve)
    runner.start()
    assert wait_for(connected, 15)
    time.sleep(0.3)
    pub = _Publisher(broker, messages, rate=150.0)
    pub.start()
    try:
        # 1. the broker dies while frames flow to a connected gateway
        assert wait_for(lambda: pub.sent >= len(messages) // 4, 30)
        broker.kill()
        time.sleep(1.0)
        broker.start()
        assert wait_for(connected, 15)
        # 2. the gateway goes away (clean stop, its session stays), frames are queued for it,
        #    then the broker dies before the gateway is back
        assert wait_for(lambda: pub.sent >= len(messages) // 2, 30)
        stop.set()
        runner.join(20)
        assert wait_for(lambda: pub.sent >= 3 * len(messages) // 4, 30)
        pub.hold.set()  # the queue reaches the disk (tests/servers/mosquitto.conf: every 1 s)
        assert wait_for(lambda: pub.acknowledged() == pub.sent, 20)
        queued = pub.sent - len(messages) // 2
        time.sleep(2.5)
        broker.kill()
        time.sleep(0.5)
        broker.start()
        pub.hold.clear()
        stop = threading.Event()
        runner = threading.Thread(target=serve)
        runner.start()
        # 3. the rest arrives; wait until every frame has been handled
        pub.join(60)
        assert wait_for(lambda: pub.acknowledged() == len(messages), 30)
        assert wait_for(
            lambda: gw.telemetry.value("boutline_frames_in_total") >= len(messages), 60
        ), (gw.telemetry.value("boutline_frames_in_total"), len(messages))
        time.sleep(1.0)
    finally:
        stop.set()
        runner.join(20)
        pub.close()
    assert not errors, errors
    gw.close(flush=True)
    rejects = gw.telemetry.rejects_by_reason()
    print(f"\nbroker SIGKILL: {len(messages)} frames, {queued} queued while away,"
          f" rejects {rejects}, reconnects {gw.telemetry.value('boutline_broker_reconnects_total')}")  # fmt: skip
    # every frame taken once (QoS 1 may deliver twice: the duplicate is dropped and counted)
    assert gw.telemetry.value("boutline_frames_in_total") == len(messages)
    assert set(rejects) <= {"duplicate"}

    # the same decisions as a gateway that got every frame once, without broker
    ref = Gateway(Settings.model_validate(cfg), speed=None)
    ref_results = []
    for k in range(0, len(frames), 50):
        ref.handle((t, p, f.t_end) for (t, p), f in zip(messages[k : k + 50], frames[k : k + 50],
                                                          strict=True))  # fmt: skip
        ref_results.append(ref.tick(now=frames[min(k + 49, len(frames) - 1)].t_end))
    ref_results.append(ref.close(flush=True))

    def decided(rs: list) -> list:
        return sorted((d.animal, d.t, d.behaviour) for r in rs for d in r.decisions)

    assert decided(results) == decided(ref_results) and len(decided(results)) > 1000


# ------------------------------------------------------------------------------ disk full


def _small_filesystem_prefix(mount_point: Path, size_mb: int) -> list[str]:
    """argv that runs a command in a mount namespace of its own, ``mount_point`` being a
    tmpfs of ``size_mb`` there (unshare(1); a user namespace when we are not root)."""
    unshare = shutil.which("unshare")
    assert unshare, "unshare (util-linux) is needed to give the store a small filesystem"
    user = [] if os.geteuid() == 0 else ["--map-root-user"]
    probe = [unshare, "--mount", *user, "sh", "-c", f"mount -t tmpfs -o size=1m t {mount_point}"]
    done = subprocess.run(probe, capture_output=True, text=True)
    assert done.returncode == 0, f"cannot mount a tmpfs in a mount namespace: {done.stderr}"
    script = f'mount -t tmpfs -o size={size_mb}m boutline-test "$0" && exec "$@"'
    return [unshare, "--mount", *user, "sh", "-c", script, str(mount_point)]


def _fill(directory: Path) -> int:
    """Write a file until the filesystem is full; its size."""
    n = 0
    try:
        f = (directory / "filler").open("wb")
    except OSError as exc:  # full before the filler: say what filled it
        sizes = {p.name: p.stat().st_size for p in directory.iterdir()}
        raise AssertionError(f"{directory} is full before the filler ({exc}): {sizes}") from exc
    with f:
        chunk = b"\0" * 65536
        try:
            while True:
                f.write(chunk)
                f.flush()
                n += len(chunk)
        except OSError as exc:
            assert exc.errno == errno.ENOSPC, exc
    return n


@pytest.mark.slow
def test_store_disk_full_keeps_classifying_and_publishing_then_catches_up(
    tmp_path: Path, mosquitto
) -> None:
    from mqttpeers import Subscriber

    site, herd = "fault-disk", 2
    data = tmp_path / "data"
    data.mkdir()
    cfg = _base(site, mosquitto, tmp_path, herd, outputs={"mqtt": True},
                store={"data_dir": str(data)})  # fmt: skip
    gw = Daemon(tmp_path, cfg)
    gw.argv_prefix = _small_filesystem_prefix(data, 24)
    bouts_topic = Subscriber(mosquitto.host, mosquitto.port, f"barn/{site}/events/bouts")
    alerts = Subscriber(mosquitto.host, mosquitto.port, f"barn/{site}/alerts")
    start = float(int(time.time())) - 7 * 3600
    part_s = 2 * 3600.0

    def feed(k: int) -> None:
        finish(publish_herd(mosquitto.host, mosquitto.port, site, herd=herd, duration_s=part_s,
                            start=start + k * part_s, seed=71))  # fmt: skip
        gw.wait_quiet("boutline_frames_in_total")

    gw.start()
    seen = Path(f"/proc/{gw.pid}/root") / str(data).lstrip("/")  # the store's tmpfs, from here

    def stored() -> set:
        """Bout keys in the store, read inside the gateway's mount namespace (SQLite resolves
        /proc/<pid>/root to this namespace's root, so it cannot open the file through it)."""
        code = (
            "import json, sys; from gateway.store import Store\n"
            f"with Store.open({str(data)!r}, readonly=True) as s:\n"
            "    json.dump([(b.animal, b.behaviour, round(b.start * 1000))"
            " for b in s.bouts() + s.no_data()], sys.stdout)"
        )
        user = [] if os.geteuid() == 0 else ["--user", "--preserve-credentials"]
        argv = ["nsenter", "--target", str(gw.pid), "--mount", *user, sys.executable, "-c", code]
        done = subprocess.run(argv, capture_output=True, text=True, timeout=60)
        assert done.returncode == 0, done.stderr[-2000:]
        return {tuple(k) for k in json.loads(done.stdout)}

    try:
        feed(0)
        before = stored()
        filler = _fill(seen)
        windows = gw.value("boutline_windows_classified_total")
        feed(1)  # two hours of the herd while nothing can be written
        assert gw.value("boutline_windows_classified_total") > windows + herd * 1000
        during = stored()
        live = {(p["animal"], p["behaviour"], round(p["start"] * 1000))
                for p in (json.loads(m[1]) for m in bouts_topic.collect(quiet_s=2.0))}  # fmt: skip
        errors = [ln for ln in gw.log.splitlines() if "is full" in ln]
        (seen / "filler").unlink()  # space comes back
        feed(2)
        assert wait_for(lambda: gw.value("boutline_sink_backlog", sink="mqtt") == 0, 30)
        after = stored()
        assert gw.alive()
    finally:
        rc = gw.stop()
        bouts_topic.close()
    gateway_alerts = [json.loads(p) for _, p, _ in alerts.collect(quiet_s=0.5)]
    alerts.close()
    new_while_full = live - before
    print(f"\nstore disk full: {filler / 1e6:.1f} MB filler, {len(new_while_full)} bouts on MQTT"
          f" while full, {len(after)} stored in the end")  # fmt: skip
    assert rc == 0
    assert during == before  # nothing could be stored...
    assert len(new_while_full) >= herd * 3  # ...yet the displays heard of the bouts,
    assert errors and "free disk space" in errors[0]  # the log said why and what to do,
    assert [a["cause"] for a in gateway_alerts] == ["store_failing"]  # the alerts topic too,
    assert before | new_while_full <= after  # and every one of them was stored afterwards
    assert len(after) > len(before | new_while_full)  # and storing went on


def test_store_full_hands_events_to_the_live_path_once_each(tmp_path: Path) -> None:
    """Without servers: a capped store (SQLite max_page_count) as the full disk."""
    from gateway.daemon import Gateway
    from gateway.errors import StoreFullError
    from gateway.outbox import GatewayAlert
    from gateway.types import BoutClosed, StateChanged
    from gateway.wire import collar_topic, encode_binary
    from simulator.herd import Herd

    settings = Settings.model_validate({"model": {"watch": False}})
    frames = list(Herd(1, seed=81, frame_s=10.0, days=6 / 24.0, loss=0.0, silence_per_day=0.0))
    live: list = []
    with Store.open(tmp_path) as store:
        gw = Gateway(settings, store=store, speed=None)
        gw.on_store_failed = live.extend

        def feed(part: list) -> None:
            for k in range(0, len(part), 30):
                chunk = part[k : k + 30]
                gw.handle((collar_topic("barn", "home-farm", f.collar_id), encode_binary(f),
                           f.t_end) for f in chunk)  # fmt: skip
                gw.tick(now=chunk[-1].t_end)

        third = len(frames) // 3
        feed(frames[:third])
        before = store.bouts()
        with sqlite3.connect(f"file:{store.path}?mode=ro", uri=True) as c:
            pages, size = (
                c.execute(f"PRAGMA {k}").fetchone()[0] for k in ("page_count", "page_size")
            )
        store.set_max_mb(pages * size / 1e6)  # no page more
        with pytest.raises(StoreFullError):
            store.write_events([BoutClosed(f"x{i}", "resting", 1.0, 2.0, 0.9) for i in range(5000)])
        feed(frames[third : 2 * third])
        assert store.bouts() == before and store.pending > 0
        store.set_max_mb(None)  # space again
        feed(frames[2 * third :])
        gw.close(flush=False)
        after = store.bouts()
    alerts = [e for e in live if isinstance(e, GatewayAlert)]
    events = [e for e in live if isinstance(e, BoutClosed | StateChanged)]
    assert [a.cause for a in alerts] == ["store_failing"] and "full" in alerts[0].message
    bouts = [e for e in events if isinstance(e, BoutClosed) and not e.animal.startswith("x")]
    assert len(bouts) >= 2 and len(set(map(repr, events))) == len(events)  # each once
    stored = {(b.animal, b.start) for b in after}
    assert {(b.animal, b.start) for b in bouts if b.behaviour != "no_data"} <= stored
