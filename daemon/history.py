"""The durable severity history: one SQLite file per instance (``<state_dir>/history.sqlite``, WAL, versioned).

What it keeps, per measurement point and indicator:

* **frames** — every analysed frame's indicator values at frame rate, with the machine state of that frame
  (``running``, ``stopped``, ``starting``, ``coasting``, ``unknown``, ``sensor-fault``), for a short window
  (``recent_s``);
* **roll-ups** per minute, hour and day — count, min, mean, max, median and a high percentile (default 95th) of
  the values of *running* frames only; each level kept for its own retention (default: minutes 2 days, hours
  90 days, days 1100 days, i.e. three years);
* **periods** when the machine was not running (stopped, starting, coasting, unknown, sensor fault): marked with
  their start and end, never averaged into the roll-ups;
* the latest **projection** of each tracked series (written by :mod:`edgevib.daemon.projection`) and the trend
  **baselines**.

Buckets are aligned to UTC (minute, hour, day) and each row keeps, per indicator, the mean time of the values it
holds (``HistorySeries.t_mean_s``): the time its statistics stand for, which is the bucket's middle only when its
values fill it evenly — not for the still-filling bucket, nor for a machine that ran part of it (schema version 2;
a version 1 file is migrated when a writer opens it: its older rows read at their middles, its open hour and day
continue from their minute roll-ups).  Minute percentiles are exact; hour and day percentiles come from
a logarithmic-bin sketch within 1 % (:class:`edgevib.pipelines.rollup.LogSketch`), whose state is stored with the
open bucket so that a restart continues it.  An open bucket's row is readable before it closes: the open minute's
as of the last flush, an open hour's or day's as of its last closed minute (and of the open minute once the
recorder is closed).  Retention counts back from the newest frame of each point (the measurement timeline), so
replayed recordings with old time stamps keep their history too.

Writes are batched: :meth:`HistoryRecorder.record` only queues a frame (cheap, any thread); :meth:`flush` (a
worker thread, every ``flush_s``) aggregates and writes the batch in one transaction.  A process killed between
flushes loses at most the frames of the unflushed batch; everything committed survives SIGKILL.

**Disk budget** (``max_bytes``, counting the database and its WAL): after a flush that leaves the file above
the budget, the oldest frame-rate values are pruned first, then the oldest minute roll-ups, then the oldest hour
roll-ups, and daily roll-ups last, until the file is back under 80 % of the budget; pruned rows are counted per
level.  A write error (disk full, I/O error) is logged and counted; the batch is kept for the next attempt (up to
``max_pending`` frames, the oldest dropped and counted beyond) and the daemon carries on.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import sqlite3
import threading
import time
from collections import deque
from collections.abc import Callable, Mapping, Sequence
from contextlib import AbstractContextManager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from edgevib.daemon.interfaces import EdgevibError
from edgevib.daemon.logs import RateLimitedLogger, get_logger
from edgevib.daemon.sqlite_schema import migrate, write_transaction
from edgevib.pipelines.rollup import STAT_FIELDS, LogSketch, sketch_summaries, summarize_many, time_sums

if TYPE_CHECKING:
    from edgevib.daemon.config import HistoryConfig

__all__ = [
    "LEVELS",
    "MACHINE_STATES",
    "SCHEMA_VERSION",
    "HistoryError",
    "HistoryReader",
    "HistoryRecorder",
    "HistorySeries",
    "HistorySettings",
    "history_settings",
]

log = get_logger("edgevib.history")

SCHEMA_VERSION = 2
LEVELS: dict[str, int] = {"minute": 60, "hour": 3600, "day": 86400}
"""Roll-up levels and their bucket lengths in seconds."""
MACHINE_STATES: tuple[str, ...] = ("running", "stopped", "starting", "coasting", "unknown", "sensor-fault")
_STATE_CODE = {s: i for i, s in enumerate(MACHINE_STATES)}
_PRUNE_ORDER = ("frames", "minute", "hour", "day")
_SKETCH_ALPHA = 0.01
_PRUNE_TO = 0.8  # a full budget prunes down to this fraction of it (so pruning does not run at every flush)
_MIB = 1024 * 1024

_SCHEMA_V1 = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS points (id INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE);
CREATE TABLE IF NOT EXISTS layouts (id INTEGER PRIMARY KEY, names TEXT NOT NULL UNIQUE);
CREATE TABLE IF NOT EXISTS frames (
    t_ns INTEGER NOT NULL, point INTEGER NOT NULL, layout INTEGER NOT NULL, state INTEGER NOT NULL,
    v BLOB NOT NULL, PRIMARY KEY (t_ns, point)
) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS frames_point ON frames (point, t_ns);
CREATE TABLE IF NOT EXISTS rollups (
    level INTEGER NOT NULL, start_s INTEGER NOT NULL, point INTEGER NOT NULL, layout INTEGER NOT NULL,
    closed INTEGER NOT NULL, stats BLOB NOT NULL, sketch BLOB, PRIMARY KEY (level, start_s, point)
) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS rollups_point ON rollups (point, level, start_s);
CREATE TABLE IF NOT EXISTS periods (
    point INTEGER NOT NULL, start_ns INTEGER NOT NULL, end_ns INTEGER NOT NULL, state INTEGER NOT NULL,
    PRIMARY KEY (point, start_ns)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS projections (
    point INTEGER NOT NULL, indicator TEXT NOT NULL, t_ns INTEGER NOT NULL, body TEXT NOT NULL,
    PRIMARY KEY (point, indicator)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS baselines (
    point INTEGER NOT NULL, indicator TEXT NOT NULL, mean REAL NOT NULL, std REAL NOT NULL, n INTEGER NOT NULL,
    t_ns INTEGER NOT NULL, PRIMARY KEY (point, indicator)
) WITHOUT ROWID
"""

# The present layout: version 1's with ``rollups.t_mean`` — per indicator (layout order, float32), the mean time
# of the values a bucket holds, in s from its start (NULL in rows written before version 2: read as the middle).
_SCHEMA = _SCHEMA_V1.replace("sketch BLOB, PRIMARY KEY", "sketch BLOB, t_mean BLOB, PRIMARY KEY")
assert _SCHEMA != _SCHEMA_V1

# Rows are stored in time order (primary keys lead with the time), so pruning the oldest rows empties whole pages
# that go back to the file system; the per-point indexes serve the queries.
# version found in the file -> SQL that brings it to version + 1
MIGRATIONS: dict[int, str] = {1: "ALTER TABLE rollups ADD COLUMN t_mean BLOB"}
_INSERT_ROLLUP = ("INSERT OR REPLACE INTO rollups (point, level, start_s, layout, closed, stats, sketch, t_mean) "
                  "VALUES (?, ?, ?, ?, ?, ?, ?, ?)")
