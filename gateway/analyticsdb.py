"""Small SQLite helpers shared by the analytics' tables (budgets, alerts, collar health).

The analytics keep their own tables in the store's database file; these helpers create them
and build the animal filters of their queries.

>>> animal_clause("animal", ["cow-1", "cow-2"])
('animal IN (?, ?)', ['cow-1', 'cow-2'])
>>> animal_clause("animal", [])
('0', [])
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable

from .errors import StoreError

__all__ = ["animal_clause", "create_tables"]


def create_tables(conn: sqlite3.Connection, script: str, what: str) -> None:
    """Run a ``CREATE ... IF NOT EXISTS`` script; sqlite3 errors become StoreError."""
    try:
        conn.executescript(script)
    except sqlite3.Error as exc:
        raise StoreError(
            f"cannot create the {what} tables: {exc}; check the store file is writable"
        ) from exc


def animal_clause(column: str, animal: str | Iterable[str]) -> tuple[str, list[str]]:
    """``column IN (...)`` for one name or several; an empty list matches nothing."""
    names = [animal] if isinstance(animal, str) else list(animal)
    if not names:
        return "0", []
    return f"{column} IN ({', '.join('?' * len(names))})", names
