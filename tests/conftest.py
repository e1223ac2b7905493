"""Shared fixtures: real servers on free loopback ports, each in its own temporary directory.

A missing server binary fails loudly with its install hint; no test silently skips a server.
Each fixture stops exactly the process it started.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import HealthCheck
from hypothesis import settings as hypothesis_settings

from gateway.servers import (
    ServerProcess,
    start_influxdb1,
    start_mosquitto,
    start_victoria_metrics,
)

SERVERS = Path(__file__).parent / "servers"

# Two shared cores: generation speed varies with load, so no per-example deadline.
hypothesis_settings.register_profile(
    "boutline", deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
hypothesis_settings.load_profile("boutline")


@pytest.fixture(scope="session")
def mosquitto(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServerProcess]:
    """A Mosquitto broker shared by the session (anonymous, persistence on)."""
    srv = start_mosquitto(tmp_path_factory.mktemp("mosquitto"), SERVERS / "mosquitto.conf")
    yield srv
    srv.stop()


@pytest.fixture
def mosquitto_private(tmp_path: Path) -> Iterator[ServerProcess]:
    """A broker of the test's own, for tests that kill or restart it."""
    srv = start_mosquitto(tmp_path / "mosquitto", SERVERS / "mosquitto.conf")
    yield srv
    srv.stop()


@pytest.fixture(scope="session")
def influxdb1(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServerProcess]:
    """InfluxDB 1.x (Debian's influxdb), v1 write and query API."""
    srv = start_influxdb1(tmp_path_factory.mktemp("influxdb1"), SERVERS / "influxdb.conf")
    yield srv
    srv.stop()


@pytest.fixture
def influxdb1_private(tmp_path: Path) -> Iterator[ServerProcess]:
    """InfluxDB 1.x of the test's own, for outage tests that stop and restart it."""
    srv = start_influxdb1(tmp_path / "influxdb1", SERVERS / "influxdb.conf")
    yield srv
    srv.stop()


@pytest.fixture(scope="session")
def victoria(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServerProcess]:
    """VictoriaMetrics, a server for the InfluxDB v2 write API (/api/v2/write)."""
    srv = start_victoria_metrics(tmp_path_factory.mktemp("victoria"))
    yield srv
    srv.stop()