_Row = tuple[int, int, int, int, int, bytes, bytes | None, bytes]
"""A roll-up row: point, level, start_s, layout, closed, stats, sketch, t_mean."""
_Rows = list[_Row | None]
"""Roll-up rows in writing order; None holds the place of a minute row whose statistics are still to come."""
_MinuteRow = tuple[int, int, int, int, npt.NDArray[np.float64], npt.NDArray[np.float64]]
"""A minute row to fill in: its index in the rows, point, start_s, closed, values (n, indicators), times (n,)."""


class HistoryError(EdgevibError):
    """The history database cannot be used (unreadable, written by a newer edgevib, bad query)."""


# --------------------------------------------------------------------------------------------- settings


@dataclass(frozen=True, slots=True)
class HistorySettings:
    """``[history]`` resolved (see README, configuration reference)."""

    enabled: bool = True
    file: str = "history.sqlite"  # as configured (relative to the state directory unless absolute)
    path: str = "history.sqlite"  # resolved
    recent_s: float = 900.0
    minute_s: float = 2 * 86400.0
    hour_s: float = 90 * 86400.0
    day_s: float = 1100 * 86400.0
    max_bytes: int = 1024 * _MIB
    flush_s: float = 5.0
    high_percentile: float = 95.0
    max_pending: int = 200_000

    def retention_s(self, what: str) -> float:
        return {"frames": self.recent_s, "minute": self.minute_s, "hour": self.hour_s, "day": self.day_s}[what]


def history_settings(table: HistoryConfig) -> HistorySettings:
    """The settings of a loaded ``[history]`` table (:class:`edgevib.daemon.config.HistoryConfig`, its ``file``
    already resolved against the state directory)."""
    return HistorySettings(
        enabled=table.enabled, file=table.file, path=table.file, recent_s=table.recent_s,
        minute_s=86400.0 * table.minute_days, hour_s=86400.0 * table.hour_days, day_s=86400.0 * table.day_days,
        max_bytes=int(_MIB * table.max_mb), flush_s=table.flush_s, high_percentile=table.high_percentile)


# --------------------------------------------------------------------------------------------- database


def _vacuum(conn: sqlite3.Connection) -> None:
    """Release every free page (``PRAGMA incremental_vacuum``; outside a transaction).  It frees one page per
    step of the statement, and ``execute`` steps a statement that returns no row only once: ``executescript``
    runs it to completion."""
    conn.executescript("PRAGMA incremental_vacuum;")


def _connect(path: Path, readonly: bool) -> sqlite3.Connection:
    if readonly:
        if not path.exists():
            raise HistoryError(f"no history database at {path}")
        conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30.0, isolation_level=None,
                               check_same_thread=False)
    else:
        path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(str(path), timeout=30.0, isolation_level=None, check_same_thread=False)
    return conn


class _Database:
    """The history file for writing: schema, migrations, point and layout ids."""

    def __init__(self, path: Path, durable: bool = True, max_bytes: int | None = None) -> None:
        self.path = path
        try:
            fresh = not path.exists() or path.stat().st_size == 0
            self.conn = _connect(path, readonly=False)
            if fresh:
                # must precede the first table: lets pruning hand pages back to the file system
                self.conn.execute("PRAGMA auto_vacuum=INCREMENTAL")
            self.conn.execute("PRAGMA journal_mode=WAL")
            # WAL + NORMAL: a commit survives a killed process; power loss may lose the last commits only
            self.conn.execute(f"PRAGMA synchronous={'NORMAL' if durable else 'OFF'}")
            self.conn.execute(f"PRAGMA journal_size_limit={16 * _MIB}")
            self._migrate()
            if max_bytes is not None:  # checkpoint the WAL before it holds a tenth of the budget
                page = int(self.conn.execute("PRAGMA page_size").fetchone()[0])
                self.conn.execute(f"PRAGMA wal_autocheckpoint={max(16, min(1000, max_bytes // page // 10))}")
        except sqlite3.Error as exc:
            raise HistoryError(f"cannot open history database {path}: {exc}") from exc
        self._points: dict[str, int] = {}
        self._layouts: dict[tuple[str, ...], int] = {}

    def _migrate(self) -> None:
        migrate(self.conn, self.transaction, what="history database", path=self.path, first_layout=_SCHEMA,
                migrations=MIGRATIONS, version=SCHEMA_VERSION, error=HistoryError, log=log)

    def transaction(self) -> AbstractContextManager[sqlite3.Connection]:
        return write_transaction(self.conn)

    def point_id(self, name: str) -> int:
        pid = self._points.get(name)
        if pid is None:
            self.conn.execute("INSERT OR IGNORE INTO points (name) VALUES (?)", (name,))
            pid = int(self.conn.execute("SELECT id FROM points WHERE name = ?", (name,)).fetchone()[0])
            self._points[name] = pid
        return pid

    def layout_id(self, names: tuple[str, ...]) -> int:
        lid = self._layouts.get(names)
        if lid is None:
            text = ",".join(names)
            self.conn.execute("INSERT OR IGNORE INTO layouts (names) VALUES (?)", (text,))
            lid = int(self.conn.execute("SELECT id FROM layouts WHERE names = ?", (text,)).fetchone()[0])
            self._layouts[names] = lid
        return lid

    def size_bytes(self) -> int:
        """Bytes on disk: the database file and its WAL."""
        total = 0
        for p in (self.path, self.path.with_name(self.path.name + "-wal")):
            with contextlib.suppress(OSError):
                total += p.stat().st_size
        return total

    def close(self) -> None:
        with contextlib.suppress(sqlite3.Error):
            self.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        self.conn.close()


def _f32(a: npt.ArrayLike) -> bytes:
    return np.asarray(a, dtype="<f4").tobytes()


def _sketch_blob(sketches: Sequence[LogSketch], t_sums: npt.NDArray[np.float64]) -> bytes:
    """An open bucket's state: its sketches, then (since schema version 2) the sums of its values' times in s from
    the bucket's start, one per sketch (:func:`edgevib.pipelines.rollup.time_sums`)."""
    parts = [float(len(sketches))]
    for s in sketches:
        state = s.to_list()
        parts.append(float(len(state)))
        parts += state
    parts += np.asarray(t_sums, dtype=np.float64).reshape(-1).tolist()
    return np.array(parts, dtype="<f8").tobytes()


def _sketches_from_blob(blob: bytes) -> tuple[list[LogSketch], npt.NDArray[np.float64] | None]:
    """The sketches and time sums of :func:`_sketch_blob` (None for the sums of a version 1 blob, which ends after
    the sketches)."""
    a = np.frombuffer(blob, dtype="<f8")
    n, i, out = int(a[0]), 1, []
    for _ in range(n):
        size = int(a[i])
        out.append(LogSketch.from_array(a[i + 1:i + 1 + size]))
        i += 1 + size
    sums = a[i:i + n].astype(np.float64) if a.size >= i + n and n > 0 else None
    return out, sums


