"""The alarm layer's decisions as a pure core: ``decide(core, input, now) -> (core, effects)``.

No I/O, no clocks, no logging, no threads: the caller passes the time (:class:`Now`), the frames with their sensor
health already checked and their machine's state (:class:`Frames`), timer ticks with the latest block arrival of
each point (:class:`Tick`), source connection changes (:class:`SourceChange`) and operator commands
(:class:`Command`), and gets back what to do (:class:`Effects`): the events to append to the outbox (with their
history rows and capture requests), the state rows to persist, the points whose state message changed, log records
and a command's reply.  The caller applies them (``edgevib.daemon.alarms.store``) and publishes
:meth:`AlarmCore.snapshot` for the views (``edgevib.daemon.alarms.views``).  ``decide`` updates the core it is
given and returns it: one owner calls it, one input after another (``edgevib.daemon.alarms.engine`` runs it on one
thread), and the same inputs on equal cores give equal effects.

For every analysed frame of a point:

1. **Sensor health**: a fault raises one ``io.edgevib.sensor.v1.fault`` event and suppresses that point's machine
   alarms (reason ``sensor-fault``) — a sensor fault is never reported as a machine fault.  It clears after
   ``sensor_recover_frames`` healthy frames (longer for a relapsing fault).  A point without frames for
   ``no_data_frames`` frame periods while its source is up and another point of that source still delivers gets
   the ``no-data`` fault.
2. **Run state** per machine, as each frame carries it (the daemon's machine tracker judges it); while the
   machine stands and for ``startup_grace_s`` after a start its alarms stay suppressed (reason
   ``machine-stopped`` / ``start-up-grace``).
3. **Baselines** learn each indicator's mean and spread over ``baseline_frames`` valid running frames.
4. **Limits** resolve to set points (ISO 20816-3, absolute, baseline-relative), the pure state machine
   (:mod:`edgevib.pipelines.alarm`) steps, and each transition becomes an ``io.edgevib.alarm.v1.transition``
   event with value, limit, trend slope and advice; transitions into alert or danger ask for a waveform capture.
5. **Data gaps.** A source whose connection is lost (or which is connected but none of whose points delivers)
   gives one ``io.edgevib.source.v1.down`` event and, when data flows again, one ``io.edgevib.source.v1.up``; its
   points' alarms are *stale* meanwhile: they keep their state and acknowledgement and are judged again on the
   first good frames (:func:`edgevib.pipelines.alarm.mark_stale`).  A machine whose every point is stale has an
   unknown state; its events say so and carry the last known one.

Time for the state machine is the frames' measurement time (``t_end_ns``); shelf expiries are set on that
timeline.  edgevib monitors and advises; it is not a machinery protection system.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Any

import numpy as np

from edgevib.daemon.alarms.config import AlarmSettings, LevelRule, LimitConfig
from edgevib.daemon.alarms.control import CommandError, human_duration
from edgevib.daemon.alarms.feed import ALARM_TYPE, BASELINE_TYPE, SENSOR_TYPE, SOURCE_DOWN_TYPE, SOURCE_UP_TYPE
from edgevib.daemon.alarms.state import Baseline, SensorState, SourceState, restart_tracking
from edgevib.daemon.config import Config, PointConfig
from edgevib.daemon.indicators import LIMITABLE
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.machine_state import state_spec
from edgevib.daemon.timestamps import rfc3339_utc_s
from edgevib.pipelines.alarm import (
    AlarmState,
    Level,
    LimitSpec,
    Transition,
    acknowledge,
    display_severity,
    expire_shelf,
    isa_state,
    mark_stale,
    process_severity,
    shelve,
    step,
    unshelve,
)
from edgevib.pipelines.machine_state import MACHINE_STATES, MachineState, MachineStateSpec

__all__ = ["AlarmCore", "AlarmSnapshot", "Capture", "Command", "Effects", "EventOut", "Frames", "Now",
           "SourceChange", "Tick", "advice_text", "decide", "trend_slope_per_h"]

SEVERITY = ("normal", "alert", "danger")
SUPPRESSION: dict[str, str] = {"stopped": "machine-stopped", "starting": "start-up-grace"}
"""Machine states under which machine alarms are suppressed by design, and the reason given."""
NO_DATA_START_S = 30.0  # allowance after start (and after a source returns) before a silent point counts
SOURCE_CONNECT_GRACE_S = 10.0  # a source not connected this long after start is announced down
RELAPSE_WINDOW_S = 120.0  # a sensor fault back within this time of clearing (or twice its last hold) is a relapse
RELAPSE_HOLD_S = 30.0  # after a relapse a fault clears only after this long healthy, doubled by each further relapse
RELAPSE_HOLD_MAX_S = 3600.0
DISCLAIMER = "edgevib monitors and advises; it is not a protection system."
_FAULT_HINT = {
    "overall": "An overall level sums every vibration source the sensor picks up: look at the narrow-band "
               "indicators before concluding what is wrong.",
    "impacting": f"Rising impact indicators ({', '.join(n for n, i in LIMITABLE.items() if i.fault == 'impacting')}) "
                 "can mean early bearing or gear damage; trend them together with the r.m.s. level.",
    "imbalance": "A rise at 1× running speed often points to imbalance.",
    "misalignment": "A rise at 2× running speed often points to misalignment.",
    "looseness": "Harmonics and sub-harmonics (0.5×) of running speed often point to mechanical looseness.",
}


def trend_slope_per_h(points: Iterable[tuple[float, float]]) -> float | None:
    """Least-squares slope of ``(t_s, value)`` pairs in value units per hour (``None`` for fewer than 3)."""
    pts = list(points)
    if len(pts) < 3:
        return None
    t = np.array([p[0] for p in pts], dtype=np.float64)
    v = np.array([p[1] for p in pts], dtype=np.float64)
    t = t - t.mean()
    den = float(np.dot(t, t))
    if den <= 0:
        return None
    return float(np.dot(t, v - v.mean()) / den * 3600.0)


def advice_text(severity: int, fault: str, transition: str, value: float | None, danger: float | None,
                slope_per_h: float | None) -> str:
    """Advice in plain words matched to severity (deferring to site procedures and a qualified analyst)."""
    what = fault.removeprefix("bearing ")
    article = "an" if what[:1] in "aeiou" else "a"
    hint = _FAULT_HINT.get(fault) or (f"Energy at {article} {what} defect frequency points to "
                                      f"rolling-element bearing damage." if fault.startswith("bearing") else "")
    if severity == 0:
        return f"Back below the clear threshold; keep trending. {DISCLAIMER}"
    if severity >= 2:
        head = ("Act now within the site's procedures and have a qualified vibration analyst confirm the "
                "diagnosis before any intervention.")
    elif slope_per_h is not None and slope_per_h > 0 and value is not None and danger is not None and \
            value < danger and (danger - value) / slope_per_h < 14 * 24:
        days = (danger - value) / slope_per_h / 24.0
        head = (f"Plan an inspection or repair: at the present trend the danger level would be reached in about "
                f"{max(days, 0.1):.1f} days.")
    else:
        head = ("Keep watching and trending: an early change like this is usually kept under observation and "
                "repaired when its severity calls for it.")
    if transition in ("acknowledged", "shelved", "unshelved", "reset", "suppressed", "unsuppressed", "latched"):
        head = f"Operator or suppression change; the alarm is {SEVERITY[min(severity, 2)]}. " + head
    return " ".join(x for x in (head, hint, DISCLAIMER) if x)


def _rule(r: LevelRule | None) -> dict[str, Any] | None:
    return None if r is None else {"kind": r.kind, "value": r.value}


# ---------------------------------------------------------------------------------------------- inputs, effects


@dataclass(frozen=True, slots=True)
class Now:
    """The time of a decision: ``mono`` (monotonic s, for intervals) and ``wall`` (Unix s)."""

    mono: float
    wall: float


@dataclass(frozen=True, slots=True)
class Frames:
    """Analysed frames in order, each with its sensor-health verdict (``FrameResult.health``; ``None``: not
    checked) and its machine's state (``FrameResult.machine_state``; ``None``: unknown)."""

    results: Sequence[FrameResult]


