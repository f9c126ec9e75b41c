"""Persisted alarm state: each limit's state machine, latches and shelves, sensor faults and learned baselines.

Rows are JSON bodies in the outbox's database (see :mod:`edgevib.daemon.alarms.outbox`), versioned by the
``schema_version`` table.  Decoding is tolerant both ways: a field an older edgevib did not write takes its
default, a field a newer one added is ignored — so a newer version reads an older one's state.
"""

from __future__ import annotations

import json
import math
import operator
import sqlite3
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, fields, replace
from json.encoder import encode_basestring_ascii
from typing import Any, TypeVar

from edgevib.daemon.alarms.outbox import Database
from edgevib.pipelines.alarm import AlarmState, LevelTrack

__all__ = ["Baseline", "SensorState", "SourceState", "StateStore", "decode_alarm", "encode_alarm",
           "encode_sensor"]

T = TypeVar("T")


@dataclass(frozen=True, slots=True)
class Baseline:
    """Running mean and spread of one indicator (Welford's algorithm) during its learning period."""

    n: int = 0
    mean: float = 0.0
    m2: float = 0.0
    started_s: float | None = None
    learned_s: float | None = None

    @property
    def learned(self) -> bool:
        return self.learned_s is not None

    @property
    def std(self) -> float:
        return math.sqrt(self.m2 / (self.n - 1)) if self.n > 1 else 0.0

    def add(self, value: float, now_s: float, frames_needed: int) -> Baseline:
        """One more value; the baseline becomes learned at ``frames_needed`` values.  Learned baselines stay."""
        if self.learned or not math.isfinite(value):
            return self
        n = self.n + 1
        delta = value - self.mean
        mean = self.mean + delta / n
        m2 = self.m2 + delta * (value - mean)
        return Baseline(n=n, mean=mean, m2=m2, started_s=self.started_s if self.started_s is not None else now_s,
                        learned_s=now_s if n >= frames_needed else None)


@dataclass(frozen=True, slots=True)
class SensorState:
    """Sensor health of one point as the daemon tracks it, with the time of the point's latest frame and its
    machine's state judged then (``machine_state``, since ``machine_since_s``): what a restart shows as the last
    known while no data flows."""

    fault: str | None = None
    detail: str = ""
    since_s: float | None = None
    healthy_run: int = 0
    last_frame_s: float | None = None
    relapses: int = 0  # re-raised soon after clearing: an intermittent fault needs longer to re-arm
    machine_state: str | None = None
    machine_since_s: float | None = None


_ENCODERS: dict[type, Callable[[Any], dict[str, Any]]] = {}


def _as_dict(obj: Any) -> dict[str, Any]:
    """``dataclasses.asdict`` for the state records here (fields of plain values or nested dataclasses), several
    times faster: the state of every limit a frame touches is encoded on each commit."""
    enc = _ENCODERS.get(type(obj))
    if enc is None:
        enc = _ENCODERS[type(obj)] = _encoder(type(obj))
    return enc(obj)


_PLAIN = frozenset({int, float, str, bool, type(None)})


def _encoder(cls: type) -> Callable[[Any], dict[str, Any]]:
    names = tuple(f.name for f in fields(cls))
    get = operator.attrgetter(*names)

    def encode(obj: Any) -> dict[str, Any]:
        d = dict(zip(names, get(obj) if len(names) > 1 else (get(obj),), strict=True))
        for name, v in d.items():
            t = type(v)
            if t in _PLAIN:
                continue
            if hasattr(t, "__dataclass_fields__"):
                d[name] = _as_dict(v)
            else:  # containers are copied as asdict copies them
                return asdict(obj)
        return d

    return encode


@dataclass(frozen=True, slots=True)
class SourceState:
    """A source's data path as the alarm layer last announced it: ``up`` (or never announced) or ``down``.

    ``since_s``: wall-clock time of the announced change; ``reason``: why it is down (``connection lost``, ``not
    reachable since start``, ``connected, but none of its points delivers data``); ``silent``: it went down for
    lack of data (connected, no point delivering), so its return is its data flowing again, never a connection
    coming back — also after the connection was lost meanwhile (``reason`` then says so) or the daemon restarted.
    """

    down: bool = False
    since_s: float | None = None
    reason: str = ""
    silent: bool = False


def _dc_from(cls: Any, d: dict[str, Any]) -> Any:
    if not isinstance(d, dict):  # a row that is JSON but no object: unreadable like any other
        raise TypeError(f"{cls.__name__} body is not an object")
    names = {f.name for f in fields(cls)}
    return cls(**{k: v for k, v in d.items() if k in names})


