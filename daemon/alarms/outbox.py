"""The durable outbox: every alarm event is committed to SQLite (WAL mode) before any attempt to publish it.

Delivery is at least once per sink (``mqtt``, ``webhook``): an event stays pending for a sink until that sink
confirms it (an MQTT PUBACK, an HTTP 2xx), across broker outages, restarts and SIGKILL.  Event ids are UUIDs, so
a consumer de-duplicates on CloudEvents ``source`` + ``id``.

The same database file holds the alarm state (:mod:`edgevib.daemon.alarms.state`), so that an event and the state
change behind it are committed in one transaction: after a crash either both exist or neither does — no alarm
is raised twice and none is forgotten.
"""

from __future__ import annotations

import contextlib
import sqlite3
import threading
import uuid
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import structlog

from edgevib.daemon.interfaces import EdgevibError
from edgevib.daemon.sqlite_schema import migrate, write_transaction

__all__ = ["SCHEMA_VERSION", "Database", "Outbox", "OutboxEvent", "StateError", "new_event_id"]

log = structlog.get_logger("edgevib.alarms.outbox")

SCHEMA_VERSION = 2
"""Version of the database layout; :data:`MIGRATIONS` upgrades older files in place."""

_SCHEMA_V1 = """
CREATE TABLE IF NOT EXISTS outbox (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    id TEXT NOT NULL UNIQUE,
    created_ns INTEGER NOT NULL,
    type TEXT NOT NULL,
    subject TEXT NOT NULL,
    topic TEXT NOT NULL,
    body TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS pending (
    seq INTEGER NOT NULL REFERENCES outbox(seq),
    sink TEXT NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (seq, sink)
);
CREATE TABLE IF NOT EXISTS alarm_state (
    point TEXT NOT NULL, indicator TEXT NOT NULL, body TEXT NOT NULL, updated_ns INTEGER NOT NULL,
    PRIMARY KEY (point, indicator)
);
CREATE TABLE IF NOT EXISTS sensor_state (
    point TEXT PRIMARY KEY, body TEXT NOT NULL, updated_ns INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS baselines (
    point TEXT NOT NULL, indicator TEXT NOT NULL, body TEXT NOT NULL, updated_ns INTEGER NOT NULL,
    PRIMARY KEY (point, indicator)
);
"""

_SCHEMA_V2 = """
CREATE TABLE IF NOT EXISTS source_state (
    source TEXT PRIMARY KEY, body TEXT NOT NULL, updated_ns INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS history (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    time_ns INTEGER NOT NULL,
    kind TEXT NOT NULL,
    point TEXT NOT NULL,
    indicator TEXT NOT NULL,
    event_id TEXT NOT NULL,
    data TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS history_point_time ON history (point, time_ns);
CREATE INDEX IF NOT EXISTS history_time ON history (time_ns)
"""

# version found in the file -> SQL that brings it to version + 1.
MIGRATIONS: dict[int, str] = {1: _SCHEMA_V2}  # 2: source states and the transitions history


class StateError(EdgevibError):
    """The state database cannot be used (unreadable, or written by a newer edgevib)."""


def new_event_id() -> str:
    """A fresh, globally unique event id (UUID version 4)."""
    return str(uuid.uuid4())


