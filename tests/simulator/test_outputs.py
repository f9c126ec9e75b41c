"""Outputs: MQTT against a real mosquitto, the OPC UA server read by an asyncua client, the CLI and its files."""

from __future__ import annotations

import asyncio
import datetime as dt
import json
import subprocess
import sys
import threading
import time
import tomllib

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from scipy.io import wavfile
from servers import free_port

from edgevib.common import wire
from edgevib.daemon.cli import main
from edgevib.simulator.engine import Simulation, load_scenario
from edgevib.simulator.publishers import MqttPublisher, OpcUaPublisher, stream


class _Subscriber:
    def __init__(self, port: int, topic: str = "fwb/quarry-lane/#") -> None:
        self.messages: list[tuple[str, bytes, int]] = []
        self.lock = threading.Lock()
        self.ready = threading.Event()
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"test-sub-{port}")
        self.client.on_connect = lambda c, u, f, rc, p: (c.subscribe(topic, qos=1), None)
        self.client.on_subscribe = lambda c, u, mid, rc, p: self.ready.set()
        self.client.on_message = self._on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        assert self.ready.wait(10), "subscription not acknowledged"

    def _on_message(self, client, userdata, msg) -> None:
        with self.lock:
            self.messages.append((msg.topic, bytes(msg.payload), msg.qos))

    def wait_for(self, n: int, timeout_s: float = 20.0) -> list[tuple[str, bytes, int]]:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            with self.lock:
                if len(self.messages) >= n:
                    return list(self.messages)
            time.sleep(0.05)
        with self.lock:
            return list(self.messages)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def _expected_counts(sim: Simulation, t_s: float) -> tuple[int, int]:
    blocks = Simulation(sim.scenario, seed=sim.seed, t0_ns=sim.t0_ns).blocks_until(t_s)
    speeds = len(sim.machines) * (int(t_s / 0.5) + 1)
    return len(blocks), speeds


@pytest.mark.network
@pytest.mark.parametrize(("qos", "encoding"), [(0, "json"), (1, "binary")])
def test_mqtt_publishing_reads_back(mosquitto, qos, encoding):
    sim = Simulation(load_scenario("mechanical"), seed=9, t0_ns=1_764_633_600_000_000_000)
    n_blocks, n_speeds = _expected_counts(sim, 2.0)
    sub = _Subscriber(mosquitto.port)
    pub = MqttPublisher(mosquitto.url, qos=qos, encoding=encoding, connect_timeout_s=5.0)
    try:
        pub.connect()
        asyncio.run(stream(sim, rate=1e6, duration_s=2.0, mqtt=pub))
        pub.flush(10.0)
        msgs = sub.wait_for(n_blocks + n_speeds)
    finally:
        pub.close()
        sub.close()
    blocks = [(t, p, q) for t, p, q in msgs if t.endswith("/block")]
    speeds = [(t, p) for t, p, q in msgs if t.endswith("/speed")]
    assert len(blocks) == n_blocks and len(speeds) == n_speeds
    assert {q for _, _, q in blocks} == {qos}
    ref = Simulation(sim.scenario, seed=9, t0_ns=sim.t0_ns)
    for topic, payload, _ in blocks:
        b = wire.decode(payload)                      # the daemon's own decoder
        p = next(p for p in sim.points if p.sensor_id == b.sensor_id)
        assert topic == f"fwb/quarry-lane/{p.machine_id}/{p.point_id}/block"
        expected = ref.block(p.point_id, b.seq)
        assert b.t0_ns == expected.t0_ns and b.fs_hz == p.fs_hz and b.unit == "g"
        np.testing.assert_allclose(b.samples, expected.samples, rtol=1e-6, atol=1e-7)   # float32 on the wire
    assert {t for t, _ in speeds} == {f"fwb/quarry-lane/{m}/speed" for m in ("P-501", "P-502", "P-503")}
    assert all(float(p) == pytest.approx(1480.0) for _, p in speeds)


