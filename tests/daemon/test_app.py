"""The daemon end to end in-process: a scripted source → ingest → analysis workers → Prometheus exposition,
health probes, reload keeping state, a failing sink isolated."""

from __future__ import annotations

import asyncio
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from edgevib.common.wire import Block, encode_binary
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import Config, parse_config
from edgevib.daemon.interfaces import FrameResult

FS = 25600.0
BLOCK = 4096
T0 = 1_764_633_600_000_000_000


def config(state_dir: Path, **analysis: Any) -> Config:
    return parse_config(document(state_dir, **analysis))


def document(state_dir: Path, **analysis: Any) -> dict[str, Any]:
    doc = {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": dict({"frame_samples": 16384, "overlap": 0.5, "queue_frames": 4, "workers": 1}, **analysis),
        "sources": [{"name": "scripted", "type": "mqtt", "url": "mqtt://127.0.0.1:1", "topics": ["x/#"]}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1500.0},
                     {"id": "F-201", "speed_range_rpm": [300.0, 1800.0]}],
        "points": [
            {"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "scripted",
             "sensor": "QL-P101-DE-H", "fs_hz": FS, "block_samples": BLOCK,
             "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}},
            {"id": "P-101-DE-V", "machine": "P-101", "axis": "vertical", "source": "scripted",
             "sensor": "QL-P101-DE-V", "fs_hz": FS, "block_samples": BLOCK,
             "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}},
            {"id": "F-201-NDE-V", "machine": "F-201", "axis": "vertical", "source": "scripted",
             "sensor": "QL-F201-NDE-V", "fs_hz": 3200.0, "block_samples": 3200, "sensor_type": "mems",
             "bandwidth_hz": [0.0, 1000.0]},
        ],
    }
    return doc


def sine_block(sensor: str, seq: int, amp_g: float, f_hz: float, fs: float = FS, n: int = BLOCK) -> Block:
    t = (seq * n + np.arange(n)) / fs
    return Block(sensor, seq, T0 + round(seq * n * 1e9 / fs), fs, "g", amp_g * np.sin(2 * np.pi * f_hz * t))


class ScriptedSource:
    """A source the test drives by hand (connected on demand)."""

    def __init__(self, name: str = "scripted") -> None:
        self.name = name
        self.ingest: Any = None
        self._connected = False
        self._stop = asyncio.Event()

    @property
    def connected(self) -> bool:
        return self._connected

    def connect(self) -> None:
        self._connected = True
        self.ingest.connection(self.name, True)

    async def run(self) -> None:
        await self._stop.wait()

    async def stop(self) -> None:
        self._stop.set()


class Probe:
    def __init__(self) -> None:
        self.results: list[FrameResult] = []
        self.event = asyncio.Event()

    async def start(self) -> None: ...

    async def on_frames(self, results: list[FrameResult]) -> None:
        self.results.extend(results)
        self.event.set()

    async def stop(self) -> None: ...


class Broken(Probe):
    async def on_frames(self, results: list[FrameResult]) -> None:
        raise RuntimeError("sink exploded")


def get(url: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as e:
        return e.code, e.read().decode()


async def wait_for(pred: Any, timeout_s: float = 20.0) -> None:
    async with asyncio.timeout(timeout_s):
        while not pred():
            await asyncio.sleep(0.02)


async def start_daemon(cfg: Config) -> tuple[Daemon, ScriptedSource, Probe, CollectorRegistry]:
    src = ScriptedSource()
    registry = CollectorRegistry()
    d = Daemon(cfg, registry=registry, metrics_listen=("127.0.0.1", 0), sources=[src])
    src.ingest = d.ingest
    d.add_sink(Broken())
    probe = Probe()
    d.add_sink(probe)
    await d.start()
    return d, src, probe, registry


async def test_sine_to_metrics_and_probes(tmp_path: Path) -> None:
    d, src, probe, registry = await start_daemon(config(tmp_path))
    try:
        url = d.metrics.url
        assert url is not None
        base = url.rsplit("/", 1)[0]
        assert (await asyncio.to_thread(get, base + "/healthz"))[0] == 200
        code, text = await asyncio.to_thread(get, base + "/readyz")
        assert code == 503 and "scripted" in text
        src.connect()
        assert (await asyncio.to_thread(get, base + "/readyz"))[0] == 200
        for seq in range(8):
            d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 50.0), 0)
            d.ingest.payload("scripted", None, encode_binary(sine_block("QL-P101-DE-V", seq, 0.5, 50.0)), 0)
        for seq in range(6):
            d.ingest.block("scripted", sine_block("QL-F201-NDE-V", seq, 0.2, 40.0, fs=3200.0, n=3200), 0)
        await wait_for(lambda: len({r.point_id for r in probe.results}) == 3
                       and d.stats.frames_analysed["P-101-DE-H"] >= 3 and d.idle)  # idle: every sink has them
        labels = {"site": "quarry-lane", "machine": "P-101", "point": "P-101-DE-H", "axis": "horizontal"}
        v = registry.get_sample_value("edgevib_velocity_rms_meters_per_second", labels)
        # FIELD_NOTES §5: 1 g peak at 50 Hz → 31.22 mm/s peak = 22.07 mm/s r.m.s. (a/(2πf), gₙ = 9.80665 m/s²)
        assert v == pytest.approx(22.07e-3, rel=0.02)
        a = registry.get_sample_value("edgevib_acceleration_rms_meters_per_second_squared", labels)
        assert a == pytest.approx(9.80665 / np.sqrt(2), rel=0.01)  # r.m.s. of a sine = peak/√2
        crest = registry.get_sample_value("edgevib_crest_factor", labels)
        assert crest == pytest.approx(np.sqrt(2), rel=0.01)  # FIELD_NOTES §4: sine crest factor √2
        # 22 mm/s on a group 2 rigid machine is zone D (C/D at 4.5 mm/s, ISO 20816-3)
        assert registry.get_sample_value("edgevib_iso_zone", labels) == 4
        assert registry.get_sample_value("edgevib_shaft_speed_hertz", labels) == pytest.approx(25.0)
        v2 = registry.get_sample_value("edgevib_velocity_rms_meters_per_second", dict(labels, point="P-101-DE-V",
                                                                                         axis="vertical"))
        assert v2 == pytest.approx(v / 2, rel=0.01)
        # the MEMS point: no envelope series at all
        code, text = await asyncio.to_thread(get, url)
        assert code == 200
        assert 'edgevib_velocity_rms_meters_per_second{axis="vertical",machine="F-201"' in text
        assert 'edgevib_envelope_amplitude_meters_per_second_squared{axis="vertical",machine="F-201"' not in text
        assert 'edgevib_build_info{version=' in text
        assert registry.get_sample_value("edgevib_blocks_received_total", {"source": "scripted"}) == 22
        assert registry.get_sample_value("edgevib_source_connected", {"source": "scripted"}) == 1
        assert registry.get_sample_value("edgevib_analysis_latency_seconds_count") >= 3
        assert probe.results and all(r.samples.shape == (16384,) for r in probe.results)
        # each result carries its trend from the start: an exponentially weighted mean of a steady level is that
        # level (definition of the weighted mean, the weights summing to 1)
        for r in probe.results:
            assert r.trend["velocity_rms_mm_s"] == pytest.approx(r.indicators.velocity_rms_mm_s, rel=1e-3)
        # the broken sink did not stop the probe after it
        assert {r.point_id for r in probe.results} == {"P-101-DE-H", "P-101-DE-V", "F-201-NDE-V"}
    finally:
        await d.stop()