@dataclass(frozen=True, slots=True)
class Tick:
    """A timer tick: source changes, no-data detection and shelf expiry between frames.  ``arrivals``: when each
    point's latest block arrived (Unix s; absent or ``None``: unknown) — a point whose blocks arrive is not
    silent, even while its frames wait for analysis.  ``refused``: points whose blocks the daemon refuses for a
    configuration reason (unit, sample rate), with the reason — silent, but not for their sensor's sake."""

    arrivals: Mapping[str, float | None] = field(default_factory=dict)
    refused: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class SourceChange:
    """A source's connection came up or went down (announced on the next tick)."""

    source: str
    connected: bool


@dataclass(frozen=True, slots=True)
class Command:
    """A validated operator command: ``ack``, ``shelve``, ``unshelve`` or ``relearn`` (with ``by``)."""

    req: Mapping[str, Any]


Input = Frames | Tick | SourceChange | Command


@dataclass(frozen=True, slots=True)
class Capture:
    """A waveform capture to save with an event; its file name goes into the event's ``capture``."""

    result: FrameResult
    indicator: str
    transition: str
    severity: str
    limits: dict[str, Any]


@dataclass(frozen=True, slots=True)
class EventOut:
    """One event to append to the outbox (the store gives it its id and serializes it).  ``history``: ``(kind,
    indicator)`` of its history row, ``at_s``: an operator action's wall-clock time."""

    type: str
    point: str
    machine: str
    data: dict[str, Any]
    t_ns: int
    subject: str
    topic: str
    history: tuple[str, str] | None = None
    at_s: float | None = None
    capture: Capture | None = None


@dataclass
class Effects:
    """What one decision asks for: events, state rows to persist, baselines to forget, points whose state message
    changed, log records ``(level, message, fields)``, frames judged ``(result, suppression reason)`` and a
    command's reply."""

    events: list[EventOut] = field(default_factory=list)
    alarms: dict[tuple[str, str], AlarmState] = field(default_factory=dict)
    sensors: dict[str, SensorState] = field(default_factory=dict)
    baselines: dict[tuple[str, str], Baseline] = field(default_factory=dict)
    sources: dict[str, SourceState] = field(default_factory=dict)
    forget: set[str] = field(default_factory=set)
    points: set[str] = field(default_factory=set)
    logs: list[tuple[str, str, dict[str, Any]]] = field(default_factory=list)
    reply: Any = None

    @property
    def writes(self) -> bool:
        """Whether anything is to be committed."""
        return bool(self.alarms or self.sensors or self.baselines or self.events or self.forget or self.sources)

    def log(self, level: str, message: str, **fields: Any) -> None:
        self.logs.append((level, message, fields))


@dataclass(frozen=True, slots=True)
class AlarmSnapshot:
    """The core's state after a decision, for readers on any thread (copies, never changed after publication)."""

    settings: AlarmSettings
    points: Mapping[str, PointConfig]
    machine_points: Mapping[str, tuple[str, ...]]
    limits: Mapping[tuple[str, str], LimitConfig]
    by_point: Mapping[str, tuple[LimitConfig, ...]]
    machine_specs: Mapping[str, MachineStateSpec]
    alarms: Mapping[tuple[str, str], AlarmState]
    specs: Mapping[tuple[str, str], LimitSpec]
    values: Mapping[tuple[str, str], float]
    baselines: Mapping[tuple[str, str], Baseline]
    sensors: Mapping[str, SensorState]
    stale: Mapping[str, str]
    suppressed: Mapping[str, str | None]
    machine_states: Mapping[str, MachineState]
    last_machine_states: Mapping[str, MachineState]
    source_states: Mapping[str, SourceState]
    last_frame: Mapping[str, float]
    events_total: Mapping[str, int]


def machine_stale(machine_points: Mapping[str, tuple[str, ...]], stale: Mapping[str, str], machine: str) -> bool:
    """Whether every point of a machine is stale (its source down or its sensor silent): its state is unknown."""
    pids = machine_points.get(machine, ())
    return bool(pids) and all(stale.get(pid) for pid in pids)


def _level(v: float | None, deadband: float) -> Level | None:
    if v is None or not math.isfinite(v) or v == 0:
        return None
    return Level(v, v - deadband * abs(v))


