"""Schema versions and write transactions of the daemon's SQLite files (the alarm state database, the severity
history).

A file holds its layout's version in a one-row table ``schema_version``.  A new file gets the first layout and the
current version; an older one is brought forward one migration at a time, each in its own transaction; a file
written by a newer edgevib is refused rather than guessed at.
"""

from __future__ import annotations

import contextlib
import sqlite3
from collections.abc import Callable, Iterator, Mapping
from contextlib import AbstractContextManager
from pathlib import Path
from typing import Any

__all__ = ["migrate", "write_transaction"]


@contextlib.contextmanager
def write_transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """A write transaction (``BEGIN IMMEDIATE`` … ``COMMIT``) on a connection in autocommit mode, rolled back on
    an exception."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


def _execute_all(conn: sqlite3.Connection, script: str) -> None:
    for stmt in script.split(";"):
        if stmt.strip():
            conn.execute(stmt)


def migrate(conn: sqlite3.Connection, transaction: Callable[[], AbstractContextManager[Any]], *, what: str,
            path: Path, first_layout: str, migrations: Mapping[int, str], version: int,
            error: type[Exception], log: Any) -> None:
    """Create or bring forward the layout of ``conn``'s file to ``version``.

    ``first_layout`` is the SQL of version 1; ``migrations[v]`` the SQL that brings version v to v + 1;
    ``what`` names the file in messages ("state database"); ``error`` is raised for a file of a newer version.
    """
    conn.execute("CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL)")
    row = conn.execute("SELECT version FROM schema_version").fetchone()
    if row is None:
        with transaction():
            _execute_all(conn, first_layout)
            conn.execute("INSERT INTO schema_version (version) VALUES (?)", (version,))
        return
    found = int(row[0])
    if found > version:
        raise error(f"{what} {path} has schema version {found}, written by a newer edgevib; this version reads up "
                    f"to {version}")
    while found < version:
        with transaction():
            _execute_all(conn, migrations[found])
            found += 1
            conn.execute("UPDATE schema_version SET version = ?", (found,))
        log.info(f"{what} upgraded", path=str(path), version=found)