@pytest.mark.network
def test_cli_streams_to_mqtt(mosquitto, capsys):
    sub = _Subscriber(mosquitto.port)
    try:
        rc = main(["simulate", "--scenario", "mechanical", "--mqtt", mosquitto.url, "--qos", "1", "--duration", "1.0",
                   "--rate", "1000", "--seed", "4", "--t0-ns", "0"])
        sim = Simulation(load_scenario("mechanical"), seed=4, t0_ns=0)
        n_blocks, n_speeds = _expected_counts(sim, 1.0)
        msgs = sub.wait_for(n_blocks + n_speeds)
    finally:
        sub.close()
    assert rc == 0
    assert "publishing 6 points" in capsys.readouterr().out
    blocks = [wire.decode(p) for t, p, _ in msgs if t.endswith("/block")]
    assert len(blocks) == n_blocks
    b = blocks[0]
    pid = next(p.point_id for p in sim.points if p.sensor_id == b.sensor_id)
    np.testing.assert_allclose(b.samples, sim.block(pid, b.seq).samples, rtol=1e-6, atol=1e-7)


@pytest.mark.network
def test_unreachable_broker_exits_2_after_bounded_retries():
    port = free_port()                                 # nothing listens here
    # a child process: --connect-timeout ends the retries; the timeout below only bounds a hang (no timing check)
    proc = subprocess.run([sys.executable, "-m", "edgevib.daemon", "simulate", "--mqtt", f"mqtt://127.0.0.1:{port}",
                           "--connect-timeout", "0.8", "--duration", "1"], capture_output=True, text=True, timeout=120)
    err = proc.stderr.strip().splitlines()
    assert proc.returncode == 2
    assert len(err) == 1 and "cannot reach MQTT broker" in err[0] and str(port) in err[0]


@pytest.mark.network
async def test_opcua_server_readable_by_client():
    from asyncua import Client

    sim = Simulation(load_scenario("mechanical"), seed=6, t0_ns=1_700_000_000_000_000_000)
    port = free_port()
    pub = OpcUaPublisher(sim, "127.0.0.1", port)
    await pub.start()
    try:
        await stream(sim, rate=1e6, duration_s=1.0, opcua=pub)
        nodes = pub.node_ids()
        assert nodes["P-502-DE-A"] == "ns=2;s=quarry-lane/P-502/P-502-DE-A/samples"
        ref = Simulation(sim.scenario, seed=6, t0_ns=sim.t0_ns)
        async with asyncio.timeout(30), Client(f"opc.tcp://127.0.0.1:{port}/", timeout=10) as client:
            assert await client.get_namespace_index("urn:edgevib:simulator") == 2
            for p in sim.points:
                samples = client.get_node(nodes[p.point_id])
                dv = await samples.read_data_value()
                values = np.asarray(dv.Value.Value)
                seq = await client.get_node(nodes[p.point_id].replace("/samples", "/seq")).read_value()
                t0 = await client.get_node(nodes[p.point_id].replace("/samples", "/t0_ns")).read_value()
                fs = await client.get_node(nodes[p.point_id] + "/fs_hz").read_value()
                unit = await client.get_node(nodes[p.point_id] + "/unit").read_value()
                expected = ref.block(p.point_id, seq)
                assert fs == p.fs_hz and unit == "g" and values.size == p.block_samples
                assert t0 == expected.t0_ns
                # the stamp is the block's end, t0 + n/fs (what the daemon's OPC UA source assumes by default)
                end_ns = expected.t0_ns + round(p.block_samples * 1e9 / p.fs_hz)
                stamp = dv.SourceTimestamp.replace(tzinfo=dt.UTC) - dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
                assert stamp // dt.timedelta(microseconds=1) == end_ns // 1000
                np.testing.assert_array_equal(values, expected.samples)
            speed = await client.get_node(nodes["P-501"]).read_value()
            assert speed == pytest.approx(1480.0)
    finally:
        await pub.stop()


@pytest.mark.network
async def test_opcua_variables_wait_for_initial_data():
    # Before the first block a client reads "no value yet" (BadWaitingForInitialData), not zeros or 0 r/min;
    # after it, Good.
    from asyncua import Client, ua

    sim = Simulation(load_scenario("mechanical"), seed=6, t0_ns=1_700_000_000_000_000_000)
    port = free_port()
    pub = OpcUaPublisher(sim, "127.0.0.1", port)
    await pub.start()
    nodes = pub.node_ids()
    point, machine = sim.points[0].point_id, "P-501"
    names = [nodes[point], nodes[point].replace("/samples", "/seq"), nodes[machine]]
    try:
        async with asyncio.timeout(30), Client(f"opc.tcp://127.0.0.1:{port}/", timeout=10) as client:
            for nid in names:
                dv = await client.get_node(nid).read_data_value(raise_on_bad_status=False)
                assert dv.StatusCode.value == ua.StatusCodes.BadWaitingForInitialData, nid
                assert dv.Value.Value is None
            assert await client.get_node(nodes[point]).read_data_type_as_variant_type() == ua.VariantType.Double
            await stream(sim, rate=1e6, duration_s=1.0, opcua=pub)
            for nid in names:
                dv = await client.get_node(nid).read_data_value()
                assert dv.StatusCode.is_good(), nid
            assert np.asarray(dv.Value.Value) == pytest.approx(1480.0)
    finally:
        await pub.stop()


