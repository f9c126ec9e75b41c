"""The alarm layer as a FrameSink: limits and baselines, run-state suppression, sensor-health gating, events.

For every analysed frame of a point:

1. **Sensor health** (:func:`edgevib.pipelines.health.check_health`): a fault raises one
   ``io.edgevib.sensor.v1.fault`` event and suppresses that point's machine alarms (reason ``sensor-fault``) —
   a sensor fault is never reported as a machine fault.  It clears after ``sensor_recover_frames`` healthy
   frames.  A point without frames for ``no_data_frames`` frame periods while its source is up and another point
   of that source still delivers gets the ``no-data`` fault.
2. **Run state** per machine: stopped when the overall velocity is under ``run_threshold_velocity_mm_s`` or a
   measured (not estimated) speed is under the machine's ``run_threshold_rpm``; after a start its alarms stay
   suppressed for ``startup_grace_s`` (reason ``machine-stopped`` / ``start-up-grace``).
3. **Baselines** learn each indicator's mean and spread over ``baseline_frames`` valid running frames.
4. **Limits** resolve to set points (ISO 20816-3, absolute, baseline-relative), the pure state machine
   (:mod:`edgevib.pipelines.alarm`) steps, and each transition becomes an ``io.edgevib.alarm.v1.transition``
   event with value, limit, trend slope and advice; transitions into alert or danger save a waveform capture.
5. **Data gaps.** A source whose connection is lost (or which is connected but none of whose points delivers)
   gives one ``io.edgevib.source.v1.down`` event and, when data flows again, one ``io.edgevib.source.v1.up``; its
   points' alarms are *stale* meanwhile: they keep their state and acknowledgement and are judged again on the
   first good frames (:func:`edgevib.pipelines.alarm.mark_stale`).  No sensor fault is raised for them.
6. State changes, their events and the history rows are committed in one SQLite transaction before anything is
   published.

Time for the state machine is the frames' measurement time (``t_end_ns``); shelf expiries are set on that
timeline.  edgevib monitors and advises; it is not a machinery protection system.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import json
import math
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import structlog
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.registry import Collector

from edgevib.daemon.alarms.capture import CaptureStore
from edgevib.daemon.alarms.config import AlarmSettings, LevelRule, LimitConfig
from edgevib.daemon.alarms.control import CommandError, ControlServer, handle_payload, human_duration
from edgevib.daemon.alarms.feed import (
    ALARM_TYPE,
    BASELINE_TYPE,
    SENSOR_TYPE,
    SOURCE_DOWN_TYPE,
    SOURCE_UP_TYPE,
    MqttFeed,
    WebhookFeed,
    cloud_event,
    event_body,
)
from edgevib.daemon.alarms.outbox import Database, Outbox, OutboxEvent
from edgevib.daemon.alarms.state import Baseline, SensorState, SourceState, StateStore, restart_tracking
from edgevib.daemon.config import Config
from edgevib.daemon.indicators import LIMITABLE
from edgevib.daemon.interfaces import AlarmTransition, FrameResult
from edgevib.daemon.machine_state import MachineTracker
from edgevib.daemon.sensor_health import HealthError, batch_health, judged_running
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
    shelve,
    step,
    unshelve,
)
from edgevib.pipelines.health import HealthSpec, SensorHealth
from edgevib.pipelines.machine_state import MachineState

__all__ = ["AlarmCollector", "AlarmLayer", "advice_text", "trend_slope_per_h"]

log = structlog.get_logger("edgevib.alarms")

SEVERITY = ("normal", "alert", "danger")
SUPPRESSION: dict[str, str] = {"stopped": "machine-stopped", "starting": "start-up-grace"}
"""Machine states under which machine alarms are suppressed by design, and the reason given."""
NO_DATA_START_S = 30.0  # allowance after start (and after a source returns) before a silent point counts
SOURCE_CONNECT_GRACE_S = 10.0  # a source not connected this long after start is announced down
HISTORY_LIMIT_MAX = 1000
RELAPSE_WINDOW_S = 120.0  # a sensor fault back within this time of clearing (or twice its last hold) is a relapse
RELAPSE_HOLD_S = 30.0  # after a relapse a fault clears only after this long healthy, doubled by each further relapse
RELAPSE_HOLD_MAX_S = 3600.0
_DISCLAIMER = "edgevib monitors and advises; it is not a protection system."
_FAULT_HINT = {
    "overall": "An overall level sums every vibration source the sensor picks up: look at the narrow-band "
               "indicators before concluding what is wrong.",
    "impacting": "Rising impact indicators (crest factor, kurtosis) can mean early bearing or gear damage; trend "
                 "them together with the r.m.s. level.",
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
        return f"Back below the clear threshold; keep trending. {_DISCLAIMER}"
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
    return " ".join(x for x in (head, hint, _DISCLAIMER) if x)


def _display_rank(indicator: str) -> int:
    """Display order among equally severe alarms: a fault pattern says more than a broadband level."""
    return {"overall": 2, "impacting": 1}.get(LIMITABLE[indicator].fault or "", 0)


@dataclass
class _Pending:
    alarms: dict[tuple[str, str], AlarmState] = field(default_factory=dict)
    sensors: dict[str, SensorState] = field(default_factory=dict)
    baselines: dict[tuple[str, str], Baseline] = field(default_factory=dict)
    events: list[OutboxEvent] = field(default_factory=list)
    forget: set[str] = field(default_factory=set)
    points: set[str] = field(default_factory=set)
    sources: dict[str, SourceState] = field(default_factory=dict)
    history: list[tuple[int, str, str, str, str, str]] = field(default_factory=list)

    def __bool__(self) -> bool:
        return bool(self.alarms or self.sensors or self.baselines or self.events or self.forget or self.sources
                    or self.history)


class AlarmLayer:
    """The alarm layer (a :class:`~edgevib.daemon.interfaces.FrameSink`).

    ``config`` is the daemon configuration; ``settings`` the parsed alarm settings (default: ``config.alarms``).
    ``registry``: a Prometheus registry to register :attr:`collector` on at start.  The layer is a *lossless*
    sink: the daemon hands it every analysed frame of a point in order and pauses analysis rather than skip one
    (``edgevib.daemon.app``), since debounce counts, baselines and sensor-recovery runs depend on each frame.
    It takes them gathered over up to :attr:`batch_window_s` (alarm latency ≤ 0.1 s more, a fraction of the
    per-call cost).
    """

    lossless = True
    batch_window_s = 0.1  # frames gathered per call: one commit and one vectorized health check for many frames

    def __init__(self, config: Config, settings: AlarmSettings | None = None, *, registry: Any = None,
                 clock: Callable[[], float] = time.time, monotonic: Callable[[], float] = time.monotonic) -> None:
        if settings is None:
            settings = config.alarm_settings
        self.config = config
        self.settings = settings
        self.registry = registry
        self.clock = clock
        self.monotonic = monotonic
        self.points = {p.id: p for p in config.points}
        self.sources_of: dict[str, list[str]] = {s.name: [] for s in config.sources}
        for p in config.points:
            self.sources_of.setdefault(p.source, []).append(p.id)
        self.source_states: dict[str, SourceState] = {}  # as announced (durable)
        self._conn: dict[str, bool] = {}  # live connection state of each source
        self._conn_changes: deque[tuple[str, bool, float]] = deque()  # from the event loop to the timer
        self._ever_up: set[str] = set()  # sources connected at least once since start
        # Whether the daemon reports the sources' connections (on_source); without, every source counts as up.
        self.tracks_sources = False
        # When a point's latest block arrived (wall clock, s; the daemon's ingest): a point whose blocks arrive is
        # not silent, even while its frames wait for analysis or a lossy link leaves frames incomplete.
        self.block_arrival: Callable[[str], float | None] | None = None
        self._started_m = 0.0
        self._wake: asyncio.Event | None = None
        self.stale: dict[str, str] = {}  # point -> why its data stopped (until its next frame)
        self.machines_cfg = {m.id: m for m in config.machines}
        self.limits: dict[tuple[str, str], LimitConfig] = {lim.key: lim for lim in settings.limits}
        self._by_point: dict[str, list[LimitConfig]] = {}
        for lim in settings.limits:
            self._by_point.setdefault(lim.point, []).append(lim)
        self.alarms: dict[tuple[str, str], AlarmState] = {}
        self.specs: dict[tuple[str, str], LimitSpec] = {}
        self.values: dict[tuple[str, str], float] = {}
        self.baselines: dict[tuple[str, str], Baseline] = {}
        self.sensors: dict[str, SensorState] = {}
        self.trends: dict[tuple[str, str], deque[tuple[float, float]]] = {}
        # Machine state: the daemon's (carried by each FrameResult); for results that carry none, the layer
        # keeps its own from the same evidence (a point with a sensor fault does not vote).
        self.own_machines = MachineTracker(config, healthy=self.point_healthy)
        self.machine_states: dict[str, MachineState] = {}
        self.last_frame: dict[str, float] = {}   # point -> latest frame time (measurement timeline)
        self.last_seen: dict[str, float] = {}    # point -> monotonic arrival time
        self.suppressed: dict[str, str | None] = {}
        self.events_total: dict[str, int] = {}
        self.health_errors = 0
        self.db: Database | None = None
        self.outbox: Outbox | None = None
        self.store: StateStore | None = None
        self.capture = CaptureStore(settings.capture.model_copy(update={"enabled": False}))
        self.mqtt: MqttFeed | None = None
        self.webhook: WebhookFeed | None = None
        self.control: ControlServer | None = None
        self.extra_commands: dict[str, Callable[[dict[str, Any]], Any]] = {}  # commands served for the daemon
        self.collector = AlarmCollector(self)
        self._lock = threading.RLock()
        self._tasks: list[asyncio.Task[None]] = []
        self._started = False
        self._loop: asyncio.AbstractEventLoop | None = None
        self._source = settings.feed.event_source
        self.listeners: list[Callable[[dict[str, Any]], None]] = []  # called with each committed CloudEvent
        # The trend layer's seams (edgevib.daemon.trendwatch): called with every frame in order and the reason it
        # was suppressed (None: judged while running), in the worker thread; and the trend of a series / a point
        # for event data and the retained state message.
        self.frame_listeners: list[Callable[[FrameResult, str | None], None]] = []
        self.trend_info: Callable[[str, str], dict[str, Any] | None] | None = None
        self.trend_state: Callable[[str], dict[str, Any]] | None = None

    # ------------------------------------------------------------------------------------------ lifecycle

    async def start(self) -> None:
        s = self.settings
        self._loop = asyncio.get_running_loop()
        state_dir = Path(s.state_dir)
        state_dir.mkdir(parents=True, exist_ok=True)
        self.db = Database(state_dir / "alarms.sqlite")
        sinks = []
        if s.feed.enabled and s.feed.connection is not None:
            sinks.append(MqttFeed.sink)
        if s.feed.enabled and s.feed.webhook is not None:
            sinks.append(WebhookFeed.sink)
        self.outbox = Outbox(self.db, sinks)
        self.store = StateStore(self.db)
        self._restore()
        with contextlib.suppress(Exception):
            pruned = await asyncio.to_thread(self.store.prune_history, time.time_ns() - round(
                s.table.history_days * 86400e9))
            if pruned:
                log.info("alarm history pruned", rows=pruned, days=s.table.history_days)
        self.capture = await asyncio.to_thread(CaptureStore, s.capture)
        now = self.monotonic()
        self._started_m = now
        self._wake = asyncio.Event()
        for pid in self.points:  # sensors get a while to start sending before "no data" applies
            self.last_seen.setdefault(pid, now + NO_DATA_START_S)
        if s.feed.enabled and s.feed.connection is not None:
            self.mqtt = MqttFeed(s.feed, self.outbox, self.state_messages,
                                 on_command=lambda b: handle_payload(b, self.handle_command))
            self._tasks.append(asyncio.get_running_loop().create_task(self.mqtt.run(), name="edgevib-alarm-feed"))
        if s.feed.enabled and s.feed.webhook is not None:
            self.webhook = WebhookFeed(s.feed.webhook, self.outbox)
            self._tasks.append(asyncio.get_running_loop().create_task(self.webhook.run(), name="edgevib-webhook"))
        self.control = ControlServer(s.socket_path, self.handle_command, mode=s.socket_mode)
        try:
            await self.control.start()
        except OSError as exc:
            log.error("alarm control socket unavailable", path=s.socket_path, error=str(exc))
            self.control = None
        self._tasks.append(asyncio.get_running_loop().create_task(self._timer(), name="edgevib-alarm-timer"))
        if self.registry is not None:
            with contextlib.suppress(ValueError):
                self.registry.register(self.collector)
        self._started = True
        log.info("alarm layer started", limits=len(self.limits), points=len(self.points), sinks=sinks,
                 pending=self.outbox.depth())

    def _restore(self) -> None:
        assert self.store is not None
        restored = self.store.load_alarms()
        self.alarms = {k: restart_tracking(v) for k, v in restored.items() if k in self.limits}
        self.baselines = {k: v for k, v in self.store.load_baselines().items() if k in self.limits}
        self.sensors = {k: v for k, v in self.store.load_sensors().items() if k in self.points}
        self.source_states = {k: v for k, v in self.store.load_sources().items() if k in self.sources_of}
        for name, st in self.source_states.items():
            if st.down:
                for pid in self.sources_of[name]:
                    self.stale[pid] = "source-down"
        for (pid, _), a in self.alarms.items():
            if a.stale is not None:
                self.stale.setdefault(pid, a.stale)
        for key in self.limits:
            self.specs[key] = self._spec(self.limits[key])
        active = sum(1 for k, a in self.alarms.items() if display_severity(a, self.specs[k]) > 0)
        if restored:
            log.info("alarm state restored", alarms=len(self.alarms), active=active,
                     sensor_faults=sum(1 for s in self.sensors.values() if s.fault),
                     sources_down=[n for n, st in self.source_states.items() if st.down])

    async def stop(self) -> None:
        self._started = False
        for feed in (self.mqtt, self.webhook):
            if feed is not None:
                with contextlib.suppress(Exception):
                    await feed.stop()
        for t in self._tasks:
            if not t.done():
                try:
                    await asyncio.wait_for(asyncio.shield(t), 3.0)
                except (TimeoutError, asyncio.CancelledError, Exception):
                    t.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)
        self._tasks.clear()
        if self.control is not None:
            await self.control.stop()
        if self.registry is not None:
            with contextlib.suppress(KeyError):
                self.registry.unregister(self.collector)
        if self.db is not None:
            with self._lock:
                self.db.close()
            self.db = None

    async def reconfigure(self, config: Config) -> None:
        """A reload keeps the running layer; new limits take effect on the next start (logged)."""
        if replace(config.alarm_settings, config_digest=self.settings.config_digest) != self.settings:
            log.warning("alarm settings changed; restart edgevib to apply them")

    # ------------------------------------------------------------------------------------------ limits

    def _level_value(self, rule: LevelRule | None, which: str, lim: LimitConfig, base: Baseline | None) -> float | None:
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

    def _spec(self, lim: LimitConfig) -> LimitSpec:
        base = self.baselines.get(lim.key)
        a = self._level_value(lim.alert, "alert", lim, base)
        d = self._level_value(lim.danger, "danger", lim, base)
        if a is not None and d is not None and a >= d:
            a = None  # a baseline-derived alert at or above danger adds nothing
        def lvl(v: float | None) -> Level | None:
            if v is None or not math.isfinite(v) or v == 0:
                return None
            return Level(v, v - lim.deadband * abs(v))
        return LimitSpec(alert=lvl(a), danger=lvl(d), on_delay=lim.on_delay, off_delay=lim.off_delay,
                         latching=lim.latching)

    # ------------------------------------------------------------------------------------------ frames

    async def on_frames(self, results: list[FrameResult]) -> None:
        if not self._started or not results:
            return
        mine = [r for r in results if r.point_id in self.points]
        if not mine:
            return
        now_m = self.monotonic()
        for r in mine:
            self.last_seen[r.point_id] = now_m
        # One worker-thread hop per batch: health checks on the raw samples, the state machines, the commit.
        pending = await asyncio.to_thread(self._frames_in_thread, mine)
        self._after_commit(pending)

    def _frames_in_thread(self, results: list[FrameResult]) -> _Pending:
        pend = self._process(results, self._health(results))
        if pend:
            self._write(pend)
        return pend

    def _health(self, results: list[FrameResult]) -> list[SensorHealth | None]:
        """Health of every frame: the verdict the daemon's analysis workers attached, or — for results without
        one — checked here, batched over frames of one length and rate (in a worker thread; the r.m.s. comes
        from the frame's indicators)."""
        out: list[SensorHealth | None] = [r.health for r in results]
        if not self.settings.health_enabled:
            return [None] * len(results)
        groups: dict[tuple[int, float], list[int]] = {}
        for i, r in enumerate(results):
            if r.health is None:
                groups.setdefault((int(np.asarray(r.samples).size), r.fs_hz), []).append(i)
        for (_, fs), idx in groups.items():
            errors: list[HealthError] = []
            res = batch_health(np.stack([np.asarray(results[i].samples, dtype=np.float64).reshape(-1) for i in idx]),
                               fs, [self.settings.health.get(results[i].point_id, HealthSpec()) for i in idx],
                               [results[i].indicators.acceleration_rms_g for i in idx],
                               [self._runs(results[i]) for i in idx], [results[i].point_id for i in idx], errors)
            for err in errors:
                self.health_errors += 1
                log.warning("sensor health check failed", points=list(err.points), error=err.problem)
            for i, h in zip(idx, res, strict=True):
                out[i] = h
        return out

    def _runs(self, r: FrameResult) -> bool:
        """Whether the frame's machine runs (else its health is judged against a standing machine); results
        without a machine state use the machine's latest known one."""
        ms = r.machine_state or self.machine_states.get(r.machine_id)
        return judged_running(ms is not None and ms.state == "running", r.indicators.velocity_rms_mm_s,
                              self.settings.run_threshold_velocity_mm_s)

    def _process(self, results: list[FrameResult], health: list[SensorHealth | None]) -> _Pending:
        pend = _Pending()
        with self._lock:
            for r, h in zip(results, health, strict=True):
                self._frame(r, h, pend)
        return pend

    def _count(self, kind: str) -> None:
        self.events_total[kind] = self.events_total.get(kind, 0) + 1

    def point_healthy(self, point: str) -> bool:
        """Whether a point has no sensor fault (its level may then vote for its machine's state)."""
        s = self.sensors.get(point)
        return s is None or s.fault is None

    def _machine_state(self, r: FrameResult, t_s: float) -> MachineState:
        ms = r.machine_state
        if ms is None:
            ind = r.indicators
            m = self.machines_cfg.get(r.machine_id)
            measured = ind.shaft_hz if m is not None and m.speed_tag is not None and not ind.shaft_estimated \
                else None
            ms = self.own_machines.observe(r.machine_id, r.point_id, t_s, speed_hz=measured,
                                           velocity_rms_mm_s=ind.velocity_rms_mm_s) or MachineState()
        self.machine_states[r.machine_id] = ms
        return ms

    def _frame(self, r: FrameResult, h: SensorHealth | None, pend: _Pending) -> None:
        pid, t_s = r.point_id, r.t_end_ns / 1e9
        self.last_frame[pid] = t_s
        source = self.points[pid].source
        if self.source_states.get(source, SourceState()).down and self._connected(source):
            self._source_up(source, self.clock(), "data flows again", pend)  # a frame of a source announced down
        still_down = self.source_states.get(source, SourceState()).down
        if not still_down:
            self.stale.pop(pid, None)
        sensor = self._sensor(r, h, t_s, pend)
        ms = self._machine_state(r, t_s)
        if sensor.fault is not None:
            reason: str | None = "sensor-fault"
        else:
            reason = SUPPRESSION.get(ms.state)
        self.suppressed[pid] = reason
        for listener in self.frame_listeners:
            try:
                listener(r, reason)
            except Exception as exc:  # a listener never breaks the layer
                log.warning("frame listener failed", error=repr(exc))
        for lim in self._by_point.get(pid, ()):
            key = lim.key
            value = LIMITABLE[lim.indicator].value(r)
            if value is None or not math.isfinite(value):
                if reason is None:
                    continue
                value = math.nan  # absent while stopped (orders, bearing families): suppressed all the same
            if math.isfinite(value):  # the latest value is shown, suppressed or not (judging is what suppression stops)
                self.values[key] = value
            else:
                self.values.pop(key, None)
            if reason is None:
                tr = self.trends.setdefault(key, deque(maxlen=self.settings.trend_frames))
                tr.append((t_s, value))
                if lim.needs_baseline:
                    b = self.baselines.get(key, Baseline())
                    if not b.learned:
                        nb = b.add(value, t_s, self.settings.baseline_frames)
                        self.baselines[key] = pend.baselines[key] = nb
                        if nb.learned:
                            self.specs[key] = self._spec(lim)
                            self._baseline_event(r, lim, nb, "learned", None, pend)
            spec = self.specs.get(key) or self._spec(lim)
            self.specs[key] = spec
            state, transitions = step(self.alarms.get(key, AlarmState()), value, t_s, spec, reason)
            if still_down:  # a frame from before the source went down: judged, and stale again
                state, more = mark_stale(state, "source-down", t_s, spec)
                transitions += more
            self.alarms[key] = pend.alarms[key] = state
            for tr_ in transitions:
                self._alarm_event(r, lim, tr_, pend)
        pend.points.add(pid)

    def _sensor(self, r: FrameResult, h: SensorHealth | None, t_s: float, pend: _Pending) -> SensorState:
        pid = r.point_id
        s = self.sensors.get(pid, SensorState())
        s = replace(s, last_frame_s=t_s)
        if s.fault == "no-data":  # frames flow again
            s = replace(s, fault=None, detail="", since_s=t_s, healthy_run=0)
            self._sensor_event(pid, r.machine_id, "cleared", "no-data", "frames arrive again", r.t_end_ns, pend)
        if h is not None and h.fault is not None:
            if s.fault is None:
                window = max(RELAPSE_WINDOW_S, 2.0 * self._relapse_hold_s(s.relapses))
                recent = s.since_s is not None and t_s - s.since_s < window
                s = replace(s, fault=h.fault, detail=h.detail, since_s=t_s, healthy_run=0,
                            relapses=min(s.relapses + 1, 9) if recent else 0)
                self._sensor_event(pid, r.machine_id, "raised", h.fault, h.detail, r.t_end_ns, pend)
            else:
                s = replace(s, healthy_run=0, detail=h.detail if h.fault == s.fault else s.detail)
        elif h is not None and s.fault is not None:
            run = s.healthy_run + 1
            if run >= self._recover_frames(pid, s.relapses):
                self._sensor_event(pid, r.machine_id, "cleared", s.fault, f"{run} healthy frames", r.t_end_ns, pend)
                s = replace(s, fault=None, detail="", since_s=t_s, healthy_run=0)
            else:
                s = replace(s, healthy_run=run)
        self.sensors[pid] = pend.sensors[pid] = s
        return s

    @staticmethod
    def _relapse_hold_s(relapses: int) -> float:
        """Healthy time a relapsing sensor fault needs before it clears (0 for a first fault)."""
        return 0.0 if relapses <= 0 else min(RELAPSE_HOLD_MAX_S, RELAPSE_HOLD_S * 2.0 ** (relapses - 1))

    def _recover_frames(self, pid: str, relapses: int) -> int:
        """Consecutive healthy frames before a sensor fault clears: ``sensor_recover_frames``, and after a relapse
        at least the relapse hold (30 s, 60 s, 120 s … up to 1 h) of frames, so an intermittent fault stays raised."""
        hold_s = self._relapse_hold_s(relapses)
        return max(int(self.settings.sensor_recover_frames), math.ceil(hold_s / self._frame_period_s(pid)))

    # ------------------------------------------------------------------------------------------ events

    def _topic(self, point: str, machine: str) -> str:
        return self.settings.feed.topic.format(site=self.settings.site, machine=machine, point=point)

    def _base_data(self, point: str, machine: str) -> dict[str, Any]:
        p = self.points.get(point)
        ms = self.machine_states.get(machine)
        return {"site": self.settings.site, "machine": machine, "point": point,
                "axis": getattr(p, "axis", None), "machine_state": ms.state if ms is not None else "unknown"}

    def machine_stale(self, machine: str) -> bool:
        """Whether every point of a machine is stale (its source down or its sensor silent): its state is then
        not known."""
        with self._lock:  # also called from the metrics thread
            pids = [pid for pid, p in self.points.items() if p.machine == machine]
            return bool(pids) and all(self.stale.get(pid) for pid in pids)

    def machine_view(self, machine: str) -> dict[str, Any]:
        """A machine's state for the views: ``{state, since_s, grace_left_s, last_state, last_since_s}`` (the
        start-up grace still to run, on the frames' timeline, while ``starting``).  While every point of the
        machine is stale the state is ``unknown``; ``last_state`` and ``last_since_s`` keep the last known one
        (both null otherwise)."""
        ms = self.machine_states.get(machine) or MachineState()
        if self.machine_stale(machine):
            return {"state": "unknown", "since_s": None, "grace_left_s": None, "last_state": ms.state,
                    "last_since_s": ms.since_s}
        spec = self.own_machines.specs.get(machine)
        until = ms.grace_until_s(spec) if spec is not None else None
        left = None if until is None or ms.last_s is None else max(0.0, until - ms.last_s)
        return {"state": ms.state, "since_s": ms.since_s, "grace_left_s": left, "last_state": None,
                "last_since_s": None}

    def _emit(self, type_: str, point: str, machine: str, data: dict[str, Any], t_ns: int, pend: _Pending,
              event_id: str | None = None, *, subject: str | None = None, topic: str | None = None,
              history: tuple[str, str] | None = None, at_s: float | None = None) -> str:
        """Queue one event (and, with ``history = (kind, indicator)``, its history row) in ``pend``."""
        ev = cloud_event(type_=type_, source=self._source, subject=subject or point, data=data, time_ns=t_ns,
                         event_id=event_id, dataschema=self.settings.feed.dataschema_for(type_))
        pend.events.append(OutboxEvent(id=ev["id"], type=type_, subject=subject or point,
                                       topic=topic or self._topic(point, machine), body=event_body(ev),
                                       created_ns=time.time_ns()))
        if history is not None:
            row = {**data, "at_s": at_s}
            pend.history.append((t_ns, history[0], point, history[1], str(ev["id"]),
                                 json.dumps(row, separators=(",", ":"), allow_nan=False, default=str)))
        if point:
            pend.points.add(point)
        return str(ev["id"])

    def _sensor_event(self, point: str, machine: str, transition: str, fault: str, detail: str, t_ns: int,
                      pend: _Pending) -> None:
        raised = transition == "raised"
        data = {**self._base_data(point, machine), "transition": transition,
                "state": "sensor-fault" if raised else "normal", "fault": fault, "detail": detail,
                "stale": self.stale.get(point),
                "advice": ("Check the sensor, its cable, connector and mounting: this is a measurement problem, not "
                           "a machine finding. Machine alarms of this point are suppressed until it recovers. "
                           + _DISCLAIMER) if raised else
                          "The sensor signal looks healthy again; machine alarms of this point are re-armed."}
        self._emit(SENSOR_TYPE, point, machine, data, t_ns, pend, history=("sensor", fault))
        self._count("sensor-fault" if raised else "sensor-recovered")
        if raised:
            log.warning("sensor fault", point=point, fault=fault, detail=detail)
        else:  # good news: information, not a warning
            log.info("sensor recovered", point=point, fault=fault, detail=detail)

    def _baseline_event(self, r: FrameResult | None, lim: LimitConfig, b: Baseline, transition: str, by: str | None,
                        pend: _Pending) -> None:
        p = self.points[lim.point]
        data = {**self._base_data(lim.point, p.machine), "indicator": lim.indicator, "transition": transition,
                "mean": b.mean, "std": b.std, "frames": b.n, "by": by}
        t_ns = r.t_end_ns if r is not None else time.time_ns()
        self._emit(BASELINE_TYPE, lim.point, p.machine, data, t_ns, pend)
        self._count(f"baseline-{transition}")

    def _alarm_event(self, r: FrameResult | None, lim: LimitConfig, tr: Transition, pend: _Pending,
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
                head = str(data["advice"]).replace(_DISCLAIMER, "").strip()
                data["advice"] = f"{head} Trend: {trend['advice_text']}"
        from edgevib.daemon.alarms.outbox import new_event_id

        eid = new_event_id()
        if r is not None and tr.kind in ("raised", "escalated") and tr.to_severity > 0:
            data["capture"] = self.capture.save(
                r, indicator=lim.indicator, transition=tr.kind, severity=SEVERITY[tr.to_severity], event_id=eid,
                limits={"alert": data["alert_limit"], "danger": data["danger_limit"], "clear": tr.clear,
                        "rule": {"alert": _rule(lim.alert), "danger": _rule(lim.danger)}},
                config_digest=self.settings.config_digest, site=self.settings.site)
        t_ns = r.t_end_ns if r is not None else round(tr.at_s * 1e9)
        self._emit(ALARM_TYPE, lim.point, p.machine, data, t_ns, pend, event_id=eid,
                   history=("alarm", lim.indicator), at_s=self.clock() if by is not None else None)
        self._count(tr.kind)
        log.info("alarm " + tr.kind, point=lim.point, indicator=lim.indicator, state=SEVERITY[tr.to_severity],
                 value=tr.value, limit=tr.limit)

    async def _commit(self, pend: _Pending) -> None:
        if not pend:
            return
        await asyncio.to_thread(self._write, pend)
        self._after_commit(pend)

    def _after_commit(self, pend: _Pending) -> None:
        """On the event loop, once ``pend`` is durable: listeners, feed wake-ups, retained state topics."""
        if not pend:
            return
        self._notify(pend)
        if pend.events:
            for feed in (self.mqtt, self.webhook):
                if feed is not None:
                    feed.wake()
        if self.mqtt is not None and pend.points:
            self.mqtt.publish_states(pend.points)

    def _notify(self, pend: _Pending) -> None:
        for e in pend.events:
            for cb in self.listeners:
                try:
                    cb(json.loads(e.body))
                except Exception as exc:  # a listener never breaks the layer
                    log.warning("event listener failed", error=repr(exc))

    def _write(self, pend: _Pending) -> None:
        if self.db is None or self.store is None or self.outbox is None:
            return
        with self._lock, self.db.transaction() as c:
            for point in pend.forget:
                self.store.forget_baselines(c, point)
            self.store.save(c, alarms=pend.alarms, sensors=pend.sensors, baselines=pend.baselines,
                            sources=pend.sources)
            self.store.add_history(c, pend.history)
            self.outbox.add(pend.events, conn=c)

    # ------------------------------------------------------------------------------------------ timers

    async def _timer(self) -> None:
        while self._started:
            if self._wake is not None:
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._wake.wait(), 1.0)
                self._wake.clear()
            else:
                await asyncio.sleep(1.0)
            try:
                pend = self._tick()
                await self._commit(pend)
            except Exception as exc:  # the timer never dies
                log.error("alarm timer failed", error=repr(exc))

    def on_source(self, source: str, connected: bool) -> None:
        """A source's connection came up or went down (called on the event loop by the daemon's ingest; a
        deliberate close at shutdown is not reported).  The timer announces it at once."""
        self.tracks_sources = True
        self._conn[source] = connected
        if connected:
            self._ever_up.add(source)
        self._conn_changes.append((source, connected, self.clock()))
        if self._wake is not None:
            self._wake.set()

    def _connected(self, source: str) -> bool:
        return self._conn.get(source, False) if self.tracks_sources else True

    def _frame_period_s(self, pid: str) -> float:
        p = self.points[pid]
        hop = getattr(p, "hop_samples", None) or getattr(p, "frame_samples", 16384)
        return float(hop or 16384) / float(p.fs_hz)

    def _no_data_s(self, pid: str) -> float:
        return max(2.0, float(self.settings.no_data_frames) * self._frame_period_s(pid))

    def _silent(self, pid: str, now_m: float) -> bool:
        """No frame for the no-data interval, and (where the daemon tells) no block either."""
        limit = self._no_data_s(pid)
        if now_m - self.last_seen.get(pid, now_m) <= limit:
            return False
        if self.block_arrival is not None:
            try:
                t = self.block_arrival(pid)
            except Exception:  # a view that fails must not stop the timer
                t = None
            if t is not None and self.clock() - t <= limit:
                return False
        return True

    def _tick(self) -> _Pending:
        """Source changes, no-data detection (wall-clock) and shelf expiry between frames."""
        pend = _Pending()
        now_m = self.monotonic()
        with self._lock:
            self._source_tick(now_m, pend)
            for pid in self.points:
                self._no_data_tick(pid, now_m, pend)
                self._shelf_tick(pid, now_m, pend)
        return pend

    def _source_tick(self, now_m: float, pend: _Pending) -> None:
        while self._conn_changes:
            name, up, t = self._conn_changes.popleft()
            if name not in self.sources_of:
                continue
            if up:
                self._source_up(name, t, "connection restored", pend)
            else:
                self._source_down(name, t, "connection lost", pend)
        for name, pids in self.sources_of.items():
            st = self.source_states.get(name, SourceState())
            if st.down:
                continue
            if not self._connected(name):
                if name not in self._ever_up and now_m - self._started_m > SOURCE_CONNECT_GRACE_S:
                    self._source_down(name, self.clock(), "not reachable since start", pend)
            elif pids and all(self._silent(pid, now_m) for pid in pids):
                quiet = max(now_m - self.last_seen.get(pid, now_m) for pid in pids)
                self._source_down(name, self.clock(), f"connected, but none of its {len(pids)} point(s) has "
                                  f"delivered data for {quiet:.0f} s", pend, silent=True)

    def _no_data_tick(self, pid: str, now_m: float, pend: _Pending) -> None:
        """A point silent while its source is up and another of its points delivered after this one was due: the
        sensor (or its channel) is silent — a sensor fault.  Its alarms keep their state, stale."""
        p = self.points[pid]
        s = self.sensors.get(pid, SensorState())
        if s.fault == "no-data" or self.source_states.get(p.source, SourceState()).down or \
                not self._connected(p.source) or not self._silent(pid, now_m):
            return
        due = self.last_seen.get(pid, now_m) + self._no_data_s(pid)
        if not any(self.last_seen.get(q, -math.inf) >= due for q in self.sources_of.get(p.source, ()) if q != pid):
            return  # nothing else delivered since either: a source matter (see _source_tick), not this sensor
        limit_s = self._no_data_s(pid)
        detail = (f"no frames for more than {limit_s:.1f} s ({self.settings.no_data_frames} frame periods) while "
                  f"other points of source {p.source!r} deliver")
        t_ns = round(self.last_frame.get(pid, self.clock()) * 1e9)
        self.stale[pid] = "no-data"
        self._sensor_event(pid, p.machine, "raised", "no-data", detail, t_ns, pend)
        s = replace(s, fault="no-data", detail=detail, since_s=self.last_frame.get(pid), healthy_run=0)
        self.sensors[pid] = pend.sensors[pid] = s
        self._mark_point_stale(pid, "no-data", pend)
        self.suppressed[pid] = "sensor-fault"

    def _mark_point_stale(self, pid: str, reason: str, pend: _Pending) -> list[dict[str, Any]]:
        """Flag every alarm of a point stale; returns the visible ones (for the source event)."""
        visible = []
        t_s = self._point_now_s(pid, self.monotonic())
        for lim in self._by_point.get(pid, ()):
            spec = self.specs.get(lim.key) or self._spec(lim)
            st, trs = mark_stale(self.alarms.get(lim.key, AlarmState()), reason, t_s, spec)
            self.alarms[lim.key] = pend.alarms[lim.key] = st
            for tr in trs:
                self._alarm_event(None, lim, tr, pend)
            state = isa_state(st, spec)
            if display_severity(st, spec) > 0 or state == "rtn-unacknowledged":
                visible.append({"point": pid, "indicator": lim.indicator, "alarm_state": state,
                                "severity": SEVERITY[display_severity(st, spec)]})
        return visible

    def _point_now_s(self, pid: str, now_m: float) -> float:
        """The point's frames' timeline now: its latest frame's time advanced by the wall-clock time since.

        While the point is stale (its source down, its sensor silent, or since a restart before data flows) the
        time since its last frame is unknown to that timeline: the wall clock is taken, never an earlier time."""
        if pid not in self.last_frame:
            return self.clock()
        t = self.last_frame[pid] + max(0.0, now_m - self.last_seen.get(pid, now_m))
        return max(t, self.clock()) if self.stale.get(pid) else t

    def _shelf_tick(self, pid: str, now_m: float, pend: _Pending) -> None:
        # Shelves expire on the frames' timeline (a shelf is set from the last frame's time), advanced by the
        # wall-clock time since that frame, so a shelf also ends while no frames arrive.
        now_s = self._point_now_s(pid, now_m)
        for lim in self._by_point.get(pid, ()):
            shelved = self.alarms.get(lim.key)
            if shelved is None or shelved.shelved_until_s is None or now_s < shelved.shelved_until_s:
                continue
            spec = self.specs.get(lim.key) or self._spec(lim)
            st, trs = expire_shelf(shelved, now_s, spec)
            self.alarms[lim.key] = pend.alarms[lim.key] = st
            for tr in trs:
                self._alarm_event(None, lim, tr, pend)

    def _source_down(self, name: str, t_s: float, reason: str, pend: _Pending, *, silent: bool = False) -> None:
        """Announce a source's data path lost (once): its points' alarms turn stale, no sensor fault is raised."""
        st = self.source_states.get(name, SourceState())
        if st.down:
            if st.silent and not silent:  # a silent source now lost its connection too: no new announcement
                self.source_states[name] = pend.sources[name] = replace(st, reason=reason, silent=False)
            return
        pids = self.sources_of.get(name, [])
        visible: list[dict[str, Any]] = []
        for pid in pids:
            self.stale[pid] = "source-down"
            visible += self._mark_point_stale(pid, "source-down", pend)
        self.source_states[name] = pend.sources[name] = SourceState(down=True, since_s=t_s, reason=reason,
                                                                    silent=silent)
        advice = ("The data path from this source is lost: a communication problem (network, broker, gateway or "
                  "server), not a machine finding and not a sensor fault. Its points are stale: their alarms keep "
                  "their state and acknowledgement and are judged again on the first good frames. " + _DISCLAIMER)
        self._source_event(SOURCE_DOWN_TYPE, name, "down", reason, t_s, pids, visible, pend, advice=advice,
                           extra={"silent": silent})
        self._count("source-down")
        log.warning("source down", source=name, reason=reason, points=len(pids), stale_alarms=len(visible))

    def _source_up(self, name: str, t_s: float, reason: str, pend: _Pending) -> None:
        """Announce a source's data path back (once after each down); its points stay stale until their next
        frame, and get the start allowance again before a silent one counts as a sensor fault."""
        st = self.source_states.get(name, SourceState())
        if not st.down:
            return
        pids = self.sources_of.get(name, [])
        now_m = self.monotonic()
        for pid in pids:
            self.last_seen[pid] = max(self.last_seen.get(pid, now_m), now_m + NO_DATA_START_S)
        visible = []
        for pid in pids:
            for lim in self._by_point.get(pid, ()):
                spec = self.specs.get(lim.key) or self._spec(lim)
                a = self.alarms.get(lim.key, AlarmState())
                shown = display_severity(a, spec) > 0 or isa_state(a, spec) == "rtn-unacknowledged"
                if a.stale is not None and shown:
                    visible.append({"point": pid, "indicator": lim.indicator, "alarm_state": isa_state(a, spec),
                                    "severity": SEVERITY[display_severity(a, spec)]})
        self.source_states[name] = pend.sources[name] = SourceState(down=False, since_s=t_s)
        down_for = None if st.since_s is None else max(0.0, t_s - st.since_s)
        advice = ("Data from this source flows again; its stale alarms are judged again on the first good frames. "
                  + _DISCLAIMER)
        self._source_event(SOURCE_UP_TYPE, name, "up", reason, t_s, pids, visible, pend, advice=advice,
                           extra={"down_since": None if st.since_s is None else rfc3339_utc_s(st.since_s),
                                  "down_for_s": down_for, "down_reason": st.reason})
        self._count("source-up")
        log.info("source up", source=name, reason=reason, down_for_s=down_for)

    def _source_event(self, type_: str, name: str, transition: str, reason: str, t_s: float, pids: list[str],
                      visible: list[dict[str, Any]], pend: _Pending, *, advice: str, extra: dict[str, Any]) -> None:
        machines = sorted({self.points[pid].machine for pid in pids})
        data: dict[str, Any] = {"site": self.settings.site, "source": name, "transition": transition,
                                "state": transition, "reason": reason, "machines": machines, "points": list(pids),
                                "stale_alarms": visible, **extra, "advice": advice}
        topic = self.settings.feed.source_topic.format(site=self.settings.site, source=name)
        self._emit(type_, "", ",".join(machines), data, round(t_s * 1e9), pend, subject=name, topic=topic,
                   history=("source", name))
        pend.points.update(pids)

    # ------------------------------------------------------------------------------------------ commands

    def _targets(self, req: dict[str, Any]) -> list[LimitConfig]:
        point = req["point"]
        if point not in self.points:
            raise CommandError(f"unknown point {point!r}")
        lims = self._by_point.get(point, [])
        ind = req.get("indicator")
        if ind is not None:
            lims = [lim for lim in lims if lim.indicator == ind]
            if not lims:
                raise CommandError(f"point {point!r} has no limit on {ind!r} (limits: "
                                   f"{', '.join(x.indicator for x in self._by_point.get(point, [])) or 'none'})")
        return lims

    def handle_command(self, req: dict[str, Any]) -> Any:
        """Run one validated command (see :mod:`edgevib.daemon.alarms.control`); raises CommandError."""
        cmd = req["cmd"]
        extra = self.extra_commands.get(cmd)
        if extra is not None:  # a daemon command on the same channel (select_band)
            return extra(req)
        if cmd == "list":
            if req.get("point") is not None and req["point"] not in self.points:
                raise CommandError(f"unknown point {req['point']!r}")
            return self.snapshot(req.get("point"))
        if cmd == "history":
            if req.get("point") is not None and req["point"] not in self.points:
                raise CommandError(f"unknown point {req['point']!r}")
            return [dataclasses.asdict(t) for t in self.history(req.get("point"), since_s=req.get("since_s"),
                                                                limit=int(req.get("limit", 200)))]
        pend = _Pending()
        by = req.get("by")
        changed = 0
        with self._lock:
            lims = self._targets(req)
            # the time of the action: the wall clock, on the point's timeline (the last frame's time advanced by
            # the time since it arrived; during an outage, the wall clock) so shelves run from the action
            t_s = self._point_now_s(req["point"], self.monotonic())
            for lim in lims:
                key, spec = lim.key, self.specs.get(lim.key) or self._spec(lim)
                st = self.alarms.get(key, AlarmState())
                if cmd == "ack":
                    st2, trs = acknowledge(st, t_s, spec)
                elif cmd == "shelve":
                    dur = float(req["duration_s"])
                    if dur > self.settings.max_shelve_s:
                        raise CommandError(f"shelve: {human_duration(dur)} exceeds the maximum "
                                           f"{human_duration(self.settings.max_shelve_s)} ([alarms] max_shelve_h)")
                    st2, trs = shelve(st, str(req["reason"]), t_s + dur, t_s, spec)
                elif cmd == "unshelve":
                    st2, trs = unshelve(st, t_s, spec, reason=f"by {by}" if by else "by command")
                elif cmd == "relearn":
                    if not lim.needs_baseline:
                        continue
                    self.baselines.pop(key, None)
                    self.specs[key] = self._spec(lim)
                    pend.forget.add(lim.point)
                    self._baseline_event(None, lim, Baseline(), "relearn", by, pend)
                    changed += 1
                    continue
                else:  # pragma: no cover - validate_request allows only the commands above
                    raise CommandError(f"unknown command {cmd!r}")
                if st2 != st:
                    changed += 1
                self.alarms[key] = pend.alarms[key] = st2
                for tr in trs:
                    self._alarm_event(None, lim, tr, pend, by=by)
            # Commands run on a worker thread (socket) or the event loop (MQTT): write synchronously.
            self._write(pend)
        self._notify(pend)
        loop = self._loop
        if loop is not None and (pend.events or pend.points):
            loop.call_soon_threadsafe(self._after_command, pend.points)
        return {"changed": changed, "events": len(pend.events)}

    def _after_command(self, points: set[str]) -> None:
        for feed in (self.mqtt, self.webhook):
            if feed is not None:
                feed.wake()
        if self.mqtt is not None:
            self.mqtt.publish_states(points)

    # ------------------------------------------------------------------------------------------ views

    def _alarm_row(self, key: tuple[str, str]) -> dict[str, Any]:
        lim = self.limits[key]
        spec = self.specs.get(key) or self._spec(lim)
        st = self.alarms.get(key, AlarmState())
        b = self.baselines.get(key)
        return {"point": key[0], "indicator": key[1], "state": isa_state(st, spec),
                "severity": SEVERITY[display_severity(st, spec)], "value": self.values.get(key),
                "alert": spec.alert.set_point if spec.alert else None,
                "danger": spec.danger.set_point if spec.danger else None,
                "shelved_until_s": st.shelved_until_s, "shelve_reason": st.shelve_reason,
                "suppressed": st.suppressed, "stale": st.stale, "since_s": st.since_s,
                "baseline": None if b is None else {"learned": b.learned, "mean": b.mean, "std": b.std,
                                                    "frames": b.n}}

    def _point_row(self, pid: str) -> dict[str, Any]:
        p = self.points[pid]
        mv = self.machine_view(p.machine)
        src = self.source_states.get(p.source, SourceState())
        return {"machine": p.machine, "machine_state": mv["state"], "start_up_grace_left_s": mv["grace_left_s"],
                "last_machine_state": mv["last_state"], "suppressed": self.suppressed.get(pid),
                "stale": self.stale.get(pid), "source": p.source,
                "source_state": "down" if src.down else "up", "alarm_text": self.state_text(pid),
                "time": None if pid not in self.last_frame else rfc3339_utc_s(self.last_frame[pid])}

    def snapshot(self, point: str | None = None) -> dict[str, Any]:
        with self._lock:
            keys = [k for k in self.limits if point is None or k[0] == point]
            sensors = {pid: {"fault": s.fault, "detail": s.detail} for pid, s in self.sensors.items()
                       if point is None or pid == point}
            points = {pid: self._point_row(pid) for pid in self.points if point is None or pid == point}
            sources = {n: {"state": "down" if st.down else "up", "since_s": st.since_s, "reason": st.reason or None}
                       for n, st in self.source_states.items()}
            return {"alarms": [self._alarm_row(k) for k in keys], "sensors": sensors, "points": points,
                    "sources": sources, "outbox_pending": self.outbox.depth() if self.outbox is not None else 0}

    def history(self, point: str | None = None, *, since_s: float | None = None,
                limit: int = 200) -> list[AlarmTransition]:
        """Recorded transitions (alarms, sensor faults, sources) from the durable store, newest first."""
        if isinstance(limit, bool) or not isinstance(limit, int) or not 1 <= limit <= HISTORY_LIMIT_MAX:
            raise ValueError(f"history limit {limit!r} must be an integer 1..{HISTORY_LIMIT_MAX}")
        if since_s is not None and not math.isfinite(since_s):
            raise ValueError(f"history since {since_s!r} must be a finite time in Unix seconds")
        store = self.store
        if store is None:
            return []
        rows = store.history(point, None if since_s is None else round(since_s * 1e9), limit)
        return [_transition_of(*row) for row in rows]

    def point_severity(self, point: str) -> int:
        """0 normal, 1 alert, 2 danger, 3 sensor fault (suppressed alarms count as normal)."""
        s = self.sensors.get(point)
        if s is not None and s.fault is not None:
            return 3
        worst = 0
        for lim in self._by_point.get(point, ()):
            st = self.alarms.get(lim.key)
            if st is not None and st.suppressed is None:
                worst = max(worst, display_severity(st, self.specs.get(lim.key) or self._spec(lim)))
        return worst

    def state_text(self, point_id: str) -> str | None:
        """A short alarm state for the demo table: ``normal``, ``ALERT kurtosis``, ``sensor: flatline`` …

        Every active alarm is shown, most severe level first (``DANGER misalignment_2x_mm_s; ALERT
        velocity_rms_mm_s``); within a level, fault patterns first (order lines and bearing families), then
        impacting statistics, then broadband levels.  ``(stale: …)`` marks a point whose data stopped (its alarms
        keep their state)."""
        if point_id not in self.points:
            return None
        with self._lock:
            stale = self.stale.get(point_id)
            tail = f" (stale: {stale})" if stale else ""
            s = self.sensors.get(point_id)
            if s is not None and s.fault is not None:
                return f"sensor: {s.fault}{tail}"
            levels: dict[int, list[str]] = {}
            shelved = False
            for lim in self._by_point.get(point_id, ()):
                st = self.alarms.get(lim.key)
                if st is None:
                    continue
                spec = self.specs.get(lim.key) or self._spec(lim)
                shelved = shelved or st.shelved_until_s is not None
                if st.suppressed is not None:
                    continue
                d = display_severity(st, spec)
                if d > 0:
                    levels.setdefault(d, []).append(lim.indicator)
            if levels:
                parts = [f"{SEVERITY[d].upper()} {', '.join(sorted(levels[d], key=_display_rank))}"
                         for d in sorted(levels, reverse=True)]
                return "; ".join(parts) + tail
            reason = self.suppressed.get(point_id)
            if reason == "machine-stopped":
                return "stopped" + tail
            if reason == "start-up-grace":
                return "starting" + tail
            return ("shelved" if shelved else "normal") + tail

    def state_messages(self) -> dict[str, tuple[str, bytes]]:
        """Retained state message of every point: ``{point: (topic, JSON)}``."""
        out: dict[str, tuple[str, bytes]] = {}
        with self._lock:
            for pid, p in self.points.items():
                sev = self.point_severity(pid)
                s = self.sensors.get(pid, SensorState())
                mv = self.machine_view(p.machine)
                msg = {"site": self.settings.site, "machine": p.machine, "point": pid, "axis": p.axis,
                       "machine_state": mv["state"], "start_up_grace_left_s": mv["grace_left_s"],
                       "last_machine_state": mv["last_state"],
                       "last_machine_state_since": None if mv["last_since_s"] is None
                       else rfc3339_utc_s(mv["last_since_s"]),
                       "state": ("normal", "alert", "danger", "sensor-fault")[sev],
                       "suppressed": self.suppressed.get(pid), "stale": self.stale.get(pid),
                       "source": {"name": p.source,
                                  "state": "down" if self.source_states.get(p.source, SourceState()).down
                                  else "up"},
                       "sensor": {"fault": s.fault, "detail": s.detail or None},
                       "time": None if pid not in self.last_frame else rfc3339_utc_s(self.last_frame[pid]),
                       "alarms": {k[1]: {kk: v for kk, v in self._alarm_row(k).items() if kk not in ("point",)}
                                  for k in self.limits if k[0] == pid}}
                if self.trend_state is not None:
                    msg["trend"] = self.trend_state(pid)
                topic = self.settings.feed.state_topic.format(site=self.settings.site, machine=p.machine, point=pid)
                out[pid] = (topic, json.dumps(msg, separators=(",", ":"), allow_nan=False,
                                              default=str).encode("utf-8"))
        return out


def _transition_of(time_ns: int, kind: str, point: str, indicator: str, event_id: str,
                   body: str) -> AlarmTransition:
    """A history row as the views read it."""
    try:
        d = json.loads(body)
    except ValueError:
        d = {}
    if not isinstance(d, dict):
        d = {}

    def num(key: str) -> float | None:
        v = d.get(key)
        return float(v) if isinstance(v, int | float) and not isinstance(v, bool) else None

    def text(key: str) -> str | None:
        v = d.get(key)
        return None if v is None else str(v)

    if kind == "alarm":
        from_state, state, limit = text("from_state"), str(d.get("state", "")), num("limit")
    elif kind == "sensor":
        from_state = "normal" if d.get("transition") == "raised" else "sensor-fault"
        state, limit = str(d.get("state", "")), None
    else:
        from_state = "up" if d.get("transition") == "down" else "down"
        state, limit = str(d.get("state", d.get("transition", ""))), None
    return AlarmTransition(
        kind=kind, t_s=time_ns / 1e9, point=point, machine=str(d.get("machine", "")), indicator=indicator,
        unit=text("unit"), transition=str(d.get("transition", "")), from_state=from_state, state=state,
        alarm_state=text("alarm_state"), value=num("value"), limit=limit, by=text("by"), at_s=num("at_s"),
        reason=text("reason") if kind != "sensor" else text("detail"), capture=text("capture"), event_id=event_id,
        machine_state=text("machine_state"), stale=text("stale"))


def _rule(r: LevelRule | None) -> dict[str, Any] | None:
    return None if r is None else {"kind": r.kind, "value": r.value}


class AlarmCollector(Collector):
    """Prometheus collector of the alarm layer (fresh families from a snapshot on each scrape)."""

    def __init__(self, layer: AlarmLayer) -> None:
        self.layer = layer

    def describe(self) -> list[Any]:
        return []

    def collect(self) -> Iterable[Any]:
        lay = self.layer
        site = lay.settings.site
        state = GaugeMetricFamily("edgevib_alarm_state", "Alarm state per point and indicator: 0 normal, 1 alert, "
                                  "2 danger, 3 sensor fault", labels=["site", "machine", "point", "axis", "indicator"])
        with lay._lock:
            for pid, p in lay.points.items():
                s = lay.sensors.get(pid)
                fault = s is not None and s.fault is not None
                for lim in lay._by_point.get(pid, ()):
                    st = lay.alarms.get(lim.key, AlarmState())
                    spec = lay.specs.get(lim.key) or lay._spec(lim)
                    v = 3 if fault else 0 if st.suppressed is not None else display_severity(st, spec)
                    state.add_metric([site, p.machine, pid, p.axis, lim.indicator], float(v))
                state.add_metric([site, p.machine, pid, p.axis, "sensor"], 3.0 if fault else 0.0)
            events = CounterMetricFamily("edgevib_alarm_events", "Alarm layer events by type", labels=["type"])
            for kind, n in sorted(lay.events_total.items()):
                events.add_metric([kind], float(n))
        yield state
        yield events
        pub = CounterMetricFamily("edgevib_feed_published", "Events confirmed by a feed sink", labels=["sink"])
        for feed in (lay.mqtt, lay.webhook):
            if feed is not None:
                pub.add_metric([feed.sink], float(feed.published))
        yield pub
        rej = CounterMetricFamily("edgevib_feed_rejected", "Events a feed sink refused for good (a webhook's 4xx "
                                  "answer other than 408/425/429; an MQTT topic or PUBACK refusal; not retried)",
                                  labels=["sink"])
        for feed in (lay.mqtt, lay.webhook):
            if feed is not None:
                rej.add_metric([feed.sink], float(getattr(feed, "rejected", 0)))
        yield rej
        depth, age = 0, 0.0
        if lay.outbox is not None:
            with contextlib.suppress(Exception):
                depth, age = lay.outbox.depth(), lay.outbox.oldest_age_s()
        yield GaugeMetricFamily("edgevib_outbox_pending_events", "Events waiting in the durable outbox", value=depth)
        yield GaugeMetricFamily("edgevib_outbox_oldest_pending_age_seconds", "Age of the oldest pending event",
                                value=age)
        yield GaugeMetricFamily("edgevib_captures_stored", "Waveform captures on disk", value=lay.capture.count)
        yield GaugeMetricFamily("edgevib_captures_bytes", "Disk used by waveform captures", value=lay.capture.bytes)
