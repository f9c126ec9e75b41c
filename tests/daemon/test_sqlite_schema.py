"""Schema versions of the daemon's SQLite files (edgevib.daemon.sqlite_schema): a new file gets the first layout,
an older one each migration in turn, a newer one is refused with the store's own error; a failed write transaction
leaves nothing behind."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
import structlog

from edgevib.daemon.sqlite_schema import migrate, write_transaction

FIRST = "CREATE TABLE items (id INTEGER PRIMARY KEY, name TEXT NOT NULL)"
MIGRATIONS = {1: "ALTER TABLE items ADD COLUMN size INTEGER NOT NULL DEFAULT 0",
              2: "CREATE INDEX items_by_size ON items (size); ALTER TABLE items ADD COLUMN note TEXT"}


class StoreError(Exception):
    pass


def _open(path: Path, version: int) -> sqlite3.Connection:
    conn = sqlite3.connect(str(path), isolation_level=None)
    migrate(conn, lambda: write_transaction(conn), what="test store", path=path, first_layout=FIRST,
            migrations=MIGRATIONS, version=version, error=StoreError, log=structlog.get_logger("test"))
    return conn


def _columns(conn: sqlite3.Connection) -> list[str]:
    return [row[1] for row in conn.execute("PRAGMA table_info(items)")]


def test_new_file_then_each_migration_in_turn_then_a_newer_file_refused(tmp_path: Path) -> None:
    path = tmp_path / "store.sqlite"
    conn = _open(path, 1)
    assert _columns(conn) == ["id", "name"]
    conn.execute("INSERT INTO items (name) VALUES ('kept')")
    conn.close()
    conn = _open(path, 3)  # 1 → 2 → 3, the row kept
    assert _columns(conn) == ["id", "name", "size", "note"]
    assert conn.execute("SELECT name, size FROM items").fetchall() == [("kept", 0)]
    assert conn.execute("SELECT version FROM schema_version").fetchall() == [(3,)]
    conn.close()
    with pytest.raises(StoreError, match=r"test store .* has schema version 3, written by a newer edgevib; this "
                                         r"version reads up to 2"):
        _open(path, 2)


def test_a_failed_write_transaction_is_rolled_back(tmp_path: Path) -> None:
    conn = _open(tmp_path / "store.sqlite", 1)
    with pytest.raises(sqlite3.IntegrityError), write_transaction(conn):
        conn.execute("INSERT INTO items (name) VALUES ('first')")
        conn.execute("INSERT INTO items (name) VALUES (NULL)")  # NOT NULL
    assert conn.execute("SELECT count(*) FROM items").fetchone() == (0,)
    with write_transaction(conn):
        conn.execute("INSERT INTO items (name) VALUES ('kept')")
    assert conn.execute("SELECT name FROM items").fetchall() == [("kept",)]
