"""Prometheus exposition: names and units on a fresh registry, `promtool check metrics`, and a real Prometheus
server scraping the daemon and answering through its HTTP API."""

from __future__ import annotations

import asyncio
import json
import shutil
import subprocess
import tempfile
import urllib.parse
import urllib.request
from collections.abc import AsyncIterator
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families
from servers import free_port, wait_port

from edgevib.common.wire import Block
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import parse_config
from edgevib.daemon.frames import Stats

FS = 25600.0
BLOCK = 4096
T0 = 1_764_633_600_000_000_000

INDICATORS = {
    "edgevib_velocity_rms_meters_per_second", "edgevib_velocity_peak_meters_per_second",
    "edgevib_acceleration_rms_meters_per_second_squared", "edgevib_acceleration_peak_meters_per_second_squared",
    "edgevib_crest_factor", "edgevib_kurtosis", "edgevib_order_velocity_rms_meters_per_second",
    "edgevib_shaft_speed_hertz", "edgevib_iso_zone", "edgevib_velocity_rms_trend_meters_per_second",
    "edgevib_last_frame_timestamp_seconds",
}
SELF = {
    "edgevib_blocks_received", "edgevib_blocks_rejected", "edgevib_frames_analysed", "edgevib_frames_dropped",
    "edgevib_sink_results_dropped", "edgevib_analysis_latency_seconds", "edgevib_source_connected",
    "edgevib_source_reconnects",
    "edgevib_build_info",
}


def bearing_block(seq: int) -> Block:
    """A 1.5 g sine at the 25 Hz shaft speed plus impacts repeating at BPFO exciting a 4 kHz ring-down.

    BPFO = n·fr/2·(1 − d/D·cos φ) (FIELD_NOTES §2) = 9 × 25 / 2 × (1 − 7.94/39.04) = 89.62 Hz."""
    rng = np.random.default_rng(seq)
    t = (seq * BLOCK + np.arange(BLOCK)) / FS
    x = 1.5 * np.sin(2 * np.pi * 25.0 * t) + 0.05 * rng.standard_normal(BLOCK)
    bpfo_hz = 9 * 25.0 / 2 * (1 - 7.94 / 39.04)
    phase = (t * bpfo_hz) % 1.0 / bpfo_hz
    x += 0.8 * np.exp(-phase * 800.0) * np.sin(2 * np.pi * 4000.0 * phase)
    return Block("QL-P101-DE-H", seq, T0 + round(seq * BLOCK * 1e9 / FS), FS, "g", x)


@pytest.fixture
async def daemon(tmp_path: Path) -> AsyncIterator[tuple[Daemon, CollectorRegistry]]:
    cfg = parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(tmp_path / "state")},
        "sources": [{"name": "station-broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1", "topics": ["x/#"]}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1500.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "station-broker",
                    "sensor": "QL-P101-DE-H", "fs_hz": FS, "block_samples": BLOCK,
                    "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}}],
    })
    registry = CollectorRegistry()
    d = Daemon(cfg, registry=registry, metrics_listen=("127.0.0.1", 0), sources=[])
    await d.start()
    d.ingest.connection("station-broker", True)
    for seq in range(8):
        d.ingest.block("station-broker", bearing_block(seq), 0)
    d.ingest.payload("station-broker", None, b"garbage", 0)
    async with asyncio.timeout(20):
        while d.stats.frames_analysed["P-101-DE-H"] < 3:
            await asyncio.sleep(0.02)
    # a lossy sink that fell behind (app.SinkChannel counts into Stats.sink_dropped): as if 3 results were skipped
    Stats.inc(d.stats.sink_dropped, ("OpcUaIndicatorSink", "P-101-DE-H"), 3)
    try:
        yield d, registry
    finally:
        await d.stop()


def scrape(url: str) -> str:
    with urllib.request.urlopen(url, timeout=5) as r:
        return r.read().decode()


