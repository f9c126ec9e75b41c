"""End-to-end daemon benchmark: publishers → a private mosquitto → ``edgevib`` daemon(s) → indicators.

``python -m edgevib.bench.daemon [--channels 500,1000] [--instances 2] [--seconds 20] [--json]``

For each channel count the benchmark starts a mosquitto of its own on a free loopback port, then each daemon
instance in a process of its own (one analysis worker, the alarm layer on), then publisher processes that send
every channel as a real device would: 25.6 kHz, 16384-sample binary blocks (float32, 64 KiB), one block per
channel every 0.64 s, phases spread evenly, each block published when its last sample is due (its ``t0_ns`` is
that schedule, so a late publisher shows up in the latency).  Payloads are encoded once; only the sequence number
and start time are patched per block, and at QoS 0 a block goes out as one ``sendmsg`` of a prebuilt MQTT header
and the payload (:class:`RawPublisher`), so the load generator leaves the cores to the broker and the daemon.
Frames are 16384 samples, overlap 0 by default (one frame per block).  Every point has the same pump bearing by
default, so all share one analysis plan and the daemon analyses them in large batches; ``--plans K`` gives the
points K distinct bearing geometries, as a plant's machines have: K plans that differ only in the bearing, which
the daemon analyses in mixed batches (``analysis.analyze_mixed``) as large as with one plan.  The machines run at
a fixed, given speed (1480 r/min); with ``--estimated`` they have only a speed range (900–3000 r/min), and every
frame's shaft speed is estimated from its spectrum (each row with its own bearing's cage ratio).

Because every daemon instance runs in its own process, its CPU time and memory are its own: publishers, the
broker and the benchmark's coordinator are other processes.  ``--instances N`` splits the channels between N
instances by ``[site] shard`` (hash shards), each subscribed to its own sensors' topics only (as the README
advises), to show how instances sharing a box add up.

Each row (one per instance) reports, over the measurement window after a warm-up:

* ``frames_per_s`` analysed and the rate the stream requires (``expected_frames_per_s``);
* ``latency_p50_ms`` / ``latency_p99_ms``: ingest-to-metric, from the arrival of a frame's last block at the
  daemon to its indicators being published to the Prometheus sink — the quantity of the daemon's
  ``edgevib_analysis_latency_seconds`` histogram, measured per frame by a probe sink; ``hist_p99_le_ms`` is the
  bucket bound of the same percentile from that histogram (scrapes of ``/metrics`` at the window's start and end,
  made by one scraper process started before the window, as a Prometheus server; a warm-up scrape 1.5 s before
  the window takes the first scrape's one-off work out of it);
* ``e2e_p99_ms``: from the moment the block was due at the device to its indicators (adds publishing and broker);
  ``alarm_p99_ms``: ingest to the alarm layer having processed and committed the frame (every sink has its own
  delivery task, so this does not delay the exposition or the next analysis batch);
  ``sink_dropped``: results a lossy sink skipped because it fell behind (the alarm layer never skips one);
* ``dropped`` frames, ``rejected`` blocks, ``cpu_cores`` used by the daemon's process (all threads: event loop,
  the MQTT client's network thread, the analysis worker, the alarm layer's thread), ``mem_per_channel_mb`` (RSS
  growth from the daemon's construction to the window's end, ÷ its channels);
* ``publisher_cores``: CPU of all publisher processes together (the load generator's own cost, for context);
* diagnostics: ``slow_frames`` over 250 ms and in how many distinct seconds they fell (one stall or many),
  ``slow_at_s`` those seconds counted from the window's start (a stall at 0 s or at the end: the window's own
  ``/metrics`` scrapes), ``lag_at_s`` when the event loop was unresponsive for more than 100 ms,
  ``loop_lag_max_ms`` the longest the event loop was unresponsive, ``thread_cores`` CPU per thread,
  ``faults_per_frame`` the daemon process's minor page faults per analysed frame (memory handed back to the
  system and faulted in again: see ``--keep-freed-memory``), ``exposition_ms`` the CPU time of encoding the whole
  ``/metrics`` exposition once (what each Prometheus scrape costs the daemon, measured after the window) and
  ``exposition_ref_ms`` the same registry encoded by prometheus_client's ``generate_latest`` (the reference the
  daemon's own text encoder replaces; measured alternately with it);
* ``sustained``: every expected frame analysed (≥ 97 %), none dropped or rejected, p99 < 250 ms.

A level's summary adds the instances up (channels, frames, cores, ``channels_per_core``); ``sustained_channels``
is the largest level every instance sustained.  Figures depend on the machine and on whatever else runs on it
(``--cpu N`` pins instance i to core N+i to make a one-core figure explicit).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import heapq
import json
import math
import multiprocessing as mp
import os
import queue
import resource
import shutil
import socket
import struct
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

FS_HZ = 25600.0
BLOCK = 16384
PERIOD_NS = round(BLOCK * 1e9 / FS_HZ)  # 640 ms, exact
WARM_SCRAPE_BEFORE_NS = 1_500_000_000  # the warm-up scrape, before the window starts
TOPIC = "bench/{sensor}/block"
P99_TARGET_MS = 250.0
CHANNELS_PER_CORE_TARGET = 1000.0  # issue 14: channels of 25.6 kHz per core of the daemon's own CPU
_HIST = "edgevib_analysis_latency_seconds"
SEQ_T0 = struct.Struct("<Qq")  # seq and t0_ns at offset 8 of the binary block header (common/wire.py)


# ------------------------------------------------------------------------------------------- the broker


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Broker:
    """A private mosquitto on 127.0.0.1 and a free port."""

    def __init__(self) -> None:
        exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        if not Path(exe).exists():
            raise SystemExit("the benchmark needs mosquitto (apt-get install mosquitto)")
        self.port = _free_port()
        self.dir = Path(tempfile.mkdtemp(prefix="edgevib-bench-mosq-"))
        conf = self.dir / "mosquitto.conf"
        conf.write_text(f"listener {self.port} 127.0.0.1\nallow_anonymous true\npersistence false\n"
                        "log_dest stderr\nlog_type error\nmax_packet_size 16777216\nmax_queued_messages 0\n")
        self.proc = subprocess.Popen([exe, "-c", str(conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.2).close()
                break
            except OSError:
                if time.monotonic() > deadline or self.proc.poll() is not None:
                    self.close()
                    raise SystemExit("mosquitto did not start") from None
                time.sleep(0.05)

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        shutil.rmtree(self.dir, ignore_errors=True)


# ------------------------------------------------------------------------------------------- the load


def sensor_id(channel: int) -> str:
    return f"QL-BENCH-{channel:04d}"


def channel_signal(channel: int, seed: int, danger: bool = False) -> np.ndarray:
    """One block of a plausible pump bearing signal in g: 1× and 2× of a 1480 r/min shaft, outer-race impacts
    ringing a 3.2 kHz resonance, broadband noise (seeded per channel).  The shaft lines put the pump in ISO 20816-3
    zone B (velocity about 1.9 mm/s r.m.s.: running, no alarm), or with ``danger`` in zone D (about 11 mm/s: every
    point raises an alarm and captures its waveform at once, a plant-wide alarm storm)."""
    rng = np.random.default_rng([seed, channel])
    t = np.arange(BLOCK) / FS_HZ
    f1 = 1480.0 / 60.0
    gain = 1.0 if danger else 0.16
    x = gain * 0.25 * np.sin(2 * np.pi * f1 * t + rng.uniform(0, 2 * np.pi))
    x += gain * 0.08 * np.sin(2 * np.pi * 2 * f1 * t + rng.uniform(0, 2 * np.pi))
    bpfo = 3.585 * f1 * rng.uniform(0.99, 1.01)
    ring = np.exp(-t[:256] * 900.0) * np.sin(2 * np.pi * 3200.0 * t[:256])
    impacts = np.zeros(BLOCK)
    impacts[(np.arange(0, t[-1], 1 / bpfo) * FS_HZ).astype(int)] = 0.6
    x += np.convolve(impacts, ring)[:BLOCK]
    x += rng.normal(0.0, 0.05, BLOCK)
    return x


def _varint(n: int) -> bytes:
    """MQTT remaining-length encoding (MQTT 3.1.1 §2.2.3)."""
    out = bytearray()
    while True:
        n, byte = n >> 7, n & 0x7F
        out.append(byte | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _utf8(text: str) -> bytes:
    raw = text.encode("utf-8")
    return struct.pack(">H", len(raw)) + raw


class RawPublisher:
    """A minimal MQTT 3.1.1 QoS 0 publisher on a plain socket: the load generator's per-message cost is one
    ``sendmsg`` of a prebuilt fixed header and the payload (no client library between the schedule and the wire),
    so the publishers leave the cores to the broker and the daemon."""

    def __init__(self, port: int, client_id: str) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=10)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        body = _utf8("MQTT") + bytes([4, 0x02]) + struct.pack(">H", 0) + _utf8(client_id)  # clean, no keep-alive
        self.sock.sendall(b"\x10" + _varint(len(body)) + body)
        ack = self.sock.recv(4)
        if ack[:2] != b"\x20\x02" or ack[3:4] != b"\x00":
            raise SystemExit(f"the benchmark broker refused the publisher: CONNACK {ack!r}")

    @staticmethod
    def prefix(topic: str, payload_bytes: int) -> bytes:
        """Fixed header and topic of a QoS 0 PUBLISH carrying ``payload_bytes``."""
        t = _utf8(topic)
        return b"\x30" + _varint(len(t) + payload_bytes) + t

    def publish(self, prefix: bytes, payload: bytes | bytearray) -> None:
        view = memoryview(payload)
        sent = self.sock.sendmsg([prefix, view])
        total = len(prefix) + len(view)
        if sent < total:  # a short write: send the rest in order
            rest = (prefix + bytes(view))[sent:]
            self.sock.sendall(rest)

    def close(self) -> None:
        with contextlib.suppress(OSError):
            self.sock.sendall(b"\xe0\x00")  # DISCONNECT
        self.sock.close()


def _publisher(port: int, channels: list[int], n_channels: int, duration_ns: int, qos: int, seed: int,
               out: Any, go: Any, danger: bool = False) -> None:
    """Publisher process: connects and encodes, reports ready, receives the common start time on ``go``, then
    publishes ``channels`` paced for ``duration_ns``; reports counts and lag on ``out``.  QoS 0 goes through
    :class:`RawPublisher`, QoS 1 through paho (which handles the acknowledgements)."""
    from edgevib.common.wire import Block, encode_binary

    templates: dict[int, bytearray] = {}
    topics: dict[int, str] = {}
    for c in channels:
        block = Block(sensor_id=sensor_id(c), seq=0, t0_ns=0, fs_hz=FS_HZ, unit="g",
                      samples=channel_signal(c, seed, danger))
        templates[c] = bytearray(encode_binary(block))
        topics[c] = TOPIC.format(sensor=sensor_id(c))
    client_id = f"edgevib-bench-pub-{os.getpid()}"
    if qos == 0:
        raw = RawPublisher(port, client_id)
        prefixes = {c: RawPublisher.prefix(topics[c], len(templates[c])) for c in channels}

        def send(c: int, buf: bytearray) -> None:
            raw.publish(prefixes[c], buf)

        def close() -> None:
            raw.close()
    else:
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id)
        client.max_inflight_messages_set(1000)
        client.connect("127.0.0.1", port, keepalive=30)
        client.loop_start()

        def send(c: int, buf: bytearray) -> None:
            client.publish(topics[c], bytes(buf), qos=qos)

        def close() -> None:
            time.sleep(0.5)
            client.loop_stop()
            client.disconnect()
    out.put({"ready": os.getpid()})
    start_ns = int(go.get(timeout=120))
    stop_ns = start_ns + duration_ns
    heap = [(start_ns + round(c * PERIOD_NS / n_channels) + PERIOD_NS, c, 0) for c in channels]
    heapq.heapify(heap)
    lags_ms: list[float] = []
    sent = 0
    cpu0 = time.process_time()
    while heap:
        due, c, k = heapq.heappop(heap)
        wait_s = (due - time.time_ns()) / 1e9
        if wait_s > 0:
            time.sleep(wait_s)
        buf = templates[c]
        SEQ_T0.pack_into(buf, 8, k, due - PERIOD_NS)
        send(c, buf)
        lags_ms.append((time.time_ns() - due) / 1e6)
        sent += 1
        if due + PERIOD_NS <= stop_ns:
            heapq.heappush(heap, (due + PERIOD_NS, c, k + 1))
    cpu_s = time.process_time() - cpu0
    close()
    lag = np.asarray(lags_ms) if lags_ms else np.zeros(1)
    out.put({"sent": sent, "lag_p99_ms": float(np.percentile(lag, 99)), "lag_max_ms": float(lag.max()),
             "cpu_cores": cpu_s / max(1e-9, duration_ns / 1e9)})


# ------------------------------------------------------------------------------------------- measuring


def _rss_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return math.nan


def _cpu_s() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def thread_cpu_s() -> dict[str, float]:
    """CPU seconds per live Python thread, by thread name (numbered pool threads grouped by prefix)."""
    import threading

    tick = os.sysconf("SC_CLK_TCK")
    out: dict[str, float] = {}
    for th in threading.enumerate():
        try:
            with open(f"/proc/self/task/{th.native_id}/stat") as f:
                fields = f.read().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        name = th.name.split("_")[0].rstrip("0123456789-") or th.name
        out[name] = out.get(name, 0.0) + (int(fields[11]) + int(fields[12])) / tick
    return out


class ProbeSink:
    """Records, per analysed frame, ingest-to-metric and due-to-metric latencies (FrameSink protocol)."""

    def __init__(self) -> None:
        self.samples: list[tuple[int, float, float]] = []  # (wall ns, ingest→metric ms, due→metric ms)

    async def start(self) -> None:
        pass

    async def on_frames(self, results: list[Any]) -> None:
        now = time.time_ns()
        for r in results:
            self.samples.append((now, (now - r.received_ns) / 1e6, (now - r.t_end_ns) / 1e6))

    async def stop(self) -> None:
        pass


def _timed(on_frames: Any, probe: ProbeSink) -> Any:
    """Wrap a sink's ``on_frames`` so that ``probe`` records each batch when the sink has finished with it."""
    async def wrapped(results: list[Any]) -> None:
        await on_frames(results)
        await probe.on_frames(results)
    return wrapped


