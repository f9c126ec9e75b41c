"""Indicator JSON on MQTT: one message per point per frame on the templated topic, units in key names, null
for unavailable indicators."""

from __future__ import annotations

import asyncio
import contextlib
import json
import queue
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from framekit import frame_indicators
from paho.mqtt.enums import CallbackAPIVersion

from edgevib.common.wire import Block
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import parse_config
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.sinks.mqtt import indicator_document

FS = 25600.0
BLOCK = 4096


def test_document_marks_unavailable_as_null() -> None:
    ind = frame_indicators(acceleration_rms_g=0.5, acceleration_peak_g=1.5, acceleration_peak_to_peak_g=3.0,
                           crest_factor=3.0, kurtosis=3.1, skewness=0.0, mean_g=0.0, velocity_rms_mm_s=2.0,
                           velocity_peak_mm_s=3.0, displacement_pp_um=20.0, shaft_hz=None, shaft_estimated=False)
    r = FrameResult(point_id="F-201-NDE-V", machine_id="F-201", t_end_ns=1_764_633_600_000_000_000, received_ns=0,
                    fs_hz=3200.0, indicators=ind, iso_zone="B", samples=np.zeros(16384))
    doc = indicator_document("quarry-lane", "vertical", r, ("0.5x", "1x"))
    assert doc["shaft_speed_hz"] is None and doc["envelope"] is None
    assert doc["orders_velocity_rms_mm_s"] == {"0.5x": None, "1x": None}
    assert doc["velocity_rms_mm_s"] == 2.0 and doc["iso_zone"] == "B"
    assert doc["acceleration_rms_m_s2"] == pytest.approx(0.5 * 9.80665)  # gₙ exact (3rd CGPM)
    assert doc["time"].startswith("2025-12-02T00:00:00")
    json.dumps(doc, allow_nan=False)


@pytest.mark.network
async def test_indicator_messages_per_point_per_frame(mosquitto: Any, tmp_path: Path) -> None:
    cfg = parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(tmp_path)},
        "sources": [{"name": "station-broker", "type": "mqtt", "url": mosquitto.url, "topics": ["x/#"],
                     "reconnect_min_s": 0.1}],
        "publish": {"mqtt": {"enabled": True, "source": "station-broker", "qos": 1,
                             "topic": "fwb/{site}/{machine}/{point}/indicators"}},
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1500.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "station-broker",
                    "sensor": "QL-P101-DE-H", "fs_hz": FS, "block_samples": BLOCK,
                    "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}}],
    })
    got: queue.Queue[tuple[str, bytes]] = queue.Queue()
    sub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="edgevib-test-historian")
    sub.on_message = lambda _c, _u, m: got.put((m.topic, bytes(m.payload)))
    sub.connect("127.0.0.1", mosquitto.port)
    sub.subscribe("fwb/#", qos=1)
    sub.loop_start()
    d = Daemon(cfg, metrics_listen=("127.0.0.1", 0))
    await d.start()
    try:
        async with asyncio.timeout(10):
            while not d.ready:
                await asyncio.sleep(0.05)
        for seq in range(6):  # 6 blocks, frames of 4 blocks every 2 → 2 frames
            t = (seq * BLOCK + np.arange(BLOCK)) / FS
            d.ingest.block("station-broker", Block("QL-P101-DE-H", seq, seq * 160_000_000, FS, "g",
                                                   np.sin(2 * np.pi * 50.0 * t)), 0)
        messages = []
        async with asyncio.timeout(20):
            while len(messages) < 2:
                with contextlib.suppress(queue.Empty):
                    messages.append(await asyncio.to_thread(got.get, True, 0.5))
        topic, payload = messages[0]
        assert topic == "fwb/quarry-lane/P-101/P-101-DE-H/indicators"
        doc = json.loads(payload)
        # FIELD_NOTES §5: 1 g peak at 50 Hz → 22.07 mm/s r.m.s.
        assert doc["velocity_rms_mm_s"] == pytest.approx(22.07, rel=0.02)
        assert doc["shaft_speed_hz"] == pytest.approx(25.0) and doc["iso_zone"] == "D"
        assert set(doc["orders_velocity_rms_mm_s"]) == {"0.5x", "1x", "2x", "3x"}
        assert set(doc["envelope"]) == {"ftf", "bpfo", "bpfi", "bsf"}
        await asyncio.sleep(0.3)
        assert got.empty()  # exactly one message per frame
    finally:
        await d.stop()
        sub.disconnect()
        sub.loop_stop()