class Database:
    """One SQLite file in WAL mode, one connection shared by threads under a lock.

    ``synchronous=FULL`` makes each commit durable on disk, not only in the OS cache, before the caller goes on.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.lock = threading.RLock()
        try:
            self.conn = sqlite3.connect(str(self.path), timeout=30.0, isolation_level=None,
                                        check_same_thread=False)
            self.conn.execute("PRAGMA journal_mode=WAL")
            self.conn.execute("PRAGMA synchronous=FULL")
            self._migrate()
        except sqlite3.Error as exc:
            raise StateError(f"cannot open state database {self.path}: {exc}") from exc

    def _migrate(self) -> None:
        migrate(self.conn, self.transaction, what="state database", path=self.path,
                first_layout=_SCHEMA_V1 + ";" + _SCHEMA_V2, migrations=MIGRATIONS, version=SCHEMA_VERSION,
                error=StateError, log=log)

    @contextlib.contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """A write transaction (``BEGIN IMMEDIATE`` … ``COMMIT``), rolled back on an exception."""
        with self.lock, write_transaction(self.conn) as conn:
            yield conn

    def close(self) -> None:
        with self.lock:
            self.conn.close()


@dataclass(frozen=True, slots=True)
class OutboxEvent:
    """One serialized event: ``body`` is the CloudEvents JSON, ``topic`` its MQTT topic."""

    id: str
    type: str
    subject: str
    topic: str
    body: str
    created_ns: int
    seq: int = 0


class Outbox:
    """Pending events per sink, oldest first."""

    def __init__(self, db: Database, sinks: Sequence[str]) -> None:
        self.db = db
        self.sinks = tuple(sinks)
        with db.transaction() as c:
            placeholders = ",".join("?" * len(self.sinks)) or "''"
            dropped = c.execute(f"DELETE FROM pending WHERE sink NOT IN ({placeholders})", self.sinks).rowcount
            self._gc(c)
        if dropped:
            log.warning("outbox entries for sinks no longer configured dropped", count=dropped)

    def add(self, events: Iterable[OutboxEvent], conn: sqlite3.Connection | None = None) -> int:
        """Store events pending for every sink.  Pass ``conn`` inside an open :meth:`Database.transaction` to
        commit together with state changes; otherwise the events are committed here."""
        if conn is None:
            with self.db.transaction() as c:
                return self._add(c, events)
        return self._add(conn, events)

    def _add(self, c: sqlite3.Connection, events: Iterable[OutboxEvent]) -> int:
        if not self.sinks:  # no feed configured: nothing to deliver, nothing to keep
            return 0
        n = 0
        for e in events:
            cur = c.execute("INSERT INTO outbox (id, created_ns, type, subject, topic, body) VALUES (?,?,?,?,?,?)",
                            (e.id, e.created_ns, e.type, e.subject, e.topic, e.body))
            c.executemany("INSERT INTO pending (seq, sink) VALUES (?, ?)", [(cur.lastrowid, s) for s in self.sinks])
            n += 1
        return n

    def pending(self, sink: str, limit: int = 100) -> list[OutboxEvent]:
        with self.db.lock:
            rows = self.db.conn.execute(
                "SELECT o.seq, o.id, o.type, o.subject, o.topic, o.body, o.created_ns FROM pending p "
                "JOIN outbox o ON o.seq = p.seq WHERE p.sink = ? ORDER BY o.seq LIMIT ?", (sink, limit)).fetchall()
        return [OutboxEvent(id=r[1], type=r[2], subject=r[3], topic=r[4], body=r[5], created_ns=r[6], seq=r[0])
                for r in rows]

    def mark_delivered(self, sink: str, seqs: Iterable[int]) -> None:
        with self.db.transaction() as c:
            c.executemany("DELETE FROM pending WHERE sink = ? AND seq = ?", [(sink, s) for s in seqs])
            self._gc(c)

    def mark_attempt(self, sink: str, seqs: Iterable[int]) -> None:
        with self.db.transaction() as c:
            c.executemany("UPDATE pending SET attempts = attempts + 1 WHERE sink = ? AND seq = ?",
                          [(sink, s) for s in seqs])

    @staticmethod
    def _gc(c: sqlite3.Connection) -> None:
        c.execute("DELETE FROM outbox WHERE seq NOT IN (SELECT seq FROM pending)")

    def depth(self, sink: str | None = None) -> int:
        """Pending events (for one sink, or events pending for any sink)."""
        with self.db.lock:
            if sink is None:
                row = self.db.conn.execute("SELECT COUNT(DISTINCT seq) FROM pending").fetchone()
            else:
                row = self.db.conn.execute("SELECT COUNT(*) FROM pending WHERE sink = ?", (sink,)).fetchone()
        return int(row[0])

    def oldest_created_ns(self) -> int | None:
        """Creation time of the oldest pending event (``None`` when nothing is pending)."""
        with self.db.lock:
            row = self.db.conn.execute(
                "SELECT MIN(o.created_ns) FROM pending p JOIN outbox o ON o.seq = p.seq").fetchone()
        return None if row[0] is None else int(row[0])
