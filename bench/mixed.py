"""Frames of many plans in one call: ``analyze_mixed`` on frames whose plans differ only in the bearing against one
call per plan, and against the same frames all on one plan.

``python -m edgevib.bench.mixed [--samples 16384] [--channels 64] [--json]``

``channels`` frames of ``samples`` samples at 25.6 kHz (those of :mod:`edgevib.bench`), each on its own plan:
bearing geometry ``i`` of the daemon benchmark (:func:`edgevib.bench.daemon.bench_bearing`), the default envelope
band of a 0.5 Hz–10 kHz sensor, speed range 15–60 Hz.  Timed, per frame, with the alternating loops of
:mod:`edgevib.bench` (CPU time of this thread, the fastest of seven loops): ``mixed`` one ``analyze_mixed`` call
on all frames; ``per_plan`` one ``analyze_frames`` call per frame (what batching by plan gives when every point has
its own plan); ``one_plan`` one ``analyze_frames`` call on all frames with the first plan (the batch of a plant
whose points share one plan; the floor of the mixed call).  Each with the speed given (``given``, as a fixed
machine speed is) and estimated (``estimated``: one estimate for the speed range, each row with its bearing's cage
ratio).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from functools import partial
from typing import Any

import numpy as np

from edgevib.bench.__main__ import FS_HZ, SHAFT_HZ, _frames, _time_alternating
from edgevib.bench.daemon import bench_bearing
from edgevib.pipelines.analysis import analyze_frames, analyze_mixed, default_envelope_band, make_plan
from edgevib.pipelines.types import AnalysisPlan, BearingGeometry


def plans_of(samples: int, channels: int) -> list[AnalysisPlan]:
    """One plan per frame, bearing ``i`` of the daemon benchmark for frame ``i``."""
    band = default_envelope_band(FS_HZ, (0.5, 10_000.0), shaft_hz_max=60.0)
    out = []
    for i in range(channels):
        b = bench_bearing(i)
        bearing = BearingGeometry(int(b["elements"]), b["ball_diameter_mm"], b["pitch_diameter_mm"],
                                  b["contact_angle_deg"])
        out.append(make_plan(FS_HZ, samples, velocity_band_hz=(max(10.0, 2 * FS_HZ / samples), 1000.0),
                             envelope_band_hz=band, bearing=bearing, speed_range_hz=(15.0, 60.0)))
    return out


def _per_plan(x: np.ndarray[Any, Any], plans: Sequence[AnalysisPlan], speeds: np.ndarray[Any, Any] | None) -> None:
    for i, p in enumerate(plans):
        analyze_frames(x[i : i + 1], p, None if speeds is None else speeds[i : i + 1])


def run(samples: int = 16384, channels: int = 64, *, target_s: float = 0.1, repeats: int = 7) -> list[dict[str, Any]]:
    plans = plans_of(samples, channels)
    x = _frames(samples, channels)
    rows = []
    for label, speeds in (("given", np.full(channels, SHAFT_HZ)), ("estimated", None)):
        t_mixed, t_per, t_one = _time_alternating([
            partial(analyze_mixed, x, plans, speeds),
            partial(_per_plan, x, plans, speeds),
            partial(analyze_frames, x, plans[0], speeds),
        ], target_s, repeats)
        rows.append({"samples": samples, "channels": channels, "plans": len(set(plans)), "speed": label,
                     "mixed_us_per_frame": round(t_mixed / channels * 1e6, 1),
                     "per_plan_us_per_frame": round(t_per / channels * 1e6, 1),
                     "one_plan_us_per_frame": round(t_one / channels * 1e6, 1),
                     "per_plan_over_mixed": round(t_per / t_mixed, 2),
                     "mixed_over_one_plan": round(t_mixed / t_one, 2)})
    return rows


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m edgevib.bench.mixed",
                                     description="frames of many plans in one call against one call per plan")
    parser.add_argument("--samples", type=int, default=16384)
    parser.add_argument("--channels", type=int, default=64)
    parser.add_argument("--json", action="store_true", help="print the rows as one JSON list")
    args = parser.parse_args(argv)
    if args.samples < 4096 or args.channels < 1:
        print("need --samples >= 4096 and --channels >= 1", file=sys.stderr)
        return 2
    rows = run(args.samples, args.channels)
    if args.json:
        print(json.dumps(rows))
        return 0
    print(f"{'samples':>8} {'frames':>7} {'plans':>6} {'speed':>10} {'mixed µs':>9} {'per plan µs':>12} "
          f"{'one plan µs':>12} {'per plan ÷ mixed':>17} {'mixed ÷ one plan':>17}")
    for r in rows:
        print(f"{r['samples']:>8} {r['channels']:>7} {r['plans']:>6} {r['speed']:>10} {r['mixed_us_per_frame']:>9.1f} "
              f"{r['per_plan_us_per_frame']:>12.1f} {r['one_plan_us_per_frame']:>12.1f} "
              f"{r['per_plan_over_mixed']:>17.2f} {r['mixed_over_one_plan']:>17.2f}")
    print("µs per frame, CPU time of this thread (fastest of seven alternating loops).")
    return 0


if __name__ == "__main__":
    sys.exit(main())