def _t_mean_blob(t_sums: npt.NDArray[np.float64], counts: npt.ArrayLike) -> bytes:
    """The ``t_mean`` column: per indicator the mean time of its values in s from the bucket's start (NaN when it
    has none)."""
    c = np.asarray(counts, dtype=np.float64)
    out = np.full(c.shape, np.nan)
    np.divide(t_sums, c, out=out, where=c > 0)
    return out.astype("<f4").tobytes()


class FlushPacer:
    """Keeps a flush to a share of one core while the daemon runs: after each ``slice_s`` of the flushing thread's
    own CPU time it sleeps ``(1 − share) / share`` times what it used (the interpreter lock free meanwhile).

    A flush runs in a worker thread beside the event loop and the analysis, which need the same interpreter lock.
    At each wall-clock minute every point closes a minute at once (roll-ups, the hour's and the day's sketches
    rewritten): some 2 s of Python for 600 points, which unpaced took most of the lock for those seconds and held
    back ingest and analysis (latency up to seconds at each minute).  Paced, the same rows are written a few
    seconds later.  ``enabled`` is asked at every slice: a stopping daemon flushes at full speed."""

    def __init__(self, share: float, enabled: Callable[[], bool], *, slice_s: float = 0.01,
                 cpu_s: Callable[[], float] = time.thread_time, sleep: Callable[[float], None] = time.sleep) -> None:
        if not 0.0 < share <= 1.0:
            raise ValueError(f"flush CPU share {share!r} must be within (0, 1]")
        self._ratio = (1.0 - share) / share
        self._enabled, self._slice_s, self._cpu_s, self._sleep = enabled, slice_s, cpu_s, sleep
        self._mark = cpu_s()

    def __call__(self) -> None:
        """A point where the flush may pause: it pauses once a slice of CPU time has been used since the last."""
        used = self._cpu_s() - self._mark
        if used < self._slice_s:
            return
        if self._ratio > 0 and self._enabled():
            self._sleep(used * self._ratio)
        self._mark = self._cpu_s()


FLUSH_CPU_SHARE = 0.2  # of one core, for the daemon's periodic flushes (FlushPacer)
_PACE_EVERY = 16  # frames or points between two looks at the flush's CPU time


# --------------------------------------------------------------------------------------------- recorder


@dataclass
class _Open:
    """The open buckets of one point (owned by the flushing thread)."""

    layout: int
    minute_start: int | None = None
    minute_x: npt.NDArray[np.float64] | None = None               # the open minute's running values, one row each
    minute_t: npt.NDArray[np.float64] | None = None               # their frame times, s from the minute's start
    minute_n: int = 0                                             # rows of minute_x / minute_t in use
    starts: dict[str, int] = field(default_factory=dict)          # "hour"/"day" -> open bucket start
    sketches: dict[str, list[LogSketch]] = field(default_factory=dict)
    t_sums: dict[str, npt.NDArray[np.float64]] = field(default_factory=dict)  # level -> time sums of its sketches
    dirty: set[str] = field(default_factory=set)                  # levels whose open row changed
    period: tuple[int, int, int] | None = None                    # (state code, start_ns, end_ns), not running
    period_dirty: bool = False
    latest_ns: int = 0

    def add_to_minute(self, values: npt.NDArray[np.float64], t_s: float) -> None:
        """Append a running frame to the open minute (rows grow by doubling: no re-stacking at every flush)."""
        n = self.minute_n
        if self.minute_x is None or self.minute_t is None or n == self.minute_x.shape[0]:
            x = np.empty((max(16, 2 * n), values.shape[-1]))
            t = np.empty(x.shape[0])
            if self.minute_x is not None and self.minute_t is not None:
                x[:n] = self.minute_x[:n]
                t[:n] = self.minute_t[:n]
            self.minute_x, self.minute_t = x, t
        self.minute_x[n] = values
        self.minute_t[n] = t_s
        self.minute_n = n + 1

    def minute(self) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]] | None:
        """The open minute's values (n, indicators) and times (n,), or None when it has none (views: valid until
        :meth:`clear_minute`, which leaves them to their holder)."""
        if self.minute_n == 0 or self.minute_x is None or self.minute_t is None:
            return None
        return self.minute_x[:self.minute_n], self.minute_t[:self.minute_n]

    def clear_minute(self) -> None:
        self.minute_start = None
        self.minute_x = self.minute_t = None
        self.minute_n = 0


@dataclass
class HistoryStats:
    """Counters of the recorder (read by the metrics collector)."""

    written: int = 0
    dropped: int = 0
    late: int = 0
    write_errors: int = 0
    pruned: dict[str, int] = field(default_factory=lambda: dict.fromkeys(_PRUNE_ORDER, 0))
    bytes: int = 0