def level_value(rule: LevelRule | None, which: str, lim: LimitConfig, base: Baseline | None) -> float | None:
    """The set point of one level rule (ISO zone, absolute, baseline-relative)."""
    if rule is None:
        return None
    iso = lim.iso_mm_s
    learned = base is not None and base.learned
    if rule.kind == "absolute":
        return rule.value
    if rule.kind == "iso":
        return None if iso is None else (iso[1] if which == "alert" else iso[2])
    if rule.kind == "iso-baseline":
        if iso is None:
            return None
        if not learned or base is None:
            return iso[1]
        # ISO 10816-3/20816-3 guidance (FIELD_NOTES §1): baseline + 0.25 × B/C, not above 1.25 × B/C.
        return min(base.mean + 0.25 * iso[1], 1.25 * iso[1])
    if not learned or base is None:
        return None
    if rule.kind == "factor":
        return base.mean * rule.value if base.mean > 0 else None
    spread = max(base.std, 0.01 * abs(base.mean), 1e-9)
    return base.mean + rule.value * spread


def limit_spec(lim: LimitConfig, base: Baseline | None) -> LimitSpec:
    """A limit's levels for the state machine, from its rules and its baseline."""
    a = level_value(lim.alert, "alert", lim, base)
    d = level_value(lim.danger, "danger", lim, base)
    if a is not None and d is not None and a >= d:
        a = None  # a baseline-derived alert at or above danger adds nothing
    return LimitSpec(alert=_level(a, lim.deadband), danger=_level(d, lim.deadband), on_delay=lim.on_delay,
                     off_delay=lim.off_delay, latching=lim.latching)


# ---------------------------------------------------------------------------------------------- the core


