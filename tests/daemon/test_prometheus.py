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
from edgevib.daemon.interfaces import FrameResult

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


class LaggingSink:
    """A lossy sink (an indicator publisher on a slow link) stuck in its first delivery until released."""

    def __init__(self) -> None:
        self.results: list[FrameResult] = []
        self.entered = asyncio.Event()
        self.release = asyncio.Event()

    async def start(self) -> None: ...

    async def on_frames(self, results: list[FrameResult]) -> None:
        self.entered.set()
        await self.release.wait()
        self.results += results

    async def stop(self) -> None: ...


@pytest.fixture
async def daemon(tmp_path: Path) -> AsyncIterator[tuple[Daemon, CollectorRegistry, LaggingSink]]:
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
    lagging = LaggingSink()
    d.add_sink(lagging)
    await d.start()
    d.ingest.connection("station-broker", True)
    d.ingest.payload("station-broker", None, b"garbage", 0)
    # 8 blocks, then 3 × 4 more (two frames each, analysed round by round) while the lagging sink holds its first
    # delivery: it keeps the newest few per point (app.SINK_BACKLOG_PER_POINT) and the daemon counts the rest
    for seq in range(20):
        d.ingest.block("station-broker", bearing_block(seq), 0)
        if seq >= 7 and (seq - 7) % 4 == 0:  # 3 frames after 8 blocks (hop 8192), then 2 more per 4 blocks
            async with asyncio.timeout(20):
                while d.stats.frames_analysed["P-101-DE-H"] < 3 + 2 * ((seq - 7) // 4):
                    await asyncio.sleep(0.02)
    lagging.release.set()
    async with asyncio.timeout(20):
        while not d.idle:
            await asyncio.sleep(0.02)
    try:
        yield d, registry, lagging
    finally:
        await d.stop()


def scrape(url: str) -> str:
    with urllib.request.urlopen(url, timeout=5) as r:
        return r.read().decode()


async def test_exposition_names_and_labels(daemon: tuple[Daemon, CollectorRegistry, LaggingSink]) -> None:
    d, _, lagging = daemon
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
    # every analysed result either reached the lagging sink or was counted as skipped for it
    skipped = families["edgevib_sink_results_dropped"]
    assert skipped.type == "counter"
    analysed = d.stats.frames_analysed["P-101-DE-H"]
    dropped = analysed - len(lagging.results)
    assert analysed == 9 and dropped > 0
    assert [(s.name, s.labels, s.value) for s in skipped.samples if s.name.endswith("_total")] == [
        ("edgevib_sink_results_dropped_total", {"sink": "LaggingSink", "point": "P-101-DE-H"}, float(dropped))]


async def test_promtool_check_metrics(daemon: tuple[Daemon, CollectorRegistry, LaggingSink]) -> None:
    promtool = shutil.which("promtool")
    if promtool is None:
        pytest.skip("promtool not installed")
    d, _, _lagging = daemon
    assert d.metrics.url is not None
    text = await asyncio.to_thread(scrape, d.metrics.url)
    proc = await asyncio.to_thread(subprocess.run, [promtool, "check", "metrics"], input=text.encode(),
                                   capture_output=True, timeout=30)
    assert proc.returncode == 0, proc.stdout.decode() + proc.stderr.decode()
    assert not proc.stdout.strip() and not proc.stderr.strip(), proc.stdout.decode() + proc.stderr.decode()


@pytest.mark.network
@pytest.mark.slow
async def test_real_prometheus_scrapes_the_daemon(daemon: tuple[Daemon, CollectorRegistry, LaggingSink]) -> None:
    exe = shutil.which("prometheus")
    if exe is None:
        pytest.skip("prometheus not installed")
    d, _, _lagging = daemon
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