# The per-frame rows (an alarm state per limit, a sensor state per point) are written by hand-made encoders, a few
# times faster than the JSON encoder on :func:`_as_dict`: the keys are fixed text, each value goes through a
# converter for its field's type.  A value of any other type (a subclass, a NaN or infinity) is handed to the JSON
# encoder with the same settings, so the text — and the ValueError for a non-finite float — is what
# ``json.dumps(_as_dict(obj), separators=…, allow_nan=False)`` gives.  A record whose fields are not the ones
# written out here (a field added to the dataclass) takes that generic way.

_json_compact = json.JSONEncoder(separators=(",", ":"), allow_nan=False).encode
_json_spaced = json.JSONEncoder(allow_nan=False).encode
_float_repr = float.__repr__
_int_repr = int.__repr__


def _num(x: Any, other: Callable[[Any], str]) -> str:
    """A ``float | None`` field."""
    if type(x) is float and x - x == 0.0:  # finite (x - x is NaN for a NaN or an infinity)
        return _float_repr(x)
    return "null" if x is None else other(x)


def _text(x: Any, other: Callable[[Any], str]) -> str:
    """A ``str | None`` field."""
    if type(x) is str:
        return encode_basestring_ascii(x)
    return "null" if x is None else other(x)


def _int(x: Any, other: Callable[[Any], str]) -> str:
    return _int_repr(x) if type(x) is int else other(x)


def _bool(x: Any, other: Callable[[Any], str]) -> str:
    return "true" if x is True else "false" if x is False else other(x)


def _track_json(t: LevelTrack) -> str:
    c = _json_compact
    return (f'{{"active":{_bool(t.active, c)},"run_frames":{_int(t.run_frames, c)},'
            f'"run_start_s":{_num(t.run_start_s, c)}}}')


_ALARM_FIELDS = ("alert", "danger", "acked", "latched", "shelved_until_s", "shelve_reason", "suppressed",
                 "last_value", "since_s", "stale")
_TRACK_FIELDS = ("active", "run_frames", "run_start_s")
_SENSOR_FIELDS = ("fault", "detail", "since_s", "healthy_run", "last_frame_s", "relapses", "machine_state",
                  "machine_since_s")


def _names(cls: type) -> tuple[str, ...]:
    return tuple(f.name for f in fields(cls))


_FAST = _names(AlarmState) == _ALARM_FIELDS and _names(LevelTrack) == _TRACK_FIELDS and \
    _names(SensorState) == _SENSOR_FIELDS
"""Whether the hand-made encoders cover the records' fields (else every record takes the generic way)."""


def encode_alarm(s: AlarmState) -> str:
    """The alarm state row's body: the compact JSON object of :func:`dataclasses.asdict`, fields in order."""
    if not _FAST or type(s) is not AlarmState or type(s.alert) is not LevelTrack or type(s.danger) is not LevelTrack:
        return _json_compact(_as_dict(s))
    a, d, c = s.alert, s.danger, _json_compact
    return (f'{{"alert":{_track_json(a)},"danger":{_track_json(d)},"acked":{_bool(s.acked, c)},'
            f'"latched":{_int(s.latched, c)},"shelved_until_s":{_num(s.shelved_until_s, c)},'
            f'"shelve_reason":{_text(s.shelve_reason, c)},"suppressed":{_text(s.suppressed, c)},'
            f'"last_value":{_num(s.last_value, c)},"since_s":{_num(s.since_s, c)},"stale":{_text(s.stale, c)}}}')


def encode_sensor(s: SensorState) -> str:
    """The sensor state row's body: the JSON object of :func:`dataclasses.asdict` (``json.dumps``' default
    separators), fields in order."""
    if not _FAST or type(s) is not SensorState:
        return _json_spaced(_as_dict(s))
    j = _json_spaced
    return (f'{{"fault": {_text(s.fault, j)}, "detail": {_text(s.detail, j)}, "since_s": {_num(s.since_s, j)}, '
            f'"healthy_run": {_int(s.healthy_run, j)}, "last_frame_s": {_num(s.last_frame_s, j)}, '
            f'"relapses": {_int(s.relapses, j)}, "machine_state": {_text(s.machine_state, j)}, '
            f'"machine_since_s": {_num(s.machine_since_s, j)}}}')


def decode_alarm(body: str) -> AlarmState:
    d = json.loads(body)
    if not isinstance(d, dict):
        raise ValueError("alarm state body is not an object")
    for level in ("alert", "danger"):
        if isinstance(d.get(level), dict):
            d[level] = _dc_from(LevelTrack, d[level])
        else:
            d.pop(level, None)
    return _dc_from(AlarmState, d)  # type: ignore[no-any-return]