class AlarmCore:
    """The alarm layer's state and its rules.  ``trend_info(point, indicator)``: the trend layer's view of a
    series for event data (read only); ``frame_listeners``: called with each judged frame and its suppression
    reason (``None``: judged while running) before its alarms are stepped."""

    def __init__(self, config: Config, settings: AlarmSettings) -> None:
        self.settings = settings
        self.points = {p.id: p for p in config.points}
        self.sources_of: dict[str, list[str]] = {s.name: [] for s in config.sources}
        for p in config.points:
            self.sources_of.setdefault(p.source, []).append(p.id)
        machine_points: dict[str, list[str]] = {}
        for p in config.points:
            machine_points.setdefault(p.machine, []).append(p.id)
        self.machine_points = {m: tuple(pids) for m, pids in machine_points.items()}
        self.limits: dict[tuple[str, str], LimitConfig] = {lim.key: lim for lim in settings.limits}
        by_point: dict[str, list[LimitConfig]] = {}
        for lim in settings.limits:
            by_point.setdefault(lim.point, []).append(lim)
        self.by_point = {k: tuple(v) for k, v in by_point.items()}
        # per limit, fixed by the configuration: how its value is read from a frame, whether it learns a baseline
        self._read = {key: LIMITABLE[lim.indicator].reader() for key, lim in self.limits.items()}
        self._learns = frozenset(key for key, lim in self.limits.items() if lim.needs_baseline)
        self.source_states: dict[str, SourceState] = {}  # as announced (durable)
        self.conn: dict[str, bool] = {}  # live connection state of each source
        self.conn_changes: deque[tuple[str, bool, float]] = deque()  # announced on the next tick
        self.ever_up: set[str] = set()  # sources connected at least once since start
        # Whether the daemon reports the sources' connections; without, every source counts as up.
        self.tracks_sources = False
        self.started_mono = 0.0
        self.stale: dict[str, str] = {}  # point -> why its data stopped (until its next frame)
        self.alarms: dict[tuple[str, str], AlarmState] = {}
        self.baselines: dict[tuple[str, str], Baseline] = {}
        self.specs: dict[tuple[str, str], LimitSpec] = {k: limit_spec(lim, None) for k, lim in self.limits.items()}
        self.values: dict[tuple[str, str], float] = {}
        self.sensors: dict[str, SensorState] = {}
        self.trends: dict[tuple[str, str], deque[tuple[float, float]]] = {}
        self.machine_specs = {m.id: state_spec(m, config.alarms) for m in config.machines}
        self.machine_states: dict[str, MachineState] = {}  # as the latest frame of each machine carried it
        # the state database's last known machine states (until the machine's frames judge it again)
        self.last_machine_states: dict[str, MachineState] = {}
        self.last_frame: dict[str, float] = {}   # point -> latest frame time (measurement timeline)
        self.restored_frames: set[str] = set()  # points whose latest frame is from before the restart
        self.last_seen: dict[str, float] = {}  # point -> monotonic arrival time of its latest frame
        self.suppressed: dict[str, str | None] = {}
        self.events_total: dict[str, int] = {}
        self.trend_info: Callable[[str, str], dict[str, Any] | None] | None = None
        self.frame_listeners: list[Callable[[FrameResult, str | None], None]] = []

    def restore(self, alarms: Mapping[tuple[str, str], AlarmState], baselines: Mapping[tuple[str, str], Baseline],
                sensors: Mapping[str, SensorState], sources: Mapping[str, SourceState], now: Now) -> Effects:
        """At start: take the persisted state (rows of limits, points and sources no longer configured are left
        out); sensors get a while to start sending before "no data" applies."""
        eff = Effects()
        self.started_mono = now.mono
        for pid in self.points:
            self.last_seen.setdefault(pid, now.mono + NO_DATA_START_S)
        self.alarms = {k: restart_tracking(v) for k, v in alarms.items() if k in self.limits}
        self.baselines = {k: v for k, v in baselines.items() if k in self.limits}
        self.sensors = {k: v for k, v in sensors.items() if k in self.points}
        self.source_states = {k: v for k, v in sources.items() if k in self.sources_of}
        for name, st in self.source_states.items():
            if st.down:
                for pid in self.sources_of[name]:
                    self.stale[pid] = "source-down"
        for (pid, _), a in self.alarms.items():
            if a.stale is not None:
                self.stale.setdefault(pid, a.stale)
        self._restore_last_known()
        self.specs = {key: limit_spec(lim, self.baselines.get(key)) for key, lim in self.limits.items()}
        active = sum(1 for k, a in self.alarms.items() if display_severity(a, self.specs[k]) > 0)
        if alarms:
            eff.log("info", "alarm state restored", alarms=len(self.alarms), active=active,
                    sensor_faults=sum(1 for s in self.sensors.values() if s.fault),
                    sources_down=[n for n, st in self.source_states.items() if st.down])
        return eff

    def _restore_last_known(self) -> None:
        """What the views showed before the restart while no data flows: each alarm's latest value, each point's
        latest frame time, each machine's state at its latest frame (from the persisted alarm and sensor rows)."""
        for key, a in self.alarms.items():
            if a.last_value is not None and math.isfinite(a.last_value):
                self.values.setdefault(key, a.last_value)
        latest: dict[str, tuple[float, SensorState]] = {}
        for pid, s in self.sensors.items():
            if s.last_frame_s is None or pid in self.last_frame:
                continue
            self.last_frame[pid] = s.last_frame_s
            self.restored_frames.add(pid)
            machine = self.points[pid].machine
            if s.machine_state in MACHINE_STATES and (machine not in latest or s.last_frame_s > latest[machine][0]):
                latest[machine] = (s.last_frame_s, s)
        for machine, (t_s, s) in latest.items():
            self.last_machine_states[machine] = MachineState(state=s.machine_state,  # type: ignore[arg-type]
                                                             since_s=s.machine_since_s, last_s=t_s)

    def snapshot(self) -> AlarmSnapshot:
        """The state for the views (copies of the core's tables)."""
        mp = MappingProxyType
        return AlarmSnapshot(
            settings=self.settings, points=mp(self.points), machine_points=mp(self.machine_points),
            limits=mp(self.limits), by_point=mp(self.by_point),
            machine_specs=mp(self.machine_specs), alarms=mp(dict(self.alarms)), specs=mp(dict(self.specs)),
            values=mp(dict(self.values)), baselines=mp(dict(self.baselines)), sensors=mp(dict(self.sensors)),
            stale=mp(dict(self.stale)), suppressed=mp(dict(self.suppressed)),
            machine_states=mp(dict(self.machine_states)), last_machine_states=mp(dict(self.last_machine_states)),
            source_states=mp(dict(self.source_states)),
            last_frame=mp(dict(self.last_frame)), events_total=mp(dict(self.events_total)))

    def _count(self, kind: str) -> None:
        self.events_total[kind] = self.events_total.get(kind, 0) + 1

    def _connected(self, source: str) -> bool:
        return self.conn.get(source, False) if self.tracks_sources else True

    def _spec(self, lim: LimitConfig) -> LimitSpec:
        return limit_spec(lim, self.baselines.get(lim.key))

    # ------------------------------------------------------------------------------------------ frames

    def frames(self, inp: Frames, now: Now, eff: Effects) -> None:
        for r in inp.results:
            if r.point_id in self.points:
                self.last_seen[r.point_id] = now.mono
        for r in inp.results:
            if r.point_id in self.points:
                self._frame(r, now, eff)

    def _frame(self, r: FrameResult, now: Now, eff: Effects) -> None:
        pid, t_s = r.point_id, r.t_end_ns / 1e9
        self.last_frame[pid] = t_s
        self.restored_frames.discard(pid)
        source = self.points[pid].source
        announced = self.source_states.get(source)
        if announced is not None and announced.down and self._connected(source):
            self._source_up(source, now.wall, "data flows again", now, eff)  # a frame of a source announced down
            announced = self.source_states.get(source)
        still_down = announced is not None and announced.down
        if not still_down:
            self.stale.pop(pid, None)
        sensor = self._sensor(r, t_s, eff)
        ms = r.machine_state or MachineState()
        self.machine_states[r.machine_id] = ms
        if (sensor.machine_state, sensor.machine_since_s) != (ms.state, ms.since_s):  # kept for a restart
            sensor = replace(sensor, machine_state=ms.state, machine_since_s=ms.since_s)
            self.sensors[pid] = eff.sensors[pid] = sensor
        reason: str | None = "sensor-fault" if sensor.fault is not None else SUPPRESSION.get(ms.state)
        self.suppressed[pid] = reason
        for listener in self.frame_listeners:
            try:
                listener(r, reason)
            except Exception as exc:  # a listener never breaks the layer
                eff.log("warning", "frame listener failed", error=repr(exc))
        for lim in self.by_point.get(pid, ()):
            self._limit(r, lim, t_s, reason, still_down, now, eff)
        eff.points.add(pid)

    def _limit(self, r: FrameResult, lim: LimitConfig, t_s: float, reason: str | None, still_down: bool, now: Now,
               eff: Effects) -> None:
        key = lim.key
        value = self._read[key](r)
        if value is None or not math.isfinite(value):
            if reason is None:
                return
            value = math.nan  # absent while stopped (orders, bearing families): suppressed all the same
        if math.isfinite(value):  # the latest value is shown, suppressed or not (judging is what suppression stops)
            self.values[key] = value
        else:
            self.values.pop(key, None)
        if reason is None:
            trend = self.trends.get(key)
            if trend is None:
                trend = self.trends[key] = deque(maxlen=self.settings.table.trend_frames)
            trend.append((t_s, value))
            if key in self._learns:
                b = self.baselines.get(key, Baseline())
                if not b.learned:
                    nb = b.add(value, t_s, self.settings.table.baseline_frames)
                    self.baselines[key] = eff.baselines[key] = nb
                    if nb.learned:
                        self.specs[key] = self._spec(lim)
                        self._baseline_event(r, lim, nb, "learned", None, now, eff)
        spec = self.specs[key]
        state, transitions = step(self.alarms.get(key, AlarmState()), value, t_s, spec, reason)
        if still_down:  # a frame from before the source went down: judged, and stale again
            state, more = mark_stale(state, "source-down", t_s, spec)
            transitions += more
        self._set_alarm(r, lim, state, transitions, now, eff)

    def _set_alarm(self, r: FrameResult | None, lim: LimitConfig, state: AlarmState, transitions: Iterable[Transition],
                   now: Now, eff: Effects, by: str | None = None) -> None:
        """A limit's new state, to persist, and an event for each of its transitions."""
        self.alarms[lim.key] = eff.alarms[lim.key] = state
        for tr in transitions:
            self._alarm_event(r, lim, tr, now, eff, by=by)

    def _sensor(self, r: FrameResult, t_s: float, eff: Effects) -> SensorState:
        pid, h = r.point_id, r.health
        s = _at_frame(self.sensors.get(pid, _NEW_SENSOR), t_s)
        if s.fault == "no-data":  # frames flow again
            s = replace(s, fault=None, detail="", since_s=t_s, healthy_run=0)
            self._sensor_event(pid, r.machine_id, "cleared", "no-data", "frames arrive again", r.t_end_ns, eff)
        if h is not None and h.fault is not None:
            if s.fault is None:
                window = max(RELAPSE_WINDOW_S, 2.0 * _relapse_hold_s(s.relapses))
                recent = s.since_s is not None and t_s - s.since_s < window
                s = replace(s, fault=h.fault, detail=h.detail, since_s=t_s, healthy_run=0,
                            relapses=min(s.relapses + 1, 9) if recent else 0)
                self._sensor_event(pid, r.machine_id, "raised", h.fault, h.detail, r.t_end_ns, eff)
            else:
                s = replace(s, healthy_run=0, detail=h.detail if h.fault == s.fault else s.detail)
        elif h is not None and s.fault is not None:
            run = s.healthy_run + 1
            if run >= self._recover_frames(pid, s.relapses):
                self._sensor_event(pid, r.machine_id, "cleared", s.fault, f"{run} healthy frames", r.t_end_ns, eff)
                s = replace(s, fault=None, detail="", since_s=t_s, healthy_run=0)
            else:
                s = replace(s, healthy_run=run)
        self.sensors[pid] = eff.sensors[pid] = s
        return s

    def _recover_frames(self, pid: str, relapses: int) -> int:
        """Consecutive healthy frames before a sensor fault clears: ``sensor_recover_frames``, and after a relapse
        at least the relapse hold (30 s, 60 s, 120 s … up to 1 h) of frames, so an intermittent fault stays raised."""
        hold_s = _relapse_hold_s(relapses)
        return max(self.settings.table.sensor_recover_frames, math.ceil(hold_s / self.frame_period_s(pid)))

    # ------------------------------------------------------------------------------------------ events

    def _topic(self, point: str, machine: str) -> str:
        return self.settings.feed.topic.format(site=self.settings.site, machine=machine, point=point)

    def _base_data(self, point: str, machine: str) -> dict[str, Any]:
        """What every point event says of the point and its machine (while every point of the machine is stale
        its state is unknown and ``last_machine_state`` the last one judged)."""
        p = self.points.get(point)
        ms = self.machine_states.get(machine)
        stale = machine_stale(self.machine_points, self.stale, machine)
        if ms is None and stale:
            ms = self.last_machine_states.get(machine)  # judged before a restart
        d = {"site": self.settings.site, "machine": machine, "point": point, "axis": getattr(p, "axis", None),
             "machine_state": ms.state if ms is not None else "unknown"}
        if ms is not None and stale:
            d["machine_state"], d["last_machine_state"] = "unknown", ms.state
        return d

    def _emit(self, eff: Effects, type_: str, point: str, machine: str, data: dict[str, Any], t_ns: int, *,
              subject: str | None = None, topic: str | None = None, history: tuple[str, str] | None = None,
              at_s: float | None = None, capture: Capture | None = None) -> None:
        eff.events.append(EventOut(type=type_, point=point, machine=machine, data=data, t_ns=t_ns,
                                   subject=subject or point, topic=topic or self._topic(point, machine),
                                   history=history, at_s=at_s, capture=capture))
        if point:
            eff.points.add(point)

    def _sensor_event(self, point: str, machine: str, transition: str, fault: str, detail: str, t_ns: int,
                      eff: Effects) -> None:
        raised = transition == "raised"
        data = {**self._base_data(point, machine), "transition": transition,
                "state": "sensor-fault" if raised else "normal", "fault": fault, "detail": detail,
                "stale": self.stale.get(point),
                "advice": ("Check the sensor, its cable, connector and mounting: this is a measurement problem, not "
                           "a machine finding. Machine alarms of this point are suppressed until it recovers. "
                           + DISCLAIMER) if raised else
                          "The sensor signal looks healthy again; machine alarms of this point are re-armed."}
        self._emit(eff, SENSOR_TYPE, point, machine, data, t_ns, history=("sensor", fault))
        self._count("sensor-fault" if raised else "sensor-recovered")
        # good news is information, not a warning
        eff.log("warning" if raised else "info", "sensor fault" if raised else "sensor recovered", point=point,
                fault=fault, detail=detail)

    def _baseline_event(self, r: FrameResult | None, lim: LimitConfig, b: Baseline, transition: str, by: str | None,
                        now: Now, eff: Effects) -> None:
        p = self.points[lim.point]
        data = {**self._base_data(lim.point, p.machine), "indicator": lim.indicator, "transition": transition,
                "mean": b.mean, "std": b.std, "frames": b.n, "by": by}
        t_ns = r.t_end_ns if r is not None else round(now.wall * 1e9)
        self._emit(eff, BASELINE_TYPE, lim.point, p.machine, data, t_ns)
        self._count(f"baseline-{transition}")

    def _alarm_event(self, r: FrameResult | None, lim: LimitConfig, tr: Transition, now: Now, eff: Effects,
                     by: str | None = None) -> None:
        p = self.points[lim.point]
        key = lim.key
        spec = self.specs.get(key)
        slope = trend_slope_per_h(self.trends.get(key, ()))
        danger = spec.danger.set_point if spec is not None and spec.danger is not None else None
        idef = LIMITABLE[lim.indicator]
        data: dict[str, Any] = {
            **self._base_data(lim.point, p.machine), "indicator": lim.indicator, "unit": idef.unit,
            "fault_kind": idef.fault, "transition": tr.kind, "state": SEVERITY[tr.to_severity],
            "from_state": SEVERITY[tr.from_severity], "alarm_state": tr.to_state, "from_alarm_state": tr.from_state,
            "value": tr.value, "limit": tr.limit, "clear": tr.clear,
            "alert_limit": spec.alert.set_point if spec is not None and spec.alert is not None else None,
            "danger_limit": danger, "trend_per_hour": slope,
            "iso_zone": r.iso_zone if r is not None else None, "reason": tr.reason, "by": by,
            "stale": self.alarms.get(key, AlarmState()).stale,
            "advice": advice_text(tr.to_severity, idef.fault or "", tr.kind, tr.value, danger, slope),
            "capture": None,
        }
        trend = self.trend_info(lim.point, lim.indicator) if self.trend_info is not None else None
        if trend is not None:
            data["trend"] = trend
            if trend.get("advice_text") and tr.to_severity > 0:
                head = str(data["advice"]).replace(DISCLAIMER, "").strip()
                data["advice"] = f"{head} Trend: {trend['advice_text']}"
        capture = None
        if r is not None and tr.kind in ("raised", "escalated") and tr.to_severity > 0:
            capture = Capture(r, lim.indicator, tr.kind, SEVERITY[tr.to_severity],
                              {"alert": data["alert_limit"], "danger": data["danger_limit"], "clear": tr.clear,
                               "rule": {"alert": _rule(lim.alert), "danger": _rule(lim.danger)}})
        t_ns = r.t_end_ns if r is not None else round(tr.at_s * 1e9)
        self._emit(eff, ALARM_TYPE, lim.point, p.machine, data, t_ns, history=("alarm", lim.indicator),
                   at_s=now.wall if by is not None else None, capture=capture)
        self._count(tr.kind)
        eff.log("info", "alarm " + tr.kind, point=lim.point, indicator=lim.indicator, state=SEVERITY[tr.to_severity],
                value=tr.value, limit=tr.limit)

    # ------------------------------------------------------------------------------------------ ticks

    def frame_period_s(self, pid: str) -> float:
        p = self.points[pid]
        hop = getattr(p, "hop_samples", None) or getattr(p, "frame_samples", 16384)
        return float(hop or 16384) / float(p.fs_hz)

    def _no_data_s(self, pid: str) -> float:
        return max(2.0, self.settings.table.no_data_frames * self.frame_period_s(pid))

    def _silent(self, pid: str, inp: Tick, now: Now) -> bool:
        """No frame for the no-data interval, and (where the daemon tells) no block either."""
        limit = self._no_data_s(pid)
        if now.mono - self.last_seen.get(pid, now.mono) <= limit:
            return False
        t = inp.arrivals.get(pid)
        return not (t is not None and now.wall - t <= limit)

    def source_change(self, inp: SourceChange, now: Now) -> None:
        self.tracks_sources = True
        self.conn[inp.source] = inp.connected
        if inp.connected:
            self.ever_up.add(inp.source)
        self.conn_changes.append((inp.source, inp.connected, now.wall))

    def tick(self, inp: Tick, now: Now, eff: Effects) -> None:
        self._source_tick(inp, now, eff)
        for pid in self.points:
            self._no_data_tick(pid, inp, now, eff)
            self._shelf_tick(pid, now, eff)

    def _source_tick(self, inp: Tick, now: Now, eff: Effects) -> None:
        while self.conn_changes:
            name, up, t = self.conn_changes.popleft()
            if name not in self.sources_of:
                continue
            if up:
                if self.source_states.get(name, SourceState()).silent:
                    continue  # down for lack of data (also across a restart): its return is data, not a connection
                self._source_up(name, t, "connection restored", now, eff)
            else:
                self._source_down(name, t, "connection lost", now, eff)
        for name, pids in self.sources_of.items():
            st = self.source_states.get(name, SourceState())
            if st.down:
                continue
            if not self._connected(name):
                if name not in self.ever_up and now.mono - self.started_mono > SOURCE_CONNECT_GRACE_S:
                    self._source_down(name, now.wall, "not reachable since start", now, eff)
            elif pids and all(self._silent(pid, inp, now) for pid in pids):
                quiet = max(now.mono - self.last_seen.get(pid, now.mono) for pid in pids)
                self._source_down(name, now.wall, f"connected, but none of its {len(pids)} point(s) has "
                                  f"delivered data for {quiet:.0f} s", now, eff, silent=True)

    def _no_data_tick(self, pid: str, inp: Tick, now: Now, eff: Effects) -> None:
        """A point silent while its source is up and another of its points delivered after this one was due: the
        sensor (or its channel) is silent — a sensor fault.  Its alarms keep their state, stale."""
        p = self.points[pid]
        s = self.sensors.get(pid, SensorState())
        if s.fault == "no-data" or self.source_states.get(p.source, SourceState()).down or \
                not self._connected(p.source) or not self._silent(pid, inp, now):
            return
        due = self.last_seen.get(pid, now.mono) + self._no_data_s(pid)
        if not any(self.last_seen.get(q, -math.inf) >= due for q in self.sources_of.get(p.source, ()) if q != pid):
            return  # nothing else delivered since either: a source matter (see _source_tick), not this sensor
        refused = inp.refused.get(pid)
        if refused is not None:  # the daemon refuses its blocks (configuration): stale, the sensor is not blamed
            if self.stale.get(pid) != "config-mismatch":
                self.stale[pid] = "config-mismatch"
                self._mark_point_stale(pid, "config-mismatch", now, eff)
                eff.log("warning", "point receives nothing: its blocks are refused for the configuration",
                        point=pid, refused=refused)
            return
        limit_s = self._no_data_s(pid)
        detail = (f"no frames for more than {limit_s:.1f} s ({self.settings.table.no_data_frames} frame periods) while "
                  f"other points of source {p.source!r} deliver")
        last = None if pid in self.restored_frames else self.last_frame.get(pid)  # a frame since start
        t_ns = round((now.wall if last is None else last) * 1e9)
        self.stale[pid] = "no-data"
        self._sensor_event(pid, p.machine, "raised", "no-data", detail, t_ns, eff)
        s = replace(s, fault="no-data", detail=detail, since_s=last, healthy_run=0)
        self.sensors[pid] = eff.sensors[pid] = s
        self._mark_point_stale(pid, "no-data", now, eff)
        self.suppressed[pid] = "sensor-fault"

    def _visible(self, pid: str, lim: LimitConfig) -> dict[str, Any] | None:
        """An alarm as a source event lists it, when it is shown (active, or returned and unacknowledged)."""
        spec, st = self.specs[lim.key], self.alarms.get(lim.key, AlarmState())
        state = isa_state(st, spec)
        if display_severity(st, spec) > 0 or state == "rtn-unacknowledged":
            return {"point": pid, "indicator": lim.indicator, "alarm_state": state,
                    "severity": SEVERITY[display_severity(st, spec)]}
        return None

    def _mark_point_stale(self, pid: str, reason: str, now: Now, eff: Effects) -> list[dict[str, Any]]:
        """Flag every alarm of a point stale; returns the visible ones (for the source event)."""
        visible = []
        t_s = self.point_now_s(pid, now)
        for lim in self.by_point.get(pid, ()):
            st, trs = mark_stale(self.alarms.get(lim.key, AlarmState()), reason, t_s, self.specs[lim.key])
            self._set_alarm(None, lim, st, trs, now, eff)
            row = self._visible(pid, lim)
            if row is not None:
                visible.append(row)
        return visible

    def point_now_s(self, pid: str, now: Now) -> float:
        """The point's frames' timeline now: its latest frame's time advanced by the wall-clock time since.

        While the point is stale (its source down, its sensor silent, or since a restart before data flows) the
        time since its last frame is unknown to that timeline: the wall clock is taken, never an earlier time."""
        if pid not in self.last_frame or pid in self.restored_frames:
            return now.wall
        t = self.last_frame[pid] + max(0.0, now.mono - self.last_seen.get(pid, now.mono))
        return max(t, now.wall) if self.stale.get(pid) else t

    def _shelf_tick(self, pid: str, now: Now, eff: Effects) -> None:
        # Shelves expire on the frames' timeline (a shelf is set from the last frame's time), advanced by the
        # wall-clock time since that frame, so a shelf also ends while no frames arrive.
        now_s = self.point_now_s(pid, now)
        for lim in self.by_point.get(pid, ()):
            shelved = self.alarms.get(lim.key)
            if shelved is None or shelved.shelved_until_s is None or now_s < shelved.shelved_until_s:
                continue
            st, trs = expire_shelf(shelved, now_s, self.specs[lim.key])
            self._set_alarm(None, lim, st, trs, now, eff)

    def _source_down(self, name: str, t_s: float, reason: str, now: Now, eff: Effects, *,
                     silent: bool = False) -> None:
        """Announce a source's data path lost (once): its points' alarms turn stale, no sensor fault is raised."""
        st = self.source_states.get(name, SourceState())
        if st.down:
            if st.silent and not silent:
                # A silent source now lost its connection too: no new announcement, only the reason changes.  It
                # stays silent — down for lack of data — so a reconnect is not its return: data flowing is
                # (one down and one up over the whole episode, across a restart as well).
                self.source_states[name] = eff.sources[name] = replace(st, reason=reason)
            return
        pids = self.sources_of.get(name, [])
        visible: list[dict[str, Any]] = []
        for pid in pids:  # all stale first: the events say whether the whole machine's state is unknown
            self.stale[pid] = "source-down"
        for pid in pids:
            visible += self._mark_point_stale(pid, "source-down", now, eff)
        self.source_states[name] = eff.sources[name] = SourceState(down=True, since_s=t_s, reason=reason,
                                                                   silent=silent)
        advice = ("The data path from this source is lost: a communication problem (network, broker, gateway or "
                  "server), not a machine finding and not a sensor fault. Its points are stale: their alarms keep "
                  "their state and acknowledgement and are judged again on the first good frames. " + DISCLAIMER)
        self._source_event(SOURCE_DOWN_TYPE, name, "down", reason, t_s, pids, visible, eff, advice=advice,
                           extra={"silent": silent})
        self._count("source-down")
        eff.log("warning", "source down", source=name, reason=reason, points=len(pids), stale_alarms=len(visible))

    def _source_up(self, name: str, t_s: float, reason: str, now: Now, eff: Effects) -> None:
        """Announce a source's data path back (once after each down); its points stay stale until their next
        frame, and get the start allowance again before a silent one counts as a sensor fault."""
        st = self.source_states.get(name, SourceState())
        if not st.down:
            return
        pids = self.sources_of.get(name, [])
        for pid in pids:
            self.last_seen[pid] = max(self.last_seen.get(pid, now.mono), now.mono + NO_DATA_START_S)
        visible = []
        for pid in pids:
            for lim in self.by_point.get(pid, ()):
                row = self._visible(pid, lim) if self.alarms.get(lim.key, AlarmState()).stale is not None else None
                if row is not None:
                    visible.append(row)
        self.source_states[name] = eff.sources[name] = SourceState(down=False, since_s=t_s)
        down_for = None if st.since_s is None else max(0.0, t_s - st.since_s)
        advice = ("Data from this source flows again; its stale alarms are judged again on the first good frames. "
                  + DISCLAIMER)
        self._source_event(SOURCE_UP_TYPE, name, "up", reason, t_s, pids, visible, eff, advice=advice,
                           extra={"down_since": None if st.since_s is None else rfc3339_utc_s(st.since_s),
                                  "down_for_s": down_for, "down_reason": st.reason})
        self._count("source-up")
        eff.log("info", "source up", source=name, reason=reason, down_for_s=down_for)

    def _source_event(self, type_: str, name: str, transition: str, reason: str, t_s: float, pids: list[str],
                      visible: list[dict[str, Any]], eff: Effects, *, advice: str, extra: dict[str, Any]) -> None:
        machines = sorted({self.points[pid].machine for pid in pids})
        data: dict[str, Any] = {"site": self.settings.site, "source": name, "transition": transition,
                                "state": transition, "reason": reason, "machines": machines, "points": list(pids),
                                "stale_alarms": visible, **extra, "advice": advice}
        topic = self.settings.feed.source_topic.format(site=self.settings.site, source=name)
        self._emit(eff, type_, "", ",".join(machines), data, round(t_s * 1e9), subject=name, topic=topic,
                   history=("source", name))
        eff.points.update(pids)

    # ------------------------------------------------------------------------------------------ commands

    def targets(self, req: Mapping[str, Any]) -> tuple[LimitConfig, ...]:
        """The limits a command names (raises CommandError for an unknown point or indicator)."""
        point = req["point"]
        if point not in self.points:
            raise CommandError(f"unknown point {point!r}")
        lims = self.by_point.get(point, ())
        ind = req.get("indicator")
        if ind is not None:
            lims = tuple(lim for lim in lims if lim.indicator == ind)
            if not lims:
                raise CommandError(f"point {point!r} has no limit on {ind!r} (limits: "
                                   f"{', '.join(x.indicator for x in self.by_point.get(point, ())) or 'none'})")
        return lims

    def _ack_targets(self, req: Mapping[str, Any], lims: tuple[LimitConfig, ...],
                     ) -> tuple[tuple[LimitConfig, ...], list[dict[str, Any]]]:
        """The limits an ack acknowledges, and the hidden ones it leaves that await an acknowledge.

        A shelved alarm (hidden by an operator) and a suppressed one (hidden by design: machine stopped, start-up
        grace, sensor fault) are not annunciated, and an acknowledge answers an annunciated alarm (ANSI/ISA-18.2,
        IEC 62682; from memory): a point-wide ack leaves them — its reply lists the suppressed ones left
        unacknowledged — and an ack naming one is refused with the reason.  The alarm shows again as it stands
        when unshelved or when the suppression ends, and is acknowledged then, with its event.  A stale alarm (no
        data) stays shown, flagged stale, and is acknowledged as usual, its event saying it is stale."""
        hidden: list[tuple[LimitConfig, AlarmState, str, str | None]] = []
        for lim in lims:
            st = self.alarms.get(lim.key, AlarmState())
            if st.suppressed is not None:
                hidden.append((lim, st, "suppressed", st.suppressed))
            elif st.shelved_until_s is not None:
                hidden.append((lim, st, "shelved", st.shelve_reason))
        if hidden and req.get("indicator") is not None:
            lim, st, how, why = hidden[0]
            then = "unshelve it first to acknowledge it" if how == "shelved" else \
                "it is not annunciated while suppressed; acknowledge it when it shows again"
            raise CommandError(f"ack: {lim.indicator} on {req['point']} is {how} ({why}); {then}")
        # a shelf is the operator's own doing; a suppression is not, so the reply names what it left waiting
        left = [{"indicator": lim.indicator, "state": how, "reason": why} for lim, st, how, why in hidden
                if how == "suppressed" and (not st.acked or st.latched > process_severity(st))]
        return tuple(lim for lim in lims if all(lim is not h[0] for h in hidden)), left

    def command(self, inp: Command, now: Now, eff: Effects) -> None:
        """ack, shelve, unshelve or relearn; the reply ``{changed, events}`` goes into ``eff.reply``."""
        req = inp.req
        cmd, by = req["cmd"], req.get("by")
        lims = self.targets(req)
        max_s = 3600.0 * self.settings.table.max_shelve_h
        if cmd == "shelve" and lims and float(req["duration_s"]) > max_s:
            raise CommandError(f"shelve: {human_duration(float(req['duration_s']))} exceeds the maximum "
                               f"{human_duration(max_s)} ([alarms] max_shelve_h)")
        if cmd not in ("ack", "shelve", "unshelve", "relearn"):  # validate_request allows no other
            raise CommandError(f"unknown command {cmd!r}")
        # the time of the action: the wall clock, on the point's timeline (the last frame's time advanced by
        # the time since it arrived; during an outage, the wall clock) so shelves run from the action
        t_s = self.point_now_s(req["point"], now)
        left: list[dict[str, Any]] = []
        if cmd == "ack":
            lims, left = self._ack_targets(req, lims)
        changed = 0
        for lim in lims:
            key, spec = lim.key, self.specs[lim.key]
            st = self.alarms.get(key, AlarmState())
            if cmd == "relearn":
                if lim.needs_baseline:
                    self.baselines.pop(key, None)
                    self.specs[key] = self._spec(lim)
                    eff.forget.add(lim.point)
                    self._baseline_event(None, lim, Baseline(), "relearn", by, now, eff)
                    changed += 1
                continue
            if cmd == "ack":
                st2, trs = acknowledge(st, t_s, spec)
            elif cmd == "shelve":
                st2, trs = shelve(st, str(req["reason"]), t_s + float(req["duration_s"]), t_s, spec)
            else:
                st2, trs = unshelve(st, t_s, spec, reason=f"by {by}" if by else "by command")
            changed += st2 != st
            self._set_alarm(None, lim, st2, trs, now, eff, by=by)
        eff.reply = {"changed": changed, "events": len(eff.events)}
        if left:
            eff.reply["not_acknowledged"] = left


