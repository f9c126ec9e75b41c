"""Analysis batching: frames that arrive close together are analysed in one call (the pipeline's fixed cost per
call is paid once), a point's frames stay in order, and nothing queued is left behind."""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import numpy as np
from prometheus_client import CollectorRegistry

from edgevib.common.wire import Block
from edgevib.daemon.app import BATCH_WINDOW_S, MAX_BATCH, Daemon
from edgevib.daemon.config import Config, parse_config
from edgevib.pipelines.analysis import analyze_frames

FS = 25600.0
N = 16384
T0 = 1_764_633_600_000_000_000


def config(state_dir: Path, points: int, machines: tuple[str, ...] = ("P-101",)) -> Config:
    """``points`` points shared evenly by ``machines``, in that order (``P-101-00``…), sensors ``QL-00``…"""
    per = points // len(machines)
    return parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": N, "overlap": 0.0, "queue_frames": 4, "workers": 1},
        "alarms": {"enabled": False},
        "sources": [{"name": "scripted", "type": "mqtt", "url": "mqtt://127.0.0.1:1", "topics": ["x/#"]}],
        "machines": [{"id": m, "group": 2, "support": "rigid", "speed_rpm": 1500.0} for m in machines],
        "points": [{"id": f"{machines[i // per]}-{i % per:02d}", "machine": machines[i // per], "source": "scripted",
                    "sensor": f"QL-{i:02d}", "fs_hz": FS, "block_samples": N} for i in range(points)],
    })


def probe(daemon: Daemon) -> list[Any]:
    """The results the daemon delivers to its sinks, in order (a sink added to ``daemon``)."""
    seen: list[Any] = []

    class Probe:
        async def start(self) -> None: ...
        async def stop(self) -> None: ...
        async def on_frames(self, results: list[Any]) -> None:
            seen.extend(results)

    daemon.add_sink(Probe())
    return seen


class Recorder:
    """An analysis function that records each call's frames (point order) and runs the real pipeline."""

    def __init__(self) -> None:
        self.calls: list[int] = []

    def __call__(self, x: Any, plan: Any, shaft_hz: Any) -> Any:
        self.calls.append(x.shape[0])
        return analyze_frames(x, plan, shaft_hz=shaft_hz)


def block(i: int, seq: int) -> Block:
    t = (seq * N + np.arange(N)) / FS
    x = (0.1 * np.sin(2 * np.pi * 25.0 * t) + 0.001 * i).astype(np.float32)
    x.flags.writeable = False
    return Block(f"QL-{i:02d}", seq, T0 + round(seq * N * 1e9 / FS), FS, "g", x)


async def _run(tmp_path: Path, points: int, feed: Any) -> tuple[Recorder, Daemon, list[Any]]:
    rec = Recorder()
    daemon = Daemon(config(tmp_path, points), registry=CollectorRegistry(), analyze=rec, sources=[],
                    serve_metrics=False)
    seen = probe(daemon)
    await daemon.start()
    try:
        await feed(daemon)
        for _ in range(400):
            if len(seen) >= sum(daemon.stats.frames_analysed.values()) and daemon.idle and not daemon._ready:
                break
            await asyncio.sleep(0.01)
    finally:
        await daemon.stop()
    return rec, daemon, seen


async def test_frames_arriving_within_the_window_share_one_call(tmp_path: Path) -> None:
    async def feed(d: Daemon) -> None:
        d.ingest.block("scripted", block(0, 0), 1)
        await asyncio.sleep(BATCH_WINDOW_S / 5)  # the others follow well inside the window
        for i in range(1, 10):
            d.ingest.block("scripted", block(i, 0), 1)

    rec, _daemon, seen = await _run(tmp_path, 10, feed)
    assert rec.calls == [10]
    assert sorted(r.point_id for r in seen) == [f"P-101-{i:02d}" for i in range(10)]
    # each result's indicators belong to its own frame: the offsets 0.001 × i g come back as the means
    for r in seen:
        assert abs(r.indicators.mean_g - 0.001 * int(r.point_id[-2:])) < 1e-6


async def test_a_full_batch_goes_at_once_and_the_rest_follows_in_order(tmp_path: Path) -> None:
    points = 40

    async def feed(d: Daemon) -> None:
        for seq in range(3):  # 120 frames: more than MAX_BATCH, every point's frames in sequence
            for i in range(points):
                d.ingest.block("scripted", block(i, seq), 1)

    rec, daemon, seen = await _run(tmp_path, points, feed)
    assert sum(rec.calls) == 3 * points and max(rec.calls) <= MAX_BATCH
    assert sum(daemon.stats.frames_dropped.values()) == 0
    for i in range(points):  # per point, frames in order
        ends = [r.t_end_ns for r in seen if r.point_id == f"P-101-{i:02d}"]
        assert ends == sorted(ends) and len(ends) == 3