async def _loop_lag(out: list[tuple[int, float]], interval_s: float = 0.01) -> None:
    """Event-loop responsiveness: how late a 10 ms sleep wakes up (a blocked loop delays every source)."""
    loop = asyncio.get_running_loop()
    while True:
        t = loop.time()
        await asyncio.sleep(interval_s)
        out.append((time.time_ns(), (loop.time() - t - interval_s) * 1e3))


def histogram_buckets(text: str, name: str) -> dict[float, float]:
    """Cumulative bucket counts ``{le: count}`` of a Prometheus histogram in an exposition text."""
    buckets: dict[float, float] = {}
    for line in text.splitlines():
        if line.startswith(f"{name}_bucket{{"):
            le = line.split('le="', 1)[1].split('"', 1)[0]
            buckets[math.inf if le == "+Inf" else float(le)] = float(line.rsplit(" ", 1)[1])
    return buckets


def histogram_quantile(before: dict[float, float], after: dict[float, float], q: float) -> float:
    """Upper bucket bound (s) holding quantile ``q`` of the observations between two scrapes."""
    delta = sorted((le, count - before.get(le, 0.0)) for le, count in after.items())
    if not delta or delta[-1][1] <= 0:
        return math.nan
    total = delta[-1][1]
    return next(le for le, count in delta if count >= q * total)