class HistoryRecorder:
    """Queues frames, aggregates them into roll-ups and writes them in batches (see the module docstring).

    ``indicators``: the indicator names whose values :meth:`record` receives, in that order (the layout).
    ``durable=False`` (replays into a scratch file) skips fsync.
    """

    def __init__(self, settings: HistorySettings, indicators: Sequence[str], *, durable: bool = True) -> None:
        if not indicators:
            raise HistoryError("the history needs at least one indicator")
        self.settings = settings
        self.indicators = tuple(indicators)
        self.stats = HistoryStats()
        self.db = _Database(Path(settings.path), durable=durable, max_bytes=settings.max_bytes)
        self._lock = threading.Lock()          # guards the pending queue
        self._flush_lock = threading.Lock()    # one flush at a time
        self._pending: deque[tuple[str, int, npt.NDArray[np.float64], int]] = deque()
        self._open: dict[str, _Open] = {}
        self._layout = self.db.layout_id(self.indicators)
        self._rlog = RateLimitedLogger(log, interval_s=60.0)
        self._task: asyncio.Task[None] | None = None
        self._stopping = False
        self._paced = False  # the periodic flushes of a running daemon (start … stop) keep to FLUSH_CPU_SHARE
        self._since_retention = 0.0
        self._restore()
        self.stats.bytes = self.db.size_bytes()

    # ------------------------------------------------------------------ restart

    def _restore(self) -> None:
        """Reload the open buckets and periods of every point (a restart continues them)."""
        c = self.db.conn
        names = {int(i): str(n) for i, n in c.execute("SELECT id, name FROM points")}
        for pid, name in names.items():
            self.db._points[name] = pid
        rows = c.execute("SELECT point, level, start_s, layout, sketch FROM rollups WHERE closed = 0").fetchall()
        stale: list[tuple[int, int, int]] = []
        for pid, level, start, layout, sketch in rows:
            pname = names.get(int(pid))
            if pname is None or int(layout) != self._layout:
                stale.append((pid, level, start))  # another indicator list: close it as it is
                continue
            op = self._open.setdefault(pname, _Open(self._layout))
            if int(level) == LEVELS["minute"]:
                op.minute_start = int(start)
            elif sketch is not None:
                lname = "hour" if int(level) == LEVELS["hour"] else "day"
                op.starts[lname] = int(start)
                op.sketches[lname], sums = _sketches_from_blob(sketch)
                op.t_sums[lname] = sums if sums is not None else \
                    self._legacy_time_sums(int(pid), int(start), LEVELS[lname], op.sketches[lname])
        for name, op in self._open.items():
            pid = self.db.point_id(name)
            if op.minute_start is not None:  # the open minute's running frames are in the frames table
                fr = c.execute("SELECT t_ns, v FROM frames WHERE point = ? AND t_ns >= ? AND t_ns < ? AND state = 0 "
                               "AND layout = ? ORDER BY t_ns",
                               (pid, op.minute_start * 10**9, (op.minute_start + 60) * 10**9, self._layout)).fetchall()
                for t_ns, v in fr:
                    op.add_to_minute(np.frombuffer(v, dtype="<f4").astype(np.float64),
                                     (int(t_ns) - op.minute_start * 10**9) / 1e9)
            last = c.execute("SELECT max(t_ns) FROM frames WHERE point = ?", (pid,)).fetchone()[0]
            op.latest_ns = int(last or 0)
        for pid, start_ns, end_ns, state in c.execute(
                "SELECT p.point, p.start_ns, p.end_ns, p.state FROM periods p JOIN "
                "(SELECT point, max(start_ns) AS s FROM periods GROUP BY point) m "
                "ON p.point = m.point AND p.start_ns = m.s").fetchall():
            pname = names.get(int(pid))
            if pname is None:
                continue
            op = self._open.setdefault(pname, _Open(self._layout))
            last_ns = op.latest_ns
            if last_ns and int(end_ns) >= last_ns:  # the point's last frames were not running: still open
                op.period = (int(state), int(start_ns), int(end_ns))
        if stale:
            with self.db.transaction() as tx:
                tx.executemany("UPDATE rollups SET closed = 1, sketch = NULL WHERE point = ? AND level = ? "
                               "AND start_s = ?", stale)
        if self._open:
            log.info("history restored", points=len(self._open), path=str(self.db.path))

    def _legacy_time_sums(self, pid: int, start: int, length: int, sketches: Sequence[LogSketch]
                          ) -> npt.NDArray[np.float64]:
        """Time sums of an open hour or day written before schema version 2 (its state held no times): from its
        closed minute roll-ups (each at its own mean time, or its middle when it has none), scaled to the
        sketches' counts where minutes were pruned; the middle of the time elapsed so far when none is left."""
        k = len(self.indicators)
        counts = np.array([sk.count for sk in sketches], dtype=np.float64)
        found = np.zeros(k)
        sums = np.zeros(k)
        for m_start, layout, blob, t_mean in self.db.conn.execute(
                "SELECT start_s, layout, stats, t_mean FROM rollups WHERE point = ? AND level = 60 AND closed = 1 "
                "AND start_s >= ? AND start_s < ?", (pid, start, start + length)).fetchall():
            if int(layout) != self._layout:
                continue
            n = np.frombuffer(blob, dtype="<f4").reshape(len(STAT_FIELDS), k)[0].astype(np.float64)
            off = np.full(k, 30.0) if t_mean is None else np.frombuffer(t_mean, dtype="<f4").astype(np.float64)
            off = np.where(np.isfinite(off), off, 30.0)
            found += n
            sums += n * (int(m_start) - start + off)
        latest = self.db.conn.execute("SELECT max(t_ns) FROM frames WHERE point = ?", (pid,)).fetchone()[0]
        elapsed = min(float(length), max(0.0, (int(latest or 0) / 1e9) - start))
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(found > 0, sums / np.where(found > 0, found, 1.0), elapsed / 2.0)
        return np.asarray(mean * counts, dtype=np.float64)

    # ------------------------------------------------------------------ intake (any thread)

    def record(self, point: str, t_ns: int, values: npt.ArrayLike, state: str) -> None:
        """Queue one frame: its end time, its values in :attr:`indicators` order (NaN = missing), its machine
        state (one of :data:`MACHINE_STATES`; only ``running`` frames enter the roll-ups)."""
        code = _STATE_CODE.get(state)
        if code is None:
            raise HistoryError(f"machine state {state!r} is not one of {', '.join(MACHINE_STATES)}")
        v = np.asarray(values, dtype=np.float64).reshape(-1)
        if v.size != len(self.indicators):
            raise HistoryError(f"{v.size} values for {len(self.indicators)} indicators")
        with self._lock:
            self._pending.append((point, int(t_ns), v, code))
            self._drop_excess()

    def _drop_excess(self) -> None:
        """Keep the queue within ``max_pending`` frames, dropping (and counting) the oldest; under ``_lock``."""
        for _ in range(max(0, len(self._pending) - self.settings.max_pending)):
            self._pending.popleft()
            self.stats.dropped += 1

    @property
    def pending(self) -> int:
        with self._lock:
            return len(self._pending)

    # ------------------------------------------------------------------ flushing (worker thread)

    def flush(self) -> int:
        """Aggregate and write everything queued, in one transaction; then retention and budget pruning.
        Returns the number of frames written.  Never raises for a database error (logged and counted; the batch
        waits for the next flush)."""
        with self._flush_lock:
            with self._lock:
                batch = list(self._pending)
                self._pending.clear()
            if not batch:
                return 0
            pace = FlushPacer(FLUSH_CPU_SHARE, lambda: self._paced) if self._paced else None
            try:
                late = self._write(batch, pace)
            except sqlite3.Error as exc:
                self.stats.write_errors += 1
                self._rlog.error("history", "history write failed; frames kept for the next attempt",
                                 error=str(exc), frames=len(batch), path=str(self.db.path))
                with self._lock:  # put them back in front, oldest first, within the bound
                    self._pending.extendleft(reversed(batch))
                    self._drop_excess()
                self._reload_open()
                return 0
            self.stats.late += late
            self.stats.written += len(batch) - late
            try:
                self._prune()
            except sqlite3.Error as exc:
                self.stats.write_errors += 1
                self._rlog.error("history-prune", "history pruning failed", error=str(exc))
            self.stats.bytes = self.db.size_bytes()
            return len(batch) - late

    def _reload_open(self) -> None:
        """After a failed transaction the in-memory buckets may hold the batch: rebuild them from the file."""
        self._open.clear()
        with contextlib.suppress(sqlite3.Error):
            self._restore()

    def _write(self, batch: list[tuple[str, int, npt.NDArray[np.float64], int]],
               pace: FlushPacer | None = None) -> int:
        """Write ``batch`` in one transaction; returns how many of its frames were late (not newer than their
        point's latest recorded frame: skipped).  ``pace`` is called every few frames and points."""
        frames: list[tuple[int, int, int, int]] = []
        values: list[npt.NDArray[np.float64]] = []  # the frames' values, made float32 blobs all at once
        rollups: _Rows = []
        minutes: list[_MinuteRow] = []
        with self.db.transaction() as c:
            for i, (point, t_ns, v, code) in enumerate(batch):
                if pace is not None and i % _PACE_EVERY == 0:
                    pace()
                pid = self.db.point_id(point)
                op = self._open.get(point)
                if op is None:
                    op = self._open[point] = _Open(self._layout)
                if t_ns <= op.latest_ns and op.latest_ns:
                    continue
                op.latest_ns = t_ns
                frames.append((pid, t_ns, self._layout, code))
                values.append(v)
                self._close_due(point, pid, op, t_ns // 10**9, rollups, minutes)
                if code == 0:
                    if op.period is not None:  # running again: the period ends at this frame
                        op.period = (op.period[0], op.period[1], t_ns)
                        self._write_period(c, pid, op)
                        op.period = None
                    start = (t_ns // 10**9) // 60 * 60
                    if op.minute_start is None:
                        op.minute_start = start
                    op.add_to_minute(v, (t_ns - op.minute_start * 10**9) / 1e9)
                    op.dirty.add("minute")
                else:
                    if op.period is None or op.period[0] != code:
                        if op.period is not None:
                            op.period = (op.period[0], op.period[1], t_ns)
                            self._write_period(c, pid, op)
                        op.period = (code, t_ns, t_ns)
                    else:
                        op.period = (code, op.period[1], t_ns)
                    op.period_dirty = True
            if frames:
                blob = np.stack(values).astype("<f4").tobytes()
                w = 4 * len(self.indicators)
                c.executemany("INSERT OR REPLACE INTO frames (point, t_ns, layout, state, v) VALUES (?, ?, ?, ?, ?)",
                              [(*f, blob[i * w:(i + 1) * w]) for i, f in enumerate(frames)])
            for i, (point, op) in enumerate(self._open.items()):
                if pace is not None and i % _PACE_EVERY == 0:
                    pace()
                pid = self.db.point_id(point)
                if op.period is not None and op.period_dirty:
                    self._write_period(c, pid, op)
                if op.dirty:
                    self._open_rows(pid, op, rollups, minutes)
            c.executemany(_INSERT_ROLLUP, self._fill_minutes(rollups, minutes))
        return len(batch) - len(frames)

    def _fill_minutes(self, rows: _Rows, minutes: list[_MinuteRow]) -> list[_Row]:
        """The rows with their minute rows filled in: the statistics of every minute of the flush in one
        :func:`~edgevib.pipelines.rollup.summarize_many` (equal to each minute's own :func:`summarize`), their
        float32 blobs cut from one array each."""
        if minutes:
            k = len(self.indicators)
            stats = summarize_many([m[4] for m in minutes], self.settings.high_percentile)  # (6, minutes · k)
            sums = np.stack([time_sums(m[5], m[4]) for m in minutes])  # (minutes, k)
            stats_f32 = stats.reshape(len(STAT_FIELDS), len(minutes), k).transpose(1, 0, 2).astype("<f4").tobytes()
            t_mean_f32 = _t_mean_blob(sums, stats[0].reshape(sums.shape))  # every minute's at once
            w_stats, w_t = 4 * len(STAT_FIELDS) * k, 4 * k
            for i, (at, pid, start, closed, _, _) in enumerate(minutes):
                rows[at] = (pid, 60, start, self._layout, closed, stats_f32[i * w_stats:(i + 1) * w_stats], None,
                            t_mean_f32[i * w_t:(i + 1) * w_t])
        out = [r for r in rows if r is not None]
        if len(out) != len(rows):
            raise HistoryError("a minute roll-up row was left unfilled")
        return out

    @staticmethod
    def _write_period(c: sqlite3.Connection, pid: int, op: _Open) -> None:
        assert op.period is not None
        code, start, end = op.period
        c.execute("INSERT OR REPLACE INTO periods (point, start_ns, end_ns, state) VALUES (?, ?, ?, ?)",
                  (pid, start, end, code))
        op.period_dirty = False

    def _close_due(self, point: str, pid: int, op: _Open, t_s: int, rows: _Rows,
                   minutes: list[_MinuteRow]) -> None:
        """Close the buckets that end at or before ``t_s`` (a new frame's time, whatever its state).  The closed
        minute's row takes its place in ``rows``; its statistics come with the flush's others (``minutes``)."""
        if op.minute_start is not None and t_s >= op.minute_start + 60:
            held = op.minute()
            if held is not None:
                x, tt = held
                minutes.append((len(rows), pid, op.minute_start, 1, x, tt))
                rows.append(None)
                for lname in ("hour", "day"):
                    length = LEVELS[lname]
                    start = op.minute_start // length * length
                    if op.starts.get(lname) != start:
                        self._close_level(pid, op, lname, rows)
                        op.starts[lname] = start
                        op.sketches[lname] = [LogSketch(_SKETCH_ALPHA) for _ in self.indicators]
                        op.t_sums[lname] = np.zeros(len(self.indicators))
                    op.dirty.add(lname)
                    before = op.t_sums.get(lname)
                    op.t_sums[lname] = (np.zeros(len(self.indicators)) if before is None else before) + \
                        time_sums(tt + (op.minute_start - start), x)
                # the closed minute into the hour's and the day's sketches (its bins worked out once for both)
                LogSketch.add_columns(op.sketches["hour"], x, also=[op.sketches["day"]])
            op.clear_minute()
            op.dirty.discard("minute")
        for lname in ("hour", "day"):
            open_start = op.starts.get(lname)
            if open_start is not None and t_s >= open_start + LEVELS[lname] and op.minute_start is None:
                self._close_level(pid, op, lname, rows)

    def _close_level(self, pid: int, op: _Open, lname: str, rows: _Rows) -> None:
        start = op.starts.pop(lname, None)
        sketches = op.sketches.pop(lname, None)
        sums = op.t_sums.pop(lname, None)
        op.dirty.discard(lname)
        if start is None or sketches is None:
            return
        stats = self._sketch_stats(sketches)
        rows.append((pid, LEVELS[lname], start, self._layout, 1, _f32(stats), None,
                     _t_mean_blob(np.zeros(len(sketches)) if sums is None else sums, stats[0])))

    def _sketch_stats(self, sketches: Sequence[LogSketch]) -> npt.NDArray[np.float64]:
        return sketch_summaries(sketches, self.settings.high_percentile)

    def _open_rows(self, pid: int, op: _Open, rows: _Rows, minutes: list[_MinuteRow],
                   with_minute: bool = False) -> None:
        """Rows of the still-open buckets (readers see the latest partial roll-ups; a restart continues them).

        The open minute's row is rewritten at every flush.  An open hour or day row is rewritten when a minute
        closes into it, holding the bucket's closed minutes: merging the open minute into the hour's and the
        day's sketches at every flush cost more than the rest of the history together (for 1,000 points, most
        of a core), for a partial roll-up at most a minute fresher.  ``with_minute`` (at :meth:`close`) writes
        them with the open minute too.  Either way the stored sketches hold the closed minutes only: a restart
        takes the open minute's values back from the frames table.  Each row's ``t_mean`` is the mean time of the
        values its statistics hold."""
        held = op.minute()
        minute, minute_t = held if held is not None else (None, np.zeros(0))
        if op.minute_start is not None and minute is not None:
            minutes.append((len(rows), pid, op.minute_start, 0, minute, minute_t))
            rows.append(None)
        if not with_minute:
            minute = None
        zero = np.zeros(len(self.indicators))
        for lname in ("hour", "day"):
            if lname not in op.dirty and minute is None:
                continue
            sketches = op.sketches.get(lname)
            start = op.starts.get(lname)
            sums = op.t_sums.get(lname, zero)
            if minute is not None and op.minute_start is not None:
                m_start = op.minute_start // LEVELS[lname] * LEVELS[lname]
                if start is None or start != m_start:
                    start, sketches, sums = m_start, None, zero
            if start is None:
                continue
            view_sums = sums
            if minute is not None and op.minute_start is not None:
                view_sums = sums + time_sums(minute_t + (op.minute_start - start), minute)
            if minute is None and sketches is not None:
                view = sketches
            else:
                view = [LogSketch(_SKETCH_ALPHA) for _ in self.indicators]
                if sketches is not None:
                    for sk, stored_sk in zip(view, sketches, strict=True):
                        sk.merge(stored_sk)
                if minute is not None:
                    LogSketch.add_columns(view, minute)
            stored = sketches if sketches is not None else [LogSketch(_SKETCH_ALPHA) for _ in self.indicators]
            stats = self._sketch_stats(view)
            rows.append((pid, LEVELS[lname], start, self._layout, 0, _f32(stats), _sketch_blob(stored, sums),
                         _t_mean_blob(view_sums, stats[0])))
        op.dirty.clear()

    def _write_open_with_minute(self) -> None:
        """Rewrite every point's open hour and day rows with its open minute (at :meth:`close`)."""
        rows: _Rows = []
        minutes: list[_MinuteRow] = []
        for point, op in self._open.items():
            if op.minute_start is not None and op.minute_n:
                self._open_rows(self.db.point_id(point), op, rows, minutes, with_minute=True)
        if rows:
            with self.db.transaction() as c:
                c.executemany(_INSERT_ROLLUP, self._fill_minutes(rows, minutes))

    # ------------------------------------------------------------------ pruning

    def _prune(self) -> None:
        c = self.db.conn
        now = time.monotonic()
        if now - self._since_retention >= min(60.0, 10 * self.settings.flush_s):
            self._since_retention = now
            with self.db.transaction() as tx:
                for point, op in self._open.items():
                    if not op.latest_ns:
                        continue
                    pid = self.db.point_id(point)
                    latest_s = op.latest_ns / 1e9
                    cut = round((latest_s - self.settings.recent_s) * 1e9)
                    tx.execute("DELETE FROM frames WHERE point = ? AND t_ns < ?", (pid, cut))
                    for lname, length in LEVELS.items():
                        cut_s = math.floor(latest_s - self.settings.retention_s(lname)) // length * length
                        tx.execute("DELETE FROM rollups WHERE point = ? AND level = ? AND start_s < ? AND closed = 1",
                                   (pid, length, cut_s))
                    tx.execute("DELETE FROM periods WHERE point = ? AND end_ns < ?",
                               (pid, round((latest_s - self.settings.day_s) * 1e9)))
            _vacuum(c)  # hand the deleted rows' pages back to the file system (at the next checkpoint)
        budget = self.settings.max_bytes
        if self.db.size_bytes() <= budget:
            return
        c.execute("PRAGMA wal_checkpoint(TRUNCATE)")  # the WAL's pages into the file first: often enough
        if self.db.size_bytes() <= budget:
            return
        target = int(_PRUNE_TO * budget)
        for what in _PRUNE_ORDER:
            for _ in range(8):  # a few rounds per kind: the first usually frees enough
                used = self._used_bytes()
                if used <= target:
                    break
                removed = self._prune_oldest(what, used - target)
                if removed == 0:
                    break
                self.stats.pruned[what] += removed
            if self._used_bytes() <= target:
                break
        _vacuum(c)
        c.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        if self.db.size_bytes() > budget:
            self._rlog.warning("history-budget", "history still above its disk budget after pruning",
                               bytes=self.db.size_bytes(), budget=budget)

    def _used_bytes(self) -> int:
        """Bytes the database's pages hold (free pages excluded) plus the WAL."""
        c = self.db.conn
        page = int(c.execute("PRAGMA page_size").fetchone()[0])
        count = int(c.execute("PRAGMA page_count").fetchone()[0])
        free = int(c.execute("PRAGMA freelist_count").fetchone()[0])
        wal = self.db.path.with_name(self.db.path.name + "-wal")
        wal_size = wal.stat().st_size if wal.exists() else 0
        return (count - free) * page + wal_size

    def _prune_oldest(self, what: str, excess_bytes: int) -> int:
        """Delete the oldest rows of one kind, about enough to free ``excess_bytes``; returns how many."""
        c = self.db.conn
        if what == "frames":
            total = int(c.execute("SELECT count(*) FROM frames").fetchone()[0])
            width = 4 * len(self.indicators) + 24
            sql = ("DELETE FROM frames WHERE (t_ns, point) IN (SELECT t_ns, point FROM frames ORDER BY t_ns "
                   "LIMIT ?)")
            args: tuple[int, ...] = ()
        else:
            length = LEVELS[what]
            total = int(c.execute("SELECT count(*) FROM rollups WHERE level = ? AND closed = 1",
                                  (length,)).fetchone()[0])
            width = 4 * (len(STAT_FIELDS) + 1) * len(self.indicators) + 24  # stats and t_mean
            sql = ("DELETE FROM rollups WHERE (level, start_s, point) IN (SELECT level, start_s, point FROM rollups "
                   "WHERE level = ? AND closed = 1 ORDER BY start_s LIMIT ?)")
            args = (length,)
        if total == 0:
            return 0
        k = min(total, max(50, math.ceil(1.2 * excess_bytes / width)))
        with self.db.transaction() as tx:
            n = int(tx.execute(sql, (*args, k)).rowcount)
        _vacuum(c)
        c.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        return n

    # ------------------------------------------------------------------ projections and baselines

    def write_projection(self, point: str, indicator: str, t_ns: int, body: Mapping[str, Any]) -> None:
        """Store the latest projection of a series (a JSON document; see :mod:`edgevib.daemon.projection`)."""
        text = json.dumps(body, separators=(",", ":"), allow_nan=False)
        self._write_row("history-projection", "INSERT OR REPLACE INTO projections (point, indicator, t_ns, body) "
                        "VALUES (?, ?, ?, ?)", point, (indicator, int(t_ns), text))

    def write_baseline(self, point: str, indicator: str, mean: float, std: float, n: int, t_ns: int) -> None:
        self._write_row("history-baseline", "INSERT OR REPLACE INTO baselines (point, indicator, mean, std, n, t_ns) "
                        "VALUES (?, ?, ?, ?, ?, ?)", point, (indicator, float(mean), float(std), int(n), int(t_ns)))

    def _write_row(self, what: str, sql: str, point: str, values: tuple[Any, ...]) -> None:
        """One row of the point in its own transaction; a failure is logged and counted, never raised."""
        with self._flush_lock:
            try:
                with self.db.transaction() as c:
                    c.execute(sql, (self.db.point_id(point), *values))
            except sqlite3.Error as exc:
                self.stats.write_errors += 1
                self._rlog.error(what, "history write failed", error=str(exc))

    # ------------------------------------------------------------------ lifecycle (event loop)

    async def start(self) -> None:
        self._stopping = False
        self._paced = True
        self._task = asyncio.get_running_loop().create_task(self._run(), name="edgevib-history")

    async def _run(self) -> None:
        while not self._stopping:
            await asyncio.sleep(self.settings.flush_s)
            try:
                await asyncio.to_thread(self.flush)
            except Exception as exc:  # the flusher never dies
                self._rlog.error("history-flush", "history flush failed", error=repr(exc))

    async def stop(self) -> None:
        """Flush what is queued and close the file."""
        self._stopping = True
        self._paced = False  # a flush in flight finishes at full speed
        if self._task is not None:
            self._task.cancel()
            await asyncio.gather(self._task, return_exceptions=True)
            self._task = None
        await asyncio.to_thread(self.close)

    def close(self) -> None:
        self.flush()
        with self._flush_lock:
            try:
                self._write_open_with_minute()
            except sqlite3.Error as exc:
                self.stats.write_errors += 1
                self._rlog.error("history", "history write failed", error=str(exc), path=str(self.db.path))
            self.db.close()


# --------------------------------------------------------------------------------------------- reading


@dataclass(frozen=True, slots=True)
class HistorySeries:
    """One indicator of one point read back from the history.

    ``level`` is ``"frames"`` (frame-rate values: ``t_s``, ``value`` = the value, ``state`` per frame) or a roll-up
    level (``t_s`` = bucket start, and the roll-up arrays; ``value`` = the median).  ``t_mean_s``: the mean time of
    the values each bucket holds (the frame time itself at frame rate; a bucket's middle where the file does not
    know it: rows written before schema version 2) — the time a bucket's statistics stand for, which is its middle
    only when its values fill it evenly (not the open bucket, nor one of a machine that ran part of it).
    ``periods``: the not-running periods overlapping the range, ``(state, start_s, end_s)``.  ``high_percentile``:
    which percentile ``p_high`` holds.
    """

    point: str
    indicator: str
    level: str
    t_s: npt.NDArray[np.float64]
    value: npt.NDArray[np.float64]
    count: npt.NDArray[np.float64] | None = None
    vmin: npt.NDArray[np.float64] | None = None
    mean: npt.NDArray[np.float64] | None = None
    vmax: npt.NDArray[np.float64] | None = None
    p_high: npt.NDArray[np.float64] | None = None
    state: tuple[str, ...] = ()
    periods: tuple[tuple[str, float, float], ...] = ()
    high_percentile: float = 95.0
    t_mean_s: npt.NDArray[np.float64] | None = None

    @property
    def bucket_s(self) -> float:
        return float(LEVELS.get(self.level, 0))

    @property
    def stamp_s(self) -> npt.NDArray[np.float64]:
        """The time each value stands for: :attr:`t_mean_s`, or each bucket's middle without it."""
        if self.t_mean_s is not None:
            return self.t_mean_s
        return np.asarray(self.t_s + self.bucket_s / 2.0, dtype=np.float64)


class HistoryReader:
    """Read-only access to a history file (safe beside a running daemon: WAL readers never block its writer).

    This is the query surface for the trend monitor, ``edgevib trend`` and the HTTP API
    (``GET /api/v1/points/{point}/trend``): :meth:`series`, :meth:`points`, :meth:`projection`,
    :meth:`projections`, :meth:`baseline`.
    """

    def __init__(self, path: str | Path, high_percentile: float = 95.0) -> None:
        self.path = Path(path)
        try:
            self.conn = _connect(self.path, readonly=True)
            row = self.conn.execute("SELECT version FROM schema_version").fetchone()
        except sqlite3.Error as exc:
            raise HistoryError(f"cannot read history database {self.path}: {exc}") from exc
        if row is None or int(row[0]) > SCHEMA_VERSION:
            raise HistoryError(f"history database {self.path} has schema version {row and row[0]}; this edgevib "
                               f"reads up to {SCHEMA_VERSION}")
        # a version 1 file (not yet opened by a writer, which migrates it) has no mean times: bucket middles
        self._t_mean_column = "t_mean" if int(row[0]) >= 2 else "NULL"
        self.high_percentile = high_percentile
        self._layouts: dict[int, tuple[str, ...]] = {}

    def close(self) -> None:
        self.conn.close()

    def __enter__(self) -> HistoryReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _layout(self, lid: int) -> tuple[str, ...]:
        names = self._layouts.get(lid)
        if names is None:
            row = self.conn.execute("SELECT names FROM layouts WHERE id = ?", (lid,)).fetchone()
            names = tuple(str(row[0]).split(",")) if row else ()
            self._layouts[lid] = names
        return names

    def _pid(self, point: str) -> int | None:
        row = self.conn.execute("SELECT id FROM points WHERE name = ?", (point,)).fetchone()
        return None if row is None else int(row[0])

    def points(self) -> dict[str, tuple[str, ...]]:
        """Point → the indicators its latest frames carry."""
        out: dict[str, tuple[str, ...]] = {}
        for pid, name in self.conn.execute("SELECT id, name FROM points ORDER BY name").fetchall():
            row = self.conn.execute("SELECT layout FROM frames WHERE point = ? ORDER BY t_ns DESC LIMIT 1",
                                    (pid,)).fetchone()
            if row is None:
                row = self.conn.execute("SELECT layout FROM rollups WHERE point = ? ORDER BY start_s DESC LIMIT 1",
                                        (pid,)).fetchone()
            if row is not None:
                out[str(name)] = self._layout(int(row[0]))
        return out

    def latest_time_s(self, point: str) -> float | None:
        pid = self._pid(point)
        if pid is None:
            return None
        row = self.conn.execute("SELECT max(t_ns) FROM frames WHERE point = ?", (pid,)).fetchone()
        if row and row[0] is not None:
            return int(row[0]) / 1e9
        row = self.conn.execute("SELECT max(start_s + level) FROM rollups WHERE point = ?", (pid,)).fetchone()
        return None if not row or row[0] is None else float(row[0])

    def latest_state(self, point: str) -> str | None:
        """Machine state of the point's latest frame."""
        pid = self._pid(point)
        if pid is None:
            return None
        row = self.conn.execute("SELECT state FROM frames WHERE point = ? ORDER BY t_ns DESC LIMIT 1",
                                (pid,)).fetchone()
        return None if row is None else MACHINE_STATES[int(row[0])]

    def level_for(self, point: str, since_s: float | None, until_s: float | None, max_points: int) -> str:
        """The finest roll-up level with at most ``max_points`` buckets in [since, until] that still holds the
        range's oldest data (a level whose older rows were pruned by retention or budget gives way to a coarser
        one); ``"day"`` when none has few enough."""
        pid = self._pid(point)
        if pid is None:
            raise HistoryError(f"no history for point {point!r}")
        lo = -(2**62) if since_s is None else math.floor(since_s)
        hi = 2**62 if until_s is None else math.ceil(until_s)
        found: dict[str, tuple[int, int | None]] = {}
        for lname, length in LEVELS.items():
            n, first = self.conn.execute("SELECT count(*), min(start_s) FROM rollups WHERE point = ? AND level = ? "
                                         "AND start_s >= ? AND start_s <= ?",
                                         (pid, length, lo // length * length, hi)).fetchone()
            found[lname] = (int(n), None if first is None else int(first))
        levels = list(LEVELS)
        for i, lname in enumerate(levels):
            n, first = found[lname]
            if first is None or n > max_points:
                continue
            coarser = [(LEVELS[c], found[c][1]) for c in levels[i + 1:]]
            if all(f is None or first <= f + length for length, f in coarser):
                return lname
        return "day"

    def series(self, point: str, indicator: str, *, since_s: float | None = None, until_s: float | None = None,
               level: str = "auto", max_points: int = 400) -> HistorySeries:
        """One indicator of one point over [since_s, until_s] (default: everything).

        ``level``: ``"frames"``, ``"minute"``, ``"hour"``, ``"day"`` or ``"auto"`` (the finest roll-up level with at
        most ``max_points`` buckets in the range).  Roll-up buckets with no running values are left out.
        """
        pid = self._pid(point)
        if pid is None:
            raise HistoryError(f"no history for point {point!r}")
        lo_ns = -(2**62) if since_s is None else math.floor(since_s * 1e9)
        hi_ns = 2**62 if until_s is None else math.ceil(until_s * 1e9)
        if level == "auto":
            has_rollups = self.conn.execute("SELECT 1 FROM rollups WHERE point = ? LIMIT 1", (pid,)).fetchone()
            level = self.level_for(point, since_s, until_s, max_points) if has_rollups else "frames"
        periods = self._periods(pid, lo_ns, hi_ns)
        if level == "frames":
            rows = self.conn.execute("SELECT t_ns, layout, state, v FROM frames WHERE point = ? AND t_ns >= ? AND "
                                     "t_ns <= ? ORDER BY t_ns", (pid, lo_ns, hi_ns)).fetchall()
            t, v, st = [], [], []
            for t_ns, lid, state, blob in rows:
                names = self._layout(int(lid))
                if indicator not in names:
                    continue
                vals = np.frombuffer(blob, dtype="<f4")
                t.append(int(t_ns) / 1e9)
                v.append(float(vals[names.index(indicator)]))
                st.append(MACHINE_STATES[int(state)])
            return HistorySeries(point, indicator, "frames", np.asarray(t), np.asarray(v), state=tuple(st),
                                 periods=periods, high_percentile=self.high_percentile,
                                 t_mean_s=np.asarray(t, dtype=np.float64))
        if level not in LEVELS:
            raise HistoryError(f"level {level!r} is not frames, minute, hour, day or auto")
        length = LEVELS[level]
        lo_s = -(2**62) if since_s is None else math.floor(since_s) // length * length
        hi_s = 2**62 if until_s is None else math.ceil(until_s)
        rows = self.conn.execute(f"SELECT start_s, layout, stats, {self._t_mean_column} FROM rollups WHERE point = ? "
                                 "AND level = ? AND start_s >= ? AND start_s <= ? ORDER BY start_s",
                                 (pid, length, lo_s, hi_s)).fetchall()
        starts: list[float] = []
        stamps: list[float] = []
        stats: list[npt.NDArray[np.float32]] = []
        for start, lid, blob, t_mean in rows:
            lnames = self._layout(int(lid))
            if indicator not in lnames:
                continue
            j = lnames.index(indicator)
            stat = np.frombuffer(blob, dtype="<f4").reshape(len(STAT_FIELDS), len(lnames))[:, j]
            if stat[0] > 0:  # buckets with running values only
                off = float(np.frombuffer(t_mean, dtype="<f4")[j]) if t_mean is not None else math.nan
                starts.append(float(start))
                stamps.append(float(start) + (off if math.isfinite(off) else length / 2.0))
                stats.append(stat)
        count, vmin, mean, vmax, p50, p_high = np.asarray(stats, dtype=np.float64).reshape(-1, len(STAT_FIELDS)).T
        return HistorySeries(point, indicator, level, np.asarray(starts, dtype=np.float64), p50, count=count,
                             vmin=vmin, mean=mean, vmax=vmax, p_high=p_high, periods=periods,
                             high_percentile=self.high_percentile, t_mean_s=np.asarray(stamps, dtype=np.float64))

    def _periods(self, pid: int, lo_ns: int, hi_ns: int) -> tuple[tuple[str, float, float], ...]:
        rows = self.conn.execute("SELECT state, start_ns, end_ns FROM periods WHERE point = ? AND end_ns >= ? AND "
                                 "start_ns <= ? ORDER BY start_ns", (pid, lo_ns, hi_ns)).fetchall()
        return tuple((MACHINE_STATES[int(s)], int(a) / 1e9, int(b) / 1e9) for s, a, b in rows)

    def projection(self, point: str, indicator: str) -> dict[str, Any] | None:
        """The latest stored projection document of a series, or None."""
        pid = self._pid(point)
        if pid is None:
            return None
        row = self.conn.execute("SELECT body FROM projections WHERE point = ? AND indicator = ?",
                                (pid, indicator)).fetchone()
        return None if row is None else dict(json.loads(row[0]))

    def projections(self) -> dict[tuple[str, str], dict[str, Any]]:
        """Every stored projection: (point, indicator) → document."""
        out: dict[tuple[str, str], dict[str, Any]] = {}
        for name, ind, body in self.conn.execute("SELECT p.name, j.indicator, j.body FROM projections j JOIN points p "
                                                 "ON p.id = j.point ORDER BY p.name, j.indicator").fetchall():
            out[(str(name), str(ind))] = dict(json.loads(body))
        return out

    def baseline(self, point: str, indicator: str) -> tuple[float, float, int] | None:
        pid = self._pid(point)
        if pid is None:
            return None
        row = self.conn.execute("SELECT mean, std, n FROM baselines WHERE point = ? AND indicator = ?",
                                (pid, indicator)).fetchone()
        return None if row is None else (float(row[0]), float(row[1]), int(row[2]))
