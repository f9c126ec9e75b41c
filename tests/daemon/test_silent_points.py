"""A point whose source is connected but which receives nothing is reported not ready (issue 13 §3: an OPC UA node
that delivers nothing must not pass for a working point)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from edgevib.common.wire import Block
from edgevib.daemon.config import parse_config
from edgevib.daemon.frames import BlockIngest, Stats

FS, N = 25600.0, 2560


def test_connected_source_with_a_silent_point(tmp_path: Path) -> None:
    cfg = parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(tmp_path)},
        "sources": [{"name": "gw", "type": "opcua", "endpoint": "opc.tcp://127.0.0.1:4840/"}],
        "machines": [{"id": "P-101", "speed_rpm": 1485.0}],
        "points": [{"id": p, "machine": "P-101", "source": "gw", "sensor": p, "node": f"ns=2;s={p}", "fs_hz": FS,
                    "block_samples": N} for p in ("P-101-DE-H", "P-101-NDE-H")],
        "alarms": {"enabled": False}})
    now = [1_000_000_000_000]
    ingest = BlockIngest(cfg, Stats(), clock_ns=lambda: now[0])
    ingest.connection("gw", True)
    assert ingest.silent_points() == []  # just connected: no verdict yet
    for seq in range(120):  # 12 s of blocks for one point only
        now[0] += round(N / FS * 1e9)
        ingest.block("gw", Block("P-101-DE-H", seq, now[0] - round(N / FS * 1e9), FS, "g", np.zeros(N)), now[0])
    assert ingest.silent_points() == ["P-101-NDE-H"]  # 12 s > the 10 s window
    ingest.connection("gw", False)
    assert ingest.silent_points() == []  # a disconnected source is reported as such, not its points
