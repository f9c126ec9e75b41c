"""The alarm layer's store: one worker thread owns the state database (outbox, alarm state, history) and the
waveform captures; nothing else touches them.

``submit(effects)`` queues a decision's :class:`~edgevib.daemon.alarms.core.Effects` and returns a future of the
events as committed: the worker saves the captures the events ask for, gives each event its id and CloudEvents
body, and commits the events (outbox), their history rows and the state rows of every decision waiting in the queue
in one transaction (``synchronous=FULL``: durable on return); of a key written by several of them, only the last
state is encoded and written.  The caller publishes events only once their future
is done, so an event is never seen before it is on disk.  ``call(fn, …)`` runs any other database work (the feeds'
pending / delivered calls, history queries, pruning) on the same worker, in queue order.

The queue needs no bound of its own: every caller waits for its item (frames and ticks for their commit, commands
for their reply, the feeds for their rows), so it holds at most one item per waiting caller.

After every transaction the worker refreshes :attr:`AlarmStore.outbox_figures` (pending events, oldest creation
time), a tuple the metrics scrape reads without a lock.
"""

from __future__ import annotations

import asyncio
import json
import queue
import threading
import time
from collections.abc import Callable, Iterable
from concurrent.futures import Future
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from edgevib.daemon.alarms.capture import CaptureStore
from edgevib.daemon.alarms.config import AlarmSettings
from edgevib.daemon.alarms.core import Effects, EventOut
from edgevib.daemon.alarms.feed import cloud_event, event_body
from edgevib.daemon.alarms.outbox import Database, Outbox, OutboxEvent, StateError, new_event_id
from edgevib.daemon.alarms.state import Baseline, SensorState, SourceState, StateStore
from edgevib.pipelines.alarm import AlarmState

__all__ = ["AlarmStore", "Restored"]

T = TypeVar("T")
K = TypeVar("K")
V = TypeVar("V")
BATCH_MAX = 64  # decisions committed in one transaction at most


@dataclass(frozen=True, slots=True)
class Restored:
    """The persisted state, as loaded at start."""

    alarms: dict[Any, Any]
    baselines: dict[Any, Any]
    sensors: dict[Any, Any]
    sources: dict[Any, Any]


class _Stop:
    pass


_States = tuple[list[str], dict[tuple[str, str], AlarmState], dict[str, SensorState],
                dict[tuple[str, str], Baseline], dict[str, SourceState]]


def _last_states(effs: list[Effects]) -> _States:
    """The state rows a group of decisions leaves, to be written in one transaction: the points whose baselines go
    (deleted first), then each key's last state (alarms, sensors, baselines, sources) in the order of its last
    write.  An earlier state of a key would be overwritten in the same transaction: it is neither encoded nor
    written.  A baseline written before its point's baselines are forgotten goes with them."""
    if len(effs) == 1:
        e = effs[0]
        return list(e.forget), e.alarms, e.sensors, e.baselines, e.sources
    forget: list[str] = []
    alarms: dict[tuple[str, str], AlarmState] = {}
    sensors: dict[str, SensorState] = {}
    baselines: dict[tuple[str, str], Baseline] = {}
    sources: dict[str, SourceState] = {}
    for eff in effs:
        for point in eff.forget:
            forget.append(point)
            for key in [k for k in baselines if k[0] == point]:
                del baselines[key]
        _merge(alarms, eff.alarms)
        _merge(sensors, eff.sensors)
        _merge(baselines, eff.baselines)
        _merge(sources, eff.sources)
    return forget, alarms, sensors, baselines, sources


def _merge(into: dict[K, V], new: dict[K, V]) -> None:
    for key, state in new.items():
        into.pop(key, None)  # moved to the end: the rows keep the order of their last write
        into[key] = state


