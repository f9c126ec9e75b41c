"""``edgevib alarms select-band [POINT]``: the control command ``select_band`` of a running daemon, from the command
line — accepted for points with an automatic envelope band, refused (exit 2, one line naming the problem) for the
others, raw response with ``--json``."""

from __future__ import annotations

import asyncio
import json
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest
from test_band_auto import document, start

from edgevib.daemon.cli import main
from edgevib.daemon.config import parse_config


@pytest.fixture
def short_tmp() -> Iterator[Path]:
    """A short temporary directory (Unix socket paths are limited to ~100 bytes)."""
    d = Path(tempfile.mkdtemp(prefix="evb-"))
    try:
        yield d
    finally:
        shutil.rmtree(d, ignore_errors=True)


async def test_select_band_from_the_command_line(short_tmp: Path, capsys: pytest.CaptureFixture[str]) -> None:
    d, _, _ = await start(parse_config(document(short_tmp)))  # B-301-DE-H "auto", B-301-NDE-H the default band
    base = ["alarms", "--state-dir", str(short_tmp)]
    try:
        codes = [await asyncio.to_thread(main, [*base, *argv]) for argv in (
            ["select-band", "B-301-DE-H"], ["select-band"], ["select-band", "B-301-NDE-H"],
            ["select-band", "X-1"], ["select-band", "B-301-DE-H", "--json"])]
        requested = set(d.band_auto._requested)
    finally:
        await d.stop()
    out, err = capsys.readouterr()
    assert codes == [0, 0, 2, 2, 0]
    assert out.count("select-band: requested for B-301-DE-H") == 2
    assert "B-301-NDE-H" not in out  # without a point: only the automatic ones
    assert "no automatic envelope band" in err and "B-301-NDE-H" in err
    assert "unknown point 'X-1'" in err
    raw = out[out.index("\n{\n") + 1:out.index("\n}\n") + 2]  # the --json response (log lines around it)
    assert json.loads(raw) == {"ok": True, "result": {"requested": ["B-301-DE-H"]}}
    assert requested == {"B-301-DE-H"}  # the daemon really has the request pending


def test_select_band_without_a_daemon_exits_2(short_tmp: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["alarms", "--state-dir", str(short_tmp), "select-band"]) == 2
    assert "no daemon socket" in capsys.readouterr().err