def test_each_trended_indicator_reads_its_frame_indicators_field() -> None:
    # the daemon updates a frame's trend from its FrameIndicators before the result is built (app.TRENDED): each
    # trended indicator must read the field of its own name, as the registry does from the result
    from framekit import frame_indicators

    from edgevib.daemon.app import TRENDED
    from edgevib.daemon.indicators import REGISTRY

    assert "velocity_rms_mm_s" in TRENDED
    ind = frame_indicators(**{name: 1.5 + k for k, name in enumerate(TRENDED)})
    r = FrameResult("P-101-DE-H", "P-101", 0, 0, 25600.0, ind, None, np.zeros(4, dtype=np.float32))
    assert [i.value(r) for i in REGISTRY if i.trend] == [1.5 + k for k in range(len(TRENDED))]


async def test_reload_keeps_untouched_points_state(tmp_path: Path) -> None:
    cfg = config(tmp_path)
    d, src, _probe, _registry = await start_daemon(cfg)
    try:
        src.connect()
        for seq in range(3):
            d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 50.0), 0)
            d.ingest.block("scripted", sine_block("QL-P101-DE-V", seq, 1.0, 50.0), 0)
        kept = d.ingest.streams["P-101-DE-H"]
        doc = document(tmp_path)
        doc["points"][1]["velocity_band_hz"] = [20.0, 1000.0]  # DE-V changed
        del doc["points"][2]  # F-201 point removed
        await d.reload(parse_config(doc))
        assert d.ingest.streams["P-101-DE-H"] is kept and kept.buffered_samples == 3 * BLOCK
        assert d.ingest.streams["P-101-DE-V"].buffered_samples == 0
        assert "F-201-NDE-V" not in d.points
        d.ingest.block("scripted", sine_block("QL-P101-DE-H", 3, 1.0, 50.0), 0)
        await wait_for(lambda: d.stats.frames_analysed["P-101-DE-H"] >= 1)
    finally:
        await d.stop()