def bench_bearing(plan: int) -> dict[str, float]:
    """Bearing geometry number ``plan`` of the benchmark's points (0: the pumps' own; others differ in element
    count and ball diameter, so each makes a distinct analysis plan)."""
    if plan == 0:
        return {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04, "contact_angle_deg": 0.0}
    return {"elements": 7 + plan % 5, "ball_diameter_mm": 6.0 + 0.05 * (plan // 5 % 40),
            "pitch_diameter_mm": 39.04 + 2.0 * (plan // 200), "contact_angle_deg": 0.0}


def bench_config(port: int, channels: int, overlap: float, state_dir: str,
                 shard: tuple[int, int] | None = None, plans: int = 1, estimated: bool = False) -> Any:
    """The configuration of one benchmark instance: ``channels`` points of one pump each, all on one broker.
    Point ``c`` has bearing geometry ``c % plans`` (:func:`bench_bearing`): ``plans`` distinct analysis plans,
    which differ only in the bearing (so the daemon's batches mix them).

    With ``shard = (index, count)`` the instance owns the points of its hash shard (``[site] shard``) and, as the
    README advises for sharded instances, subscribes to its own sensors' topics only, so the broker splits the
    traffic too."""
    from edgevib.daemon.config import parse_config
    from edgevib.daemon.shard import shard_of

    owned = range(channels) if shard is None else \
        [c for c in range(channels) if shard_of(point_id(c), shard[1]) == shard[0]]
    topics = ["bench/+/block"] if shard is None else [TOPIC.format(sensor=sensor_id(c)) for c in owned]
    site: dict[str, Any] = {"name": "quarry-lane-bench", "state_dir": state_dir}
    if shard is not None:
        site["shard"] = {"index": shard[0], "count": shard[1]}
    doc: dict[str, Any] = {
        "site": site,
        "logging": {"level": "warning", "format": "json"},
        "analysis": {"frame_samples": BLOCK, "overlap": overlap, "queue_frames": 4, "workers": 1},
        "sources": [{"name": "bench-broker", "type": "mqtt", "url": f"mqtt://127.0.0.1:{port}",
                     "client_id": f"edgevib-bench-{os.getpid()}", "qos": 0, "topics": topics}],
        "machines": [{"id": f"P-{c:04d}", "group": 2, "support": "rigid",
                      **({"speed_range_rpm": [900.0, 3000.0]} if estimated else {"speed_rpm": 1480.0})}
                     for c in range(channels)],
        "points": [{"id": point_id(c), "machine": f"P-{c:04d}", "axis": "horizontal",
                    "source": "bench-broker", "sensor": sensor_id(c), "fs_hz": FS_HZ, "block_samples": BLOCK,
                    "sensor_type": "piezo", "bandwidth_hz": [0.5, 10000.0],
                    "bearing": bench_bearing(c % plans)}
                   for c in range(channels)],
    }
    return parse_config(doc, base_dir=state_dir)


def point_id(channel: int) -> str:
    return f"P-{channel:04d}-DE-H"


@dataclass
class Row:
    channels: int
    instance: int
    instances: int
    sustained: bool
    frames_per_s: float
    expected_frames_per_s: float
    latency_p50_ms: float
    latency_p99_ms: float
    hist_p99_le_ms: float
    e2e_p99_ms: float
    alarm_p99_ms: float
    sink_dropped: int
    dropped: int
    rejected: int
    cpu_cores: float
    rss_mb: float
    mem_per_channel_mb: float
    seconds: float
    slow_frames: int
    slow_seconds: int
    loop_lag_max_ms: float
    slow_at_s: list[int]
    lag_at_s: list[float]
    thread_cores: dict[str, float]
    publish_lag_p99_ms: float = math.nan
    publisher_cores: float = math.nan
    faults_per_frame: float = math.nan
    exposition_ms: float = math.nan
    exposition_ref_ms: float = math.nan


def _warm_up_analysis(overlap: float) -> None:
    """Load the numerical core (imports, FFT plans) before the memory baseline."""
    cfg = bench_config(1883, 1, overlap, tempfile.gettempdir())
    plan = cfg.plan(cfg.points[0].id)
    from edgevib.pipelines.analysis import analyze_frames

    analyze_frames(channel_signal(0, 0)[None, :], plan, shaft_hz=None)


M_TRIM_THRESHOLD, M_MMAP_THRESHOLD = -1, -3  # glibc's mallopt parameters (malloc.h)


def keep_freed_memory(trim_mb: int = 512, mmap_mb: int = 32) -> bool:
    """Diagnostic: glibc keeps freed memory for reuse (``mallopt``: trim threshold ``trim_mb``, every block under
    ``mmap_mb`` from the heap) instead of handing it back and faulting it in again.

    By default glibc returns the top of the heap once more than twice the largest recently freed block lies free
    there, and allocates blocks above a moving threshold with ``mmap``: a process whose working set is several
    array temporaries of a few MB (an analysis batch) can fault every page of them in on every call, and a page
    fault costs microseconds on a virtual machine.  Returns whether the settings took (False off glibc).
    """
    import ctypes
    import ctypes.util

    name = ctypes.util.find_library("c")
    if name is None:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return bool(mallopt(M_TRIM_THRESHOLD, trim_mb << 20)) and bool(mallopt(M_MMAP_THRESHOLD, mmap_mb << 20))


@dataclass(frozen=True)
class InstanceSpec:
    """What one daemon instance process runs (picklable for the ``spawn`` start method)."""

    port: int
    channels: int
    overlap: float
    shard: tuple[int, int] | None
    seconds: float
    alarms: bool
    cpu: int | None
    uvloop: bool = False
    keep_freed: bool = False
    switch_interval_s: float | None = None
    plans: int = 1
    estimated: bool = False


def _instance_main(spec: InstanceSpec, out: Any, ctl: Any) -> None:
    """A daemon instance in its own process: its CPU time and memory are the daemon's alone."""
    if spec.cpu is not None:
        os.sched_setaffinity(0, {spec.cpu})
    from edgevib.daemon.logs import configure_logging

    configure_logging("error", "json", stream=sys.stderr)
    if spec.keep_freed:
        keep_freed_memory()
    if spec.switch_interval_s is not None:  # diagnostic: how soon a thread waiting for the interpreter lock gets it
        sys.setswitchinterval(spec.switch_interval_s)
    _warm_up_analysis(spec.overlap)
    if spec.uvloop:  # diagnostic: the same daemon on uvloop's event loop (not a dependency of edgevib)
        import uvloop  # type: ignore[import-not-found,unused-ignore]

        asyncio.set_event_loop_policy(uvloop.EventLoopPolicy())
    try:
        row = asyncio.run(_run_instance(spec, out, ctl))
    except BaseException as exc:
        out.put({"error": f"{type(exc).__name__}: {exc}"})
        raise
    out.put({"row": asdict(row)})


async def _run_instance(spec: InstanceSpec, out: Any, ctl: Any) -> Row:
    from prometheus_client import CollectorRegistry

    from edgevib.daemon.app import Daemon

    state_dir = tempfile.mkdtemp(prefix="edgevib-bench-state-")
    config = bench_config(spec.port, spec.channels, spec.overlap, state_dir, spec.shard, spec.plans,
                          spec.estimated)
    own = len(config.points)
    rss_base = _rss_mb()
    registry = CollectorRegistry()
    daemon = Daemon(config, registry=registry, metrics_listen=("127.0.0.1", 0))
    if not spec.alarms:  # diagnostic: the pipeline and the exposition without the alarm layer
        daemon.sinks = [s for s in daemon.sinks if not type(s).__module__.startswith("edgevib.daemon.alarms")]
    probe = ProbeSink()  # right after the Prometheus sink: the indicators are in the exposition
    daemon.sinks.insert(daemon.sinks.index(daemon.metrics) + 1, probe)
    probe_alarm = ProbeSink()  # when the alarm layer has processed and committed a batch
    for sink in daemon.sinks:
        if type(sink).__module__.startswith("edgevib.daemon.alarms"):
            setattr(sink, "on_frames", _timed(sink.on_frames, probe_alarm))  # noqa: B010 (a method, wrapped)
    await daemon.start()
    lags: list[tuple[int, float]] = []
    ticker = asyncio.create_task(_loop_lag(lags))
    scraper: Scraper | None = None
    try:
        deadline = time.monotonic() + 15
        while not daemon.stats.connected.get("bench-broker"):
            if time.monotonic() > deadline:
                raise SystemExit("the daemon did not connect to the benchmark broker")
            await asyncio.sleep(0.05)
        await asyncio.sleep(0.3)  # the subscription is in place
        scraper = Scraper(daemon.metrics.url or "")
        out.put({"ready": os.getpid()})
        window_start_ns, window_end_ns = await asyncio.to_thread(ctl.get, True, 300)
        # a daemon in operation is scraped all along: the first scrape's one-off work (label strings prepared
        # for every point, then kept) is done before the window, once every point has had its first frames
        await asyncio.sleep(max(0.0, (window_start_ns - WARM_SCRAPE_BEFORE_NS - time.time_ns()) / 1e9))
        await asyncio.to_thread(scraper.buckets, _HIST)
        await asyncio.sleep(max(0.0, (window_start_ns - time.time_ns()) / 1e9))
        cpu0, dropped0, t0 = _cpu_s(), sum(daemon.stats.frames_dropped.values()), time.time_ns()
        faults0 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
        threads0 = thread_cpu_s()
        hist0 = await asyncio.to_thread(scraper.buckets, _HIST)
        await asyncio.sleep(max(0.0, (window_end_ns - time.time_ns()) / 1e9))
        cpu1, dropped1, t1 = _cpu_s(), sum(daemon.stats.frames_dropped.values()), time.time_ns()
        faults1 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
        threads1 = thread_cpu_s()
        hist1 = await asyncio.to_thread(scraper.buckets, _HIST)
        rss_end = _rss_mb()
        exposition_ms, exposition_ref_ms = await asyncio.to_thread(_exposition_ms, registry)
    finally:
        ticker.cancel()
        if scraper is not None:
            scraper.close()
        await daemon.stop()
        shutil.rmtree(state_dir, ignore_errors=True)
    window = [(lat, e2e) for t, lat, e2e in probe.samples if window_start_ns <= t < window_end_ns]
    wall_s = (t1 - t0) / 1e9
    lat = np.asarray([w[0] for w in window]) if window else np.full(1, math.nan)
    e2e = np.asarray([w[1] for w in window]) if window else np.full(1, math.nan)
    frames_per_s = len(window) / spec.seconds
    hop = config.points[0].hop_samples
    expected = own * FS_HZ / hop
    rejected = sum(daemon.stats.blocks_rejected.values())
    dropped = dropped1 - dropped0
    p99 = float(np.percentile(lat, 99))
    slow = [t for t, a, _ in probe.samples if window_start_ns <= t < window_end_ns and a > P99_TARGET_MS]
    loop_lag = [g for t, g in lags if window_start_ns <= t < window_end_ns] or [math.nan]
    after_alarm = [a for t, a, _ in probe_alarm.samples if window_start_ns <= t < window_end_ns] or [math.nan]
    return Row(
        channels=own, instance=0 if spec.shard is None else spec.shard[0],
        instances=1 if spec.shard is None else spec.shard[1],
        sustained=bool(frames_per_s >= 0.97 * expected and dropped == 0 and rejected == 0 and p99 < P99_TARGET_MS),
        frames_per_s=round(frames_per_s, 1), expected_frames_per_s=round(expected, 1),
        latency_p50_ms=round(float(np.percentile(lat, 50)), 1), latency_p99_ms=round(p99, 1),
        hist_p99_le_ms=round(histogram_quantile(hist0, hist1, 0.99) * 1e3, 1),
        e2e_p99_ms=round(float(np.percentile(e2e, 99)), 1),
        alarm_p99_ms=round(float(np.percentile(after_alarm, 99)), 1),
        sink_dropped=sum(daemon.stats.sink_dropped.values()), dropped=dropped, rejected=rejected,
        cpu_cores=round((cpu1 - cpu0) / wall_s, 2), rss_mb=round(rss_end, 1),
        mem_per_channel_mb=round((rss_end - rss_base) / max(1, own), 3), seconds=round(wall_s, 1),
        slow_frames=len(slow), slow_seconds=len({t // 1_000_000_000 for t in slow}),
        loop_lag_max_ms=round(max(loop_lag), 1),
        slow_at_s=sorted({(t - window_start_ns) // 1_000_000_000 for t in slow}),
        lag_at_s=[round((t - window_start_ns) / 1e9, 2) for t, g in lags
                  if window_start_ns <= t < window_end_ns and g > 100.0],
        thread_cores={k: round((v - threads0.get(k, 0.0)) / wall_s, 2) for k, v in threads1.items()},
        faults_per_frame=round((faults1 - faults0) / max(1, len(window)), 1),
        exposition_ms=round(exposition_ms, 1), exposition_ref_ms=round(exposition_ref_ms, 1))


def _exposition_ms(registry: Any, repeats: int = 3) -> tuple[float, float]:
    """CPU time (this thread) of encoding the daemon's whole ``/metrics`` exposition once (the text format, as a
    scrape without an OpenMetrics ``Accept`` gets it) and of the same by prometheus_client's ``generate_latest``,
    alternately, the least of a few each (ms)."""
    from prometheus_client import generate_latest

    from edgevib.daemon.sinks.prometheus import encode_text

    best = [math.inf, math.inf]
    for _ in range(repeats):
        for i, encode in enumerate((encode_text, generate_latest)):
            t0 = time.thread_time()
            encode(registry)
            best[i] = min(best[i], time.thread_time() - t0)
    return best[0] * 1e3, best[1] * 1e3


def _get(q: Any, timeout_s: float, procs: list[Any]) -> dict[str, Any]:
    """The next message on ``q``; fails when a child process died instead of answering."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            msg: dict[str, Any] = q.get(timeout=0.5)
        except queue.Empty:
            dead = [p for p in procs if p.exitcode not in (None, 0)]
            if dead or time.monotonic() > deadline:
                raise SystemExit(f"a benchmark process failed or did not answer (exit codes "
                                 f"{[p.exitcode for p in procs]})") from None
            continue
        if "error" in msg:
            raise SystemExit(f"a daemon instance failed: {msg['error']}")
        return msg


def run_level(broker: Broker, channels: int, seconds: float, warmup_s: float, overlap: float, publishers: int,
              qos: int, seed: int, alarms: bool = True, instances: int = 1, cpu: int | None = None,
              uvloop: bool = False, danger: bool = False, keep_freed: bool = False,
              switch_interval_s: float | None = None, plans: int = 1, estimated: bool = False) -> list[Row]:
    """One load level: ``instances`` daemon processes (hash shards when more than one) and publisher processes
    streaming ``channels`` channels through ``broker``; one :class:`Row` per instance."""
    ctx = mp.get_context("spawn")
    out_i, out_p, go = ctx.Queue(), ctx.Queue(), ctx.Queue()
    ctls = [ctx.Queue() for _ in range(instances)]
    inst: list[Any] = []
    pubs: list[Any] = []
    try:
        for i in range(instances):
            spec = InstanceSpec(port=broker.port, channels=channels, overlap=overlap,
                                shard=None if instances == 1 else (i, instances), seconds=seconds, alarms=alarms,
                                cpu=None if cpu is None else (cpu + i) % (os.cpu_count() or 1), uvloop=uvloop,
                                keep_freed=keep_freed, switch_interval_s=switch_interval_s, plans=plans,
                                estimated=estimated)
            p = ctx.Process(target=_instance_main, args=(spec, out_i, ctls[i]), daemon=True)
            p.start()
            inst.append(p)
        for _ in inst:  # every instance connected and subscribed
            _get(out_i, 120, inst)
        n_pub = max(1, min(publishers, channels))
        duration_ns = round((warmup_s + seconds) * 1e9) + 2 * PERIOD_NS
        for i in range(n_pub):
            p = ctx.Process(target=_publisher, daemon=True,
                            args=(broker.port, list(range(i, channels, n_pub)), channels, duration_ns, qos, seed,
                                  out_p, go, danger))
            p.start()
            pubs.append(p)
        for _ in pubs:  # every publisher connected and encoded its payloads
            _get(out_p, 120, pubs)
        start_ns = time.time_ns() + 300_000_000
        for _ in pubs:
            go.put(start_ns)
        window_start_ns = start_ns + round(warmup_s * 1e9) + PERIOD_NS
        window_end_ns = window_start_ns + round(seconds * 1e9)
        for c in ctls:
            c.put((window_start_ns, window_end_ns))
        rows = [Row(**_get(out_i, warmup_s + seconds + 120, inst)["row"]) for _ in inst]
        stats = [_get(out_p, 60, pubs) for _ in pubs]
    finally:
        for p in [*inst, *pubs]:
            p.join(15)
            if p.is_alive():
                p.kill()
                p.join(5)
    rows.sort(key=lambda r: r.instance)
    for r in rows:
        r.publish_lag_p99_ms = round(max(s["lag_p99_ms"] for s in stats), 1)
        r.publisher_cores = round(sum(s["cpu_cores"] for s in stats), 2)
    return rows


_SCRAPER = """import struct, sys, urllib.request
for url in sys.stdin:
    try:
        with urllib.request.urlopen(url.strip(), timeout=10) as r:
            body, status = r.read(), 0
    except Exception as exc:
        body, status = repr(exc).encode(), 1
    sys.stdout.buffer.write(struct.pack("<BI", status, len(body)) + body)
    sys.stdout.buffer.flush()
"""


class Scraper:
    """A process of its own that fetches the daemon's ``/metrics`` when asked, as a Prometheus server would: started
    once, before the window (a Python process started per scrape would load the box while the window runs), and
    outside the daemon (a client in the daemon's process would take its interpreter lock and its event loop's
    time to read and parse the whole exposition).  :meth:`buckets` blocks: call it from a worker thread."""

    def __init__(self, url: str) -> None:
        self.url = url.rstrip("/") + ("" if url.endswith("/metrics") else "/metrics")
        self._proc = subprocess.Popen([sys.executable, "-c", _SCRAPER], stdin=subprocess.PIPE,
                                      stdout=subprocess.PIPE)

    def buckets(self, name: str) -> dict[float, float]:
        """The histogram ``name`` of one scrape."""
        assert self._proc.stdin is not None and self._proc.stdout is not None
        self._proc.stdin.write(self.url.encode() + b"\n")
        self._proc.stdin.flush()
        head = self._proc.stdout.read(5)
        if len(head) < 5:
            raise SystemExit(f"the scraper of {self.url} ended")
        status, size = struct.unpack("<BI", head)
        body = self._proc.stdout.read(size)
        if status:
            raise SystemExit(f"scraping {self.url} failed: {body.decode(errors='replace')[-500:]}")
        return histogram_buckets(body.decode("utf-8"), name)

    def close(self) -> None:
        with contextlib.suppress(OSError):
            if self._proc.stdin is not None:
                self._proc.stdin.close()
        try:
            self._proc.wait(10)
        except subprocess.TimeoutExpired:
            self._proc.kill()
            self._proc.wait(5)


# ------------------------------------------------------------------------------------------- the command


def _channels(text: str) -> list[int]:
    try:
        levels = [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a comma-separated list of channel counts") from None
    if not levels or any(not 1 <= n <= 1000 for n in levels):
        raise argparse.ArgumentTypeError(f"channel counts {text!r} must be in 1..1000 (the points limit)")
    return levels


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m edgevib.bench.daemon", description=__doc__.split("\n\n")[0])
    p.add_argument("--channels", type=_channels, default=[200],
                   help="channel count, or a comma-separated list of counts to run one after another (default 200)")
    p.add_argument("--instances", type=int, default=1,
                   help="daemon instances sharing the channels by hash shards, each in its own process (default 1)")
    p.add_argument("--seconds", type=float, default=20.0, help="measurement window per level (default 20)")
    p.add_argument("--warmup", type=float, default=3.0, help="seconds of streaming before measuring (default 3)")
    p.add_argument("--overlap", type=float, default=0.0, help="frame overlap 0 <= x < 1 (default 0)")
    p.add_argument("--publishers", type=int, default=2, help="publisher processes (default 2)")
    p.add_argument("--qos", type=int, choices=(0, 1), default=0)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--plans", type=int, default=1, metavar="K",
                   help="distinct bearing geometries cycled over the points, hence K analysis plans (default 1: "
                        "every point on one plan; a plant's points differ, and the daemon batches them alike)")
    p.add_argument("--estimated", action="store_true",
                   help="machines without a fixed speed (speed_range_rpm 900-3000): every frame's shaft speed is "
                        "estimated from its spectrum, as for variable-speed drives without a speed tag")
    p.add_argument("--cpu", type=int, default=None,
                   help="pin the daemon instance's process to this CPU core (instance i to core N+i)")
    p.add_argument("--without-alarms", action="store_true",
                   help="diagnostic: run the daemon without its alarm layer (to see what the alarm layer costs)")
    p.add_argument("--danger", action="store_true",
                   help="every pump in ISO zone D from the start: an alarm and a waveform capture on every point "
                        "at once (default: zone B, the alarm layer judging every frame and raising nothing)")
    p.add_argument("--uvloop", action="store_true",
                   help="diagnostic: run the daemon on uvloop's event loop (needs uvloop installed)")
    p.add_argument("--keep-freed-memory", action="store_true",
                   help="diagnostic: the daemon's glibc keeps freed memory for reuse instead of faulting it in "
                        "again (mallopt; see keep_freed_memory)")
    p.add_argument("--switch-interval", type=float, default=None, metavar="S",
                   help="diagnostic: the daemon's interpreter switch interval in seconds (sys.setswitchinterval; "
                        "Python's default 0.005): how long a thread, the event loop after a system call included, "
                        "may wait for the interpreter lock while another thread runs Python code")
    p.add_argument("--json", action="store_true", help="print JSON rows and a summary instead of a table")
    return p


def level_summary(rows: list[Row]) -> dict[str, Any]:
    """One load level over all its instances: channels, frames and cores add up; the worst latency counts."""
    cores = sum(r.cpu_cores for r in rows)
    channels = sum(r.channels for r in rows)
    return {"channels": channels, "instances": len(rows), "sustained": all(r.sustained for r in rows),
            "frames_per_s": round(sum(r.frames_per_s for r in rows), 1),
            "expected_frames_per_s": round(sum(r.expected_frames_per_s for r in rows), 1),
            "latency_p99_ms": max(r.latency_p99_ms for r in rows), "dropped": sum(r.dropped for r in rows),
            "rejected": sum(r.rejected for r in rows), "cpu_cores": round(cores, 2),
            "channels_per_core": round(channels / cores, 1) if cores > 0 else math.nan,
            # what the CPU actually did: channels' worth of frames analysed per core-second (a capacity figure
            # that holds even when a starved level is not sustained)
            "analysed_channels_per_core": round(sum(r.channels * r.frames_per_s / r.expected_frames_per_s
                                                    for r in rows) / cores, 1) if cores > 0 else math.nan,
            "mem_per_channel_mb": round(sum(r.mem_per_channel_mb * r.channels for r in rows) / max(1, channels), 3),
            "faults_per_frame": round(sum(r.faults_per_frame * r.frames_per_s for r in rows)
                                      / max(1e-9, sum(r.frames_per_s for r in rows)), 1),
            "publisher_cores": rows[0].publisher_cores}


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if args.seconds <= 0 or args.warmup < 0 or not 0 <= args.overlap < 1 or args.publishers < 1 \
            or not 1 <= args.instances <= 16 or (args.switch_interval is not None and args.switch_interval <= 0) \
            or args.plans < 1:
        print("error: --seconds must be > 0, --warmup >= 0, 0 <= --overlap < 1, --publishers >= 1, "
              "1 <= --instances <= 16, --switch-interval > 0, --plans >= 1", file=sys.stderr)
        return 2
    broker = Broker()
    levels: list[list[Row]] = []
    try:
        for n in args.channels:
            rows = run_level(broker, n, args.seconds, args.warmup, args.overlap, args.publishers, args.qos,
                             args.seed, alarms=not args.without_alarms, instances=args.instances, cpu=args.cpu,
                             uvloop=args.uvloop, danger=args.danger, keep_freed=args.keep_freed_memory,
                             switch_interval_s=args.switch_interval, plans=args.plans, estimated=args.estimated)
            levels.append(rows)
            if not args.json:
                _print_level(rows, header=len(levels) == 1)
    finally:
        broker.close()
    summaries = [level_summary(rows) for rows in levels]
    sustained = max((s["channels"] for s in summaries if s["sustained"]), default=0)
    if args.json:
        print(json.dumps({"rows": [asdict(r) for rows in levels for r in rows], "levels": summaries,
                          "sustained_channels": sustained, "instances": args.instances,
                          "fs_hz": FS_HZ, "block_samples": BLOCK, "overlap": args.overlap, "workers": 1,
                          "p99_target_ms": P99_TARGET_MS, "cpu_count": os.cpu_count(),
                          "alarms": not args.without_alarms, "uvloop": args.uvloop, "danger": args.danger,
                          "keep_freed_memory": args.keep_freed_memory,
                          "switch_interval_s": args.switch_interval or sys.getswitchinterval(),
                          "plans": args.plans, "estimated": args.estimated},
                         indent=2))
    else:
        print(f"sustained channels: {sustained} over {args.instances} instance(s) (target: >= 1000 channels per "
              f"core of the daemon's own CPU, p99 < {P99_TARGET_MS:g} ms, no drops)")
    return 0


_COLUMNS = [("channels", 6), ("instance", 4), ("sustained", 9), ("frames_per_s", 8), ("expected_frames_per_s", 8),
            ("latency_p50_ms", 7), ("latency_p99_ms", 7), ("hist_p99_le_ms", 7), ("e2e_p99_ms", 7),
            ("alarm_p99_ms", 7), ("dropped", 7), ("rejected", 8), ("cpu_cores", 6), ("mem_per_channel_mb", 8),
            ("publisher_cores", 8)]
_HEADS = {"channels": "chan", "instance": "inst", "sustained": "sustained", "frames_per_s": "frm/s",
          "expected_frames_per_s": "need/s", "latency_p50_ms": "p50 ms", "latency_p99_ms": "p99 ms",
          "hist_p99_le_ms": "hist99", "e2e_p99_ms": "e2e99", "alarm_p99_ms": "alarm99", "dropped": "dropped",
          "rejected": "rejected", "cpu_cores": "cores", "mem_per_channel_mb": "MB/chan", "publisher_cores": "pub cores"}


def _print_level(rows: list[Row], header: bool) -> None:
    if header:
        print(" ".join(_HEADS[k].rjust(w) for k, w in _COLUMNS))
    for row in rows:
        d = asdict(row)
        print(" ".join(str(d[k]).rjust(w) for k, w in _COLUMNS), flush=True)
        print("      threads (cores): " + ", ".join(f"{k} {v}" for k, v in sorted(row.thread_cores.items())
                                                    if v >= 0.005) + f"; page faults per frame {row.faults_per_frame}"
              f"; /metrics exposition {row.exposition_ms} ms of CPU per scrape (prometheus_client's "
              f"generate_latest {row.exposition_ref_ms} ms)",
              flush=True)
    if rows:
        s = level_summary(rows)
        print(f"  {s['instances']} instance(s): {s['channels']} channels, {s['frames_per_s']} of "
              f"{s['expected_frames_per_s']} frames/s, p99 {s['latency_p99_ms']} ms, {s['cpu_cores']} cores "
              f"({s['channels_per_core']} channels per core; frames analysed per core-second worth "
              f"{s['analysed_channels_per_core']} channels), {s['mem_per_channel_mb']} MB per channel, "
              f"sustained {s['sustained']}", flush=True)
        print(f"  against the targets: {s['analysed_channels_per_core'] / CHANNELS_PER_CORE_TARGET:.2f} of "
              f"{CHANNELS_PER_CORE_TARGET:g} channels per core, p99 {s['latency_p99_ms'] / P99_TARGET_MS:.2f} × "
              f"{P99_TARGET_MS:g} ms, {s['dropped']} dropped (target 0)", flush=True)


if __name__ == "__main__":
    with contextlib.suppress(KeyboardInterrupt):
        sys.exit(main())
