"""The ``edgevib`` command line: one dispatcher, each subcommand implemented in the module that owns it.

A subcommand's module defines ``configure_<name>(parser)`` and ``run_<name>(args) -> int`` (``-`` in the name
becomes ``_``).  Only the module of the command being run is imported: ``edgevib --help`` lists the commands from
:data:`COMMANDS` alone, and ``edgevib alarms list`` loads neither the numerical core nor the simulator (start-up:
``python -m edgevib.bench.cli``).  Exit codes: 0 success, 2 bad input or configuration (one line on stderr, no
traceback), 130 interrupted.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
from collections.abc import Callable, Sequence
from typing import Any, NoReturn

__all__ = ["main"]

# name -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "run": ("edgevib.daemon.service", "run the monitoring daemon with a configuration file"),
    "demo": ("edgevib.daemon.service", "run the daemon on the built-in simulated pump station (no broker needed)"),
    "check-config": ("edgevib.daemon.service", "validate a configuration file and print it resolved"),
    "analyze": ("edgevib.daemon.offline", "analyse a recorded waveform (WAV, .npy, CSV, MATLAB .mat)"),
    "bearing": ("edgevib.daemon.offline", "print the defect frequencies of a rolling-element bearing"),
    "trend": ("edgevib.daemon.trendchart", "show a point's severity history with its trend, limits and projection"),
    "replay": ("edgevib.daemon.replay", "replay recorded snapshots through analysis, history, trend and projection"),
    "simulate": ("edgevib.simulator.cli", "stream simulated machines over MQTT or OPC UA, or write WAV/truth"),
    "alarms": ("edgevib.daemon.alarmctl", "list, acknowledge, shelve, re-learn alarms of a daemon; select bands"),
    "event-schemas": ("edgevib.daemon.eventschemas", "write the JSON Schemas of the alarm feed's event data"),
}


def _load(name: str) -> tuple[Callable[[argparse.ArgumentParser], None], Callable[[Any], int]]:
    module_name, _ = COMMANDS[name]
    suffix = name.replace("-", "_")
    module = importlib.import_module(module_name)
    return getattr(module, f"configure_{suffix}"), getattr(module, f"run_{suffix}")


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line on stderr and exit code 2 (no usage dump)."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: {message}\n")


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """The parser; only ``command``'s own options are configured (its module imported), the others are listed."""
    parser = _Parser(
        prog="edgevib",
        description="Streaming vibration monitor for rotating machines. edgevib monitors and advises; "
        "it is not a machinery protection (trip) system.",
    )
    from edgevib.daemon import __version__

    parser.add_argument("--version", action="version", version=f"edgevib {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (_, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if name == command:
            configure, runner = _load(name)
            configure(p)
            p.set_defaults(_runner=runner)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args_list = list(sys.argv[1:] if argv is None else argv)
    command = next((a for a in args_list if not a.startswith("-")), None)  # the top level has no valued options
    parser = build_parser(command if command in COMMANDS else None)
    args = parser.parse_args(args_list)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        return int(args._runner(args))
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader of our output went away (`edgevib check-config FILE | head`): not an error of ours
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
