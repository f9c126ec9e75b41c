"""Contracts between the daemon's parts: the errors they raise and the small async interfaces they implement.

``app.py`` is the one place that wires sources, the rolling pipeline, alarms and sinks together; every part
talks to the others only through what is named here.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Protocol, runtime_checkable

import numpy as np
import numpy.typing as npt

from edgevib.common.wire import Block
from edgevib.daemon.errors import ConfigError, EdgevibError, SourceError

if TYPE_CHECKING:  # the configuration imports this module and must not load the numerical core
    from edgevib.daemon.config import Config
    from edgevib.pipelines.health import SensorHealth
    from edgevib.pipelines.machine_state import MachineState
    from edgevib.pipelines.types import FrameIndicators

__all__ = [
    "AlarmTransition",
    "AlarmView",
    "BlockHandler",
    "ConfigError",
    "EdgevibError",
    "FrameResult",
    "FrameSink",
    "Ingest",
    "LosslessSink",
    "Reconfigurable",
    "Source",
    "SourceError",
]


@dataclass(frozen=True, slots=True)
class FrameResult:
    """One analysed frame of one measurement point, as handed to every :class:`FrameSink`.

    ``samples`` is the raw frame in g (float32, read-only: a row of the analysis batch's array; for waveform
    capture and sensor-health checks), ``t_end_ns`` the time just after its
    last sample, ``received_ns`` the wall-clock time its last block arrived (for ingest-to-metric latency).
    ``iso_zone`` is ``"A".."D"`` when the point's machine has a group and support, ``axis`` the point's axis,
    ``trend`` the exponentially weighted trend of the indicators that keep one (by indicator name; see
    :mod:`edgevib.daemon.indicators`).  ``machine_state`` is the machine's state after this frame
    (:mod:`edgevib.daemon.machine_state`; ``None`` when not tracked), ``health`` the frame's sensor-health verdict
    (:mod:`edgevib.daemon.sensor_health`; ``None`` when not checked), ``envelope_band_source`` where the frame's
    demodulation band came from (``"configured"``, ``"auto"``, ``"default"``; ``None`` without a band).
    """

    point_id: str
    machine_id: str
    t_end_ns: int
    received_ns: int
    fs_hz: float
    indicators: FrameIndicators
    iso_zone: str | None
    samples: npt.NDArray[np.float32] = field(repr=False)
    axis: str = ""
    trend: Mapping[str, float] = field(default_factory=dict)
    machine_state: MachineState | None = None
    health: SensorHealth | None = None
    envelope_band_source: str | None = None  # "configured" | "auto" | "default"; None without an envelope band


BlockHandler = Callable[[Block, str | None], None]
"""Called on the event loop with a decoded block and the topic/node it came from (or ``None``)."""


class Ingest(Protocol):
    """What a source hands its data to.  Every method is called **on the event loop** (a source whose library
    calls back from its own thread, like paho, uses ``loop.call_soon_threadsafe``); none of them blocks or raises.
    """

    def payload(self, source: str, topic: str | None, payload: bytes, received_ns: int) -> None:
        """A raw wire-format payload (decoded, validated and counted by the ingest)."""

    def block(self, source: str, block: Block, received_ns: int, topic: str | None = None) -> None:
        """An already decoded block (OPC UA arrays, the in-process simulator)."""

    def speed(self, source: str, tag: str, value: float, received_ns: int) -> None:
        """A speed tag update (MQTT topic or OPC UA node id as ``tag``; value in the tag's configured unit)."""

    def reject(self, source: str, reason: str, detail: str, topic: str | None = None, *,
               received: bool = False) -> None:
        """Something the source itself found invalid (counted by reason, logged rate-limited).  ``received``: a
        payload the source dropped before handing it over (too large, queue full): counted as received too."""

    def connection(self, source: str, connected: bool) -> None:
        """Connection state changes; a change to connected after a loss counts as a reconnect."""


@runtime_checkable
class Source(Protocol):
    """A block source (MQTT, OPC UA, the in-process simulator).

    ``run`` connects, keeps reconnecting with bounded backoff until ``stop`` is called, and hands every payload to
    the daemon's ingest; it never raises for a bad payload or a lost connection.
    """

    name: str

    @property
    def connected(self) -> bool: ...

    async def run(self) -> None: ...

    async def stop(self) -> None: ...


class FrameSink(Protocol):
    """Receives analysed frames (Prometheus, MQTT indicator publishing, the OPC UA server, test probes).

    A plain sink is *lossy*: it shows the latest values, and when it falls behind the oldest undelivered results
    are dropped and counted (``app.SinkChannel``).  ``on_frames`` gets a point's results in frame order.
    """

    async def start(self) -> None: ...

    async def on_frames(self, results: list[FrameResult]) -> None: ...

    async def stop(self) -> None: ...


class LosslessSink(FrameSink, Protocol):
    """A sink that must see every analysed frame in order (the alarm layer: debounce, baselines, sensor-health
    runs).  The daemon pauses analysis rather than drop a result for it, and hands it results gathered for up to
    ``batch_window_s`` (0: as they come) when a call has a cost of its own (a commit)."""

    @property
    def batch_window_s(self) -> float: ...


class Reconfigurable(Protocol):
    """A part that takes a new configuration on reload (SIGHUP) without restarting."""

    async def reconfigure(self, config: Config) -> None: ...


@dataclass(frozen=True, slots=True)
class AlarmTransition:
    """One recorded change of the alarm layer, as kept in its durable history (newest first from
    :meth:`AlarmView.history`).

    ``kind``: ``"alarm"`` (a limit's transition), ``"sensor"`` (a sensor fault raised or cleared) or ``"source"``
    (a source's data path down or up).  ``t_s``: the event time (the frame's measurement time; operator actions and
    timers: the time of the action on the point's timeline, the wall clock while it is stale), Unix seconds.
    ``indicator``: the limit's indicator, the sensor fault (``flatline``, ``no-data`` …) or the source name.
    ``state`` / ``from_state``: annunciated severity (``normal``/``alert``/``danger``; sensor:
    ``sensor-fault``/``normal``; source: ``down``/``up``);
    ``alarm_state``: the ISA-18.2 style operator state after it (alarms only).  ``value`` / ``limit``: the value at
    the transition and the set point concerned.  ``by`` / ``at_s``: who issued an operator action and when (wall
    clock).  ``reason``: suppression or shelve reason, ``capture``: the waveform file, ``stale``: why the point had
    no good data then (``None``: data flowed).
    """

    kind: str
    t_s: float
    point: str
    machine: str
    indicator: str
    unit: str | None
    transition: str
    from_state: str | None
    state: str
    alarm_state: str | None
    value: float | None
    limit: float | None
    by: str | None
    at_s: float | None
    reason: str | None
    capture: str | None
    event_id: str
    machine_state: str | None
    stale: str | None


class AlarmView(Protocol):
    """The alarm layer as its readers see it (the demo table's alarm column, ``edgevib alarms``, the view, the
    metrics).  Every read comes from the snapshot published after the latest decision: no lock, no wait, safe from
    any thread.  Commands go through the layer's one decision thread (:meth:`command`)."""

    def state_text(self, point_id: str) -> str | None:
        """Every active alarm of a point in one short text (``DANGER misalignment_2x_mm_s; ALERT …``)."""

    def machine_view(self, machine: str) -> dict[str, object]:
        """A machine's state: ``{state, since_s, grace_left_s, last_state, last_since_s}`` (``unknown`` while every
        point of the machine is stale; ``last_*`` then keep the last known state)."""

    def snapshot(self, point: str | None = None) -> dict[str, object]:
        """The ``alarms list`` document (of one point, or all): ``alarms`` (a row per limit: point, indicator, state,
        severity, value, alert, danger, shelved_until_s, shelve_reason, suppressed, stale, since_s, baseline),
        ``sensors`` ({point: {fault, detail}}), ``points`` ({point: machine, machine_state, …, alarm_text, time}),
        ``sources`` and ``outbox_pending``."""

    def history(self, point: str | None = None, *, since_s: float | None = None,
                limit: int = 200) -> Sequence[AlarmTransition]:
        """Recorded transitions from the durable store, newest first; ``limit`` 1..1000 (ValueError outside).
        A database read: call it off the event loop (``asyncio.to_thread``)."""

    async def command(self, req: dict[str, object]) -> object:
        """Run one command validated by ``edgevib.daemon.alarms.control.validate_request`` (``ack``, ``shelve``,
        ``unshelve``, ``relearn``, ``list``, ``history``, ``select_band``) on the event loop without blocking it;
        returns once its events are committed, with ``{changed, events}`` (``list``/``history``: their documents).
        Raises ``CommandError``."""

    def subscribe(self, listener: Callable[[dict[str, object]], None]) -> Callable[[], None]:
        """Call ``listener`` on the event loop with each committed CloudEvent (a dict); returns the unsubscribe."""
