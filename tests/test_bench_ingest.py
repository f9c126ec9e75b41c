"""Smoke test of the ingest-path benchmark: every stage delivers every block and reports a positive CPU time.

Timings are the benchmark's business; this only checks that the harness runs (no broker: the byte stream is served
to the daemon's own link, client, source and ingest in-process) and that no block is lost, rejected or gapped.
"""

from __future__ import annotations

import json

import pytest

from edgevib.bench import ingest


@pytest.mark.parametrize("read", ["all", "random"])
def test_ingest_bench_runs_every_stage(read: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert ingest.main(["--channels", "3", "--rounds", "2", "--repeats", "2", "--read", read, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["blocks_per_pass"] == 6
    assert set(report["us_per_block"]) == set(ingest.STAGES)
    assert all(v > 0 for v in report["us_per_block"].values())
    assert all(len(v) == 2 for v in report["passes_us"].values())
    # every block is a QoS 0 PUBLISH shorter than the link's read chunk: the link cuts each one itself, however the
    # reads cut the stream (its start held when it crosses a chunk's end)
    assert report["fast_share"] == {"link": 1.0, "client": 1.0}
