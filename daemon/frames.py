"""The daemon's ingest: block validation, per-point frame assembly, bounded frame queues, counters and trends.

Everything here runs on the event loop and is cheap: a block is checked against its point (sample rate, length,
unit, sequence continuity), appended to the point's assembly buffer, and every complete frame (``frame_samples``
long, advancing by the hop that the overlap leaves) is queued for analysis.  A point's queue is bounded: when
analysis falls behind, the oldest frame is dropped and counted, so ingest never stalls.

Rejected blocks are counted by reason (``edgevib_blocks_rejected_total{source,reason}``) and logged with point
context through a rate-limited logger.  Reasons: the wire codec's own (``malformed``, ``too_large``,
``invalid_field``, ``length_mismatch``, ``non_finite``, ``invalid_sample_rate``, ``unsupported_version``) and
``unknown_sensor``, ``wrong_sample_rate``, ``wrong_length``, ``duplicate``, ``out_of_order``, ``overload``.
A sequence gap is not a rejection: the block is kept, assembly restarts, and the gap is counted.

A sharded instance (``[site] shard``) receives, through wildcard subscriptions, the blocks of points that another
instance owns: those are ignored quietly and counted apart
(``edgevib_blocks_ignored_total{source,reason="other_shard"}``), never as rejections.
"""

from __future__ import annotations

import bisect
import math
import time
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, cast

import numpy as np
import numpy.typing as npt

from edgevib.common.wire import DEFAULT_MAX_PAYLOAD_BYTES, DEFAULT_MAX_SAMPLES, Block, WireError, decode
from edgevib.daemon.config import Config, MachineConfig, MqttSourceConfig, PointConfig, SpeedTag
from edgevib.daemon.indicators import G_M_S2
from edgevib.daemon.logs import RateLimitedLogger, get_logger

__all__ = [
    "LATENCY_BUCKETS_S",
    "BlockIngest",
    "EwTrend",
    "FrameJob",
    "LatencyHistogram",
    "PointStream",
    "Stats",
    "speed_limit_hz",
]

LATENCY_BUCKETS_S = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
FS_TOLERANCE = 1e-3  # relative; a block reporting another rate than its point is rejected
# A speed-tag reading above what a machine can turn is refused (``invalid_speed``): above its configured
# ``speed_range_rpm`` top by more than SPEED_MARGIN (overspeed trips are commonly set near 110–115 % of the
# maximum continuous speed — common practice, API 670/612 from memory — so 120 % is beyond any real run), or,
# without a configured range, above MAX_SPEED_RPM (the bound the configuration puts on ``speed_rpm``).
SPEED_MARGIN = 0.2
MAX_SPEED_RPM = 120000.0
_F32Array = npt.NDArray[np.float32]  # subscripted once: a subscription per block costs more than the cast
_F32 = np.dtype(np.float32)  # compared per block as a dtype (a scalar type is converted at each comparison)


