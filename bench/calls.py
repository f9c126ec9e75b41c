"""Instructions per pipeline call, counted by valgrind's callgrind: a figure that does not move with the load.

``python -m edgevib.bench.calls [--samples 16384] [--channels 1,64] [--calls 10] [--json]``

Timings on a shared machine move by ±20 % or more from run to run; the number of instructions a call executes
moves by a few percent at most, so it is the way to compare two versions of the pipeline while other work runs.
For each size the module runs itself twice under ``valgrind --tool=callgrind`` — once making one analysis call
after the warm-up, once making ``1 + --calls`` (five times as many below 16 channels) — and reports the difference
per call: start-up, imports and warm-up cancel out (the cyclic garbage collector is off while counting, hash
seeds fixed; what remains is a start-up that varies by some 10⁷ instructions between runs).  The plan, the frames
(float64) and the warm-up are those of :mod:`edgevib.bench`.  Instructions are not time (a cache miss costs
many), so the timed benchmark stays the reference; this one says whether a change removed work.  Needs valgrind
(Debian package ``valgrind``); one to three minutes per size.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import re
import shutil
import subprocess
import sys
from collections.abc import Sequence

_COLLECTED = re.compile(r"Collected\s*:\s*(\d+)")


def _calls(samples: int, channels: int, calls: int) -> None:
    """The measured program: build the plan and frames, warm up, then make ``calls`` analysis calls."""
    from edgevib.bench.__main__ import BEARING, FS_HZ, _frames
    from edgevib.pipelines.analysis import AnalysisKernel, default_envelope_band, make_plan

    band = default_envelope_band(FS_HZ, (0.5, 10_000.0), shaft_hz_max=60.0)
    plan = make_plan(FS_HZ, samples, velocity_band_hz=(max(10.0, 2 * FS_HZ / samples), 1000.0),
                     envelope_band_hz=band, bearing=BEARING, speed_range_hz=(15.0, 60.0))
    kernel = AnalysisKernel(plan)
    x = _frames(samples, channels)
    for _ in range(3):
        kernel.analyze(x)
    gc.collect()
    gc.disable()  # a cyclic collection costs millions of instructions whenever it happens to fall: none counted
    for _ in range(calls):
        kernel.analyze(x)


def _instructions(samples: int, channels: int, calls: int) -> int:
    env = {**os.environ, "PYTHONHASHSEED": "0"}
    proc = subprocess.run(["valgrind", "--tool=callgrind", "--callgrind-out-file=/dev/null", sys.executable, "-m",
                           "edgevib.bench.calls", "--run", str(samples), str(channels), str(calls)],
                          capture_output=True, text=True, check=False, env=env)
    m = _COLLECTED.search(proc.stderr)
    if proc.returncode != 0 or m is None:
        raise RuntimeError(f"valgrind run failed ({proc.returncode}): {proc.stderr[-1000:]}")
    return int(m.group(1))


def run(samples: int, channels: Sequence[int], calls: int) -> list[dict[str, int]]:
    rows = []
    for c in channels:
        # a run's own start-up moves by some 10⁷ instructions: count enough calls that this stays a few percent
        n = calls if c >= 16 else 5 * calls
        base = _instructions(samples, c, 1)
        more = _instructions(samples, c, 1 + n)
        per_call = (more - base) // n
        rows.append({"samples": samples, "channels": c, "instructions_per_call": per_call,
                     "instructions_per_block": per_call // c})
    return rows


def main(argv: Sequence[str] | None = None) -> int:
    args_in = list(sys.argv[1:] if argv is None else argv)
    if args_in[:1] == ["--run"]:  # the measured child
        _calls(int(args_in[1]), int(args_in[2]), int(args_in[3]))
        return 0
    parser = argparse.ArgumentParser(prog="python -m edgevib.bench.calls",
                                     description="instructions per pipeline call (valgrind callgrind)")
    parser.add_argument("--samples", type=int, default=16384)
    parser.add_argument("--channels", default="1,64", help="comma-separated channel counts (default 1,64)")
    parser.add_argument("--calls", type=int, default=10,
                        help="calls counted per size (default 10; five times as many below 16 channels)")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(args_in)
    if shutil.which("valgrind") is None:
        print("valgrind is not installed (Debian: apt-get install valgrind)", file=sys.stderr)
        return 2
    rows = run(args.samples, [int(c) for c in args.channels.split(",")], max(1, args.calls))
    if args.json:
        print(json.dumps(rows))
        return 0
    print(f"{'samples':>8} {'channels':>8} {'instructions/call':>18} {'instructions/block':>19}")
    for r in rows:
        print(f"{r['samples']:>8} {r['channels']:>8} {r['instructions_per_call']:>18,} "
              f"{r['instructions_per_block']:>19,}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
