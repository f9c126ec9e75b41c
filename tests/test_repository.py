"""Repository-level checks: CI runs exactly README's test command."""

from __future__ import annotations

import re
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent


def _quick_start_commands() -> list[str]:
    text = (REPO / "README.md").read_text()
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return [block.strip() for block in re.findall(r"```sh\n(.*?)```", section, re.S)]


def test_quick_start_has_two_commands() -> None:
    commands = _quick_start_commands()
    assert len(commands) == 2, commands
    assert "edgevib demo" in commands[0]
    assert "pytest" in commands[1]


def test_ci_runs_readme_test_command() -> None:
    ci = (REPO / ".ci" / "run").read_text().splitlines()
    assert _quick_start_commands()[1] in [line.strip() for line in ci]
