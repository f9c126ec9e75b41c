"""Smoke test of the end-to-end daemon benchmark: a couple of channels for ~2 s produce a well-formed row.

Timings are the benchmark's business; this only checks that the harness runs end to end (its own mosquitto on a
free loopback port, publisher processes, the daemon) and reports positive figures.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys

import pytest

pytestmark = [pytest.mark.network, pytest.mark.slow]


@pytest.mark.skipif(shutil.which("mosquitto") is None and not os.path.exists("/usr/sbin/mosquitto"),
                    reason="mosquitto is not installed")
def test_daemon_bench_two_channels() -> None:
    proc = subprocess.run([sys.executable, "-m", "edgevib.bench.daemon", "--channels", "2", "--seconds", "2",
                           "--warmup", "0.5", "--publishers", "1", "--json"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    report = json.loads(proc.stdout)
    [row] = report["rows"]
    assert row["channels"] == 2
    # 2 channels × 25600 Hz / 16384-sample hops = 3.125 frames/s required
    assert row["expected_frames_per_s"] == pytest.approx(3.1, abs=0.05)
    for key in ("frames_per_s", "latency_p50_ms", "latency_p99_ms", "e2e_p99_ms", "rss_mb", "seconds"):
        assert row[key] > 0, (key, row)
    assert row["latency_p99_ms"] >= row["latency_p50_ms"]
    assert row["rejected"] == 0  # the load generator's blocks are valid wire-format blocks
    # the stall diagnostics: one entry per distinct slow second, all within the 2 s window
    assert len(row["slow_at_s"]) == row["slow_seconds"]
    assert all(0 <= s < 3 for s in row["slow_at_s"]) and all(0 <= s < 3 for s in row["lag_at_s"])
    assert report["block_samples"] == 16384 and report["fs_hz"] == 25600.0


@pytest.mark.skipif(shutil.which("mosquitto") is None and not os.path.exists("/usr/sbin/mosquitto"),
                    reason="mosquitto is not installed")
def test_mqtt_client_bench_counts_every_message() -> None:
    proc = subprocess.run([sys.executable, "-m", "edgevib.bench.mqtt_clients", "--messages", "200", "--bytes", "4096",
                           "--json"], capture_output=True, text=True, timeout=180)
    assert proc.returncode == 0, proc.stderr[-2000:]
    rows = json.loads(proc.stdout)
    assert [r["client"] for r in rows] == ["paho-thread", "paho-asyncio", "edgevib-source", "protocol"]
    for r in rows:  # each receiver saw all 200 messages (it waits for the last) and used some CPU for them
        assert r["messages"] == 200 and r["bytes"] == 4096
        assert r["cpu_us_per_message"] > 0 and r["messages_per_s"] > 0