_NEW_SENSOR = SensorState()  # frozen: shared by every point not yet seen


def _at_frame(s: SensorState, t_s: float) -> SensorState:
    """``replace(s, last_frame_s=t_s)`` without its generic field walk (every frame of every point makes one;
    tests/alarms check it against ``dataclasses.replace`` field by field)."""
    return SensorState(fault=s.fault, detail=s.detail, since_s=s.since_s, healthy_run=s.healthy_run, last_frame_s=t_s,
                       relapses=s.relapses, machine_state=s.machine_state, machine_since_s=s.machine_since_s)


def _relapse_hold_s(relapses: int) -> float:
    """Healthy time a relapsing sensor fault needs before it clears (0 for a first fault)."""
    return 0.0 if relapses <= 0 else min(RELAPSE_HOLD_MAX_S, RELAPSE_HOLD_S * 2.0 ** (relapses - 1))


def decide(core: AlarmCore, inp: Input, now: Now) -> tuple[AlarmCore, Effects]:
    """One decision: the core after ``inp`` at ``now`` and what to do about it.  Raises CommandError for a command
    that names no limit (nothing changed then)."""
    eff = Effects()
    if isinstance(inp, Frames):
        core.frames(inp, now, eff)
    elif isinstance(inp, Tick):
        core.tick(inp, now, eff)
    elif isinstance(inp, SourceChange):
        core.source_change(inp, now)
    else:
        core.command(inp, now, eff)
    return core, eff