def test_cli_list(capsys):
    assert main(["simulate", "--list"]) == 0
    out = capsys.readouterr().out
    for name in ("demo", "progression", "sensor-faults"):
        assert any(line.startswith(name + " ") for line in out.splitlines())


@pytest.mark.parametrize("argv", [
    ["--qos", "2", "--duration", "1"],
    ["--rate", "0"],
    ["--duration", "-3"],
    ["--encoding", "xml"],
    ["--mqtt", "http://127.0.0.1:1883"],
    ["--opcua-listen", "localhost"],
    ["--scenario", "no-such-scenario"],
    ["--seed", "-1"],
])
def test_cli_bad_options_exit_2_with_one_line(argv, capsys):
    assert main(["simulate", *argv]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("edgevib simulate: ")


def test_cli_wav_truth_and_config(tmp_path, capsys):
    wav_dir, truth, config = tmp_path / "wav", tmp_path / "truth.json", tmp_path / "sim.toml"
    rc = main(["simulate", "--scenario", "sensor-faults", "--wav", str(wav_dir), "--duration", "2", "--rate", "1e6",
               "--seed", "5", "--truth", str(truth), "--emit-config", str(config)])
    assert rc == 0
    sim = Simulation(load_scenario("sensor-faults"), seed=5, t0_ns=0)
    for p in sim.points:
        rate, x = wavfile.read(wav_dir / f"{p.point_id}.wav")
        assert rate == 12800 and x.dtype == np.float32
        n = int(2.0 * 12800 // 4096)
        kept = [k for k in range(n) if sim.block(p.point_id, k) is not None]
        np.testing.assert_array_equal(x, np.concatenate([sim.block(p.point_id, k).samples for k in kept])
                                      .astype(np.float32))
    doc = json.loads(truth.read_text())
    assert doc["t_s"] == pytest.approx(2.0) and doc["seed"] == 5
    assert set(doc["points"]) == {p.point_id for p in sim.points}
    ref = sim.truth(2.0)["points"]["M-301-REF-H"]
    assert doc["points"]["M-301-REF-H"]["velocity_rms_mm_s"] == pytest.approx(ref["velocity_rms_mm_s"])
    cfg = tomllib.loads(config.read_text())
    assert cfg["sources"][0]["type"] == "simulated" and cfg["sources"][0]["scenario"] == "sensor-faults"
    assert [p["id"] for p in cfg["points"]] == [p.point_id for p in sim.points]


def test_cli_truth_only_at_a_time(tmp_path):
    truth = tmp_path / "t.json"
    assert main(["simulate", "--scenario", "progression", "--truth", str(truth), "--truth-at", "250"]) == 0
    doc = json.loads(truth.read_text())
    assert doc["t_s"] == 250.0 and doc["points"]["P-201-DE-H"]["expected_state"] == "danger"
    assert doc["points"]["P-201-DE-H"]["progression"]["zone_changes"][-1]["to"] == "D"


@pytest.mark.network
def test_cli_emit_config_for_mqtt_and_opcua(tmp_path):
    a, b = tmp_path / "a.toml", tmp_path / "b.toml"
    assert main(["simulate", "--mqtt", "mqtt://127.0.0.1:1", "--emit-config", str(a), "--connect-timeout", "0.2",
                 "--duration", "1"]) == 2                     # config written, then the broker is unreachable
    src = tomllib.loads(a.read_text())["sources"][0]
    assert src == {"name": "sim", "type": "mqtt", "url": "mqtt://127.0.0.1:1", "qos": 0,
                   "topics": ["fwb/quarry-lane/+/+/block"], "sensor_from": "payload"}
    port = free_port()
    assert main(["simulate", "--opcua-listen", f"127.0.0.1:{port}", "--emit-config", str(b), "--truth-at", "0",
                 "--duration", "0.001", "--rate", "1e6"]) == 0
    doc = tomllib.loads(b.read_text())
    assert doc["sources"][0]["endpoint"] == f"opc.tcp://127.0.0.1:{port}/"
    assert all(p["node"].startswith("ns=2;s=quarry-lane/") for p in doc["points"])