async def test_analysis_error_is_counted_not_fatal(tmp_path: Path) -> None:
    cfg = config(tmp_path)
    src = ScriptedSource()

    def boom(x: Any, plan: Any, shaft: Any) -> Any:
        raise ValueError("numerical trouble")

    registry = CollectorRegistry()
    d = Daemon(cfg, registry=registry, serve_metrics=False, sources=[src], analyze=boom)
    src.ingest = d.ingest
    await d.start()
    try:
        # Labelled counters exist at 0 from the start, so rate()/increase() see the first error (Prometheus
        # instrumentation practice: initialise the label values you know of).
        assert d.stats.analysis_errors == {p.id: 0 for p in cfg.points}
        assert registry.get_sample_value("edgevib_analysis_errors_total", {"point": "P-101-DE-H"}) == 0.0
        # 4 blocks of 4096 make one 16384-sample frame; 2 more (one hop of 8192), one more frame: each one counted
        for seq in range(4):
            d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 50.0), 0)
        await wait_for(lambda: d.stats.analysis_errors.get("P-101-DE-H", 0) >= 1 and d.idle)
        assert d.stats.analysis_errors == {p.id: int(p.id == "P-101-DE-H") for p in cfg.points}
        for seq in range(4, 6):  # the daemon keeps taking blocks after a failed analysis
            d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 50.0), 0)
        await wait_for(lambda: d.stats.analysis_errors.get("P-101-DE-H", 0) >= 2 and d.idle)
        assert d.stats.analysis_errors == {p.id: 2 * int(p.id == "P-101-DE-H") for p in cfg.points}
        assert d.stats.frames_analysed["P-101-DE-H"] == 0 and not d.latest
        assert d.stats.blocks_received["scripted"] == 6 and not d.stats.blocks_rejected
    finally:
        await d.stop()


def test_one_startup_warning_for_a_point_without_envelope_band(tmp_path: Path) -> None:
    from structlog.testing import capture_logs

    with capture_logs() as logs:
        d = Daemon(config(tmp_path), registry=CollectorRegistry(), serve_metrics=False, sources=[])
        d._build_points(d.config, keep=d.points)  # a rebuild (as on reload) does not warn again
    warnings = [e for e in logs if e["event"] == "no envelope indicators for this point"]
    assert [e["point"] for e in warnings] == ["F-201-NDE-V"]
    assert "1000 Hz" in warnings[0]["reason"]


class Gate(Probe):
    """A sink that blocks inside its first ``on_frames`` until released (a slow historian, a busy alarm layer)."""

    batch_window_s = 0.0  # as a lossless sink: results handed over as they come

    def __init__(self) -> None:
        super().__init__()
        self.release = asyncio.Event()
        self.entered = asyncio.Event()

    async def on_frames(self, results: list[FrameResult]) -> None:
        self.entered.set()
        await self.release.wait()
        await super().on_frames(results)


def frames_of(blocks: int, frame: int = 16384, hop: int = 8192) -> int:
    return (blocks * BLOCK - frame) // hop + 1


async def gated_daemon(tmp_path: Path, **analysis: Any) -> tuple[Daemon, Probe, Gate, Gate]:
    cfg = config(tmp_path, **analysis)
    d = Daemon(cfg, registry=CollectorRegistry(), serve_metrics=False, sources=[])
    probe, lossy, lossless = Probe(), Gate(), Gate()
    d.add_sink(lossy)
    d.add_lossless_sink(lossless)
    d.add_sink(probe)
    await d.start()
    return d, probe, lossy, lossless


