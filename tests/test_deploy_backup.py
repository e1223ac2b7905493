"""The backup commands of docs/operations.md, run as written on a store that is being written."""

from __future__ import annotations

import re
import shutil
import sqlite3
import subprocess
from pathlib import Path

import pytest

from gateway.store import STORE_FILE

ROOT = Path(__file__).resolve().parents[1]
OPS = (ROOT / "docs" / "operations.md").read_text()
DATA = "/var/lib/boutline"


def documented(pattern: str) -> str:
    (cmd,) = re.findall(pattern, OPS, flags=re.M)
    return cmd


@pytest.fixture
def live_store(tmp_path):
    """A WAL database with the daemon's file name, open for writing, its last rows in the WAL."""
    db = tmp_path / STORE_FILE
    writer = sqlite3.connect(db, isolation_level=None)
    writer.execute("PRAGMA journal_mode=WAL")
    writer.execute("PRAGMA wal_autocheckpoint=0")  # as between two checkpoints of the daemon
    writer.execute("CREATE TABLE bouts (animal TEXT, start REAL, end REAL)")
    writer.execute("BEGIN")
    writer.executemany(
        "INSERT INTO bouts VALUES (?, ?, ?)", [(f"cow-{i}", i, i + 60.0) for i in range(500)]
    )
    writer.execute("COMMIT")
    assert (tmp_path / f"{STORE_FILE}-wal").stat().st_size > 0
    yield tmp_path, writer
    writer.close()


def _rows(path: Path) -> int:
    with sqlite3.connect(path) as c:
        assert c.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        return c.execute("SELECT count(*) FROM bouts").fetchone()[0]


@pytest.mark.parametrize(
    "pattern",
    [
        r"sudo -u boutline (sqlite3 \S+ \"\.backup '[^']+'\")$",
        r"sudo -u boutline (sqlite3 \S+ \"VACUUM INTO '[^']+'\")$",
    ],
)
def test_sqlite3_backup_commands_copy_a_running_store(live_store, pattern):
    tmp, writer = live_store
    exe = shutil.which("sqlite3")
    assert exe, "sqlite3 is missing; install it with: apt-get install -y sqlite3"
    cmd = documented(pattern).replace(DATA, str(tmp))
    # The writer keeps going during the backup, as the daemon does.
    writer.execute("BEGIN")
    writer.execute("INSERT INTO bouts VALUES ('cow-x', 1, 2)")
    done = subprocess.run(["sh", "-c", cmd], capture_output=True, text=True, timeout=60)
    writer.execute("COMMIT")
    assert done.returncode == 0, done.stderr
    assert _rows(tmp / "backup.db") == 500  # committed rows, WAL included; never the open one


def test_python_backup_one_liner_for_compose(live_store):
    tmp, _ = live_store
    code = documented(r'docker compose exec gateway python -c "(.+)"$').replace(DATA, str(tmp))
    exec(compile(code, "operations.md", "exec"), {})  # the documented line, as written
    assert _rows(tmp / "backup.db") == 500
