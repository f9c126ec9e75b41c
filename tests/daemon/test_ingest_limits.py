"""Ingest limits of the MQTT source (issue 13 §5), against a real mosquitto and, for the thread hand-over, with
the source's paho callback driven directly:

* a payload above ``max_payload_bytes`` is counted (received and rejected ``too_large``) and logged at once, not
  when the next payload happens to arrive;
* ``max_payload_bytes`` above the codec's 4 MiB default is honoured (a valid 5 MiB JSON block is accepted);
* the queue between paho's thread and the event loop is bounded by bytes as well as by count.
"""

from __future__ import annotations

import asyncio
import json
import threading
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from prometheus_client import CollectorRegistry

from edgevib.common.wire import Block, encode_json
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import parse_config
from edgevib.daemon.sources.mqtt import MqttSource

FS = 25600.0
T0 = 1_764_633_600_000_000_000


def _config(url: str, state_dir: Path, max_payload_bytes: int) -> Any:
    return parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "sources": [{"name": "station-broker", "type": "mqtt", "url": url, "qos": 1,
                     "topics": ["fwb/quarry-lane/+/+/block"], "reconnect_min_s": 0.1,
                     "max_payload_bytes": max_payload_bytes}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1500.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "station-broker",
                    "sensor": "QL-P101-DE-H", "fs_hz": FS, "block_samples": 262144}],
        "alarms": {"enabled": False},
    })


async def _until(pred: Any, timeout_s: float = 20.0) -> bool:
    for _ in range(int(timeout_s / 0.05)):
        if pred():
            return True
        await asyncio.sleep(0.05)
    return bool(pred())


def _publish(port: int, payloads: list[bytes]) -> None:
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="limits-pub")
    c.connect("127.0.0.1", port)
    c.loop_start()
    try:
        for p in payloads:
            c.publish("fwb/quarry-lane/P-101/P-101-DE-H/block", p, qos=1).wait_for_publish(10)
    finally:
        c.loop_stop()
        c.disconnect()


@pytest.mark.network
async def test_oversize_counted_at_once_and_large_limit_honoured(mosquitto: Any, tmp_path: Path) -> None:
    limit = 8 * 1024 * 1024
    # a valid JSON block of 262144 samples as a plain array: about 5 MiB, above the codec's 4 MiB default
    samples = np.random.default_rng(3).standard_normal(262144) * 0.1  # full-precision repr in JSON
    block = Block("QL-P101-DE-H", 0, T0, FS, "g", samples)
    doc = json.loads(encode_json(block))
    doc["encoding"], doc["data"] = "array", samples.tolist()
    big_valid = json.dumps(doc).encode()
    assert 4 * 1024 * 1024 < len(big_valid) < limit
    registry = CollectorRegistry()
    d = Daemon(_config(mosquitto.url, tmp_path / "s", limit), metrics_listen=("127.0.0.1", 0), registry=registry)
    await d.start()
    try:
        assert await _until(lambda: d.stats.connected.get("station-broker", False))
        await asyncio.to_thread(_publish, mosquitto.port, [big_valid, b"{" + b" " * (limit + 10) + b"}"])
        # the oversize payload is the last one sent: nothing else arrives after it, yet it is counted
        assert await _until(lambda: d.stats.blocks_rejected.get(("station-broker", "too_large"), 0) == 1)
        assert d.stats.blocks_received["station-broker"] == 2
        assert sum(n for (s, r), n in d.stats.blocks_rejected.items() if s == "station-broker") == 1  # 5 MiB ok
    finally:
        await d.stop(timeout_s=10.0)


class _Ingest:
    def __init__(self) -> None:
        self.payloads = 0
        self.rejected: dict[str, int] = {}
        self.received_flags: list[bool] = []

    def payload(self, *_a: object) -> None:
        self.payloads += 1

    def block(self, *_a: object) -> None: ...
    def speed(self, *_a: object) -> None: ...
    def connection(self, *_a: object) -> None: ...

    def reject(self, _s: str, reason: str, _d: str, _t: str | None = None, *, received: bool = False) -> None:
        self.rejected[reason] = self.rejected.get(reason, 0) + 1
        self.received_flags.append(received)


TOPIC = "fwb/quarry-lane/P-101/P-101-DE-H/block"


async def test_thread_to_loop_queue_is_bounded_by_bytes(tmp_path: Path) -> None:
    from edgevib.daemon.config import MqttConnection

    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "t"})
    ingest = _Ingest()
    src = MqttSource(name="s", ingest=ingest, connection=conn, topics=["#"], max_payload_bytes=4 * 1024 * 1024,
                     max_pending_bytes=10 * 1024 * 1024)
    src._loop = asyncio.get_running_loop()
    payload = b"x" * (4 * 1024 * 1024)
    peak = 0

    def flood() -> None:  # paho's thread while the event loop is busy: 800 x 4 MiB
        nonlocal peak
        for _ in range(800):
            src._on_payload(TOPIC, payload)
            peak = max(peak, src.pending_bytes)

    t = threading.Thread(target=flood)
    t.start()
    t.join()  # the event loop has not run meanwhile: everything is still waiting or dropped
    assert peak <= 10 * 1024 * 1024
    await asyncio.sleep(0.1)
    assert ingest.payloads == 2  # 2 x 4 MiB fit under 10 MiB
    assert ingest.rejected == {"overload": 798}
    assert all(ingest.received_flags)  # dropped payloads still count as received
    assert src.pending_bytes == 0