async def test_blocked_sinks_do_not_hold_analysis_and_keep_frame_order(tmp_path: Path) -> None:
    from edgevib.daemon.app import SINK_BACKLOG_PER_POINT

    d, probe, lossy, lossless = await gated_daemon(tmp_path, queue_frames=64)
    pid = "P-101-DE-H"
    try:
        # One frame per analysis batch: 4 blocks of 4096 make the first 16384-sample frame, every 2 more the next.
        seq = 0
        total = 12
        for k in range(total):
            for _ in range(4 if k == 0 else 2):
                d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 50.0), 0)
                seq += 1
            # Both gates stay closed, yet each frame is analysed and reaches the other sink.
            await wait_for(lambda n=k + 1: sum(r.point_id == pid for r in probe.results) == n)
        assert lossy.entered.is_set() and lossless.entered.is_set() and not lossy.results
        lossy.release.set()
        lossless.release.set()
        await wait_for(lambda: d.idle)
        for sink in (probe, lossy, lossless):
            t = [r.t_end_ns for r in sink.results if r.point_id == pid]
            assert t == sorted(t) and len(set(t)) == len(t)  # frame order, no repeats
        assert [r.t_end_ns for r in lossless.results] == [r.t_end_ns for r in probe.results]  # lossless: all
        got = [r.t_end_ns for r in lossy.results if r.point_id == pid]
        # the blocked call's frame, then only the newest SINK_BACKLOG_PER_POINT; the older ones dropped and counted
        want = [r.t_end_ns for r in probe.results][:1] + [r.t_end_ns for r in probe.results][-SINK_BACKLOG_PER_POINT:]
        assert got == want
        assert d.stats.sink_dropped[("Gate", pid)] == total - len(want)
    finally:
        lossy.release.set()
        lossless.release.set()
        await d.stop()


async def test_a_lossless_sink_behind_pauses_analysis_and_misses_nothing(tmp_path: Path,
                                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    import edgevib.daemon.app as app

    monkeypatch.setattr(app, "LOSSLESS_BACKLOG", 2)
    d, probe, lossy, lossless = await gated_daemon(tmp_path, queue_frames=4)
    lossy.release.set()
    pid = "P-101-DE-H"
    try:
        blocks = 40
        for seq in range(blocks):
            d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 50.0), 0)
        total = frames_of(blocks)  # 19 frames
        queue = d.ingest.streams[pid].queue
        await wait_for(lambda: d.stats.frames_analysed.get(pid, 0) + d.stats.frames_dropped.get(pid, 0)
                       + len(queue) == total and d._held_back() and not d._batches)
        analysed = d.stats.frames_analysed[pid]
        assert analysed < total and d.stats.frames_dropped.get(pid, 0) > 0  # dropped before analysis, counted
        lossless.release.set()
        await wait_for(lambda: d.idle and not queue)
        seen = [r.t_end_ns for r in lossless.results if r.point_id == pid]
        assert len(seen) == d.stats.frames_analysed[pid] and seen == sorted(seen)  # every analysed frame, in order
        assert [r.t_end_ns for r in probe.results if r.point_id == pid] == seen
    finally:
        lossless.release.set()
        await d.stop()


async def test_machine_state_and_sensor_health_travel_with_the_results(tmp_path: Path) -> None:
    # P-101 has a fixed speed: the daemon knows standstill only from the level (ISO 20816 velocity r.m.s. of a
    # 1 g, 50 Hz sine is 1 g·9.80665/(2π·50)/√2 = 22 mm/s, far above the 0.2 mm/s run threshold; 1 µg of noise is
    # far below, yet above the 10 µg flatline floor).  A standing machine's frames carry no orders or bearing
    # families: absent, not zero.
    d, src, probe, registry = await start_daemon(config(tmp_path, queue_frames=64))
    try:
        src.connect()
        rng = np.random.default_rng(0)
        for seq in range(8):
            d.ingest.block("scripted", sine_block("QL-P101-DE-H", seq, 1.0, 25.0), 0)
        # standing for 6.4 s: longer than the 3 s (and 3 frames) a stop must last to be told ([alarms] run_dwell_s)
        for seq in range(8, 48):
            b = sine_block("QL-P101-DE-H", seq, 0.0, 25.0)
            d.ingest.block("scripted", Block(b.sensor_id, b.seq, b.t0_ns, b.fs_hz, "g",
                                             1e-4 * rng.standard_normal(BLOCK)), 0)
        await wait_for(lambda: d.stats.frames_analysed["P-101-DE-H"] >= 23 and d.idle)
        mine = [r for r in probe.results if r.point_id == "P-101-DE-H"]
        states = [r.machine_state.state if r.machine_state else None for r in mine]
        assert states[0] == "running" and states[-1] == "stopped"
        for r in mine:
            assert r.health is not None  # checked in the analysis workers
            if r.machine_state is not None and r.machine_state.state == "running":
                assert set(r.indicators.orders_mm_s) == {"0.5x", "1x", "2x", "3x"} and r.health.ok
            else:
                assert r.indicators.orders_mm_s == {} and r.indicators.envelope == {}
        assert registry.get_sample_value("edgevib_machine_state",
                                         {"site": "quarry-lane", "machine": "P-101", "state": "stopped"}) == 1.0
        assert registry.get_sample_value("edgevib_machine_state",
                                         {"site": "quarry-lane", "machine": "P-101", "state": "running"}) == 0.0
        assert sum(d.stats.analysis_errors.values()) == 0
    finally:
        await d.stop()


