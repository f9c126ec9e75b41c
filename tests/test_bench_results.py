"""Smoke test of the post-analysis benchmark: the harness runs the daemon's result path for every frame and reports
a CPU time for each thread and stage it names.

Timings are the benchmark's business; this only checks that every handed frame is analysed once and counted, and
that the stage timers are taken off the daemon's classes afterwards.
"""

from __future__ import annotations

import json
from collections.abc import Iterator

import pytest
import structlog

from edgevib.bench import results
from edgevib.daemon.app import Daemon


@pytest.fixture(autouse=True)
def _logging_as_before() -> Iterator[None]:
    # the benchmark configures logging for its process (level "error"); the tests after this one capture warnings
    saved = structlog.get_config()
    yield
    structlog.configure(**saved)


@pytest.mark.parametrize("storm", [False, True])
def test_results_bench_runs_and_restores_the_daemon(storm: bool, capsys: pytest.CaptureFixture[str]) -> None:
    before = dict(vars(Daemon))
    argv = ["--channels", "3", "--rounds", "2", "--json"] + (["--storm"] if storm else [])
    assert results.main(argv) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["frames"] == 3 * 2  # every point's frame of every measured round
    assert set(report["loop_stage_us_per_frame"]) >= {"Daemon._results", "PrometheusSink.on_frames",
                                                      "ViewService.on_frames"}
    assert all(v > 0 for v in report["loop_stage_us_per_frame"].values())
    assert dict(vars(Daemon)) == before  # the timing wrappers are gone
