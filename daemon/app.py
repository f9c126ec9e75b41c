"""The one place where sources, the rolling pipeline, analysis workers, alarms and sinks are wired together.

Data flow (all on one asyncio event loop, numerics in a thread pool)::

    sources ──payload/block/speed──▶ BlockIngest (frames.py) ──frames──▶ per-point bounded queues
        ──batches of points whose plans mix──▶ ThreadPoolExecutor: analyze_frames(stack, plan(s), shaft_hz)
        ──FrameResult list──▶ one delivery queue and task per FrameSink (Prometheus, MQTT, OPC UA, alarms…)

A point is in at most one analysis batch at a time, so its frames (and trend) stay in order.  A batch takes the
frames of the point that has waited longest and of every other idle point whose plan mixes with its plan (equal
``batch_key``: plans that differ only in the bearing and the speed range, as a plant's machines' do, are analysed
in one call, each frame's result that of its own plan); it starts once
:data:`MAX_BATCH` frames are queued or the oldest has waited :data:`BATCH_WINDOW_S` (50 ms), because one call on
many frames costs a fraction per frame of a call on one (the pipeline's fixed cost per call is several frames'
worth): under load the batches fill up, and when idle a frame waits at most the window.  One batch more than there
are workers may be in flight, queued behind them, so a worker goes on to its next batch at once; it holds no
frame of a machine already in a batch (that machine's state after those results judges its next frames, as if
the batches ran one after the other).  An analysis worker slot is freed as soon as the analysis returns: the
results go to every sink's own queue and a task per sink hands them over, so a slow sink delays neither the next
analysis batch nor the other sinks.  Ordering and
bounds (:class:`SinkChannel`):

* every sink receives a point's results in frame order (one FIFO per sink, filled in analysis order, and a point
  is never in two batches at once);
* a *lossy* sink (the default: the Prometheus exposition, MQTT and OPC UA publishing show the latest values)
  keeps at most :data:`SINK_BACKLOG_PER_POINT` undelivered results per point (or the newest batch's results of
  that point when there are more: a sink that keeps up misses nothing); when it falls further behind, the
  oldest undelivered ones are dropped and counted (``Stats.sink_dropped[(sink, point)]``);
* a *lossless* sink (:class:`~edgevib.daemon.interfaces.LosslessSink`, added with ``add_lossless_sink``: the
  alarm layer, whose debounce, baselines and sensor-health runs must see every analysed frame in order) drops
  nothing.  Its queue is bounded instead by pausing the
  scheduler: while it holds more than :data:`LOSSLESS_BACKLOG` results no new analysis batch starts, frames wait
  in the per-point ingest queues, and those drop their oldest frames (counted as ``frames_dropped``) as they
  always do when analysis falls behind.  So a frame is either seen by every sink that must see it or dropped
  before analysis for everyone — never silently missing from the alarm history only;
* a lossless sink with a cost per call (its ``batch_window_s``: the alarm layer's decision and SQLite commit)
  gets results gathered for up to that long or :data:`MAX_BATCH` results, rather than one call per analysis
  batch (which holds one or two frames when analysis keeps up).

A sink that fails is logged (rate-limited) and never stops the others.  :meth:`Daemon.reload` applies a new
configuration while points whose configuration is unchanged keep their assembly buffers, queues and trends.

Seams for other layers (contracts in :mod:`edgevib.daemon.interfaces`): ``Daemon.add_sink`` and
``add_lossless_sink`` (before ``start``); parts that take a reload are listed as ``Reconfigurable`` where they are
wired; :func:`wire_alarms` builds the alarm layer with its store, feeds, control socket and collector (None when
alarms are off; the alarm tests wire it the same way), also the ``AlarmView`` of the demo table's alarm column;
``on_ready`` / ``on_stopping`` callbacks (systemd notifications).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import gc
import math
import operator
import time
from collections import Counter, deque
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol, assert_never

import numpy as np
import numpy.typing as npt

from edgevib.daemon.band_auto import BandAuto, BandSelection, plan_with_band, select_for_point
from edgevib.daemon.config import (
    Config,
    MachineConfig,
    MqttSourceConfig,
    OpcUaSourceConfig,
    PointConfig,
    SimulatedSourceConfig,
    SourceConfig,
)
from edgevib.daemon.frames import BlockIngest, EwTrend, FrameJob, PointStream, Stats
from edgevib.daemon.indicators import REGISTRY
from edgevib.daemon.interfaces import (
    AlarmView,
    FrameResult,
    FrameSink,
    LosslessSink,
    Reconfigurable,
    Source,
)
from edgevib.daemon.logs import RateLimitedLogger, get_logger
from edgevib.daemon.machine_state import MachineTracker
from edgevib.daemon.sensor_health import HealthError, batch_health, judged_running
from edgevib.pipelines.health import HealthSpec, SensorHealth
from edgevib.pipelines.severity import iso_zone
from edgevib.pipelines.types import AnalysisPlan, FrameIndicators, PipelineError

if TYPE_CHECKING:
    from prometheus_client import CollectorRegistry

    from edgevib.daemon.alarms.engine import AlarmLayer
    from edgevib.daemon.web.api import ViewService

__all__ = ["LOSSLESS_BACKLOG", "SINK_BACKLOG_PER_POINT", "AnalyzeFn", "Daemon", "SinkChannel", "wire_alarms"]

AnalyzeFn = Callable[[npt.NDArray[np.float32], "AnalysisPlan | Sequence[AnalysisPlan]",
                      "npt.NDArray[np.float64] | None"], list[FrameIndicators]]
"""The analysis of a batch: frames, their plan (one plan for the whole batch, or one per frame when the plans differ
but mix: ``analyze_frames`` takes either), their speeds."""
MAX_BATCH = 64
BATCH_WINDOW_S = 0.05  # a batch waits up to this long for more frames: larger batches cost far less per frame
# Indicators whose exponentially weighted trend is kept: FrameIndicators fields (tests/daemon/test_app.py checks
# that each reads its field), so a frame's trend is known when its result is built.
TRENDED = tuple(i.name for i in REGISTRY if i.trend)
_TREND_READERS = tuple((name, operator.attrgetter(name)) for name in TRENDED)  # built once, read per frame
SINK_BACKLOG_PER_POINT = 4  # undelivered results a lossy sink keeps per point before dropping the oldest
LOSSLESS_BACKLOG = 4 * MAX_BATCH  # undelivered results of a lossless sink above which analysis pauses
log = get_logger("edgevib.daemon")


def _default_analyze(x: npt.NDArray[np.float32], plan: AnalysisPlan | Sequence[AnalysisPlan],
                     shaft_hz: npt.NDArray[np.float64] | None) -> list[FrameIndicators]:
    from edgevib.pipelines.analysis import analyze_frames

    return list(analyze_frames(x, plan, shaft_hz=shaft_hz))


def _iso_zone(v_mm_s: float | None, machine: MachineConfig) -> str | None:
    if machine.group is None or machine.support is None or v_mm_s is None or not math.isfinite(v_mm_s):
        return None
    try:
        return str(iso_zone(v_mm_s, machine.group, machine.support))
    except PipelineError:
        return None


def _freeze_startup_objects() -> None:
    """Collect once, then keep every object alive now out of the cyclic collector's later passes (``gc.freeze``).

    The configuration, the plans, the per-point state, the sinks and the imported modules live as long as the
    daemon: some 150,000 objects for 800 points.  Every full collection walked all of them — 75–300 ms with
    the interpreter lock held, every few seconds under load, as the results of each frame (which live for a
    frame period, long enough to reach the oldest generation) piled up — and stalled ingest, analysis and
    delivery alike.  Frozen, a full collection walks only what was made since: 7–25 ms.  Objects that become
    garbage later are still freed by reference counting; a reload collects and freezes again (after
    ``gc.unfreeze``), and :meth:`Daemon.stop` unfreezes."""
    gc.unfreeze()
    gc.collect()
    gc.freeze()


# Net new container objects between two collections of the cyclic collector's youngest generation (CPython's
# default is 700).  A running daemon leaves no cyclic garbage of its own (nor, with
# :class:`~edgevib.daemon.mqtt_client.AcyclicMatcher`, paho), but each batch makes and drops tens of thousands of
# result objects in bursts, so at the default the collector ran some 30 times a second, and every hundredth of
# those became a collection of every object made since start-up (25–40 ms with the interpreter lock held).
YOUNG_COLLECTION_THRESHOLD = 10_000


def _collect_less_often() -> tuple[int, int, int]:
    """Raise the youngest generation's threshold to :data:`YOUNG_COLLECTION_THRESHOLD` (never lower it); returns
    the thresholds before, for :meth:`Daemon.stop` to restore (the setting is the process's)."""
    before = gc.get_threshold()
    gc.set_threshold(max(before[0], YOUNG_COLLECTION_THRESHOLD), *before[1:])
    return before[0], before[1], before[2]


_DEFAULT_HEALTH = HealthSpec()  # frozen: one default shared by every point without its own (not one per frame)

class _Part(FrameSink, Reconfigurable, Protocol):
    """A sink that takes a new configuration on reload."""


def point_counts(results: Sequence[FrameResult]) -> dict[str, int]:
    """Results per point, in the order the points first come."""
    return Counter(r.point_id for r in results)


class SinkChannel:
    """The delivery queue and task of one sink (see the module docstring for ordering and bounds)."""

    def __init__(self, sink: FrameSink, stats: Stats, rlog: RateLimitedLogger, on_delivered: Callable[[], None],
                 *, lossless: bool = False, window_s: float = 0.0) -> None:
        self.sink = sink
        self.name = type(sink).__name__
        self.lossless = lossless
        self.window_s = window_s
        self.stats = stats
        self.rlog = rlog
        self._on_delivered = on_delivered
        self._fifo: deque[FrameResult] = deque()  # lossless
        # lossy: the batches put since the last hand-over, each point's undelivered results in them, and how many of
        # each point's oldest ones were dropped (skipped when they are handed over)
        self._pending: list[list[FrameResult]] = []
        self._held: dict[str, int] = {}
        self._skip: dict[str, int] = {}
        self._queued = 0
        self._busy = 0  # results inside the current on_frames call
        self._event = asyncio.Event()
        self.task: asyncio.Task[None] | None = None

    @property
    def backlog(self) -> int:
        """Results queued or being handed over."""
        return self._queued + self._busy

    def put(self, results: list[FrameResult], counts: Mapping[str, int] | None = None) -> None:
        """Queue a batch; ``counts``: its results per point (:func:`point_counts`, made once for every sink)."""
        if self.lossless:
            self._fifo.extend(results)
            self._queued += len(results)
        else:
            new = point_counts(results) if counts is None else counts
            self._pending.append(results)
            self._queued += len(results)
            held = self._held
            if not held:  # the usual case, a sink that keeps up: a batch alone is kept whole
                self._held = dict(new)
            else:
                for pid, n_new in new.items():  # a batch is kept whole (a sink that keeps up misses nothing)
                    n = held.get(pid, 0) + n_new
                    excess = n - max(SINK_BACKLOG_PER_POINT, n_new)
                    if excess > 0:  # the point's oldest undelivered results go
                        n -= excess
                        self._skip[pid] = self._skip.get(pid, 0) + excess
                        self._queued -= excess
                        Stats.inc(self.stats.sink_dropped, (self.name, pid), excess)
                    held[pid] = n
        self._event.set()

    def _take(self) -> list[FrameResult]:
        """Everything queued: a lossy sink's results point by point (in the order the points first came, each
        point's in frame order), without the dropped ones."""
        if self.lossless:
            out = list(self._fifo)
            self._fifo.clear()
        else:
            batches, skip = self._pending, self._skip
            if len(batches) == 1 and not skip and len(self._held) == len(batches[0]):
                out = list(batches[0])  # one batch, one result per point: already in that order
            else:
                groups: dict[str, list[FrameResult]] = {}
                for batch in batches:
                    for r in batch:
                        g = groups.get(r.point_id)
                        if g is None:
                            groups[r.point_id] = [r]
                        else:
                            g.append(r)
                out = []
                for pid, g in groups.items():
                    out.extend(g[skip[pid]:] if pid in skip else g)
            self._pending, self._held, self._skip = [], {}, {}
        self._queued = 0
        return out

    def start(self) -> None:
        self.task = asyncio.get_running_loop().create_task(self._run(), name=f"edgevib-sink-{self.name}")

    async def _run(self) -> None:
        while True:
            await self._event.wait()
            self._event.clear()
            if self.window_s > 0:  # gather up to a batch for a sink with a high cost per call
                with contextlib.suppress(TimeoutError):
                    async with asyncio.timeout(self.window_s):
                        while self._queued < MAX_BATCH:
                            await self._event.wait()
                            self._event.clear()
            while self._queued:
                batch = self._take()
                self._busy = len(batch)
                try:
                    await self.sink.on_frames(batch)
                except asyncio.CancelledError:
                    raise
                except Exception as exc:
                    self.rlog.error(("sink", self.name), "sink failed", sink=self.name, error=repr(exc))
                finally:
                    self._busy = 0
                    self._on_delivered()

    async def drain(self, timeout_s: float) -> None:
        """Wait until everything queued has been handed over (bounded), then end the task."""
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(max(0.0, timeout_s)):
                while self.backlog:
                    await asyncio.sleep(0.01)
        if self.task is not None:
            self.task.cancel()
            await asyncio.gather(self.task, return_exceptions=True)
            self.task = None
        if self.backlog:
            log.warning("sink did not take every result before stopping", sink=self.name, left=self.backlog)


@dataclass
class _PointState:
    config: PointConfig
    machine: MachineConfig
    plan: AnalysisPlan
    trend: EwTrend
    signature: tuple[Any, ...]
    band_source: str | None = None  # where the plan's envelope band comes from (configured, auto, default)
    auto_band: bool = dataclasses.field(init=False)  # the point's band is selected automatically (read per frame)
    zoned: bool = dataclasses.field(init=False)  # the machine has ISO 20816-3 zones (group and support)

    def __post_init__(self) -> None:
        self.auto_band = self.config.envelope_band_origin == "auto"
        self.zoned = self.machine.group is not None and self.machine.support is not None


class Daemon:
    """The running monitor for one configuration.

    Parameters
    ----------
    config : the validated configuration.
    registry : Prometheus registry for the metrics sink (a fresh one in tests); ``None`` makes a private one.
    metrics_listen : ``(host, port)`` overriding ``[metrics] listen`` (port 0 picks a free port): the HTTP listener of
        ``/metrics``, the health probes, the view and its API.
    analyze : the analysis function (defaults to ``edgevib.pipelines.analysis.analyze_frames``).
    sources : ready-made sources replacing those built from the configuration (tests).
    serve_metrics : bind the HTTP listener (the collector is registered either way).
    """

    def __init__(self, config: Config, *, registry: Any = None, metrics_listen: tuple[str, int] | None = None,
                 analyze: AnalyzeFn | None = None, sources: Sequence[Source] | None = None,
                 serve_metrics: bool = True, clock_ns: Callable[[], int] = time.time_ns) -> None:
        self.config = config
        self.clock_ns = clock_ns
        self.stats = Stats()
        self.analyze = analyze or _default_analyze
        self.ingest = BlockIngest(config, self.stats, on_frames=self._on_frames, clock_ns=clock_ns)
        self.machines = MachineTracker(config)  # machine state per machine, from every analysed frame
        self.points: dict[str, _PointState] = {}
        self.latest: dict[str, FrameResult] = {}
        self.sinks: list[FrameSink] = []
        self._lossless: dict[int, float] = {}  # id of each lossless sink → its batch window, s
        self._reconfigurable: list[Reconfigurable] = []
        self.alarm_view: AlarmView | None = None
        self.sources: list[Source] = []
        self._given_sources = list(sources) if sources is not None else None
        self._source_tasks: dict[str, asyncio.Task[None]] = {}
        self._busy: dict[str, str] = {}  # point in an analysis batch → its machine when it was taken
        self._busy_machines: dict[str, int] = {}  # machine → its points in analysis batches
        self._ready: dict[str, float] = {}  # idle points with queued frames → when they became ready (oldest first)
        self._queued_frames = 0  # frames in the ingest queues, as last seen per point (_counted)
        self._counted: dict[str, int] = {}
        self._timer: asyncio.TimerHandle | None = None
        self._batches: set[asyncio.Task[None]] = set()
        self._gc_thresholds: tuple[int, int, int] | None = None  # the collector's thresholds before start
        self._channels: list[SinkChannel] = []
        self._wake = asyncio.Event()
        self._scheduler: asyncio.Task[None] | None = None
        self._executor: ThreadPoolExecutor | None = None
        self._started = False
        self._warned_envelope: set[str] = set()
        state_dir = config.site.state_dir
        self.band_auto = BandAuto(None if "$" in state_dir else state_dir)
        self._band_wake = asyncio.Event()
        self._band_task: asyncio.Task[None] | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self.on_ready: list[Callable[[], None]] = []
        self.on_stopping: list[Callable[[], None]] = []
        self.rlog = RateLimitedLogger(log, interval_s=10.0)
        self._build_points(config, keep={})
        from edgevib.daemon.sinks.prometheus import PrometheusSink
        from edgevib.daemon.web.listener import HttpListener

        host, port = metrics_listen or (config.metrics.host, config.metrics.port)
        self.http = HttpListener(host, port, tls_cert_file=config.metrics.tls_cert_file,
                                 tls_key_file=config.metrics.tls_key_file,
                                 tls_client_ca_file=config.metrics.tls_client_ca_file, serve=serve_metrics)
        self.metrics = PrometheusSink(site=config.site.name, points=config.points, stats=self.stats,
                                      registry=registry, http=self.http, ready=self.readiness, clock_ns=clock_ns)
        self._add_part(self.metrics)
        self.view: ViewService | None = None
        if config.view.enabled:
            from edgevib.daemon.web.actions import Actions
            from edgevib.daemon.web.api import ViewService

            self.view = ViewService(self, self.http, recent_capacity=config.view.recent_values,
                                    recent_interval_s=config.view.recent_interval_s,
                                    actions=Actions(config.view, client_certificates=self.http.client_certificates),
                                    clock_ns=clock_ns)
            self._add_part(self.view)
        self._add_configured_sinks(config)

    # ------------------------------------------------------------------------------------------ set-up

    @staticmethod
    def _signature(p: PointConfig, m: MachineConfig, config: Config) -> tuple[Any, ...]:
        return (p, m, config.analysis.queue_frames, config.analysis.trend_halflife_s)

    def _build_points(self, config: Config, keep: dict[str, _PointState]) -> None:
        machines = {m.id: m for m in config.machines}
        points: dict[str, _PointState] = {}
        for p in config.points:
            m = machines[p.machine]
            sig = self._signature(p, m, config)
            old = keep.get(p.id)
            if old is not None and old.signature == sig:
                points[p.id] = old
                continue
            plan = config.plan(p.id)  # validated (and its kernel built) once, when the configuration was loaded
            source = p.envelope_band_origin
            if source == "auto":  # the default band until a selection (a stored one when it still applies)
                source = "default"
                stored = self.band_auto.stored_band(p)
                if stored is not None:
                    try:
                        plan, source = plan_with_band(p, m, stored[0]), "auto"
                        self.band_auto.selected_at(p.id, stored[1])
                    except PipelineError as exc:
                        log.warning("stored envelope band no longer fits; selecting again", point=p.id,
                                    band_hz=list(stored[0]), error=str(exc))
            points[p.id] = _PointState(p, m, plan, EwTrend(config.analysis.trend_halflife_s), sig, source)
            if p.envelope_note and p.id not in self._warned_envelope:
                self._warned_envelope.add(p.id)
                log.warning("no envelope indicators for this point", point=p.id, sensor_type=p.sensor_type,
                            bandwidth_hz=list(p.bandwidth_hz or ()), fs_hz=p.fs_hz, reason=p.envelope_note)
        self.points = points
        self.band_auto.forget(set(self._auto_points()))

    def _auto_points(self) -> list[str]:
        return [pid for pid, st in self.points.items() if st.auto_band]

    def _add_configured_sinks(self, config: Config) -> None:
        if config.publish.mqtt.enabled:
            from edgevib.daemon.sinks.mqtt import MqttIndicatorSink

            self._add_part(MqttIndicatorSink.from_config(config))
        if config.publish.opcua.enabled:
            from edgevib.daemon.sinks.opcua import OpcUaIndicatorSink  # asyncua loads only when configured

            pc = config.publish.opcua
            opcua = OpcUaIndicatorSink(listen=pc.listen, host=pc.host, port=pc.port, namespace=pc.namespace,
                                       site=config.site.name, points={p.id: p for p in config.points},
                                       cert_file=pc.cert_file, key_file=pc.key_file, state_dir=config.site.state_dir)
            self._add_part(opcua)
        # tracks_sources: a source down/up is one source event, its points stale, not sensor faults
        alarms = wire_alarms(config, self.metrics.registry, block_arrival=self._block_arrival_s,
                             config_refusal=self.ingest.config_refusal, tracks_sources=True,
                             commands={"select_band": lambda req: self.request_band_selection(req.get("point"))})
        if alarms is not None:
            self.add_lossless_sink(alarms)
            self._reconfigurable.append(alarms)
            self.alarm_view = alarms
            self.machines.healthy = alarms.point_healthy  # a point with a sensor fault does not vote
            self.metrics.collector.machine_stale = alarms.machine_stale  # the metric's "unknown" as the alarms'
            self.ingest.connection_listeners.append(alarms.on_source)
            if config.publish.opcua.enabled:  # the OPC UA namespace shows each point's alarm state as an enumeration
                opcua.severity_of = alarms.point_severity
        from edgevib.daemon.trendwatch import create_trend_watch

        self.trend_watch = create_trend_watch(config, alarms, registry=self.metrics.registry)
        if self.trend_watch is not None:  # history and projections (records the frames the alarm layer judges)
            self._add_part(self.trend_watch)

    def _add_part(self, sink: _Part) -> None:
        """A lossy sink of the configuration's own: added, and given the new configuration on a reload."""
        self.add_sink(sink)
        self._reconfigurable.append(sink)

    def add_sink(self, sink: FrameSink) -> None:
        """Add a lossy sink (it shows the latest values: see the module docstring); call before :meth:`start`."""
        self.sinks.append(sink)

    def add_lossless_sink(self, sink: LosslessSink) -> None:
        """Add a sink that must see every frame (see the module docstring); call before :meth:`start`."""
        self.sinks.append(sink)
        self._lossless[id(sink)] = sink.batch_window_s

    def _make_sources(self, config: Config) -> list[Source]:
        if self._given_sources is not None:
            return list(self._given_sources)
        return [make_source(s, config, self.ingest) for s in config.sources]

    # ------------------------------------------------------------------------------------------ lifecycle

    async def start(self) -> None:
        """Start the HTTP listener, the sinks, the scheduler and every source."""
        loop = asyncio.get_running_loop()
        _freeze_startup_objects()  # first: nothing listens or runs yet while the collection takes its time
        if self._gc_thresholds is None:
            self._gc_thresholds = _collect_less_often()
        self._executor = ThreadPoolExecutor(max_workers=self.config.analysis.workers,
                                            thread_name_prefix="edgevib-analysis")
        started: list[FrameSink] = []
        try:
            await self.http.start()  # first: a taken port stops the start before anything else opens
            for sink in self.sinks:
                await sink.start()
                started.append(sink)
        except BaseException:
            for sink in reversed(started):
                with contextlib.suppress(Exception):
                    await sink.stop()
            with contextlib.suppress(Exception):
                await self.http.stop()
            self._executor.shutdown(wait=False, cancel_futures=True)
            raise
        self._channels = [SinkChannel(sink, self.stats, self.rlog, self._wake.set, lossless=id(sink) in self._lossless,
                                      window_s=self._lossless.get(id(sink), 0.0)) for sink in self.sinks]
        for ch in self._channels:
            ch.start()
        self._scheduler = loop.create_task(self._schedule(), name="edgevib-scheduler")
        self._loop = loop
        self._band_task = loop.create_task(self._select_bands(), name="edgevib-band-auto")
        self.sources = self._make_sources(self.config)
        for src in self.sources:
            self._start_source(src)
        self._started = True
        log.info("daemon started", site=self.config.site.name, points=len(self.points), sources=len(self.sources),
                 metrics=self.metrics.url, skipped_points=len(self.config.skipped_points))
        for cb in self.on_ready:
            with contextlib.suppress(Exception):
                cb()

    def _start_source(self, src: Source) -> None:
        task = asyncio.get_running_loop().create_task(self._run_source(src), name=f"edgevib-source-{src.name}")
        self._source_tasks[src.name] = task

    async def _run_source(self, src: Source) -> None:
        try:
            await src.run()
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # a source promises not to raise; if it does, the daemon keeps going
            log.error("source stopped with an error", source=src.name, error=repr(exc))
            self.ingest.connection(src.name, False)

    async def stop(self, timeout_s: float = 10.0) -> None:
        """Stop taking blocks, finish the frames in flight, stop the sinks; bounded by ``timeout_s``."""
        if not self._started:
            return
        self._started = False
        for cb in self.on_stopping:
            with contextlib.suppress(Exception):
                cb()
        deadline = time.monotonic() + timeout_s
        self.ingest.closing = True  # sources now close on purpose: not a lost connection
        for src in self.sources:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(src.stop(), max(0.1, deadline - time.monotonic()))
        for task in self._source_tasks.values():
            task.cancel()
        await asyncio.gather(*self._source_tasks.values(), return_exceptions=True)
        self._source_tasks.clear()
        if self._band_task is not None:
            self._band_task.cancel()
            await asyncio.gather(self._band_task, return_exceptions=True)
            self._band_task = None
        if self._scheduler is not None:
            self._scheduler.cancel()
            if self._timer is not None:
                self._timer.cancel()
                self._timer = None
            await asyncio.gather(self._scheduler, return_exceptions=True)
        if self._batches:
            await asyncio.wait(self._batches, timeout=max(0.1, deadline - time.monotonic()))
        for ch in self._channels:
            await ch.drain(max(0.1, deadline - time.monotonic()))
        for sink in reversed(self.sinks):
            try:
                await asyncio.wait_for(sink.stop(), max(0.1, deadline - time.monotonic()))
            except Exception as exc:
                log.error("sink did not stop cleanly", sink=type(sink).__name__, error=repr(exc))
        try:
            await asyncio.wait_for(self.http.stop(), max(0.1, deadline - time.monotonic()) + 3.0)
        except Exception as exc:
            log.error("HTTP listener did not stop cleanly", error=repr(exc))
        if self._executor is not None:
            self._executor.shutdown(wait=False, cancel_futures=True)
        gc.unfreeze()  # what start-up kept out of the collector's passes is collectable again
        if self._gc_thresholds is not None:
            gc.set_threshold(*self._gc_thresholds)
            self._gc_thresholds = None
        log.info("daemon stopped")

    # ------------------------------------------------------------------------------------------ status

    @property
    def idle(self) -> bool:
        """No analysis batch running and every sink has taken every result."""
        return not self._batches and not any(ch.backlog and ch.task is not None for ch in self._channels)

    @property
    def ready(self) -> bool:
        return self.readiness()[0]

    def readiness(self) -> tuple[bool, str]:
        names = [s.name for s in self.config.sources]
        missing = [n for n in names if not self.stats.connected.get(n, False)]
        if missing:
            return False, "sources not connected: " + ", ".join(missing)
        silent = self.ingest.silent_points()
        if silent:
            return False, "points receiving nothing: " + ", ".join(silent)
        return True, f"{len(names)} source(s) connected"

    def _block_arrival_s(self, point_id: str) -> float | None:
        """When the point's latest accepted block arrived (wall clock, s), or ``None``."""
        ns = self.ingest.last_block_ns.get(point_id)
        return None if ns is None else ns / 1e9

    def state_text(self, point_id: str) -> str | None:
        """Alarm state text of a point (the demo's alarm column); ``None`` without an alarm layer."""
        return self.alarm_view.state_text(point_id) if self.alarm_view is not None else None

    # ------------------------------------------------------------------------------------------ reload

    async def reload(self, config: Config) -> None:
        """Apply a new configuration; points and sources whose configuration is unchanged keep their state."""
        old = self.config
        unchanged_points = {p.id for p in config.points if p.id in self.points
                            and self.points[p.id].signature == self._signature(p, config.machine(p.machine), config)}
        self._build_points(config, keep=self.points)
        self.config = config
        self.ingest.configure(config, keep=unchanged_points)
        streams = self.ingest.streams  # replaced streams start empty: recount the queued frames
        self._counted = {pid: len(stream.queue) for pid, stream in streams.items()}
        self._queued_frames = sum(self._counted.values())
        self._ready = {pid: t for pid, t in self._ready.items() if self._counted.get(pid)}
        self.machines.configure(config)
        for pid in [pid for pid in self.latest if pid not in self.points]:
            self.latest.pop(pid)
        if self._given_sources is None:
            old_by_name = {s.name: s for s in old.sources}
            new_by_name = {s.name: s for s in config.sources}
            for src in list(self.sources):
                if new_by_name.get(src.name) != old_by_name.get(src.name) or src.name not in new_by_name:
                    with contextlib.suppress(Exception):
                        await asyncio.wait_for(src.stop(), 5.0)
                    task = self._source_tasks.pop(src.name, None)
                    if task is not None:
                        task.cancel()
                    self.sources.remove(src)
                    self.stats.connected.pop(src.name, None)
            running = {s.name for s in self.sources}
            for name, scfg in new_by_name.items():
                if name not in running:
                    src = make_source(scfg, config, self.ingest)
                    self.sources.append(src)
                    self._start_source(src)
        for part in self._reconfigurable:
            try:
                await part.reconfigure(config)
            except Exception as exc:  # one part's failure must not stop the others taking the new configuration
                log.error("reconfiguration failed", part=type(part).__name__, error=repr(exc))
        _freeze_startup_objects()  # the replaced configuration's objects collected, the new one's set aside
        log.info("configuration reloaded", points=len(self.points), kept=len(unchanged_points))

    # ------------------------------------------------------------------------------------------ analysis

    def _on_frames(self, stream: PointStream) -> None:
        pid = stream.point.id
        n = len(stream.queue)
        self._queued_frames += n - self._counted.get(pid, 0)
        self._counted[pid] = n
        if n and pid not in self._busy and pid not in self._ready:
            self._ready[pid] = time.monotonic()
        # wake the scheduler only when it could start a batch now: a worker is free, and no batch-window timer
        # is pending or a full batch is queued (a finished batch and the timer wake it themselves)
        if len(self._batches) < self._batch_slots() and (
                self._timer is None or self._queued_frames >= MAX_BATCH):
            self._wake.set()

    async def _schedule(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            await self._wake.wait()
            self._wake.clear()
            while self._ready and len(self._batches) < self._batch_slots() and not self._held_back():
                wait_s = self._batch_wait(time.monotonic())
                if wait_s > 0:  # more frames are on their way: a larger batch costs less per frame
                    if self._timer is None and math.isfinite(wait_s):
                        self._timer = loop.call_later(wait_s, self._timer_fired)
                    break
                batch = self._take_batch()
                if batch is None:
                    break
                task = loop.create_task(self._run_batch(*batch))
                self._batches.add(task)
                task.add_done_callback(self._batch_done)

    def _batch_slots(self) -> int:
        """Analysis batches in flight at most: one per worker and one queued behind them, so that a worker starts
        its next batch as soon as it has finished one, without waiting for the event loop to hand it over (a turn
        of the loop can take several milliseconds of reading and delivering under load)."""
        return self.config.analysis.workers + 1

    def _timer_fired(self) -> None:
        self._timer = None
        self._wake.set()

    def _batch_wait(self, now: float) -> float:
        """Seconds to wait before starting the next batch: none once a full batch is queued or the oldest ready
        point has waited :data:`BATCH_WINDOW_S`."""
        if self._queued_frames >= MAX_BATCH:
            return 0.0
        busy, points = self._busy_machines, self.points
        oldest = next((t for pid, t in self._ready.items()
                       if (st := points.get(pid)) is None or st.machine.id not in busy), None)
        if oldest is None:  # every waiting point's machine is in a batch in flight: its end wakes the scheduler
            return math.inf
        return max(0.0, oldest + BATCH_WINDOW_S - now)

    def _batch_done(self, task: asyncio.Task[None]) -> None:
        self._batches.discard(task)
        self._wake.set()

    def _held_back(self) -> bool:
        """A lossless sink (the alarm layer) is too far behind: let frames wait (and drop) before analysis."""
        return any(ch.lossless and ch.backlog > LOSSLESS_BACKLOG for ch in self._channels)

    def _take_batch(self) -> tuple[AnalysisPlan | tuple[AnalysisPlan, ...], list[FrameJob]] | None:
        """The queued frames of the point that has waited longest and of every other idle point whose plan mixes
        with its plan (equal ``batch_key``), oldest first, up to :data:`MAX_BATCH` frames; and their plan (one
        plan for all, or one per frame when they differ)."""
        from edgevib.pipelines.analysis import batch_key

        streams = self.ingest.streams
        plan: AnalysisPlan | None = None
        key: AnalysisPlan | None = None
        plans: list[AnalysisPlan] = []  # each frame's
        mixed = False
        jobs: list[FrameJob] = []
        # A machine with frames in a batch in flight waits for its results: its state after them decides how its
        # next frames are judged (as if the batches ran one after the other).
        in_flight = set(self._busy_machines)
        for pid in list(self._ready):
            st, stream = self.points.get(pid), streams.get(pid)
            if st is None or stream is None or not stream.queue:  # removed or replaced by a reload
                del self._ready[pid]
                self._queued_frames -= self._counted.pop(pid, 0)
                continue
            if st.machine.id in in_flight:
                continue
            if plan is None:
                plan, key = st.plan, batch_key(st.plan)
            elif st.plan is not plan and st.plan != plan:
                if batch_key(st.plan) != key:
                    continue
                mixed = True
            q = stream.queue
            taken = len(jobs)
            while q and len(jobs) < MAX_BATCH:
                jobs.append(q.popleft())
            plans.extend([st.plan] * (len(jobs) - taken))
            self._queued_frames -= self._counted.get(pid, 0) - len(q)
            self._counted[pid] = len(q)
            del self._ready[pid]
            mid = self._busy[pid] = st.machine.id
            self._busy_machines[mid] = self._busy_machines.get(mid, 0) + 1
            if len(jobs) >= MAX_BATCH:
                break
        if plan is None or not jobs:
            return None
        return (tuple(plans) if mixed else plan), jobs

    def _release(self, pids: set[str]) -> None:
        """Points whose batch is done: idle again, and ready at once if frames queued up meanwhile."""
        for pid in pids:
            mid = self._busy.pop(pid, None)
            if mid is not None:
                left = self._busy_machines.get(mid, 0) - 1
                if left > 0:
                    self._busy_machines[mid] = left
                else:
                    self._busy_machines.pop(mid, None)
        now = time.monotonic()
        for pid in pids:
            stream = self.ingest.streams.get(pid)
            if stream is not None and stream.queue and pid in self.points:
                self._ready.setdefault(pid, now)

    async def _run_batch(self, plan: AnalysisPlan | tuple[AnalysisPlan, ...], jobs: list[FrameJob]) -> None:
        pids = {j.point_id for j in jobs}
        try:
            shaft = [j.speed_hz for j in jobs]  # each frame's speed as known when it was completed
            states = [self.points.get(j.point_id) for j in jobs]
            measured = [s if s is not None and st is not None and st.machine.speed_tag is not None else None
                        for st, s in zip(states, shaft, strict=True)]
            shaft_arr = None if all(s is None for s in shaft) else \
                np.array([math.nan if s is None else s for s in shaft], dtype=np.float64)
            specs = self._health_specs(jobs)
            running = [self.machines.running(st.machine.id) if st is not None else True for st in states]
            points = [j.point_id for j in jobs]
            health_errors: list[HealthError] = []
            loop = asyncio.get_running_loop()
            try:
                x, indicators, health = await loop.run_in_executor(
                    self._executor, self._stack_and_analyze, [j.samples for j in jobs], plan, shaft_arr, specs,
                    running, points, health_errors)
            except Exception as exc:
                for pid in pids:
                    Stats.inc(self.stats.analysis_errors, pid, sum(1 for j in jobs if j.point_id == pid))
                self.rlog.error(("analysis", tuple(sorted(pids))), "analysis failed", points=sorted(pids),
                                error=repr(exc))
                return
            for err in health_errors:
                self.rlog.warning(("health", err.points), "sensor health check failed", points=list(err.points),
                                  error=err.problem)
            results = self._results(jobs, indicators, x, measured, health)
            if results:
                self._publish(results)
        finally:
            self._release(pids)

    def _stack_and_analyze(self, frames: list[npt.NDArray[np.float32]],
                           plan: AnalysisPlan | tuple[AnalysisPlan, ...], shaft_hz: npt.NDArray[np.float64] | None,
                           specs: Sequence[HealthSpec | None], running: Sequence[bool], points: Sequence[str],
                           health_errors: list[HealthError],
                           ) -> tuple[npt.NDArray[np.float32], list[FrameIndicators], list[SensorHealth | None]]:
        """In the worker thread: one array per batch (each result's samples a read-only view of its row), the
        analysis, then the sensor-health checks of the frames — the batch's copy stays off the event loop too."""
        x = np.stack(frames, dtype=np.float32)
        x.flags.writeable = False
        ind = self.analyze(x, plan, shaft_hz)
        if not any(specs):
            return x, ind, [None] * len(ind)
        rms = [i.acceleration_rms_g for i in ind]
        level = self.config.alarms.run_threshold_velocity_mm_s
        running = [judged_running(r, i.velocity_rms_mm_s, level) for r, i in zip(running, ind, strict=True)]
        fs_hz = plan.fs_hz if isinstance(plan, AnalysisPlan) else plan[0].fs_hz  # (one rate: the batch key's)
        return x, ind, batch_health(x, fs_hz, specs, rms, running, points, health_errors)

    def _health_specs(self, jobs: Sequence[FrameJob]) -> list[HealthSpec | None]:
        """Each frame's sensor-health specification, or ``None`` when the alarm layer checks no health."""
        settings = self.config.alarm_settings  # once per batch: a property behind a pydantic private attribute
        if not settings.table.enabled or not settings.table.health.enabled:
            return [None] * len(jobs)
        health = settings.health
        return [health.get(j.point_id) or _DEFAULT_HEALTH for j in jobs]

    def _results(self, jobs: list[FrameJob], indicators: list[FrameIndicators], frames: npt.NDArray[np.float32],
                 measured_hz: Sequence[float | None] | None = None,
                 health: Sequence[SensorHealth | None] | None = None) -> list[FrameResult]:
        results = []
        speeds = measured_hz if measured_hz is not None else [None] * len(jobs)
        verdicts = health if health is not None else [None] * len(jobs)
        for job, ind, samples, speed, h in zip(jobs, indicators, frames, speeds, verdicts, strict=True):
            st = self.points.get(job.point_id)
            if st is None:  # removed by a reload while in flight
                continue
            t_end_s = job.t_end_ns / 1e9
            ms = self.machines.observe(st.machine.id, job.point_id, t_end_s, speed_hz=speed,
                                       velocity_rms_mm_s=ind.velocity_rms_mm_s,
                                       frame_healthy=h is None or h.ok)
            if ms is not None and ms.state == "stopped" and (ind.orders_mm_s or ind.envelope):
                # A standing machine has no orders or bearing families, whatever speed was assumed (a fixed one,
                # or an estimate from the noise): absent, not zero.
                ind = dataclasses.replace(ind, orders_mm_s={}, envelope={}, shaft_hz=speed, shaft_estimated=False)
            zone = _iso_zone(ind.velocity_rms_mm_s, st.machine) if st.zoned else None
            trend = st.trend.update({name: read(ind) for name, read in _TREND_READERS}, t_end_s)
            r = FrameResult(point_id=job.point_id, machine_id=st.machine.id, t_end_ns=job.t_end_ns,
                            received_ns=job.received_ns, fs_hz=st.config.fs_hz, indicators=ind, iso_zone=zone,
                            samples=samples, axis=st.config.axis, trend=trend, machine_state=ms, health=h,
                            envelope_band_source=st.band_source if ind.envelope_band_hz is not None else None)
            if st.auto_band:
                p = st.config
                self.band_auto.observe(job.point_id, job.t_end_ns, p.hop_samples, round(p.hop_samples / p.fs_hz * 1e9),
                                       samples)
                if self.band_auto.first_ready(job.point_id):
                    self._band_wake.set()
            self.latest[job.point_id] = r
            Stats.inc(self.stats.frames_analysed, job.point_id)
            results.append(r)
        return results

    # ------------------------------------------------------------------------------------------ automatic bands

    def request_band_selection(self, point: str | None = None) -> dict[str, Any]:
        """Select the automatic envelope band of ``point`` (None: of every automatic point) as soon as it has
        frames — the control command ``select_band``.  Thread-safe; raises CommandError for a point that is
        unknown or has no automatic band."""
        from edgevib.daemon.alarms.control import CommandError

        auto = self._auto_points()
        if point is not None:
            if point not in self.points:
                raise CommandError(f"unknown point {point!r}")
            if point not in auto:
                raise CommandError(f"point {point!r} has no automatic envelope band (envelope_band_hz = \"auto\")")
            ids = [point]
        else:
            ids = auto
        loop = self._loop
        if loop is None:
            raise CommandError("the daemon is not running")
        loop.call_soon_threadsafe(self._request_bands, ids)
        return {"requested": ids}

    def _request_bands(self, ids: list[str]) -> None:
        self.band_auto.request(ids)
        self._band_wake.set()

    async def _select_bands(self) -> None:
        """Select the bands of automatic points when due (interval or request), one point at a time, in the
        analysis pool; a chosen band becomes the point's plan from its next frame."""
        loop = asyncio.get_running_loop()
        while True:
            interval = self.config.analysis.band_auto_interval_s
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(min(60.0, interval / 4.0)):
                    await self._band_wake.wait()
            self._band_wake.clear()
            for pid in self.band_auto.due(self._auto_points(), self.clock_ns() / 1e9, interval):
                st = self.points.get(pid)
                record = self.band_auto.record(pid)
                if st is None or record is None:
                    continue
                latest = self.latest.get(pid)
                shaft = latest.indicators.shaft_hz if latest is not None else None
                now_s = self.clock_ns() / 1e9
                self.band_auto.started(pid, now_s)
                try:
                    sel = await loop.run_in_executor(self._executor, select_for_point, st.config, st.machine, record,
                                                     shaft, now_s)
                except Exception as exc:  # a selection that fails keeps the band in use
                    self.rlog.error(("band", pid), "envelope band selection failed", point=pid, error=repr(exc))
                    continue
                finally:
                    self.band_auto.running.discard(pid)
                await self._apply_band(st, sel)

    async def _apply_band(self, st: _PointState, sel: BandSelection) -> None:
        if self.points.get(sel.point_id) is not st:  # reconfigured meanwhile: the selection is stale
            return
        if sel.plan is None or sel.band_hz is None:
            log.info("no envelope band qualified; keeping the band in use", point=sel.point_id,
                     band_hz=list(st.plan.envelope_band_hz or ()), band_source=st.band_source, reason=sel.reason)
            return
        old = st.plan.envelope_band_hz
        st.plan, st.band_source = sel.plan, "auto"
        self.band_auto.remember(st.config, sel)
        log.info("envelope band selected", point=sel.point_id, band_hz=list(sel.band_hz),
                 previous_hz=list(old or ()), spectral_kurtosis=sel.kurtosis, periodicity_db=sel.periodicity_db)
        await asyncio.get_running_loop().run_in_executor(self._executor, self.band_auto.save,
                                                         dict(self.band_auto.stored))

    def _publish(self, results: list[FrameResult]) -> None:
        """Queue results for every sink (in analysis order, before the points are released: frame order holds)."""
        counts = point_counts(results)
        for ch in self._channels:
            ch.put(results, counts)


# ---------------------------------------------------------------------------------------------- factories

def make_source(cfg: SourceConfig, config: Config, ingest: BlockIngest) -> Source:
    """Build the source of one ``[[sources]]`` entry."""
    # the machines' speed tags read from this source: tag → (machine, unit)
    speed_tags = {m.speed_tag.tag: (m.id, m.speed_tag.unit) for m in config.machines
                  if m.speed_tag is not None and m.speed_tag.source == cfg.name}
    if isinstance(cfg, MqttSourceConfig):
        from edgevib.daemon.sources.mqtt import MqttSource

        return MqttSource.from_config(cfg, ingest, speed_topics=speed_tags)
    if isinstance(cfg, SimulatedSourceConfig):
        from edgevib.daemon.sources.simulated import SimulatedSource

        return SimulatedSource(name=cfg.name, ingest=ingest, scenario=cfg.scenario, seed=cfg.seed, rate=cfg.rate,
                               speed_tags=speed_tags)
    if isinstance(cfg, OpcUaSourceConfig):  # the last kind: the configuration's union has no other
        from edgevib.daemon.sources.opcua import NodeSpec, OpcUaSource  # asyncua loads only when configured

        nodes = {p.node: NodeSpec(sensor_id=p.sensor, fs_hz=p.fs_hz, unit=p.unit, block_samples=p.block_samples,
                                  scale=p.scale) for p in config.points
                 if p.source == cfg.name and p.node is not None}
        source: Source = OpcUaSource(
            name=cfg.name, endpoint=cfg.endpoint, ingest=ingest, nodes=nodes, speed_nodes={t: t for t in speed_tags},
            mode=cfg.mode, poll_interval_s=cfg.poll_interval_s, security_policy=cfg.security_policy,
            security_mode=cfg.security_mode, cert_file=cfg.cert_file, key_file=cfg.key_file,
            server_cert_file=cfg.server_cert_file, username=cfg.username,
            password=cfg.password.reveal() if cfg.password is not None else None,
            reconnect_min_s=cfg.reconnect_min_s, reconnect_max_s=cfg.reconnect_max_s)
        return source
    assert_never(cfg)


def wire_alarms(config: Config, registry: CollectorRegistry | None = None, *,
                commands: Mapping[str, Callable[[dict[str, Any]], Any]] | None = None,
                block_arrival: Callable[[str], float | None] | None = None,
                config_refusal: Callable[[str], str | None] | None = None, tracks_sources: bool = False,
                clock: Callable[[], float] = time.time, monotonic: Callable[[], float] = time.monotonic,
                ) -> AlarmLayer | None:
    """The alarm layer of a configuration (``None`` when ``[alarms] enabled = false``) with its parts: the store,
    the MQTT feed and webhook as configured, the control socket, and its collector on ``registry``.  The feeds and
    the socket serve the layer's states and commands; the rest are the daemon's seams (:class:`AlarmLayer`)."""
    from edgevib.daemon.alarms.control import ControlServer, handle_payload
    from edgevib.daemon.alarms.engine import AlarmLayer
    from edgevib.daemon.alarms.feed import MqttFeed, WebhookFeed
    from edgevib.daemon.alarms.store import AlarmStore

    s = config.alarm_settings
    if not s.table.enabled:
        return None
    fc = s.feed
    use_mqtt = fc.enabled and fc.connection is not None
    hook = fc.webhook if fc.enabled else None
    store = AlarmStore(s, [name for name, on in (("mqtt", use_mqtt), ("webhook", hook is not None)) if on])
    layer: AlarmLayer  # made last: its feeds and socket call back into it
    mqtt = MqttFeed(fc, store, lambda: layer.state_messages(), io=store.run,
                    on_command=lambda b: handle_payload(b, layer.handle_command)) if use_mqtt else None
    webhook = WebhookFeed(hook, store, io=store.run) if hook is not None else None
    control = ControlServer(s.table.socket, lambda req: layer.handle_command(req), mode=int(s.table.socket_mode, 8))
    layer = AlarmLayer(config, store, mqtt=mqtt, webhook=webhook, control=control, commands=commands,
                       block_arrival=block_arrival, config_refusal=config_refusal, tracks_sources=tracks_sources,
                       clock=clock, monotonic=monotonic)
    if registry is not None:
        registry.register(layer.collector)
    return layer