class _Reference:
    """The lossy sink queue in its plain form (the module docstring's rules): a deque per point in the order the
    points first came, the oldest results dropped beyond max(SINK_BACKLOG_PER_POINT, the new batch's own)."""

    def __init__(self) -> None:
        self.per_point: dict[str, list[tuple[str, int]]] = {}
        self.dropped: dict[str, int] = {}

    def put(self, batch: list[tuple[str, int]], keep: int) -> None:
        new: dict[str, int] = {}
        for pid, seq in batch:
            new[pid] = new.get(pid, 0) + 1
            self.per_point.setdefault(pid, []).append((pid, seq))
        for pid, n_new in new.items():
            q = self.per_point[pid]
            excess = len(q) - max(keep, n_new)
            if excess > 0:
                del q[:excess]
                self.dropped[pid] = self.dropped.get(pid, 0) + excess

    def take(self) -> list[tuple[str, int]]:
        out = [r for q in self.per_point.values() for r in q]
        self.per_point.clear()
        return out


@settings(max_examples=300, deadline=None)
@given(steps=st.lists(st.one_of(st.none(), st.lists(st.sampled_from("abcdef"), max_size=12)), max_size=25))
async def test_a_lossy_sink_queue_keeps_and_drops_as_the_plain_rules_say(steps: list[list[str] | None]) -> None:
    from types import SimpleNamespace

    from edgevib.daemon.app import SINK_BACKLOG_PER_POINT, SinkChannel
    from edgevib.daemon.frames import Stats

    stats = Stats()
    ch = SinkChannel(SimpleNamespace(), stats, None, lambda: None)  # type: ignore[arg-type]  # no task started
    ref = _Reference()
    seq = 0
    for step in steps:  # None: the sink takes everything queued
        if step is None:
            assert [(r.point_id, r.t_end_ns) for r in ch._take()] == ref.take()
            continue
        batch = [(pid, seq + i) for i, pid in enumerate(step)]
        seq += len(step)
        ch.put([FrameResult(pid, "M", t, 0, FS, None, None, np.zeros(0, np.float32))  # type: ignore[arg-type]
                for pid, t in batch])
        ref.put(batch, SINK_BACKLOG_PER_POINT)
        assert ch.backlog == sum(len(q) for q in ref.per_point.values())
    assert [(r.point_id, r.t_end_ns) for r in ch._take()] == ref.take()
    assert {pid: n for (_, pid), n in stats.sink_dropped.items()} == ref.dropped


async def test_the_collector_runs_less_often_while_the_daemon_runs_and_as_before_after(tmp_path: Path) -> None:
    # Python's gc.get_threshold / gc.set_threshold (the process's setting): raised for the youngest generation
    # while the daemon runs, never lowered, and the setting before start restored at stop
    import gc

    from edgevib.daemon.app import YOUNG_COLLECTION_THRESHOLD

    before = gc.get_threshold()
    try:
        for young in (700, 50_000):
            gc.set_threshold(young, before[1], before[2])
            d = Daemon(config(tmp_path), registry=CollectorRegistry(), serve_metrics=False, sources=[])
            await d.start()
            try:
                assert gc.get_threshold() == (max(young, YOUNG_COLLECTION_THRESHOLD), before[1], before[2])
            finally:
                await d.stop()
            assert gc.get_threshold() == (young, before[1], before[2])
    finally:
        gc.set_threshold(*before)
