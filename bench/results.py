"""What an analysed frame costs after its analysis: CPU time per frame of result building, sinks, alarms, history.

``python -m edgevib.bench.results [--channels 600] [--rounds 94] [--storm] [--json]``

A :class:`~edgevib.daemon.app.Daemon` is built from the daemon benchmark's configuration
(:func:`edgevib.bench.daemon.bench_config`: one pump per point, one shared plan, the alarm layer, the view and the
history on) and started without sources.  Its analysis is replaced by a lookup: the analysis results (indicators and
sensor-health verdicts) of :func:`edgevib.bench.daemon.channel_signal` are computed once beforehand with the real
pipeline, so what is measured is everything after it.  Each round hands every point one frame, 0.64 s of frame
time after the last, in analysis batches of up to 64 through the daemon's own ``_run_batch`` — result building,
machine state, trend, ISO zone, the sink queues, the Prometheus sink, the view, the alarm layer's decision and
store threads and the history recorder's flush, as in the daemon.  Frames alternate between two seeds of the signal;
``--storm`` adds alarm transitions (zone D frames), stopped machines and flat-lined sensors.  The default 94 rounds
are one minute of frame time (60 s ÷ 0.64 s), so the history's minute roll-ups, closed once a minute for every point,
weigh as they do in operation (a shorter run that crosses a minute boundary charges them to fewer frames).

The figures are the CPU time per frame of each thread (from ``/proc``: event loop, alarm decision, alarm store,
the history flush in the default executor) over the rounds after a warm-up, and of the event loop's stages (thread
CPU time around each call).  Other work on a shared machine adds little to a thread's CPU time, but caches are
shared: compare versions by running each in turn several times (``PYTHONPATH`` first on the checkout to measure).
"""

from __future__ import annotations

import argparse
import asyncio
import json
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from typing import Any

import numpy as np

from edgevib.bench.daemon import PERIOD_NS, bench_config, channel_signal, point_id, thread_cpu_s

T0_NS = 1_780_000_000 * 10**9
BATCH = 64
WARM_ROUNDS = 3
# signal variants: 0 and 1 two seeds in zone B; with --storm 2 zone D, 3 a standing machine, 4 a flat line
VARIANTS = 5


