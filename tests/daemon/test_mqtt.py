"""MQTT source against a real mosquitto (private, loopback, free port): stream → metrics, speed tags,
broker restart with reconnect, hostile payloads mixed into a valid stream."""

from __future__ import annotations

import asyncio
import struct
import time
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from prometheus_client import CollectorRegistry

from edgevib.common.wire import Block, encode_binary, encode_json
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import Config, parse_config

pytestmark = pytest.mark.network

FS = 25600.0
BLOCK = 4096
T0 = 1_764_633_600_000_000_000
LABELS = {"site": "quarry-lane", "machine": "P-101", "point": "P-101-DE-H", "axis": "horizontal"}


def config(url: str, state_dir: Path, protocol: str = "3.1.1") -> Config:
    doc = {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": 16384, "overlap": 0.5, "queue_frames": 8},
        "sources": [{"name": "station-broker", "type": "mqtt", "url": url, "protocol": protocol, "qos": 1,
                     "topics": ["fwb/quarry-lane/+/+/block"], "reconnect_min_s": 0.1, "reconnect_max_s": 1.0,
                     "keepalive_s": 5, "max_payload_bytes": 262144}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1500.0},
                     {"id": "F-201", "group": 2, "support": "flexible",
                      "speed_tag": {"source": "station-broker", "topic": "fwb/quarry-lane/F-201/speed"}}],
        "points": [
            {"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "station-broker",
             "sensor": "QL-P101-DE-H", "fs_hz": FS, "block_samples": BLOCK},
            {"id": "F-201-NDE-V", "machine": "F-201", "axis": "vertical", "source": "station-broker",
             "sensor": "QL-F201-NDE-V", "fs_hz": FS, "block_samples": BLOCK},
        ],
    }
    return parse_config(doc)


def sine(sensor: str, seq: int, amp_g: float, f_hz: float) -> Block:
    t = (seq * BLOCK + np.arange(BLOCK)) / FS
    return Block(sensor, seq, T0 + round(seq * BLOCK * 1e9 / FS), FS, "g", amp_g * np.sin(2 * np.pi * f_hz * t))


class Publisher:
    def __init__(self, port: int) -> None:
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"test-pub-{time.monotonic_ns()}")
        self.c.connect("127.0.0.1", port)
        self.c.loop_start()

    def send(self, topic: str, payload: bytes) -> None:
        self.c.publish(topic, payload, qos=1).wait_for_publish(5)

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


async def wait_for(pred: Any, timeout_s: float = 20.0) -> None:
    async with asyncio.timeout(timeout_s):
        while not pred():
            await asyncio.sleep(0.05)


async def started(cfg: Config) -> tuple[Daemon, CollectorRegistry]:
    registry = CollectorRegistry()
    d = Daemon(cfg, registry=registry, metrics_listen=("127.0.0.1", 0))
    await d.start()
    await wait_for(lambda: d.ready, 10)
    return d, registry


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
async def test_stream_to_metrics_with_speed_tag(mosquitto: Any, protocol: str, tmp_path: Path) -> None:
    d, registry = await started(config(mosquitto.url, tmp_path, protocol))
    pub = await asyncio.to_thread(Publisher, mosquitto.port)
    try:
        await asyncio.to_thread(pub.send, "fwb/quarry-lane/F-201/speed", b"1200")
        for seq in range(8):
            await asyncio.to_thread(pub.send, "fwb/quarry-lane/P-101/DE-H/block",
                                    encode_binary(sine("QL-P101-DE-H", seq, 1.0, 50.0)))
            await asyncio.to_thread(pub.send, "fwb/quarry-lane/F-201/NDE-V/block",
                                    encode_json(sine("QL-F201-NDE-V", seq, 0.5, 20.0)))
        await wait_for(lambda: d.stats.frames_analysed["P-101-DE-H"] >= 3
                       and d.stats.frames_analysed["F-201-NDE-V"] >= 3 and d.idle)  # idle: sinks have the results
        v = registry.get_sample_value("edgevib_velocity_rms_meters_per_second", LABELS)
        # FIELD_NOTES §5: 1 g peak at 50 Hz → 22.07 mm/s r.m.s.
        assert v == pytest.approx(22.07e-3, rel=0.02)
        speed = registry.get_sample_value("edgevib_shaft_speed_hertz", dict(LABELS, machine="F-201",
                                                                              point="F-201-NDE-V", axis="vertical"))
        assert speed == pytest.approx(20.0)  # 1200 r/min from the tag
        assert registry.get_sample_value("edgevib_source_connected", {"source": "station-broker"}) == 1
    finally:
        await asyncio.to_thread(pub.close)
        await d.stop()


