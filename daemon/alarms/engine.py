"""The alarm layer as a FrameSink: the pure core (:mod:`edgevib.daemon.alarms.core`) run one decision at a time on
one thread, the store (:mod:`edgevib.daemon.alarms.store`) committing its effects on another, and read-only views
(:mod:`edgevib.daemon.alarms.views`) of the snapshot published after each decision.

Frames (with the sensor-health verdicts the daemon's analysis workers attached), timer ticks, source changes and
operator commands (control socket, MQTT command topic, the view's actions) all go through :meth:`AlarmLayer.decide`
on that one thread, so the core needs no lock; events are published (listeners, feeds, retained state messages)
only after the store has committed them.  Readers — the metrics scrape, ``alarms list``, the view, the demo
table — read the current snapshot and never wait for a decision or a commit.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import json
import math
import time
from collections.abc import Callable, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import replace
from typing import Any, TypeVar

import structlog

from edgevib.daemon.alarms.control import CommandError, ControlServer
from edgevib.daemon.alarms.core import (
    AlarmCore,
    AlarmSnapshot,
    Command,
    Effects,
    Frames,
    Input,
    Now,
    SourceChange,
    Tick,
    decide,
    machine_stale,
)
from edgevib.daemon.alarms.feed import MqttFeed, WebhookFeed
from edgevib.daemon.alarms.outbox import OutboxEvent
from edgevib.daemon.alarms.store import AlarmStore
from edgevib.daemon.alarms.views import (
    AlarmCollector,
    list_doc,
    machine_view,
    point_severity,
    state_messages,
    state_text,
    transition_of,
)
from edgevib.daemon.config import Config
from edgevib.daemon.interfaces import AlarmTransition, FrameResult
from edgevib.pipelines.machine_state import MachineState

__all__ = ["AlarmLayer"]

log = structlog.get_logger("edgevib.alarms")

HISTORY_LIMIT_MAX = 1000
T = TypeVar("T")


class AlarmLayer:
    """The alarm layer (a :class:`~edgevib.daemon.interfaces.LosslessSink` and
    :class:`~edgevib.daemon.interfaces.AlarmView`), wired by :func:`edgevib.daemon.app.wire_alarms`.

    ``config`` is the daemon configuration, ``store`` the worker that owns the state database; ``mqtt`` and
    ``webhook`` the feeds and ``control`` the socket it starts once the state is restored and stops before the
    store.  Seams of the daemon: ``commands`` (its own commands served on the same channels: ``select_band``),
    ``block_arrival`` (when a point's latest block arrived, wall clock s: a point whose blocks arrive is not
    silent), ``config_refusal`` (why the daemon refuses a point's blocks for a configuration reason: no sensor
    fault) and ``tracks_sources`` (the daemon reports the sources' connections, :meth:`on_source`).  The daemon
    hands it every analysed frame of a point in order and pauses analysis rather than skip one, since debounce
    counts, baselines and sensor-recovery runs depend on each frame; it takes them gathered over up to
    :attr:`batch_window_s` (alarm latency ≤ 0.1 s more, a fraction of the per-call cost).
    """

    lossless = True
    batch_window_s = 0.1  # frames gathered per call: one decision and one commit for many frames

    def __init__(self, config: Config, store: AlarmStore, *, mqtt: MqttFeed | None = None,
                 webhook: WebhookFeed | None = None, control: ControlServer | None = None,
                 commands: Mapping[str, Callable[[dict[str, Any]], Any]] | None = None,
                 block_arrival: Callable[[str], float | None] | None = None,
                 config_refusal: Callable[[str], str | None] | None = None, tracks_sources: bool = False,
                 clock: Callable[[], float] = time.time, monotonic: Callable[[], float] = time.monotonic) -> None:
        self.settings = config.alarm_settings
        self.store, self.mqtt, self.webhook, self.control = store, mqtt, webhook, control
        self.clock = clock
        self.monotonic = monotonic
        self.core = AlarmCore(config, self.settings)
        self.core.tracks_sources = tracks_sources
        self.points = self.core.points
        self.view: AlarmSnapshot = self.core.snapshot()
        """The snapshot after the latest decision (replaced, never changed: read it from any thread)."""
        self.collector = AlarmCollector(self)
        self._commands = dict(commands or {})
        self._block_arrival = block_arrival
        self._config_refusal = config_refusal
        self._listeners: list[Callable[[dict[str, Any]], None]] = []  # each committed CloudEvent, on the event loop
        # The trend layer's seam for the retained state message (edgevib.daemon.trendwatch).
        self.trend_state: Callable[[str], dict[str, Any]] | None = None
        self._decider: ThreadPoolExecutor | None = None
        self._tasks: list[asyncio.Task[None]] = []
        self._started = False
        self._loop: asyncio.AbstractEventLoop | None = None
        self._wake = asyncio.Event()

    # The trend layer's seams on the core: every judged frame in order with its suppression reason (decision
    # thread), and a series' trend for event data.
    @property
    def frame_listeners(self) -> list[Callable[[FrameResult, str | None], None]]:
        return self.core.frame_listeners

    @property
    def trend_info(self) -> Callable[[str, str], dict[str, Any] | None] | None:
        return self.core.trend_info

    @trend_info.setter
    def trend_info(self, fn: Callable[[str, str], dict[str, Any] | None] | None) -> None:
        self.core.trend_info = fn

    @property
    def machine_states(self) -> dict[str, MachineState]:
        """The machines' states as the core judges them (read on the decision thread: a frame listener)."""
        return self.core.machine_states

    def _now(self) -> Now:
        return Now(mono=self.monotonic(), wall=self.clock())

    # ------------------------------------------------------------------------------------------ lifecycle

    async def start(self) -> None:
        s, store = self.settings, self.store
        self._loop = asyncio.get_running_loop()
        try:
            restored = await asyncio.wrap_future(store.open())
        except BaseException:  # an unusable state database: no worker left behind
            await asyncio.to_thread(store.close)
            raise
        with contextlib.suppress(Exception):
            pruned = await store.run(store.prune_history, time.time_ns() - round(s.table.history_days * 86400e9))
            if pruned:
                log.info("alarm history pruned", rows=pruned, days=s.table.history_days)
        self._emit_logs(self.core.restore(restored.alarms, restored.baselines, restored.sensors, restored.sources,
                                          self._now()))
        self.view = self.core.snapshot()
        self._decider = ThreadPoolExecutor(1, thread_name_prefix="edgevib-alarm-decide")
        for feed in (self.mqtt, self.webhook):
            if feed is not None:
                self._tasks.append(self._loop.create_task(feed.run(), name=f"edgevib-alarm-{feed.sink}"))
        if self.control is not None:
            await self.control.start()
        self._tasks.append(self._loop.create_task(self._timer(), name="edgevib-alarm-timer"))
        self._started = True
        log.info("alarm layer started", limits=len(self.core.limits), points=len(self.points),
                 sinks=list(store.sinks), pending=store.outbox_figures[0])

    async def stop(self) -> None:
        self._started = False
        self._wake.set()  # the timer ends
        for feed in (self.mqtt, self.webhook):
            if feed is not None:
                with contextlib.suppress(Exception):
                    await feed.stop()
        if self._tasks:
            _, late = await asyncio.wait(self._tasks, timeout=3.0)
            for t in late:
                t.cancel()
            await asyncio.gather(*self._tasks, return_exceptions=True)
        self._tasks.clear()
        if self.control is not None:
            await self.control.stop()
        decider, self._decider = self._decider, None
        if decider is not None:
            await asyncio.to_thread(decider.shutdown, True)
        await asyncio.to_thread(self.store.close)

    async def reconfigure(self, config: Config) -> None:
        """A reload keeps the running layer; new limits take effect on the next start (logged)."""
        if replace(config.alarm_settings, config_digest=self.settings.config_digest) != self.settings:
            log.warning("alarm settings changed; restart edgevib to apply them")

    # ------------------------------------------------------------------------------------------ decisions

    def _decide_here(self, inp: Input | list[FrameResult], now: Now,
                     ) -> tuple[Effects, Future[list[OutboxEvent]] | None]:
        """One decision, on the decision thread: the core steps, the snapshot is replaced, the writes are queued
        for the store (the future: the events once committed)."""
        if isinstance(inp, list):
            inp = Frames(inp)
        self.core, eff = decide(self.core, inp, now)
        self.view = self.core.snapshot()
        self._emit_logs(eff)
        if not eff.writes:
            return eff, None
        return eff, self.store.submit(eff)

    async def decide(self, inp: Input | list[FrameResult], now: Now | None = None) -> Effects:
        """Decide on the decision thread, wait for the commit, publish: listeners, feeds, state messages."""
        if self._decider is None:
            raise CommandError("the alarm layer is not running")
        loop = asyncio.get_running_loop()
        eff, fut = await loop.run_in_executor(self._decider, self._decide_here, inp, now or self._now())
        events = await asyncio.wrap_future(fut) if fut is not None else []
        self._notify(events)
        self._published(eff, events)
        return eff

    def _published(self, eff: Effects, events: list[OutboxEvent]) -> None:
        """On the event loop, once ``eff`` is durable: feed wake-ups, retained state topics, change listeners."""
        if not eff.writes:
            return
        if events:
            for feed in (self.mqtt, self.webhook):
                if feed is not None:
                    feed.wake()
        if self.mqtt is not None and eff.points:
            self.mqtt.publish_states(eff.points)

    def subscribe(self, listener: Callable[[dict[str, Any]], None]) -> Callable[[], None]:
        """Call ``listener`` on the event loop with each committed CloudEvent; returns the unsubscribe."""
        self._listeners.append(listener)
        return lambda: self._listeners.remove(listener) if listener in self._listeners else None

    def _notify(self, events: list[OutboxEvent]) -> None:
        for e in events:
            for cb in self._listeners:
                try:
                    cb(json.loads(e.body))
                except Exception as exc:  # a listener never breaks the layer
                    log.warning("event listener failed", error=repr(exc))

    @staticmethod
    def _emit_logs(eff: Effects) -> None:
        for level, message, fields in eff.logs:
            getattr(log, level)(message, **fields)

    # ------------------------------------------------------------------------------------------ frames

    async def on_frames(self, results: list[FrameResult]) -> None:
        if not self._started or not results:
            return
        mine = [r for r in results if r.point_id in self.points]
        if mine:  # the state machines: one hop to the decision thread
            await self.decide(mine)

    # ------------------------------------------------------------------------------------------ timer, sources

    async def _timer(self) -> None:
        while True:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._wake.wait(), 1.0)
            self._wake.clear()
            if not self._started:
                return
            try:
                await self.tick()
            except Exception as exc:  # the timer never dies
                log.error("alarm timer failed", error=repr(exc))

    async def tick(self) -> None:
        """One timer tick: source changes, no-data detection and shelf expiry (the timer's work, once)."""
        refusals = self._ask(self._config_refusal)
        await self.decide(Tick(self._ask(self._block_arrival), {p: why for p, why in refusals.items() if why}))

    def _ask(self, fn: Callable[[str], T | None] | None) -> dict[str, T | None]:
        """``fn`` of every point (``None`` where it fails: a daemon view that fails must not stop the timer)."""
        if fn is None:
            return {}
        out: dict[str, T | None] = {}
        for pid in self.points:
            try:
                out[pid] = fn(pid)
            except Exception:
                out[pid] = None
        return out

    def on_source(self, source: str, connected: bool) -> None:
        """A source's connection came up or went down (called on the event loop by the daemon's ingest; a
        deliberate close at shutdown is not reported).  The timer announces it at once."""
        inp, now = SourceChange(source, connected), self._now()
        if self._decider is None:
            self.core, _ = decide(self.core, inp, now)
        else:
            self._decider.submit(self._decide_here, inp, now).add_done_callback(_log_failure)
        self._wake.set()

    # ------------------------------------------------------------------------------------------ commands

    def _read_command(self, req: dict[str, Any]) -> tuple[bool, Any]:
        """``list`` and ``history`` (read from the snapshot and the store) and the daemon's own commands."""
        cmd = req["cmd"]
        extra = self._commands.get(cmd)
        if extra is not None:  # a daemon command on the same channel (select_band)
            return True, extra(req)
        if cmd not in ("list", "history"):
            return False, None
        if req.get("point") is not None and req["point"] not in self.points:
            raise CommandError(f"unknown point {req['point']!r}")
        if cmd == "list":
            return True, self.snapshot(req.get("point"))
        return True, [dataclasses.asdict(t) for t in self.history(req.get("point"), since_s=req.get("since_s"),
                                                                  limit=int(req.get("limit", 200)))]

    def handle_command(self, req: dict[str, Any]) -> Any:
        """Run one validated command (see :mod:`edgevib.daemon.alarms.control`) from a thread other than the event
        loop's (the control socket's, the MQTT feed's): it waits for the decision and its commit on the event
        loop, as :meth:`command`; raises CommandError."""
        done, result = self._read_command(req)
        if done:
            return result
        if self._loop is None or self._decider is None:
            raise CommandError("the alarm layer is not running")
        return asyncio.run_coroutine_threadsafe(self.decide(Command(req)), self._loop).result().reply

    async def command(self, req: dict[str, Any]) -> Any:
        """Run one validated command on the event loop, without blocking it; raises CommandError."""
        if req["cmd"] == "history":  # a database read
            done, result = await asyncio.to_thread(self._read_command, req)
        else:
            done, result = self._read_command(req)
        if done:
            return result
        return (await self.decide(Command(req))).reply

    # ------------------------------------------------------------------------------------------ views

    def snapshot(self, point: str | None = None) -> dict[str, Any]:
        """The ``list`` document (limit rows, sensors, points, sources) from the current snapshot."""
        return list_doc(self.view, point, self.store.outbox_figures[0])

    def history(self, point: str | None = None, *, since_s: float | None = None,
                limit: int = 200) -> list[AlarmTransition]:
        """Recorded transitions (alarms, sensor faults, sources) from the durable store, newest first."""
        if isinstance(limit, bool) or not isinstance(limit, int) or not 1 <= limit <= HISTORY_LIMIT_MAX:
            raise ValueError(f"history limit {limit!r} must be an integer 1..{HISTORY_LIMIT_MAX}")
        if since_s is not None and not math.isfinite(since_s):
            raise ValueError(f"history since {since_s!r} must be a finite time in Unix seconds")
        store = self.store
        if not store.running:
            return []
        rows = store.call(store.history, point, None if since_s is None else round(since_s * 1e9), limit).result()
        return [transition_of(*row) for row in rows]

    def state_text(self, point_id: str) -> str | None:
        """Every active alarm of a point in one short text (see :func:`edgevib.daemon.alarms.views.state_text`)."""
        return state_text(self.view, point_id)

    def machine_view(self, machine: str) -> dict[str, Any]:
        return machine_view(self.view, machine)

    def machine_stale(self, machine: str) -> bool:
        """Whether every point of a machine is stale: its state is then not known."""
        snap = self.view
        return machine_stale(snap.machine_points, snap.stale, machine)

    def point_severity(self, point: str) -> int:
        return point_severity(self.view, point)

    def point_healthy(self, point: str) -> bool:
        """Whether a point has no sensor fault (its level may then vote for its machine's state)."""
        s = self.view.sensors.get(point)
        return s is None or s.fault is None

    def state_messages(self) -> dict[str, tuple[str, bytes]]:
        return state_messages(self.view, self.trend_state)

    def outbox_figures(self) -> tuple[int, float]:
        """Pending events and the age of the oldest (s), as of the store's latest transaction."""
        depth, oldest = self.store.outbox_figures
        return depth, 0.0 if oldest is None else max(0.0, (time.time_ns() - oldest) / 1e9)

    def capture_figures(self) -> tuple[int, int]:
        cap = self.store.capture
        return (0, 0) if cap is None else (cap.count, cap.bytes)


def _log_failure(fut: Future[Any]) -> None:
    exc = fut.exception()
    if exc is not None:
        log.error("alarm decision failed", error=repr(exc))
