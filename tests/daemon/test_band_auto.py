"""Automatic demodulation bands in the daemon (``envelope_band_hz = "auto"``): selected from a point's frames off
the event loop, used from the next frame on, visible in the results, the MQTT document and the exposition, kept
in the state directory across a restart, selected again on the ``select_band`` command; and the envelope
verdicts published (metric, MQTT document, verdict limits)."""

from __future__ import annotations

import asyncio
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from edgevib.common.wire import Block
from edgevib.daemon.alarms.control import CommandError
from edgevib.daemon.app import Daemon
from edgevib.daemon.band_auto import STATE_FILE
from edgevib.daemon.config import Config, config_to_document, parse_config
from edgevib.daemon.interfaces import ConfigError, FrameResult
from edgevib.daemon.sinks.mqtt import indicator_document
from edgevib.pipelines.bearings import defect_multiples
from edgevib.pipelines.types import BearingGeometry

FS = 25600.0
BLOCK = 4096
FRAME = 8192
SHAFT_HZ = 24.7
T0 = 1_764_633_600_000_000_000
B6205 = BearingGeometry(9, 7.94, 39.04, 0.0)  # CWRU drive-end 6205 in mm (datasets README)


def bursts(times: np.ndarray, n: int, resonance_hz: float, decay: float, amplitude: np.ndarray) -> np.ndarray:
    """Decaying resonance bursts (impacts exciting a structural resonance, Randall & Antoni 2011)."""
    t = np.arange(n) / FS
    x = np.zeros(n)
    ring = math.ceil(8.0 / decay * FS)
    for t0, a in zip(times, amplitude, strict=True):
        i0 = max(0, math.ceil(t0 * FS))
        i1 = min(n, i0 + ring)
        if i1 > i0:
            tau = t[i0:i1] - t0
            x[i0:i1] += a * np.exp(-decay * tau) * np.sin(2 * np.pi * resonance_hz * tau)
    return x


def signal(seconds: float, seed: int = 5) -> np.ndarray:
    """Outer-race impacts at BPFO ringing a 3.5 kHz resonance under a louder band of random (Poisson) impacts
    ringing at 9 kHz (no period) and white noise: the simulated case of the automatic band's acceptance."""
    rng = np.random.default_rng(seed)
    n = int(FS * seconds)
    bpfo = defect_multiples(B6205).bpfo_hz * SHAFT_HZ
    count = int(seconds * bpfo) + 2
    periodic = (np.arange(count) + 0.01 * rng.standard_normal(count)) / bpfo
    x = bursts(periodic, n, 3500.0, 700.0, np.full(count, 0.6))
    random_times = np.sort(rng.uniform(0, seconds, int(40 * seconds)))
    noise_band = bursts(random_times, n, 9000.0, 1500.0, rng.uniform(3.0, 5.0, random_times.size))
    return x + noise_band + rng.normal(0, 0.3, n)