@pytest.mark.slow
async def test_broker_restart_reconnects_and_resumes(mosquitto: Any, tmp_path: Path) -> None:
    d, registry = await started(config(mosquitto.url, tmp_path))
    try:
        pub = await asyncio.to_thread(Publisher, mosquitto.port)
        for seq in range(4):
            await asyncio.to_thread(pub.send, "fwb/quarry-lane/P-101/DE-H/block",
                                    encode_binary(sine("QL-P101-DE-H", seq, 1.0, 50.0)))
        await wait_for(lambda: d.stats.frames_analysed["P-101-DE-H"] >= 1)
        await asyncio.to_thread(pub.close)
        await asyncio.to_thread(mosquitto.restart)
        await wait_for(lambda: d.stats.reconnects["station-broker"] >= 1 and d.ready, 20)
        before = d.stats.frames_analysed["P-101-DE-H"]
        pub = await asyncio.to_thread(Publisher, mosquitto.port)
        for seq in range(4, 10):
            await asyncio.to_thread(pub.send, "fwb/quarry-lane/P-101/DE-H/block",
                                    encode_binary(sine("QL-P101-DE-H", seq, 1.0, 50.0)))
        await wait_for(lambda: d.stats.frames_analysed["P-101-DE-H"] >= before + 2)
        await asyncio.to_thread(pub.close)
        assert registry.get_sample_value("edgevib_source_reconnects_total", {"source": "station-broker"}) >= 1
        assert registry.get_sample_value("edgevib_velocity_rms_meters_per_second", LABELS) == \
            pytest.approx(22.07e-3, rel=0.02)  # FIELD_NOTES §5
    finally:
        await d.stop()


async def test_hostile_payloads_do_not_disturb_valid_points(mosquitto: Any, tmp_path: Path) -> None:
    d, registry = await started(config(mosquitto.url, tmp_path))
    pub = await asyncio.to_thread(Publisher, mosquitto.port)
    topic = "fwb/quarry-lane/P-101/DE-H/block"
    good = [encode_binary(sine("QL-P101-DE-H", seq, 1.0, 50.0)) for seq in range(8)]
    finite = encode_binary(sine("QL-P101-DE-H", 99, 1.0, 50.0))
    at = 40 + len("QL-P101-DE-H") + 4 * 10  # sample 10 of the float32 body (common/wire.py layout)
    nan_payload = finite[:at] + struct.pack("<f", float("nan")) + finite[at + 4:]
    hostile = {
        "malformed": [b"\xff\xfe garbage", b"{not json", b"\x00" * 64],
        "length_mismatch": [good[0][:-7], good[0][:100]],                 # truncated blocks
        "too_large": [b"{" + b" " * 300_000 + b"}"],                       # above max_payload_bytes 262144
        "non_finite": [nan_payload],
        "wrong_length": [encode_binary(Block("QL-P101-DE-H", 99, 0, FS, "g", np.zeros(1000)))],
        "unknown_sensor": [encode_binary(Block("QL-NOBODY", 0, 0, FS, "g", np.zeros(BLOCK)))],
    }
    try:
        for seq, payload in enumerate(good):
            await asyncio.to_thread(pub.send, topic, payload)
            for reason_payloads in hostile.values():
                if seq < len(reason_payloads):
                    await asyncio.to_thread(pub.send, topic, reason_payloads[seq])
        expected_frames = (8 * BLOCK - 16384) // 8192 + 1  # 3 frames from 8 blocks, 50 % overlap
        await wait_for(lambda: d.stats.frames_analysed["P-101-DE-H"] >= expected_frames
                       and sum(d.stats.blocks_rejected.values()) >= 8 and d.idle)  # idle: sinks have the results
        assert d.ready
        for reason, payloads in hostile.items():
            got = registry.get_sample_value("edgevib_blocks_rejected_total",
                                            {"source": "station-broker", "reason": reason})
            assert got == len(payloads), (reason, got)
        assert d.stats.gaps.get("P-101-DE-H", 0) == 0
        assert d.stats.frames_analysed["P-101-DE-H"] == expected_frames
        assert registry.get_sample_value("edgevib_velocity_rms_meters_per_second", LABELS) == \
            pytest.approx(22.07e-3, rel=0.02)  # FIELD_NOTES §5
    finally:
        await asyncio.to_thread(pub.close)
        await d.stop()