async def test_exposition_names_and_labels(daemon: tuple[Daemon, CollectorRegistry]) -> None:
    d, _ = daemon
    assert d.metrics.url is not None
    text = await asyncio.to_thread(scrape, d.metrics.url)
    families = {f.name: f for f in text_string_to_metric_families(text)}
    missing = (INDICATORS | SELF) - set(families)
    assert not missing, missing
    v = families["edgevib_velocity_rms_meters_per_second"].samples[0]
    assert v.labels == {"site": "quarry-lane", "machine": "P-101", "point": "P-101-DE-H", "axis": "horizontal"}
    orders = {s.labels["order"] for s in families["edgevib_order_velocity_rms_meters_per_second"].samples}
    assert {"0.5x", "1x", "2x", "3x"} <= orders
    assert families["edgevib_blocks_received"].type == "counter"
    assert families["edgevib_analysis_latency_seconds"].type == "histogram"
    rejected = [s for s in families["edgevib_blocks_rejected"].samples if s.name.endswith("_total")]
    assert rejected[0].labels == {"source": "station-broker", "reason": "malformed"} and rejected[0].value == 1
    snr = {s.labels["family"]: s.value for s in families["edgevib_envelope_snr_decibels"].samples}
    # a family whose search window holds no local maximum has no level: absent, never a made-up number
    assert "bpfo" in snr and set(snr) <= {"ftf", "bpfo", "bpfi", "bsf"}
    assert max(snr, key=lambda k: snr[k]) == "bpfo"  # the impacts repeat at BPFO
    assert "edgevib_envelope_amplitude_meters_per_second_squared" in families
    skipped = families["edgevib_sink_results_dropped"]
    assert skipped.type == "counter"
    assert [(s.name, s.labels, s.value) for s in skipped.samples if s.name.endswith("_total")] == [
        ("edgevib_sink_results_dropped_total", {"sink": "OpcUaIndicatorSink", "point": "P-101-DE-H"}, 3.0)]


async def test_promtool_check_metrics(daemon: tuple[Daemon, CollectorRegistry]) -> None:
    promtool = shutil.which("promtool")
    if promtool is None:
        pytest.skip("promtool not installed")
    d, _ = daemon
    assert d.metrics.url is not None
    text = await asyncio.to_thread(scrape, d.metrics.url)
    proc = await asyncio.to_thread(subprocess.run, [promtool, "check", "metrics"], input=text.encode(),
                                   capture_output=True, timeout=30)
    assert proc.returncode == 0, proc.stdout.decode() + proc.stderr.decode()
    assert not proc.stdout.strip() and not proc.stderr.strip(), proc.stdout.decode() + proc.stderr.decode()


@pytest.mark.network
@pytest.mark.slow
async def test_real_prometheus_scrapes_the_daemon(daemon: tuple[Daemon, CollectorRegistry]) -> None:
    exe = shutil.which("prometheus")
    if exe is None:
        pytest.skip("prometheus not installed")
    d, _ = daemon
    assert d.metrics.server is not None
    workdir = Path(tempfile.mkdtemp(prefix="edgevib-prom-"))
    (workdir / "prometheus.yml").write_text(
        "global:\n  scrape_interval: 1s\n  scrape_timeout: 1s\n"
        "scrape_configs:\n  - job_name: edgevib\n    static_configs:\n"
        f"      - targets: ['127.0.0.1:{d.metrics.server.port}']\n")
    port = free_port()
    proc = subprocess.Popen([exe, f"--config.file={workdir / 'prometheus.yml'}",
                             f"--storage.tsdb.path={workdir / 'data'}", f"--web.listen-address=127.0.0.1:{port}"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        await asyncio.to_thread(wait_port, port, 30.0)
        query = urllib.parse.urlencode({"query": 'edgevib_velocity_rms_meters_per_second{point="P-101-DE-H"}'})
        result: list[dict[str, object]] = []
        async with asyncio.timeout(60):
            while not result:
                await asyncio.sleep(0.5)
                try:
                    body = await asyncio.to_thread(scrape, f"http://127.0.0.1:{port}/api/v1/query?{query}")
                except OSError:
                    continue
                doc = json.loads(body)
                assert doc["status"] == "success"
                result = doc["data"]["result"]
        metric = result[0]["metric"]
        assert isinstance(metric, dict)
        assert metric["site"] == "quarry-lane" and metric["machine"] == "P-101" and metric["job"] == "edgevib"
        value = float(result[0]["value"][1])  # type: ignore[index]
        assert value == pytest.approx(d.latest["P-101-DE-H"].indicators.velocity_rms_mm_s / 1000.0)
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
        shutil.rmtree(workdir, ignore_errors=True)
