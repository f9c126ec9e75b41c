"""Start-up time of ``edgevib`` commands: ``python -m edgevib.bench.cli [--runs N] [--json]``.

Each command runs ``N`` times in a fresh interpreter (``python -m edgevib.daemon …``, output discarded); the
table gives the median and fastest wall time and the modules of note the command loaded (numpy, scipy, pydantic,
the simulator, the numerical core).  Commands that fail on purpose (an alarm socket that does not exist) still
measure what a user waits for.  A benchmark, not a test: run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

__all__ = ["COMMANDS", "measure", "run"]

CONFIG = Path(__file__).resolve().parent.parent / "config" / "example-plant.toml"
COMMANDS: dict[str, list[str]] = {
    "edgevib --help": ["--help"],
    "edgevib alarms list": ["alarms", "--socket", "{tmp}/none.sock", "list"],
    "edgevib alarms --config FILE list": ["alarms", "--config", str(CONFIG), "list"],
    "edgevib check-config FILE": ["check-config", str(CONFIG)],
    "edgevib bearing …": ["bearing", "--elements", "9", "--ball-diameter", "7.94", "--pitch-diameter", "39.04",
                          "--rpm", "1480"],
}
NOTABLE = ("numpy", "scipy", "pydantic", "paho", "asyncua", "edgevib.simulator", "edgevib.pipelines")
_PROBE = ("import runpy, sys\n"
          "sys.argv = ['edgevib', *sys.argv[1:]]\n"
          "try:\n    runpy.run_module('edgevib.daemon', run_name='__main__')\n"
          "except SystemExit:\n    pass\n"
          "sys.__stderr__.write('\\nMODULES ' + ' '.join(sorted(sys.modules)) + '\\n')\n")


def measure(args: list[str], runs: int) -> dict[str, object]:
    """Median and fastest wall time of ``edgevib ARGS`` over ``runs`` fresh interpreters, and what it imported."""
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-m", "edgevib.daemon", *args], stdout=subprocess.DEVNULL,
                       stderr=subprocess.DEVNULL, timeout=120, check=False)
        times.append(time.perf_counter() - t0)
    probe = subprocess.run([sys.executable, "-c", _PROBE, *args], capture_output=True, text=True, timeout=120,
                           check=False)
    loaded = probe.stderr.rsplit("MODULES ", 1)[-1].split()
    return {"median_s": round(statistics.median(times), 3), "min_s": round(min(times), 3),
            "loads": [m for m in NOTABLE if m in loaded]}


def run(runs: int = 7) -> dict[str, dict[str, object]]:
    with tempfile.TemporaryDirectory(prefix="edgevib-bench-cli-") as tmp:
        return {name: measure([a.format(tmp=tmp) for a in args], runs) for name, args in COMMANDS.items()}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m edgevib.bench.cli", description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=7, help="fresh interpreters per command (default 7)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    args = parser.parse_args(argv)
    rows = run(args.runs)
    if args.json:
        print(json.dumps(rows))
        return 0
    width = max(map(len, rows))
    print(f"{'command':<{width}}  {'median s':>8}  {'min s':>6}  loads")
    for name, r in rows.items():
        print(f"{name:<{width}}  {r['median_s']:>8.3f}  {r['min_s']:>6.3f}  {', '.join(r['loads']) or '-'}")  # type: ignore[arg-type]
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
