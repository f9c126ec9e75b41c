"""A bounded store of each point's recent indicator values, kept in memory for the view's trend panel.

One row per point at most every ``interval_s`` of frame time, at most ``capacity`` rows per point (the oldest go
first); values are float32 (NaN where an indicator was unavailable), columns added as new indicators appear.
Memory is bounded by points × capacity × indicators × 4 bytes.  Nothing survives a restart: the history store of
the trend work replaces this where it is configured.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Iterable, Mapping
from typing import TypeVar

import numpy as np
import numpy.typing as npt

__all__ = ["MAX_COLUMNS", "RecentValues", "Values"]

MAX_COLUMNS = 64  # indicators per point (a point has about 20)
Values = Mapping[str, float | None]
T = TypeVar("T")


class _Ring:
    __slots__ = ("columns", "count", "head", "last_t_s", "t_s", "values")

    def __init__(self, capacity: int) -> None:
        self.t_s = np.full(capacity, np.nan)
        self.values = np.full((capacity, 8), np.nan, dtype=np.float32)
        self.columns: dict[str, int] = {}
        self.head = 0  # next row to write
        self.count = 0
        self.last_t_s = -math.inf


class RecentValues:
    """Per-point ring buffers of indicator values (thread-safe: written on the loop, read in worker threads)."""

    def __init__(self, capacity: int = 720, interval_s: float = 5.0) -> None:
        if capacity < 2:
            raise ValueError(f"capacity {capacity} must be at least 2")
        self.capacity = capacity
        self.interval_s = max(0.0, interval_s)
        self._rings: dict[str, _Ring] = {}
        self._lock = threading.Lock()

    def add(self, point: str, t_s: float, values: Values | Callable[[], Values]) -> bool:
        """Record ``values`` at frame time ``t_s`` unless the previous row is less than ``interval_s`` older.

        ``values`` may be a function returning them: it is called only when the row is recorded, so a caller with
        a frame every 0.64 s and rows every 5 s builds the values of one frame in eight, not of every frame."""
        with self._lock:
            ring = self._due(point, t_s)
            if ring is None:
                return False
            self._write(ring, t_s, values() if callable(values) else values)
            return True

    def add_frames(self, frames: Iterable[tuple[str, float, T]], values: Callable[[T], Values]) -> int:
        """:meth:`add` for many frames ``(point, t_s, item)`` in order under one lock, ``values(item)`` built only
        for the rows recorded; returns how many were."""
        n = 0
        with self._lock:
            for point, t_s, item in frames:
                ring = self._due(point, t_s)
                if ring is not None:
                    self._write(ring, t_s, values(item))
                    n += 1
        return n

    def _due(self, point: str, t_s: float) -> _Ring | None:
        """The point's ring when a row at ``t_s`` is due (``_lock`` held), else ``None``."""
        ring = self._rings.get(point)
        if ring is None:
            ring = self._rings[point] = _Ring(self.capacity)
        if t_s < ring.last_t_s + self.interval_s and t_s >= ring.last_t_s:
            return None
        if t_s < ring.last_t_s:  # time went back (a replay, a device clock reset): start again
            self._rings[point] = ring = _Ring(self.capacity)
        return ring

    def _write(self, ring: _Ring, t_s: float, values: Values) -> None:
        """One row (``_lock`` held): the values given by column, NaN in every other (and for None, NaN, Inf)."""
        row = ring.head
        out = ring.values[row]  # the row as a view: an element assignment costs less than one by (row, column)
        out[:] = np.nan
        nan, isfinite, columns = math.nan, math.isfinite, ring.columns
        for name, v in values.items():
            col = columns.get(name)
            if col is None:
                if len(columns) >= MAX_COLUMNS:
                    continue
                col = len(columns)
                columns[name] = col
                if col >= ring.values.shape[1]:
                    grown = np.full((self.capacity, ring.values.shape[1] * 2), np.nan, dtype=np.float32)
                    grown[:, : ring.values.shape[1]] = ring.values
                    ring.values = grown
                    out = grown[row]
            out[col] = nan if v is None or not isfinite(v) else v
        ring.t_s[row] = t_s
        ring.head = (row + 1) % self.capacity
        ring.count = min(ring.count + 1, self.capacity)
        ring.last_t_s = t_s

    def indicators(self, point: str) -> list[str]:
        with self._lock:
            ring = self._rings.get(point)
            return [] if ring is None else list(ring.columns)

    def series(self, point: str, indicator: str, since_s: float = -math.inf,
               ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
        """Times (s) and values of ``indicator`` at or after ``since_s``, oldest first (empty when unknown)."""
        with self._lock:
            ring = self._rings.get(point)
            if ring is None or indicator not in ring.columns:
                return np.zeros(0), np.zeros(0)
            col = ring.columns[indicator]
            idx = (np.arange(ring.count) + ring.head - ring.count) % self.capacity
            t = ring.t_s[idx].copy()
            v = ring.values[idx, col].astype(np.float64)
        sel = t >= since_s
        return t[sel], v[sel]

    def forget(self, keep: set[str]) -> None:
        """Drop the points not in ``keep`` (after a reload)."""
        with self._lock:
            for pid in [p for p in self._rings if p not in keep]:
                del self._rings[pid]