def document(state_dir: Path, band: Any = "auto", **limits: Any) -> dict[str, Any]:
    return {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": FRAME, "overlap": 0.0, "queue_frames": 64, "workers": 1},
        "alarms": {"startup_grace_s": 0.0, "on_delay_frames": 2},
        "sources": [{"name": "scripted", "type": "mqtt", "url": "mqtt://127.0.0.1:1", "topics": ["x/#"]}],
        "machines": [{"id": "B-301", "speed_rpm": SHAFT_HZ * 60}],
        "points": [
            {"id": "B-301-DE-H", "machine": "B-301", "axis": "horizontal", "source": "scripted",
             "sensor": "QL-B301-DE-H", "fs_hz": FS, "block_samples": BLOCK, "envelope_band_hz": band,
             "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04},
             **({"limits": limits} if limits else {})},
            {"id": "B-301-NDE-H", "machine": "B-301", "axis": "horizontal", "source": "scripted",
             "sensor": "QL-B301-NDE-H", "fs_hz": FS, "block_samples": BLOCK,
             "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}},
        ],
    }


class Probe:
    def __init__(self) -> None:
        self.results: list[FrameResult] = []

    async def start(self) -> None: ...

    async def on_frames(self, results: list[FrameResult]) -> None:
        self.results.extend(results)

    async def stop(self) -> None: ...


class Idle:
    name = "scripted"
    connected = True

    def __init__(self) -> None:
        self._stop = asyncio.Event()

    async def run(self) -> None:
        await self._stop.wait()

    async def stop(self) -> None:
        self._stop.set()


async def start(cfg: Config) -> tuple[Daemon, Probe, CollectorRegistry]:
    registry = CollectorRegistry()
    d = Daemon(cfg, registry=registry, metrics_listen=("127.0.0.1", 0), sources=[Idle()], serve_metrics=False)
    probe = Probe()
    d.add_sink(probe)
    await d.start()
    return d, probe, registry


def feed(d: Daemon, x: np.ndarray, first_block: int, blocks: int) -> None:
    for k in range(first_block, first_block + blocks):
        for sensor in ("QL-B301-DE-H", "QL-B301-NDE-H"):
            d.ingest.block("scripted", Block(sensor, k, T0 + round(k * BLOCK * 1e9 / FS), FS, "g",
                                             x[k * BLOCK:(k + 1) * BLOCK]), 0)


async def wait_for(pred: Any, timeout_s: float = 60.0) -> None:
    async with asyncio.timeout(timeout_s):
        while not pred():
            await asyncio.sleep(0.02)


def of(probe: Probe, point: str) -> list[FrameResult]:
    return [r for r in probe.results if r.point_id == point]


async def test_automatic_band_is_selected_used_published_and_kept(tmp_path: Path) -> None:
    x = signal(4.0)
    cfg = parse_config(document(tmp_path, bearing_bpfo_detected={"alert": True}))
    assert cfg.point("B-301-DE-H").envelope_band_origin == "auto"
    d, probe, registry = await start(cfg)
    pid = "B-301-DE-H"
    try:
        feed(d, x, 0, 8)  # 4 frames: the first selection once they are kept
        await wait_for(lambda: len(of(probe, pid)) >= 4)
        first = of(probe, pid)[0]
        default = first.indicators.envelope_band_hz
        assert first.envelope_band_source == "default" and default is not None
        assert default[0] <= 9000.0 <= default[1]  # the default band holds the louder non-periodic band too
        await wait_for(lambda: d.points[pid].band_source == "auto")
        band = d.points[pid].plan.envelope_band_hz
        assert band is not None and band[0] <= 3500.0 <= band[1] and band[1] < 9000.0  # the bearing's resonance
        feed(d, x, 8, 4)
        await wait_for(lambda: any(r.envelope_band_source == "auto" for r in of(probe, pid)) and d.idle)
        latest = [r for r in of(probe, pid) if r.envelope_band_source == "auto"][-1]
        assert latest.indicators.envelope_band_hz == band
        assert latest.indicators.envelope_detected == ("bpfo",)  # the outer-race fault, in the chosen band
        # published: the MQTT document and the exposition
        doc = indicator_document("quarry-lane", "horizontal", latest)
        assert doc["envelope_band_hz"] == list(band) and doc["envelope_band_source"] == "auto"
        assert doc["envelope"]["bpfo"]["detected"] is True and doc["envelope"]["bpfi"]["detected"] is False
        d.metrics.latest[pid] = (("quarry-lane", "B-301", pid, "horizontal"), latest)
        labels = {"site": "quarry-lane", "machine": "B-301", "point": pid, "axis": "horizontal"}
        assert registry.get_sample_value("edgevib_envelope_band_low_hertz", labels) == band[0]
        assert registry.get_sample_value("edgevib_envelope_band_high_hertz", labels) == band[1]
        assert registry.get_sample_value("edgevib_envelope_band_source", dict(labels, band_source="auto")) == 1.0
        assert registry.get_sample_value("edgevib_envelope_band_source", dict(labels, band_source="default")) == 0
        assert registry.get_sample_value("edgevib_envelope_detected", dict(labels, family="bpfo")) == 1.0
        assert registry.get_sample_value("edgevib_envelope_detected", dict(labels, family="bsf")) == 0.0
        # the verdict limit (bearing_bpfo_detected = { alert = true }) raised its alarm
        await wait_for(lambda: "bearing_bpfo_detected" in (d.state_text(pid) or ""))
        assert (d.state_text(pid) or "").startswith("ALERT")
        # the other point keeps its default band
        assert {r.envelope_band_source for r in of(probe, "B-301-NDE-H")} == {"default"}
        # kept in the state directory
        stored = json.loads((tmp_path / STATE_FILE).read_text())["points"][pid]
        assert stored["band_hz"] == list(band)
        # the command: select again now (on the alarm layer's control channel), refused for other points
        layer: Any = d.alarm_view
        assert layer.handle_command({"cmd": "select_band", "point": pid}) == {"requested": [pid]}
        with pytest.raises(CommandError, match="no automatic envelope band"):
            d.request_band_selection("B-301-NDE-H")
        with pytest.raises(CommandError, match="unknown point"):
            d.request_band_selection("X-1")
        before = d.band_auto._last_s[pid]
        await wait_for(lambda: d.band_auto._last_s[pid] > before and pid not in d.band_auto.running)
        assert d.points[pid].plan.envelope_band_hz == band  # the same record selects the same band
    finally:
        await d.stop()
    # a restart resumes with the stored band from its first frame
    d2, probe2, _ = await start(parse_config(document(tmp_path)))
    try:
        assert d2.points[pid].band_source == "auto" and d2.points[pid].plan.envelope_band_hz == band
        feed(d2, x, 0, 2)
        await wait_for(lambda: len(of(probe2, pid)) >= 1)
        assert of(probe2, pid)[0].envelope_band_source == "auto"
    finally:
        await d2.stop()


def test_configured_and_default_bands_name_their_source(tmp_path: Path) -> None:
    cfg = parse_config(document(tmp_path, band=[3000.0, 5000.0]))
    assert cfg.point("B-301-DE-H").envelope_band_origin == "configured"
    assert cfg.point("B-301-NDE-H").envelope_band_origin == "default"
    assert cfg.analysis.band_auto_interval_s == 3600.0


def test_printed_configuration_keeps_the_automatic_band(tmp_path: Path) -> None:
    # check-config prints what the file would say: "auto" for the automatic point, no band for the default one
    cfg = parse_config(document(tmp_path))
    points = {p["id"]: p for p in config_to_document(cfg)["points"]}
    assert points["B-301-DE-H"]["envelope_band_hz"] == "auto" and "envelope_band_hz" not in points["B-301-NDE-H"]
    again = parse_config(config_to_document(cfg))
    assert again.point("B-301-DE-H").envelope_band_origin == "auto"
    assert again.point("B-301-NDE-H").envelope_band_origin == "default"
    assert again.points == cfg.points


@pytest.mark.parametrize("band, match", [
    ("automatic", 'must be a \\[low, high\\] pair of numbers or "auto"'),
    ([3000.0], "must be a \\[low, high\\] pair"),
])
def test_bad_band_settings_name_the_key(tmp_path: Path, band: Any, match: str) -> None:
    with pytest.raises(ConfigError, match=match) as err:
        parse_config(document(tmp_path, band=band))
    assert "points[0].envelope_band_hz" in str(err.value)


@pytest.mark.parametrize("limit, match", [
    ({"alert": 1.0}, "a verdict limit is alert = true"),
    ({"alert": True, "rule": "iso"}, "no rule"),
    ({"alert": True, "danger": True}, "not both"),
])
def test_verdict_limits_take_true(tmp_path: Path, limit: dict[str, Any], match: str) -> None:
    with pytest.raises(ConfigError, match=match):
        parse_config(document(tmp_path, bearing_bpfi_detected=limit))
    cfg = parse_config(document(tmp_path, bearing_bpfi_detected={"alert": True}))
    (lim,) = [x for x in cfg.alarm_settings.limits if x.indicator == "bearing_bpfi_detected"]
    assert lim.verdict and lim.alert is not None and lim.alert.value == 0.5 and lim.danger is None


def test_selection_schedule_and_joined_records(tmp_path: Path) -> None:
    from edgevib.daemon.band_auto import AUTO_FRAMES, BandAuto

    auto = BandAuto(str(tmp_path))
    frame_ns = round(FRAME / FS * 1e9)
    x = np.arange(4 * FRAME, dtype=np.float32)
    for k in range(AUTO_FRAMES - 1):
        auto.observe("A", T0 + (k + 1) * frame_ns, FRAME, frame_ns, x[k * FRAME:(k + 1) * FRAME])
    assert auto.due(["A"], 0.0, 60.0) == []  # the first selection waits for AUTO_FRAMES frames …
    auto.request(["A"])
    assert auto.due(["A"], 0.0, 60.0) == ["A"]  # … unless asked for
    auto.started("A", 100.0)
    assert auto.due(["A"], 100.0, 60.0) == []  # running
    auto.running.discard("A")
    assert auto.due(["A"], 159.0, 60.0) == [] and auto.due(["A"], 160.0, 60.0) == ["A"]  # then every interval
    # consecutive frames without overlap are joined end to end (the samples in order) …
    rec = auto.record("A")
    assert rec is not None and np.array_equal(rec, x[: (AUTO_FRAMES - 1) * FRAME])
    # … a gap restarts the run
    auto.observe("A", T0 + (AUTO_FRAMES + 5) * frame_ns, FRAME, frame_ns, x[:FRAME])
    assert (r := auto.record("A")) is not None and r.size == FRAME
    # frames overlapping by half (the default overlap): the record is the signal once, in order
    hop = FRAME // 2
    for k in range(AUTO_FRAMES):
        auto.observe("B", T0 + k * (frame_ns // 2), hop, frame_ns // 2, x[k * hop:k * hop + FRAME])
    assert (r := auto.record("B")) is not None and np.array_equal(r, x[: FRAME + (AUTO_FRAMES - 1) * hop])
    auto.forget({"A"})
    assert auto.record("B") is None