class StateStore:
    """Reads and writes alarm, sensor and baseline state; writes join the caller's transaction when given."""

    def __init__(self, db: Database) -> None:
        self.db = db

    def _rows(self, sql: str) -> list[tuple[Any, ...]]:
        with self.db.lock:
            return list(self.db.conn.execute(sql))

    def _load(self, sql: str, decode: Callable[[str], T]) -> dict[Any, T]:
        """``{key: decoded body}`` of a table's rows ``(*key columns, body)``: one key column gives a plain key, more
        a tuple.  An unreadable row is left out (that limit, point or source starts afresh)."""
        out: dict[Any, T] = {}
        for *key, body in self._rows(sql):
            try:
                out[key[0] if len(key) == 1 else tuple(key)] = decode(body)
            except (ValueError, TypeError):
                continue
        return out

    def load_alarms(self) -> dict[tuple[str, str], AlarmState]:
        return self._load("SELECT point, indicator, body FROM alarm_state", decode_alarm)

    def load_sensors(self) -> dict[str, SensorState]:
        return self._load("SELECT point, body FROM sensor_state", lambda b: _dc_from(SensorState, json.loads(b)))

    def load_baselines(self) -> dict[tuple[str, str], Baseline]:
        return self._load("SELECT point, indicator, body FROM baselines", lambda b: _dc_from(Baseline, json.loads(b)))

    def load_sources(self) -> dict[str, SourceState]:
        return self._load("SELECT source, body FROM source_state", lambda b: _dc_from(SourceState, json.loads(b)))

    def add_history(self, conn: sqlite3.Connection, rows: list[tuple[int, str, str, str, str, str]]) -> None:
        """Append ``(time_ns, kind, point, indicator, event_id, data JSON)`` rows inside the open transaction."""
        if rows:
            conn.executemany("INSERT INTO history (time_ns, kind, point, indicator, event_id, data) VALUES "
                             "(?,?,?,?,?,?)", rows)

    def history(self, point: str | None = None, since_ns: int | None = None,
                limit: int = 200) -> list[tuple[int, str, str, str, str, str]]:
        """History rows ``(time_ns, kind, point, indicator, event_id, data JSON)``, newest first (ties: newest
        written first)."""
        sql = "SELECT time_ns, kind, point, indicator, event_id, data FROM history"
        where: list[str] = []
        args: list[Any] = []
        if point is not None:
            where.append("point = ?")
            args.append(point)
        if since_ns is not None:
            where.append("time_ns >= ?")
            args.append(since_ns)
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY time_ns DESC, seq DESC LIMIT ?"
        args.append(int(limit))
        with self.db.lock:
            return [(int(r[0]), str(r[1]), str(r[2]), str(r[3]), str(r[4]), str(r[5]))
                    for r in self.db.conn.execute(sql, args)]

    def prune_history(self, before_ns: int) -> int:
        """Drop history rows older than ``before_ns``; returns how many."""
        with self.db.transaction() as c:
            return int(c.execute("DELETE FROM history WHERE time_ns < ?", (before_ns,)).rowcount)

    def save(self, conn: sqlite3.Connection, alarms: dict[tuple[str, str], AlarmState] | None = None,
             sensors: dict[str, SensorState] | None = None,
             baselines: dict[tuple[str, str], Baseline] | None = None,
             sources: dict[str, SourceState] | None = None) -> None:
        """Upsert the given states inside the caller's open transaction ``conn``."""
        now = time.time_ns()
        if sources:
            conn.executemany("INSERT OR REPLACE INTO source_state (source, body, updated_ns) VALUES (?,?,?)",
                             [(n, json.dumps(asdict(s), allow_nan=False), now) for n, s in sources.items()])
        if alarms:
            conn.executemany("INSERT OR REPLACE INTO alarm_state (point, indicator, body, updated_ns) VALUES "
                             "(?,?,?,?)", [(p, i, encode_alarm(s), now) for (p, i), s in alarms.items()])
        if sensors:
            conn.executemany("INSERT OR REPLACE INTO sensor_state (point, body, updated_ns) VALUES (?,?,?)",
                             [(p, encode_sensor(s), now) for p, s in sensors.items()])
        if baselines:
            conn.executemany("INSERT OR REPLACE INTO baselines (point, indicator, body, updated_ns) VALUES "
                             "(?,?,?,?)", [(p, i, json.dumps(_as_dict(b), allow_nan=False), now)
                                           for (p, i), b in baselines.items()])

    def forget_baselines(self, conn: sqlite3.Connection, point: str) -> None:
        conn.execute("DELETE FROM baselines WHERE point = ?", (point,))


def restart_tracking(s: AlarmState) -> AlarmState:
    """After a restart, keep what the operator sees (severity, acknowledgement, latch, shelf) and restart the
    debounce runs: frames before the gap do not count toward a pending delay."""
    return replace(s, alert=LevelTrack(active=s.alert.active), danger=LevelTrack(active=s.danger.active))
