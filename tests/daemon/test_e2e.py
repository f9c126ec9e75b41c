"""End to end: the simulator's demo scenario → a private mosquitto → the daemon → HTTP scrape of /metrics.

Every point's velocity r.m.s. must be within ±5 % of the simulator's analytic truth (the simulator never uses
edgevib.pipelines, so its truth is an outside reference for the whole chain).
"""

from __future__ import annotations

import asyncio
import json
import sys
import urllib.request
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from prometheus_client.parser import text_string_to_metric_families

from edgevib.common.wire import encode_binary
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import parse_config

pytestmark = [pytest.mark.network, pytest.mark.slow]

DURATION_S = 4.0


def publish_all(port: int, messages: list[tuple[str, bytes]]) -> None:
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="edgevib-test-simulator")
    c.connect("127.0.0.1", port)
    c.loop_start()
    try:
        infos = [c.publish(topic, payload, qos=1) for topic, payload in messages]
        for info in infos:
            info.wait_for_publish(10)
    finally:
        c.disconnect()
        c.loop_stop()


async def test_simulator_broker_daemon_scrape_matches_truth(mosquitto: Any, tmp_path: Path) -> None:
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario("demo"), seed=3)
    doc = sim.daemon_config(source={"name": "station-broker", "type": "mqtt", "url": mosquitto.url, "qos": 1,
                                    "topics": ["fwb/quarry-lane/#"], "reconnect_min_s": 0.1,
                                    "reconnect_max_s": 1.0})
    doc["site"]["state_dir"] = str(tmp_path)
    doc["analysis"]["queue_frames"] = 64  # keep every frame: this test reads the last one of each point
    cfg = parse_config(doc)
    d = Daemon(cfg, metrics_listen=("127.0.0.1", 0))
    await d.start()
    try:
        async with asyncio.timeout(10):
            while not d.ready:
                await asyncio.sleep(0.05)
        messages: list[tuple[str, bytes]] = []
        tag_machines = [m for m in cfg.machines if m.speed_tag is not None]
        for block in sim.blocks_until(DURATION_S):
            t_s = (block.t0_ns - sim.t0_ns) / 1e9
            for m in tag_machines:  # the speed tag, as a plant publishes it (r/min, plain text)
                messages.append((sim.speed_topic(m.id), f"{sim.speed_hz(m.id, t_s) * 60:.2f}".encode()))
            point = next(p for p in sim.points if p.sensor_id == block.sensor_id)
            messages.append((sim.topic(point.point_id), encode_binary(block)))
        await asyncio.to_thread(publish_all, mosquitto.port, messages)
        expected = {p.id: (int(DURATION_S * p.fs_hz) // p.block_samples * p.block_samples - p.frame_samples)
                    // p.hop_samples + 1 for p in cfg.points}
        async with asyncio.timeout(60):
            while any(d.stats.frames_analysed[pid] < n for pid, n in expected.items()):
                await asyncio.sleep(0.1)
        assert d.metrics.url is not None
        text = await asyncio.to_thread(lambda: urllib.request.urlopen(d.metrics.url, timeout=5).read().decode())
        families = {f.name: f for f in text_string_to_metric_families(text)}
        scraped = {s.labels["point"]: s.value for s in families["edgevib_velocity_rms_meters_per_second"].samples}
        assert set(scraped) == {p.id for p in cfg.points}
        for p in cfg.points:
            r = d.latest[p.id]
            t_mid_s = (r.t_end_ns - sim.t0_ns) / 1e9 - p.frame_samples / p.fs_hz / 2
            truth_mm_s = sim.truth(t_mid_s)["points"][p.id]["velocity_rms_mm_s"]
            # the simulator's analytic ISO-band velocity r.m.s. (its truth) vs the scraped metric in m/s
            assert scraped[p.id] * 1000.0 == pytest.approx(truth_mm_s, rel=0.05), p.id
        assert not d.stats.blocks_rejected
    finally:
        await d.stop()


async def test_simulate_cli_broker_daemon_matches_truth_file(mosquitto: Any, tmp_path: Path) -> None:
    """The same chain with the simulator as its own process: `edgevib simulate --mqtt … --truth PATH`."""
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario("demo"), seed=0)
    doc = sim.daemon_config(source={"name": "station-broker", "type": "mqtt", "url": mosquitto.url, "qos": 1,
                                    "topics": ["fwb/quarry-lane/#"], "reconnect_min_s": 0.1})
    doc["site"]["state_dir"] = str(tmp_path / "state")
    doc["analysis"]["queue_frames"] = 64
    cfg = parse_config(doc)
    d = Daemon(cfg, metrics_listen=("127.0.0.1", 0))
    await d.start()
    truth_path = tmp_path / "truth.json"
    try:
        async with asyncio.timeout(10):
            while not d.ready:
                await asyncio.sleep(0.05)
        proc = await asyncio.create_subprocess_exec(
            sys.executable, "-m", "edgevib.daemon", "simulate", "--mqtt", mosquitto.url, "--scenario", "demo",
            "--seed", "0", "--rate", "4", "--duration", str(DURATION_S), "--qos", "1", "--encoding", "binary",
            "--truth", str(truth_path), stdout=asyncio.subprocess.DEVNULL, stderr=asyncio.subprocess.PIPE)
        async with asyncio.timeout(60):
            _, err = await proc.communicate()
        assert proc.returncode == 0, err.decode()
        truth = json.loads(truth_path.read_text())
        async with asyncio.timeout(60):
            while any(d.stats.frames_analysed[p.id] < 3 for p in cfg.points) or not d.idle or any(
                    s.queue for s in d.ingest.streams.values()):
                await asyncio.sleep(0.1)
        assert d.metrics.url is not None
        text = await asyncio.to_thread(lambda: urllib.request.urlopen(d.metrics.url, timeout=5).read().decode())
        families = {f.name: f for f in text_string_to_metric_families(text)}
        scraped = {s.labels["point"]: s.value for s in families["edgevib_velocity_rms_meters_per_second"].samples}
        for p in cfg.points:
            # the simulator's analytic ISO-band velocity r.m.s. at the end of the run vs the scraped metric
            assert scraped[p.id] * 1000.0 == pytest.approx(truth["points"][p.id]["velocity_rms_mm_s"], rel=0.05), p.id
    finally:
        await d.stop()
