"""A whole Prometheus exposition compared with a stored file: metric names, HELP and TYPE lines, units, labels,
ordering and the absence of unavailable values, all at once.

The inputs are fixed (two points' frames, the daemon's self-counters, a latency histogram), so the text is too.
When the exposition changes on purpose, refresh the file and review the diff like code::

    EDGEVIB_REFRESH_GOLDEN=1 python -m pytest tests/daemon/test_exposition_golden.py
    git diff tests/data/exposition.prom
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
from framekit import frame_indicators
from prometheus_client import CollectorRegistry
from prometheus_client.exposition import generate_latest

from edgevib.daemon.frames import Stats
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.sinks.prometheus import PrometheusSink
from edgevib.pipelines.types import FamilyResult

GOLDEN = Path(__file__).resolve().parents[1] / "data" / "exposition.prom"
T_END_NS = 1_764_633_600_000_000_000


def _results() -> list[tuple[tuple[str, ...], FrameResult]]:
    running = frame_indicators(
        acceleration_rms_g=0.5, acceleration_peak_g=2.0, acceleration_peak_to_peak_g=3.5, crest_factor=4.0,
        kurtosis=3.25, skewness=0.125, mean_g=0.0, velocity_rms_mm_s=3.5, velocity_peak_mm_s=5.0,
        displacement_pp_um=40.0, shaft_hz=24.75, shaft_estimated=False,
        orders_mm_s={"0.5x": 0.25, "1x": 3.0, "2x": 0.5, "3x": 0.125}, envelope_band_hz=(2500.0, 10000.0),
        envelope={"bpfo": FamilyResult(expected_hz=88.75, frequency_hz=89.0, amplitude_g=0.125, snr_db=24.0,
                                       harmonics_found=3, detected=True),
                  "bpfi": FamilyResult(expected_hz=134.0, frequency_hz=None, amplitude_g=None, snr_db=None,
                                       harmonics_found=0)})
    unknown_speed = frame_indicators(  # no speed known: no orders, no families, no shaft speed; no ISO group
        acceleration_rms_g=0.25, acceleration_peak_g=1.0, acceleration_peak_to_peak_g=2.0, crest_factor=4.0,
        kurtosis=3.0, skewness=0.0, mean_g=1.0, velocity_rms_mm_s=1.5, velocity_peak_mm_s=2.25,
        displacement_pp_um=10.0, shaft_hz=None, shaft_estimated=False)
    frame = np.zeros(16, dtype=np.float32)
    return [
        (("quarry-lane", "P-101", "P-101-DE-H", "horizontal"),
         FrameResult("P-101-DE-H", "P-101", T_END_NS, T_END_NS, 25600.0, running, "C", frame, axis="horizontal",
                     trend={"velocity_rms_mm_s": 3.25}, envelope_band_source="auto")),
        (("quarry-lane", "F-201", "F-201-NDE-V", "vertical"),
         FrameResult("F-201-NDE-V", "F-201", T_END_NS + 500_000_000, T_END_NS, 3200.0, unknown_speed, None, frame,
                     axis="vertical")),
    ]


def _stats() -> Stats:
    s = Stats()
    s.blocks_received = {"station-broker": 120}
    s.blocks_rejected = {("station-broker", "malformed"): 2, ("station-broker", "unknown_sensor"): 1}
    s.blocks_ignored = {("station-broker", "other_shard"): 4}
    s.frames_analysed = {"P-101-DE-H": 14, "F-201-NDE-V": 5}
    s.frames_dropped = {"P-101-DE-H": 0, "F-201-NDE-V": 1}
    s.gaps = {"P-101-DE-H": 1}
    s.analysis_errors = {}
    s.sink_dropped = {("MqttIndicatorSink", "F-201-NDE-V"): 2}
    s.connected = {"station-broker": True}
    s.reconnects = {"station-broker": 1}
    for v in (0.004, 0.02, 0.02, 0.3, 12.0):
        s.latency.observe(v)
    return s


def test_whole_exposition_matches_the_stored_file() -> None:
    registry = CollectorRegistry()
    sink = PrometheusSink(site="quarry-lane", points=[], stats=_stats(), registry=registry, serve=False)
    sink.collector.version = "0.0.0+golden"
    sink.latest.update({labels[2]: (labels, r) for labels, r in _results()})
    registry.register(sink.collector)
    text = generate_latest(registry).decode()
    if os.environ.get("EDGEVIB_REFRESH_GOLDEN"):
        GOLDEN.write_text(text, encoding="utf-8")
    assert text == GOLDEN.read_text(encoding="utf-8"), "refresh: EDGEVIB_REFRESH_GOLDEN=1 (module docstring)"
