"""The command line imports only what the command being run needs (issue 10: a fast CLI; start-up times are
measured by ``python -m edgevib.bench.cli``, not here)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

PROBE = ("import sys\nfrom edgevib.daemon.cli import main\n"
         "try:\n    code = main(sys.argv[1:])\nexcept SystemExit as e:\n    code = e.code\n"
         "roots = ('scipy', 'numpy', 'pydantic', 'paho', 'asyncua')\n"
         "heavy = sorted({m.split('.')[0] if not m.startswith('edgevib.') else '.'.join(m.split('.')[:2])\n"
         "                for m in sys.modules if m.split('.')[0] in roots\n"
         "                or m.startswith(('edgevib.simulator', 'edgevib.pipelines'))})\n"
         "print('LOADED', code, *heavy)\n")


def _loaded(*args: str) -> tuple[int, set[str]]:
    out = subprocess.run([sys.executable, "-c", PROBE, *args], capture_output=True, text=True, timeout=60,
                         check=False)
    line = next(ln for ln in out.stdout.splitlines() if ln.startswith("LOADED"))
    _, code, *mods = line.split()
    return int(code), set(mods)


@pytest.mark.parametrize("args", [("--help",), ("alarms", "--help")], ids=["help", "alarms-help"])
def test_help_loads_no_numerics(args: tuple[str, ...]) -> None:
    code, mods = _loaded(*args)
    assert code == 0
    assert not mods & {"scipy", "numpy", "edgevib.simulator", "edgevib.pipelines"}, mods


def test_alarms_list_loads_no_numerics(tmp_path: Path) -> None:
    # no daemon listens on the socket: exit 2 (one line), and nothing numerical was loaded to say so
    code, mods = _loaded("alarms", "--socket", str(tmp_path / "none.sock"), "list")
    assert code == 2
    assert not mods & {"scipy", "numpy", "edgevib.simulator", "edgevib.pipelines"}, mods


def test_the_command_run_is_configured_fully() -> None:
    # lazily built, the parser still knows every option of the command being run
    from edgevib.daemon.cli import build_parser

    args = build_parser("bearing").parse_args(["bearing", "--elements", "9", "--ball-diameter", "7.94",
                                               "--pitch-diameter", "39.04", "--rpm", "1480"])
    assert args.elements == "9" and callable(args._runner)