def _decode_limits(max_payload_bytes: int) -> tuple[int, int]:
    """``(max_bytes, max_samples)`` for decoding the payloads of a source with this size limit (also above the
    codec's 4 MiB default): as many samples as a float32 block of that size can carry, never fewer than the codec's
    default."""
    return max_payload_bytes, max(DEFAULT_MAX_SAMPLES, max_payload_bytes // 4)


_DEFAULT_DECODE_LIMITS = _decode_limits(DEFAULT_MAX_PAYLOAD_BYTES)


def speed_limit_hz(machine: MachineConfig) -> float:
    """The highest speed-tag reading believed for ``machine``, Hz (see ``SPEED_MARGIN``)."""
    if "speed_range_rpm" in machine.model_fields_set:
        return min(machine.speed_range_rpm[1] * (1.0 + SPEED_MARGIN), MAX_SPEED_RPM) / 60.0
    return MAX_SPEED_RPM / 60.0


# ------------------------------------------------------------------------------------------------ counters


class LatencyHistogram:
    """Cumulative ingest-to-metric latency histogram (Prometheus ``le`` buckets in seconds)."""

    def __init__(self, buckets: tuple[float, ...] = LATENCY_BUCKETS_S) -> None:
        self.buckets = buckets
        self.counts = [0] * (len(buckets) + 1)
        self.sum_s = 0.0
        self.count = 0

    def observe(self, value_s: float) -> None:
        value_s = max(0.0, value_s)
        self.counts[bisect.bisect_left(self.buckets, value_s)] += 1  # the first bucket with value_s <= le
        self.sum_s += value_s
        self.count += 1

    def cumulative(self) -> list[tuple[str, int]]:
        out, acc = [], 0
        for le, c in zip((*map(str, self.buckets), "+Inf"), self.counts, strict=True):
            acc += c
            out.append((le, acc))
        return out


@dataclass
class Stats:
    """The daemon's self-counters; mutated on the event loop, copied by the metrics collector per scrape."""

    blocks_received: dict[str, int] = field(default_factory=dict)
    blocks_rejected: dict[tuple[str, str], int] = field(default_factory=dict)
    blocks_ignored: dict[tuple[str, str], int] = field(default_factory=dict)
    frames_analysed: dict[str, int] = field(default_factory=dict)
    frames_dropped: dict[str, int] = field(default_factory=dict)
    gaps: dict[str, int] = field(default_factory=dict)
    analysis_errors: dict[str, int] = field(default_factory=dict)
    sink_dropped: dict[tuple[str, str], int] = field(default_factory=dict)  # (sink class, point): results a
    # lossy sink skipped because it fell behind (app.SinkChannel)
    connected: dict[str, bool] = field(default_factory=dict)
    reconnects: dict[str, int] = field(default_factory=dict)
    ever_connected: set[str] = field(default_factory=set)
    latency: LatencyHistogram = field(default_factory=LatencyHistogram)

    @staticmethod
    def inc(d: dict[Any, int], key: Any, n: int = 1) -> None:
        d[key] = d.get(key, 0) + n


# ------------------------------------------------------------------------------------------------ frames


@dataclass(frozen=True, slots=True)
class FrameJob:
    """A complete frame of one point waiting for analysis (samples in g, float32, read-only).  ``speed_hz`` is
    the machine's known speed when the frame was completed (fixed, or the latest fresh tag reading; ``None``: to be
    estimated), so a frame keeps the speed of its own time however long it waits for analysis."""

    point_id: str
    samples: npt.NDArray[np.float32]
    t_end_ns: int
    received_ns: int
    speed_hz: float | None = None


class PointStream:
    """Continuity checks and frame assembly for one point; complete frames go to a bounded queue.

    Frames are float32 (24 bits of mantissa: beyond any vibration sensor's resolution; the analysis transforms in
    single precision anyway), which halves the memory every copy moves.  A frame that is exactly one float32 block
    in g (the frame length equals the block length, no overlap: the usual set-up) is the decoded block's own
    read-only array: no copy at all until the analysis batch is stacked.
    """

    def __init__(self, point: PointConfig, queue_frames: int) -> None:
        self.point = point
        self.frame = point.frame_samples
        self.hop = point.hop_samples
        self._ns_per_sample = 1e9 / point.fs_hz
        # the point's figures that every block is checked against, read from its configuration once
        self._point_id = point.id
        self._fs_hz = point.fs_hz
        self._fs_tolerance_hz = FS_TOLERANCE * point.fs_hz
        self._block_samples = point.block_samples
        self._half_block_ns = 0.5 * point.block_samples * self._ns_per_sample
        self._buf = np.empty(self.frame + point.block_samples, dtype=np.float32)
        self._whole_blocks = self.frame == point.block_samples and self.hop == self.frame
        self._fill = 0
        self._base_t0_ns = 0     # time of the first sample since the last restart
        self._consumed = 0       # samples shifted out of the buffer since the last restart
        self.last_seq: int | None = None
        self.expected_t0_ns: int | None = None
        self.queue: deque[FrameJob] = deque()
        # At least two blocks' worth of frames: a long block (65,536 samples in frames of 8,192 with half overlap
        # is 16 frames at once) must not lose frames to a short queue while analysis keeps up.
        self.queue_frames = max(queue_frames, 2 * -(-point.block_samples // self.hop))
        self.blocks = 0

    def check(self, block: Block) -> tuple[str | None, str]:
        """``(reason, detail)`` when the block must be rejected; ``(None, "gap"|"restart"|"")`` otherwise."""
        fs_hz = block.fs_hz
        if abs(fs_hz - self._fs_hz) > self._fs_tolerance_hz:
            return "wrong_sample_rate", f"block at {fs_hz:g} Hz, point configured for {self._fs_hz:g} Hz"
        n = block.samples.shape[0]
        if n != self._block_samples:
            return "wrong_length", f"block of {n} samples, point configured for {self._block_samples}"
        last_seq = self.last_seq
        if last_seq is None:
            return None, "start"
        seq, t0_ns, expected_ns = block.seq, block.t0_ns, self.expected_t0_ns
        # (the block is as long as the point's blocks: half of it is the point's half block)
        timed = t0_ns != 0 and expected_ns is not None and expected_ns != 0
        dt_ns = t0_ns - expected_ns if timed and expected_ns is not None else 0
        if seq == last_seq + 1:
            if timed and abs(dt_ns) > self._half_block_ns:
                return None, f"time jump of {dt_ns / 1e6:.1f} ms at consecutive seq {seq}"
            return None, ""
        if seq > last_seq:
            return None, f"seq gap {last_seq} -> {seq} ({seq - last_seq - 1} blocks missing)"
        if timed and dt_ns > -self._half_block_ns:
            return None, f"seq restarted {last_seq} -> {seq} with time moving forward (device restart)"
        if seq == last_seq:
            return "duplicate", f"seq {seq} received twice"
        return "out_of_order", f"seq {seq} after {last_seq}"

    def push(self, block: Block, received_ns: int, restart: bool, speed_hz: float | None = None) -> int:
        """Append a checked block (``speed_hz``: the machine's known speed now); returns how many queued frames
        were dropped to make room."""
        x = block.samples if block.unit == "g" else np.asarray(block.samples) / G_M_S2
        if restart:
            self._fill = 0
            self._consumed = 0
            self._base_t0_ns = block.t0_ns
        n = x.shape[0]
        self.last_seq = block.seq
        self.expected_t0_ns = block.end_ns
        self.blocks += 1
        dropped = 0
        if self._whole_blocks and self._fill == 0 and x.dtype == _F32 and not x.flags.writeable:
            t_end = self._base_t0_ns + round((self._consumed + self.frame) * self._ns_per_sample)
            self._consumed += self.hop
            whole = cast(_F32Array, x)  # (checked just above: float32 and read-only)
            return self._enqueue(FrameJob(self._point_id, whole, t_end, received_ns, speed_hz))
        self._buf[self._fill:self._fill + n] = x
        self._fill += n
        while self._fill >= self.frame:
            frame = self._buf[:self.frame].copy()
            frame.flags.writeable = False
            t_end = self._base_t0_ns + round((self._consumed + self.frame) * self._ns_per_sample)
            dropped += self._enqueue(FrameJob(self._point_id, frame, t_end, received_ns, speed_hz))
            rest = self._fill - self.hop
            self._buf[:rest] = self._buf[self.hop:self._fill]
            self._fill = rest
            self._consumed += self.hop
        return dropped

    def _enqueue(self, job: FrameJob) -> int:
        """Queue a frame; returns 1 when the oldest queued frame had to be dropped to make room."""
        self.queue.append(job)
        if len(self.queue) > self.queue_frames:
            self.queue.popleft()
            return 1
        return 0

    @property
    def buffered_samples(self) -> int:
        return self._fill


# ------------------------------------------------------------------------------------------------ trends


class EwTrend:
    """Exponentially weighted trend of each indicator with a half-life in seconds of signal time."""

    def __init__(self, halflife_s: float) -> None:
        self.halflife_s = halflife_s
        self.values: dict[str, float] = {}
        self.t_s: float | None = None

    def update(self, values: Mapping[str, float | None], t_s: float) -> dict[str, float]:
        dt = 0.0 if self.t_s is None else max(0.0, t_s - self.t_s)
        alpha = 1.0 - 2.0 ** (-dt / self.halflife_s)
        for k, v in values.items():
            if v is None or not math.isfinite(v):
                continue
            prev = self.values.get(k)
            self.values[k] = v if prev is None else prev + alpha * (v - prev)
        self.t_s = t_s if self.t_s is None else max(self.t_s, t_s)
        return dict(self.values)


# ------------------------------------------------------------------------------------------------ ingest


# Refusals for the configuration's sake (unit or sample rate not the configured one, no sample rate known): the
# point receives nothing, but its sensor is not to blame.
CONFIG_REFUSALS = frozenset({"config_mismatch", "no_sample_rate", "wrong_sample_rate", "wrong_length"})


class BlockIngest:
    """The :class:`~edgevib.daemon.interfaces.Ingest` every source hands its data to (event-loop only)."""

    def __init__(self, config: Config, stats: Stats, on_frames: Callable[[PointStream], None] | None = None,
                 clock_ns: Callable[[], int] = time.time_ns) -> None:
        self.stats = stats
        self.on_frames = on_frames or (lambda _stream: None)
        self.clock_ns = clock_ns
        self.log = RateLimitedLogger(get_logger("edgevib.ingest"), interval_s=10.0)
        self.closing = False  # set by the daemon while it shuts down (sources close on purpose)
        self.streams: dict[str, PointStream] = {}
        self.speeds: dict[str, tuple[float, int]] = {}  # machine id -> (shaft Hz, received ns)
        self.connected_since_ns: dict[str, int] = {}  # source -> when it last connected
        self.last_block_ns: dict[str, int] = {}  # point -> when its last accepted block arrived
        self.config_refusals: dict[str, tuple[int, str]] = {}  # point -> (when, wall clock ns; why) of its latest
        # Told of every change of a source's connection (source name, connected), except deliberate closes at
        # shutdown: the alarm layer's source up/down judgement.
        self.connection_listeners: list[Callable[[str, bool], None]] = []
        self.configure(config)

    def configure(self, config: Config, keep: Iterable[str] = ()) -> None:
        """(Re)build the routing tables; streams of points in ``keep`` (unchanged on reload) keep their state."""
        self.config = config
        for pid in set(self.config_refusals) - set(keep):  # a point configured anew is judged anew
            del self.config_refusals[pid]
        self.by_node = {(p.source, p.node): p.id for p in config.points if p.node is not None}
        kept = {pid: s for pid, s in self.streams.items() if pid in set(keep)}
        self.streams = {p.id: kept.get(p.id) or PointStream(p, config.analysis.queue_frames) for p in config.points}
        self.by_sensor = {(p.source, p.sensor): p.id for p in config.points}
        machines = {m.id: m for m in config.machines}
        self.machine_of: dict[str, MachineConfig] = {p.id: machines[p.machine] for p in config.points
                                                     if p.machine in machines}
        self.other_shard = frozenset(config.skipped_sensors)
        self.sensor_level: dict[str, int | None] = {
            s.name: s.sensor_topic_level if isinstance(s, MqttSourceConfig) else None for s in config.sources}
        self.max_payload_bytes: dict[str, int] = {
            s.name: s.max_payload_bytes for s in config.sources if isinstance(s, MqttSourceConfig)}
        self._decode_limits = {name: _decode_limits(b) for name, b in self.max_payload_bytes.items()}
        self.speed_tags: dict[tuple[str, str], list[tuple[str, SpeedTag]]] = {}
        self.speed_limit_hz = {m.id: speed_limit_hz(m) for m in config.machines}
        self.points_of: dict[str, list[str]] = {}
        for p in config.points:
            self.points_of.setdefault(p.machine, []).append(p.id)
        for m in config.machines:
            if m.speed_tag is not None:
                self.speed_tags.setdefault((m.speed_tag.source, m.speed_tag.tag), []).append((m.id, m.speed_tag))
        for s in config.sources:
            self.stats.connected.setdefault(s.name, False)
            self.stats.blocks_received.setdefault(s.name, 0)
            self.stats.reconnects.setdefault(s.name, 0)
        for p in config.points:
            self.stats.frames_analysed.setdefault(p.id, 0)
            self.stats.frames_dropped.setdefault(p.id, 0)
            self.stats.analysis_errors.setdefault(p.id, 0)  # labelled counters start at 0 (Prometheus practice)

    # -- Ingest protocol

    def payload(self, source: str, topic: str | None, payload: bytes, received_ns: int) -> None:
        received = self.stats.blocks_received
        received[source] = received.get(source, 0) + 1
        max_bytes, max_samples = self._decode_limits.get(source, _DEFAULT_DECODE_LIMITS)
        try:
            block = decode(payload, max_bytes=max_bytes, max_samples=max_samples)
        except WireError as exc:
            self.reject(source, exc.reason, str(exc), topic)
            return
        except Exception as exc:  # the codec promises WireError only; never let anything escape into a source
            self.reject(source, "malformed", f"{type(exc).__name__}: {exc}", topic)
            return
        self._accept(source, block, received_ns, topic)

    def block(self, source: str, block: Block, received_ns: int, topic: str | None = None) -> None:
        Stats.inc(self.stats.blocks_received, source)
        self._accept(source, block, received_ns, topic)

    def _accept(self, source: str, block: Block, received_ns: int, topic: str | None) -> None:
        sensor = block.sensor_id
        level = self.sensor_level.get(source)
        if level is not None and topic is not None:
            parts = topic.split("/")
            sensor = parts[level] if level < len(parts) else ""
        pid = self.by_sensor.get((source, sensor))
        if pid is None:
            if (source, sensor) in self.other_shard:
                Stats.inc(self.stats.blocks_ignored, (source, "other_shard"))
                return
            self.reject(source, "unknown_sensor", f"sensor {sensor!r} is not configured on this source", topic)
            return
        stream = self.streams[pid]
        reason, detail = stream.check(block)
        if reason is not None:
            self.reject(source, reason, detail, topic, point=pid)
            return
        restart = detail != ""
        if restart and detail != "start":
            Stats.inc(self.stats.gaps, pid)
            self.log.warning(("gap", pid), "stream discontinuity; frame assembly restarts", point=pid,
                             source=source, detail=detail)
        self.last_block_ns[pid] = received_ns
        before = len(stream.queue)
        machine = self.machine_of.get(pid)
        speed = self.speed_hz(machine) if machine is not None else None
        dropped = stream.push(block, received_ns, restart, speed)
        if dropped:
            Stats.inc(self.stats.frames_dropped, pid, dropped)
            self.log.warning(("drop", pid), "analysis is behind: oldest frames dropped", point=pid,
                             dropped=dropped)
        if len(stream.queue) != before or dropped:
            self.on_frames(stream)

    def speed(self, source: str, tag: str, value: float, received_ns: int) -> None:
        targets = self.speed_tags.get((source, tag))
        if not targets:
            return
        if not math.isfinite(value) or value < 0:
            self.reject(source, "invalid_speed", f"speed tag {tag!r} value {value!r} is not a finite value >= 0",
                        tag)
            return
        for machine_id, spec in targets:
            hz = spec.to_hz(value)
            limit_hz = self.speed_limit_hz.get(machine_id, MAX_SPEED_RPM / 60.0)
            if hz > limit_hz:  # not a speed this machine can turn: a wrong tag, unit or transmitter fault
                points = ", ".join(self.points_of.get(machine_id, ())) or None
                self.reject(source, "invalid_speed",
                            f"speed tag {tag!r} value {value:g} {spec.unit} for machine {machine_id!r} is above "
                            f"{limit_hz * 60.0:g} r/min, more than the machine can turn; reading ignored",
                            tag, point=points)
                continue
            self.speeds[machine_id] = (hz, received_ns)

    def reject(self, source: str, reason: str, detail: str, topic: str | None = None,
               point: str | None = None, received: bool = False) -> None:
        if received:  # a payload the source refused before handing it over: it was received all the same
            Stats.inc(self.stats.blocks_received, source)
        Stats.inc(self.stats.blocks_rejected, (source, reason))
        if reason in CONFIG_REFUSALS:
            pid = point if point is not None or topic is None else self.by_node.get((source, topic))
            if pid is not None:  # an OPC UA node refused by its source names its node, not its point
                self.config_refusals[pid] = (self.clock_ns(), f"{reason}: {detail}")
        self.log.warning(("reject", source, reason, point), "block rejected", source=source, reason=reason,
                         detail=detail, topic=topic, point=point)

    def config_refusal(self, point_id: str) -> str | None:
        """Why the point's blocks are refused for the configuration, unless a block was accepted since."""
        refusal = self.config_refusals.get(point_id)
        if refusal is None or self.last_block_ns.get(point_id, -1) >= refusal[0]:
            return None
        return refusal[1]

    def connection(self, source: str, connected: bool) -> None:
        was = self.stats.connected.get(source, False)
        if connected and not was:
            self.connected_since_ns[source] = self.clock_ns()
            if source in self.stats.ever_connected:
                Stats.inc(self.stats.reconnects, source)
                self.log.info(("conn", source), "source reconnected", source=source)
            else:
                self.log.info(("conn", source), "source connected", source=source)
            self.stats.ever_connected.add(source)
        elif was and not connected:
            if self.closing:
                self.log.info(("conn", source), "source closed", source=source)
            else:
                self.log.warning(("conn", source), "source disconnected", source=source)
        self.stats.connected[source] = connected
        if connected != was and not (self.closing and not connected):
            for listener in self.connection_listeners:
                try:
                    listener(source, connected)
                except Exception as exc:  # a listener never stops a source
                    self.log.error(("conn-listener", source), "connection listener failed", error=repr(exc))

    def silent_points(self, now_ns: int | None = None) -> list[str]:
        """Points whose source has been connected for a while (10 s, at least 5 block periods) without one accepted
        block from them since: a node or topic that delivers nothing (not monitored, wrong id, a gateway that
        stopped writing)."""
        now = self.clock_ns() if now_ns is None else now_ns
        out = []
        for p in self.config.points:
            since = self.connected_since_ns.get(p.source)
            if since is None or not self.stats.connected.get(p.source, False):
                continue
            window_ns = max(10e9, 5 * p.block_samples / p.fs_hz * 1e9)
            last = self.last_block_ns.get(p.id)
            if now - since > window_ns and (last is None or now - last > window_ns):
                out.append(p.id)
        return out

    # -- speed

    def speed_hz(self, machine: MachineConfig, now_ns: int | None = None) -> float | None:
        """The known shaft speed of a machine, or ``None`` (to be estimated, or unknown)."""
        if machine.speed_rpm is not None:
            return machine.speed_rpm / 60.0
        if machine.speed_tag is None:
            return None
        entry = self.speeds.get(machine.id)
        if entry is None:
            return None
        now = self.clock_ns() if now_ns is None else now_ns
        if (now - entry[1]) / 1e9 > machine.speed_tag.max_age_s:
            return None
        return entry[0]