async def test_a_batch_queues_behind_the_running_one_without_a_machine_already_in_flight(tmp_path: Path) -> None:
    # One worker: while a batch of two of machine P-101's points is analysed, the next batch is taken at once (the
    # worker goes on to it without a round trip through the event loop), but only from the other machine: the
    # frames of P-101's two other points wait for its results, so its state after them judges them, as if the
    # batches ran one after the other.
    import threading

    cfg = config(tmp_path, 8, ("P-101", "P-102"))
    gate = threading.Event()
    calls: list[int] = []

    def analyze(x: Any, plan: Any, shaft_hz: Any) -> Any:
        calls.append(x.shape[0])
        gate.wait(10.0)  # the first batch is held in the worker until the test has looked
        return analyze_frames(x, plan, shaft_hz=shaft_hz)

    daemon = Daemon(cfg, registry=CollectorRegistry(), analyze=analyze, sources=[], serve_metrics=False)
    seen = probe(daemon)
    await daemon.start()
    try:
        for i in range(2):
            daemon.ingest.block("scripted", block(i, 0), 1)
        await asyncio.sleep(3 * BATCH_WINDOW_S)  # the first batch (P-101-00 and -01) is in the worker
        for i in range(2, 8):
            daemon.ingest.block("scripted", block(i, 0), 1)
        await asyncio.sleep(3 * BATCH_WINDOW_S)
        held = sorted(daemon._busy)
        in_flight = len(daemon._batches)
        gate.set()
        for _ in range(400):
            if len(seen) == 8 and daemon.idle and not daemon._ready:
                break
            await asyncio.sleep(0.01)
    finally:
        gate.set()
        await daemon.stop()
    assert in_flight == 2
    assert held == ["P-101-00", "P-101-01"] + [f"P-102-{i:02d}" for i in range(4)]
    assert calls == [2, 4, 2]  # P-101-00/01, then P-102's four, then P-101-02/03
    assert [r.point_id for r in seen] == ["P-101-00", "P-101-01"] + [f"P-102-{i:02d}" for i in range(4)] \
        + ["P-101-02", "P-101-03"]


def mixed_config(state_dir: Path) -> Config:
    """Six points of three machines (1500, 1200 and 1800 r/min: three speed ranges), each point with its own bearing
    geometry, so six plans that differ only in bearing and speed range; and a seventh point sampled at half the
    rate, whose plan cannot share their call."""
    rpm = {"P-201": 1500.0, "P-202": 1200.0, "P-203": 1800.0, "P-204": 1500.0}

    def point(i: int, machine: str, fs: float) -> dict[str, Any]:
        return {"id": f"{machine}-{i:02d}", "machine": machine, "source": "scripted", "sensor": f"QL-{i:02d}",
                "fs_hz": fs, "block_samples": N, "sensor_type": "piezo", "bandwidth_hz": [0.5, 10000.0],
                "bearing": {"elements": 7 + i, "ball_diameter_mm": 6.0 + 0.5 * i, "pitch_diameter_mm": 39.0,
                            "contact_angle_deg": 0.0}}

    machines = ["P-201", "P-201", "P-202", "P-202", "P-203", "P-203"]
    return parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": N, "overlap": 0.0, "queue_frames": 4, "workers": 1},
        "alarms": {"enabled": False},
        "sources": [{"name": "scripted", "type": "mqtt", "url": "mqtt://127.0.0.1:1", "topics": ["x/#"]}],
        "machines": [{"id": m, "group": 2, "support": "rigid", "speed_rpm": r} for m, r in rpm.items()],
        "points": [point(i, m, FS) for i, m in enumerate(machines)] + [point(6, "P-204", FS / 2)],
    })


def faulty_block(i: int, fs: float, shaft_hz: float) -> Block:
    """A running machine's frame (1× line) with decaying resonance bursts at 3.3 × shaft speed (a localized
    bearing defect, Randall & Antoni, MSSP 25 (2011) 485–520) and seeded noise."""
    t = np.arange(N) / fs
    f = 3.3 * shaft_hz
    tau = (t * f % 1.0) / f
    rng = np.random.default_rng(i)
    x = 0.3 * np.sin(2 * np.pi * shaft_hz * t) + 0.5 * np.exp(-600 * tau) * np.sin(2 * np.pi * 3000 * tau)
    x = (x + rng.normal(0, 0.05, N)).astype(np.float32)
    x.flags.writeable = False
    return Block(f"QL-{i:02d}", 0, T0, fs, "g", x)


async def test_points_with_different_bearings_share_one_call(tmp_path: Path) -> None:
    # plans differing only in bearing and speed range (analysis.batch_key) are analysed in one call; each point's
    # published indicators are those of its frame analysed alone with its own plan (as when every plan had its
    # own call); the point sampled at another rate is analysed in a call of its own
    from edgevib.pipelines.analysis import batch_key

    cfg = mixed_config(tmp_path)
    rec = Recorder()
    daemon = Daemon(cfg, registry=CollectorRegistry(), analyze=rec, sources=[], serve_metrics=False)
    seen = probe(daemon)
    plans = {p.id: cfg.plan(p.id) for p in cfg.points}
    assert len(set(plans.values())) == 7 and len({batch_key(p) for p in plans.values()}) == 2
    speeds = {p.id: next(m.speed_rpm for m in cfg.machines if m.id == p.machine) / 60.0 for p in cfg.points}
    await daemon.start()
    try:
        for i, p in enumerate(cfg.points):
            daemon.ingest.block("scripted", faulty_block(i, p.fs_hz, speeds[p.id]), 1)
        for _ in range(400):
            if len(seen) >= 7 and daemon.idle and not daemon._ready:
                break
            await asyncio.sleep(0.01)
    finally:
        await daemon.stop()
    assert sorted(rec.calls) == [1, 6]
    assert len(seen) == 7
    for r in seen:
        own = analyze_frames(r.samples, plans[r.point_id], [speeds[r.point_id]])[0]
        assert r.indicators == own, r.point_id
    assert any(r.indicators.envelope for r in seen)  # the envelope families were searched (not all absent)