def _variant(channel: int, k: int, storm: bool) -> int:
    if storm and channel % 17 == 3 and 8 <= k % 20 < 12:
        return 4
    if storm and channel % 13 == 5 and 6 <= k % 20 < 14:
        return 3
    if storm and (channel * 7 + k // 5) % 11 == 0 and k % 10 >= 4:
        return 2
    return 1 if (channel + k) % 3 == 0 else 0


def _signal(channel: int, variant: int) -> np.ndarray:
    x = channel_signal(channel, 7 + (variant == 1), danger=variant == 2).astype(np.float32)
    if variant == 3:
        return x * np.float32(0.01)
    if variant == 4:
        return np.full_like(x, 0.125)
    return x


@contextmanager
def _timed_stages(on: list[bool], stage_s: dict[str, float]) -> Iterator[None]:
    """Thread CPU time of the event loop's stages while ``on[0]``; the classes are restored afterwards.  (The alarm
    layer's ``on_frames`` waits for its decision thread: it is measured as that thread.)"""
    from edgevib.daemon.app import Daemon, SinkChannel
    from edgevib.daemon.sinks.prometheus import PrometheusSink
    from edgevib.daemon.web.api import ViewService

    tt = time.thread_time
    saved: list[tuple[type, str, Any]] = []

    def wrap(cls: type, name: str, label: str) -> None:
        orig = cls.__dict__[name]
        saved.append((cls, name, orig))
        if asyncio.iscoroutinefunction(orig):
            async def timed_async(*a: Any, **k: Any) -> Any:
                t = tt()  # the call up to its first suspension (these sinks do not wait inside)
                try:
                    return await orig(*a, **k)
                finally:
                    if on[0]:
                        stage_s[label] = stage_s.get(label, 0.0) + tt() - t
            setattr(cls, name, timed_async)
        else:
            def timed(*a: Any, **k: Any) -> Any:
                t = tt()
                try:
                    return orig(*a, **k)
                finally:
                    if on[0]:
                        stage_s[label] = stage_s.get(label, 0.0) + tt() - t
            setattr(cls, name, timed)

    wrap(Daemon, "_results", "Daemon._results")
    wrap(Daemon, "_publish", "Daemon._publish (every sink's put)")
    wrap(Daemon, "_release", "Daemon._release")
    wrap(SinkChannel, "_take", "SinkChannel._take")
    wrap(PrometheusSink, "on_frames", "PrometheusSink.on_frames")
    wrap(ViewService, "on_frames", "ViewService.on_frames")
    try:
        yield
    finally:
        for cls, name, orig in reversed(saved):
            setattr(cls, name, orig)


async def run(channels: int, rounds: int, storm: bool, stages: bool = True) -> dict[str, Any]:
    from prometheus_client import CollectorRegistry

    from edgevib.daemon.app import Daemon
    from edgevib.daemon.frames import FrameJob
    from edgevib.daemon.logs import configure_logging

    configure_logging("error")
    with tempfile.TemporaryDirectory(prefix="edgevib-bench-results-") as state_dir:
        config = bench_config(1, channels, 0.0, state_dir)
        clock = [T0_NS]
        daemon = Daemon(config, registry=CollectorRegistry(), serve_metrics=False, sources=[],
                        clock_ns=lambda: clock[0])
        plan = daemon.points[point_id(0)].plan
        used = range(VARIANTS if storm else 2)
        batches: list[tuple[list[int], dict[int, tuple[Any, ...]]]] = []
        for start in range(0, channels, BATCH):  # the real analysis, once per batch and variant
            chans = list(range(start, min(channels, start + BATCH)))
            pids = [point_id(c) for c in chans]
            jobs = [FrameJob(p, np.zeros(0, np.float32), 0, 0) for p in pids]
            per_v = {v: daemon._stack_and_analyze([_signal(c, v) for c in chans], plan, None,
                                                  daemon._health_specs(jobs), [True] * len(chans), pids, [])
                     for v in used}
            batches.append((chans, per_v))
        pending: dict[tuple[str, ...], tuple[Any, ...]] = {}

        def lookup(frames: Any, plan_: Any, shaft: Any, specs: Any, running: Any, points: Any,
                   errors: Any) -> tuple[Any, ...]:
            return pending.pop(tuple(points))

        daemon._stack_and_analyze = lookup  # type: ignore[method-assign,assignment]  # done beforehand
        on = [False]
        stage_s: dict[str, float] = {}
        await daemon.start()
        try:
            async def settle() -> None:
                for _ in range(5000):
                    await asyncio.sleep(0.002)
                    if daemon.idle:
                        return

            frames = 0
            with _timed_stages(on, stage_s) if stages else nullcontext():
                for k in range(WARM_ROUNDS + rounds):
                    if k == WARM_ROUNDS:
                        await settle()
                        cpu0, threads0, on[0] = time.process_time(), thread_cpu_s(), True
                    for chans, per_v in batches:
                        jobs, rows, inds, health = [], [], [], []
                        for i, c in enumerate(chans):
                            x, ind, h = per_v[_variant(c, k, storm)]
                            t_end = T0_NS + (k + 1) * PERIOD_NS + c * 1_000_000
                            jobs.append(FrameJob(point_id(c), x[i], t_end, t_end + 5_000_000))
                            rows.append(x[i])
                            inds.append(ind[i])
                            health.append(h[i])
                        clock[0] = T0_NS + (k + 1) * PERIOD_NS + 700_000_000
                        pending[tuple(j.point_id for j in jobs)] = (rows, inds, health)
                        for j in jobs:  # as the scheduler marks a batch's points
                            daemon._busy[j.point_id] = daemon.points[j.point_id].machine.id
                        await daemon._run_batch(plan, jobs)
                        frames += len(jobs) if on[0] else 0
                        await asyncio.sleep(0)
                    await asyncio.sleep(0.01)
                await settle()
                if daemon.trend_watch is not None and daemon.trend_watch.recorder is not None:
                    await asyncio.to_thread(daemon.trend_watch.recorder.flush)
                on[0] = False
            cpu_s = time.process_time() - cpu0
            threads = {name: s - threads0.get(name, 0.0) for name, s in thread_cpu_s().items()}
        finally:
            await daemon.stop()
    per = 1e6 / max(1, frames)
    return {"channels": channels, "rounds": rounds, "storm": storm, "frames": frames,
            "cpu_us_per_frame": round(cpu_s * per, 2),
            "thread_us_per_frame": {n: round(s * per, 2) for n, s in sorted(threads.items()) if s > 0},
            "loop_stage_us_per_frame": {n: round(s * per, 2) for n, s in sorted(stage_s.items())}}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m edgevib.bench.results", description=__doc__.split("\n\n")[0])
    ap.add_argument("--channels", type=int, default=600)
    ap.add_argument("--rounds", type=int, default=94, help="frames per point measured (after 3 warm-up rounds)")
    ap.add_argument("--storm", action="store_true", help="alarm transitions, standing machines, flat lines")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    report = asyncio.run(run(args.channels, args.rounds, args.storm))
    if args.json:
        print(json.dumps(report, indent=2))
        return 0
    print(f"{report['frames']} frames of {args.channels} points: {report['cpu_us_per_frame']:.1f} µs CPU per frame "
          "(all threads)")
    for title, key in (("thread", "thread_us_per_frame"), ("event-loop stage", "loop_stage_us_per_frame")):
        for name, us in report[key].items():
            print(f"  {title:17s} {name:40s} {us:8.2f} µs/frame")
    return 0


if __name__ == "__main__":
    sys.exit(main())