class AlarmStore:
    """The worker; :meth:`open` starts it and opens the database (in the worker), :meth:`close` drains and stops it."""

    def __init__(self, settings: AlarmSettings, sinks: list[str]) -> None:
        self.settings = settings
        self.sinks = sinks
        self.db: Database | None = None
        self.outbox: Outbox | None = None
        self.state: StateStore | None = None
        self.capture: CaptureStore | None = None
        self.outbox_figures: tuple[int, int | None] = (0, None)  # pending events, oldest created_ns
        self._q: queue.SimpleQueue[tuple[Any, Future[Any]] | _Stop] = queue.SimpleQueue()
        self._thread: threading.Thread | None = None

    # ------------------------------------------------------------------------------------------ queue

    def open(self) -> Future[Restored]:
        """Start the worker; the future is done once the database is open, with the persisted state."""
        self._thread = threading.Thread(target=self._run, name="edgevib-alarm-store", daemon=True)
        self._thread.start()
        return self.call(self._open)

    def submit(self, eff: Effects) -> Future[list[OutboxEvent]]:
        """Commit a decision's writes and events (batched with others waiting); the events as committed."""
        fut: Future[list[OutboxEvent]] = Future()
        self._put(eff, fut)
        return fut

    def call(self, fn: Callable[..., T], *args: Any) -> Future[T]:
        """Run ``fn(*args)`` on the worker, after everything queued before."""
        fut: Future[T] = Future()
        self._put((fn, args), fut)
        return fut

    def _put(self, what: Any, fut: Future[Any]) -> None:
        if self._thread is None:  # closed (or never opened): nobody would answer
            fut.set_exception(StateError("the alarm store is closed"))
        else:
            self._q.put((what, fut))

    async def run(self, fn: Callable[..., T], *args: Any) -> T:
        """:meth:`call` from the event loop (the feeds' ``io``)."""
        return await asyncio.wrap_future(self.call(fn, *args))

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def close(self, timeout_s: float = 10.0) -> None:
        """Finish what is queued, close the database, stop the worker."""
        if self._thread is None:
            return
        self._q.put(_Stop())
        self._thread.join(timeout_s)
        self._thread = None

    # ------------------------------------------------------------------------------------------ worker

    def _run(self) -> None:
        stop = False
        while not stop:
            items: list[tuple[Any, Future[Any]]] = []
            item = self._q.get()
            while True:
                if isinstance(item, _Stop):
                    stop = True
                    break
                items.append(item)
                if len(items) >= BATCH_MAX:
                    break
                try:
                    item = self._q.get_nowait()
                except queue.Empty:
                    break
            self._process(items)
        if self.db is not None:
            self.db.close()
            self.db = None

    def _process(self, items: list[tuple[Any, Future[Any]]]) -> None:
        """Consecutive decisions in one transaction; a call in between runs after the decisions before it."""
        group: list[tuple[Effects, Future[Any]]] = []
        for what, fut in items:
            if isinstance(what, Effects):
                group.append((what, fut))
                continue
            self._commit(group)
            group = []
            fn, args = what
            try:
                fut.set_result(fn(*args))
            except BaseException as exc:  # handed to the caller
                fut.set_exception(exc)
            self._refresh()
        self._commit(group)

    def _commit(self, group: list[tuple[Effects, Future[Any]]]) -> None:
        if not group:
            return
        try:
            done = [self._materialize(eff) for eff, _ in group]
            if self.db is not None and self.state is not None and self.outbox is not None and \
                    any(eff.writes for eff, _ in group):
                forget, alarms, sensors, baselines, sources = _last_states([eff for eff, _ in group])
                with self.db.transaction() as c:
                    for point in forget:
                        self.state.forget_baselines(c, point)
                    self.state.save(c, alarms=alarms, sensors=sensors, baselines=baselines, sources=sources)
                    for events, history in done:
                        self.state.add_history(c, history)
                        self.outbox.add(events, conn=c)
        except BaseException as exc:  # every decision of the batch hears of it
            for _, fut in group:
                fut.set_exception(exc)
            return
        self._refresh()
        for (_, fut), (events, _) in zip(group, done, strict=True):
            fut.set_result(events)

    def _materialize(self, eff: Effects) -> tuple[list[OutboxEvent], list[tuple[int, str, str, str, str, str]]]:
        """Captures saved, ids given, events serialized, history rows made."""
        events: list[OutboxEvent] = []
        history: list[tuple[int, str, str, str, str, str]] = []
        for ev in eff.events:
            events.append(self._event(ev, history))
        return events, history

    def _event(self, ev: EventOut, history: list[tuple[int, str, str, str, str, str]]) -> OutboxEvent:
        s = self.settings
        eid = new_event_id()
        if ev.capture is not None and self.capture is not None:
            c = ev.capture
            ev.data["capture"] = self.capture.save(
                c.result, indicator=c.indicator, transition=c.transition, severity=c.severity, event_id=eid,
                limits=c.limits, config_digest=s.config_digest, site=s.site)
        ce = cloud_event(type_=ev.type, source=s.feed.event_source, subject=ev.subject, data=ev.data,
                         time_ns=ev.t_ns, event_id=eid, dataschema=s.feed.dataschema_for(ev.type))
        if ev.history is not None:
            row = {**ev.data, "at_s": ev.at_s}
            history.append((ev.t_ns, ev.history[0], ev.point, ev.history[1], eid,
                            json.dumps(row, separators=(",", ":"), allow_nan=False, default=str)))
        return OutboxEvent(id=eid, type=ev.type, subject=ev.subject, topic=ev.topic, body=event_body(ce),
                           created_ns=time.time_ns())

    def _refresh(self) -> None:
        ob = self.outbox
        if ob is None or not ob.sinks:
            return
        try:
            self.outbox_figures = (ob.depth(), ob.oldest_created_ns())
        except Exception:  # figures for the metrics only
            return

    # ------------------------------------------------------------------------------------------ on the worker

    def _open(self) -> Restored:
        s = self.settings
        state_dir = Path(s.state_dir)
        state_dir.mkdir(parents=True, exist_ok=True)
        self.db = Database(state_dir / "alarms.sqlite")
        self.outbox = Outbox(self.db, self.sinks)
        self.state = StateStore(self.db)
        self.capture = CaptureStore(s.capture)
        self._refresh()
        return Restored(alarms=self.state.load_alarms(), baselines=self.state.load_baselines(),
                        sensors=self.state.load_sensors(), sources=self.state.load_sources())

    # The outbox as the feeds see it (on the worker: their ``io`` is :meth:`run`).
    def _outbox(self) -> Outbox:
        if self.outbox is None:
            raise StateError("the alarm store is not open")
        return self.outbox

    def pending(self, sink: str, limit: int = 100) -> list[OutboxEvent]:
        return self._outbox().pending(sink, limit)

    def mark_delivered(self, sink: str, seqs: Iterable[int]) -> None:
        self._outbox().mark_delivered(sink, seqs)

    def mark_attempt(self, sink: str, seqs: Iterable[int]) -> None:
        self._outbox().mark_attempt(sink, seqs)

    def history(self, point: str | None, since_ns: int | None, limit: int) -> list[tuple[int, str, str, str, str, str]]:
        """History rows (call on the worker: ``call(store.history, …)``)."""
        return [] if self.state is None else self.state.history(point, since_ns, limit)

    def prune_history(self, before_ns: int) -> int:
        return 0 if self.state is None else self.state.prune_history(before_ns)
