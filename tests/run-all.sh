#!/usr/bin/env bash
# Install everything the tests need on a fresh Debian 12 machine, start nothing by hand,
# and run the whole suite (lint, format check, unit and integration tests).
# The servers (Mosquitto, InfluxDB 1.x, VictoriaMetrics) are started by the test fixtures.
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
command -v mosquitto >/dev/null 2>&1 || [ -x /usr/sbin/mosquitto ] || need+=(mosquitto)
command -v influxd >/dev/null 2>&1 || need+=(influxdb)
command -v victoria-metrics >/dev/null 2>&1 || need+=(victoria-metrics)
command -v docker-compose >/dev/null 2>&1 || need+=(docker-compose)
command -v openssl >/dev/null 2>&1 || need+=(openssl)
command -v sqlite3 >/dev/null 2>&1 || need+=(sqlite3)
command -v systemd-analyze >/dev/null 2>&1 || need+=(systemd)
if [ ${#need[@]} -gt 0 ]; then
  sudo=""
  [ "$(id -u)" -eq 0 ] || sudo="sudo"
  echo "Installing Debian packages: ${need[*]}"
  $sudo apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq --no-install-recommends "${need[@]}"
fi

python3 -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q -e ".[test]"
.venv/bin/ruff check .
.venv/bin/ruff format --check .
.venv/bin/python -m pytest "$@"
