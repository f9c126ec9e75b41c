"""Report files are created like any other file the user writes: their mode follows the umask (POSIX open(2):
mode 0666 & ~umask), not the private 0600 of a temporary file."""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from edgevib.daemon.cli import main
from edgevib.daemon.web.report import write_report


@pytest.fixture
def umask() -> Iterator[None]:
    old = os.umask(0o022)
    try:
        yield
    finally:
        os.umask(old)


def mode(p: Path) -> int:
    return stat.S_IMODE(p.stat().st_mode)


@pytest.mark.usefixtures("umask")
@pytest.mark.parametrize(("mask", "expected"), [(0o022, 0o644), (0o027, 0o640), (0o077, 0o600), (0o002, 0o664)])
def test_report_mode_follows_the_umask(tmp_path: Path, mask: int, expected: int) -> None:
    os.umask(mask)
    out = write_report(tmp_path / "r.html", "<html></html>")
    assert mode(out) == expected  # POSIX open(2) with 0666 under this umask
    assert out.read_text() == "<html></html>"
    assert [q.name for q in tmp_path.iterdir()] == ["r.html"]  # no temporary file left behind


@pytest.mark.usefixtures("umask")
def test_analyze_report_is_readable_by_others_under_umask_022(tmp_path: Path) -> None:
    os.umask(0o022)
    fs = 12800.0
    t = np.arange(int(2 * fs)) / fs
    rec = tmp_path / "rec.npy"
    np.save(rec, 0.5 * np.sin(2 * np.pi * 49.3 * t) + 0.01 * np.random.default_rng(0).standard_normal(t.size))
    out = tmp_path / "rec.html"
    assert main(["analyze", str(rec), "--fs", str(fs), "--rpm", "2958", "--report", str(out)]) == 0
    assert mode(out) == 0o644
