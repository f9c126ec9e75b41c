"""Where simulated blocks go: an MQTT broker, an OPC UA server, WAV files; and the paced streaming loop.

MQTT
    One message per block on ``Simulation.topic(point)`` (``<prefix>/<machine>/<point>/block``) in the block
    wire format (``edgevib.common.wire``: JSON ``f32le-b64`` or binary float32), QoS 0 or 1, not retained.
    Every machine's speed goes to ``Simulation.speed_topic(machine)`` (``<prefix>/<machine>/speed``) every
    0.5 s of simulated time: r/min as plain text, e.g. ``1480.000``.

OPC UA (asyncua server, security policy None, anonymous; namespace ``urn:edgevib:simulator``, index 2)
    Stable string node ids under Objects/<site>/<machine>/<point>::

        ns=2;s=quarry-lane/P-101/P-101-DE-H/samples     Double[block_samples], g; written once per block, its
                                                        SourceTimestamp = the block's END: t0 + n/fs, the
                                                        time just after its last sample (what the daemon's
                                                        OPC UA source assumes by default)
        ns=2;s=quarry-lane/P-101/P-101-DE-H/samples/fs_hz          property, Double, Hz
        ns=2;s=quarry-lane/P-101/P-101-DE-H/samples/unit           property, String "g"
        ns=2;s=quarry-lane/P-101/P-101-DE-H/samples/block_samples  property, UInt32
        ns=2;s=quarry-lane/P-101/P-101-DE-H/samples/sensor         property, String (the sensor id)
        ns=2;s=quarry-lane/P-101/P-101-DE-H/seq                    UInt64, written just before samples
        ns=2;s=quarry-lane/P-101/P-101-DE-H/t0_ns                  Int64, written just before samples
        ns=2;s=quarry-lane/P-101/speed_rpm                         Double, r/min

    Until its first write every variable holds no value with status ``BadWaitingForInitialData``, so a client that
    connects before the first block or speed reads "no data yet", never a block of zeros or a stopped machine.

WAV
    One mono IEEE-float (format 3) 32-bit WAV per point, file name ``<point id>.wav``, samples in g at the
    point's true sample rate; blocks lost to a dropped-blocks fault are not in the file.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import importlib
import struct
import threading
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any, BinaryIO
from urllib.parse import urlsplit

import numpy as np

from edgevib.common.wire import Block, encode_binary, encode_json
from edgevib.simulator.engine import Simulation, opcua_node, opcua_speed_node

__all__ = [
    "MqttPublisher",
    "OpcUaPublisher",
    "PublishError",
    "WavWriter",
    "parse_listen",
    "parse_mqtt_url",
    "stream",
]

OPCUA_NAMESPACE = "urn:edgevib:simulator"
SPEED_INTERVAL_S = 0.5


class PublishError(Exception):
    """An output that cannot be used (unreachable broker, port in use, unwritable file)."""


def parse_mqtt_url(url: str) -> tuple[str, int]:
    """``mqtt://host[:port]`` → (host, port); the simulator speaks plain MQTT only."""
    parts = urlsplit(url)
    if parts.scheme != "mqtt":
        raise ValueError(f"MQTT URL {url!r} must start with mqtt:// (TLS is not offered by the simulator)")
    if not parts.hostname:
        raise ValueError(f"MQTT URL {url!r} has no host")
    try:
        port = parts.port or 1883
    except ValueError as exc:
        raise ValueError(f"MQTT URL {url!r} has an invalid port") from exc
    return parts.hostname, port


def parse_listen(text: str) -> tuple[str, int]:
    """``HOST:PORT`` → (host, port)."""
    host, sep, port = text.rpartition(":")
    if not sep or not host or not port.isdigit() or not 0 < int(port) < 65536:
        raise ValueError(f"listen address {text!r} must be HOST:PORT with a port in 1..65535")
    return host.strip("[]"), int(port)


# --------------------------------------------------------------------------------------------- MQTT


class MqttPublisher:
    """paho-mqtt client publishing blocks and speeds; connects with bounded exponential backoff."""

    def __init__(self, url: str, *, qos: int = 0, encoding: str = "json", client_id: str | None = None,
                 connect_timeout_s: float = 10.0, max_pending: int = 1000) -> None:
        mqtt: Any = importlib.import_module("paho.mqtt.client")

        self.host, self.port = parse_mqtt_url(url)
        if qos not in (0, 1):
            raise ValueError(f"qos {qos} must be 0 or 1")
        if encoding not in ("json", "binary"):
            raise ValueError(f"encoding {encoding!r} must be json or binary")
        self.url, self.qos, self.encoding = url, qos, encoding
        self.connect_timeout_s = connect_timeout_s
        self.max_pending = max_pending
        self._connected = threading.Event()
        self._closing = False
        self.lost: str | None = None  # why the broker connection was lost after connecting (None: it was not)
        self.on_lost: Callable[[str], None] | None = None  # called on paho's thread
        self._pending: deque[Any] = deque()
        self.published = 0
        self.failed = 0
        self._client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2,
                                   client_id=client_id or f"edgevib-sim-{int(time.time() * 1000) % 10**9}",
                                   protocol=mqtt.MQTTv311)
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect
        self._client.reconnect_delay_set(min_delay=1, max_delay=10)
        self._client.max_queued_messages_set(0)
        self._client.max_inflight_messages_set(100)

    def _on_connect(self, client: Any, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        if not getattr(reason, "is_failure", False):
            self._connected.set()

    def _on_disconnect(self, client: Any, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        was = self._connected.is_set()
        self._connected.clear()
        if was and not self._closing and self.lost is None:
            self.lost = str(reason)
            if self.on_lost is not None:
                self.on_lost(self.lost)

    def connect(self) -> None:
        """Connect within ``connect_timeout_s``, retrying with backoff 0.2 s doubling to 2 s; else PublishError."""
        deadline = time.monotonic() + self.connect_timeout_s
        delay, last = 0.2, "no attempt"
        while True:
            try:
                self._client.connect(self.host, self.port, keepalive=30)
                self._client.loop_start()
                if self._connected.wait(max(0.1, deadline - time.monotonic())):
                    return
                last = "no CONNACK from the broker"
                self._client.loop_stop()
                with contextlib.suppress(Exception):
                    self._client.disconnect()
            except (OSError, ValueError) as exc:
                last = str(exc) or type(exc).__name__
            if time.monotonic() + delay > deadline:
                raise PublishError(f"cannot reach MQTT broker {self.host}:{self.port} within "
                                   f"{self.connect_timeout_s:g} s: {last}")
            time.sleep(delay)
            delay = min(2 * delay, 2.0)

    def _track(self, info: Any) -> None:
        if info.rc != 0:
            self.failed += 1
            return
        self.published += 1
        self._pending.append(info)
        while self._pending and self._pending[0].is_published():
            self._pending.popleft()
        while len(self._pending) > self.max_pending:       # backpressure: wait for the oldest
            oldest = self._pending.popleft()
            with contextlib.suppress(RuntimeError, ValueError):
                oldest.wait_for_publish(5.0)

    def publish_block(self, topic: str, block: Block) -> None:
        payload = encode_json(block) if self.encoding == "json" else encode_binary(block)
        self._track(self._client.publish(topic, payload, qos=self.qos))

    def publish_speed(self, topic: str, rpm: float) -> None:
        self._track(self._client.publish(topic, f"{rpm:.3f}", qos=self.qos))

    def flush(self, timeout_s: float = 10.0) -> None:
        deadline = time.monotonic() + timeout_s
        while self._pending:
            info = self._pending.popleft()
            with contextlib.suppress(RuntimeError, ValueError):
                info.wait_for_publish(max(0.0, deadline - time.monotonic()))

    def close(self) -> None:
        self._closing = True
        with contextlib.suppress(Exception):
            self.flush(5.0)
        with contextlib.suppress(Exception):
            self._client.disconnect()
        self._client.loop_stop()


# --------------------------------------------------------------------------------------------- OPC UA


_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)


class OpcUaPublisher:
    """An asyncua server with one array variable per point (see the module docstring for node ids)."""

    def __init__(self, sim: Simulation, host: str, port: int) -> None:
        self.sim, self.host, self.port = sim, host, port
        self.endpoint = f"opc.tcp://{host}:{port}/"
        self._server: Any = None
        self._nodes: dict[str, tuple[Any, Any, Any]] = {}
        self._speed_nodes: dict[str, Any] = {}

    def node_ids(self) -> dict[str, str]:
        """Point id → samples node id, and machine id → speed node id."""
        sc = self.sim.scenario
        out = {p.point_id: opcua_node(sc, p.point_id) for p in sc.points}
        out |= {m.machine_id: opcua_speed_node(sc, m.machine_id) for m in sc.machines}
        return out

    async def start(self) -> None:
        asyncua: Any = importlib.import_module("asyncua")
        ua, Server = asyncua.ua, asyncua.Server

        sc = self.sim.scenario
        server = Server()
        await server.init()
        server.set_endpoint(self.endpoint)
        server.set_server_name(f"edgevib simulator ({sc.site})")
        server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
        idx = await server.register_namespace(OPCUA_NAMESPACE)
        if idx != 2:
            raise PublishError(f"OPC UA namespace index is {idx}, expected 2")

        def nid(path: str) -> Any:
            return ua.NodeId(path, idx)

        site = await server.nodes.objects.add_object(nid(sc.site), f"{idx}:{sc.site}")
        machines = {}
        waiting: list[Any] = []
        for m in sc.machines:
            mobj = await site.add_object(nid(f"{sc.site}/{m.machine_id}"), f"{idx}:{m.machine_id}")
            machines[m.machine_id] = mobj
            self._speed_nodes[m.machine_id] = await mobj.add_variable(
                nid(f"{sc.site}/{m.machine_id}/speed_rpm"), f"{idx}:speed_rpm",
                ua.Variant(0.0, ua.VariantType.Double))
            waiting.append(self._speed_nodes[m.machine_id])
        for p in sc.points:
            base = f"{sc.site}/{p.machine_id}/{p.point_id}"
            pobj = await machines[p.machine_id].add_object(nid(base), f"{idx}:{p.point_id}")
            samples = await pobj.add_variable(nid(f"{base}/samples"), f"{idx}:samples",
                                              ua.Variant([0.0] * p.block_samples, ua.VariantType.Double))
            await samples.write_value_rank(1)
            await samples.write_array_dimensions([p.block_samples])
            await samples.add_property(nid(f"{base}/samples/fs_hz"), f"{idx}:fs_hz",
                                       ua.Variant(float(p.fs_hz), ua.VariantType.Double))
            await samples.add_property(nid(f"{base}/samples/unit"), f"{idx}:unit",
                                       ua.Variant("g", ua.VariantType.String))
            await samples.add_property(nid(f"{base}/samples/block_samples"), f"{idx}:block_samples",
                                       ua.Variant(p.block_samples, ua.VariantType.UInt32))
            await samples.add_property(nid(f"{base}/samples/sensor"), f"{idx}:sensor",
                                       ua.Variant(p.sensor_id, ua.VariantType.String))
            seq = await pobj.add_variable(nid(f"{base}/seq"), f"{idx}:seq", ua.Variant(0, ua.VariantType.UInt64))
            t0 = await pobj.add_variable(nid(f"{base}/t0_ns"), f"{idx}:t0_ns", ua.Variant(0, ua.VariantType.Int64))
            self._nodes[p.sensor_id] = (samples, seq, t0)
            waiting += [samples, seq, t0]
        # The placeholders above only fix each variable's data type: replace them by "no value yet".
        no_data = ua.StatusCode(ua.StatusCodes.BadWaitingForInitialData)
        for node in waiting:
            await server.write_attribute_value(node.nodeid, ua.DataValue(StatusCode=no_data))
        try:
            await server.start()
        except OSError as exc:
            raise PublishError(f"cannot listen for OPC UA on {self.host}:{self.port}: {exc}") from exc
        self._server = server

    async def publish_block(self, block: Block) -> None:
        ua: Any = importlib.import_module("asyncua.ua")

        samples, seq, t0 = self._nodes[block.sensor_id]
        # SourceTimestamp = the block's end, t0 + n/fs (exact to the microsecond a datetime holds).
        end_ns = block.t0_ns + round(np.asarray(block.samples).size * 1e9 / block.fs_hz)
        ts = _EPOCH + dt.timedelta(microseconds=end_ns // 1000)
        await self._server.write_attribute_value(seq.nodeid, ua.DataValue(ua.Variant(block.seq, ua.VariantType.UInt64)))
        await self._server.write_attribute_value(t0.nodeid, ua.DataValue(ua.Variant(block.t0_ns, ua.VariantType.Int64)))
        await self._server.write_attribute_value(
            samples.nodeid, ua.DataValue(ua.Variant(np.asarray(block.samples, dtype=np.float64).tolist(),
                                                    ua.VariantType.Double), SourceTimestamp=ts))

    async def publish_speed(self, machine_id: str, rpm: float) -> None:
        ua: Any = importlib.import_module("asyncua.ua")

        await self._server.write_attribute_value(self._speed_nodes[machine_id].nodeid,
                                                 ua.DataValue(ua.Variant(float(rpm), ua.VariantType.Double)))

    async def stop(self) -> None:
        if self._server is not None:
            await self._server.stop()
            self._server = None


# --------------------------------------------------------------------------------------------- WAV


class WavWriter:
    """Streaming mono 32-bit IEEE-float WAV (RIFF, WAVE_FORMAT_IEEE_FLOAT with a 'fact' chunk)."""

    def __init__(self, path: Path, fs_hz: float) -> None:
        if not float(fs_hz).is_integer():
            raise PublishError(f"WAV needs an integral sample rate; {fs_hz:g} Hz is not")
        self.path = path
        self.fs = int(fs_hz)
        self.n = 0
        try:
            self._f: BinaryIO = open(path, "wb")  # noqa: SIM115 - closed in close()
        except OSError as exc:
            raise PublishError(f"cannot write {path}: {exc}") from exc
        self._header()

    def _header(self) -> None:
        data_bytes = 4 * self.n
        fmt = struct.pack("<HHIIHHH", 3, 1, self.fs, 4 * self.fs, 4, 32, 0)
        head = (b"RIFF" + struct.pack("<I", 4 + (8 + len(fmt)) + 12 + (8 + data_bytes)) + b"WAVE"
                + b"fmt " + struct.pack("<I", len(fmt)) + fmt
                + b"fact" + struct.pack("<II", 4, self.n)
                + b"data" + struct.pack("<I", data_bytes))
        self._f.seek(0)
        self._f.write(head)
        self._f.seek(0, 2)

    def write(self, samples: Any) -> None:
        self._f.write(np.asarray(samples, dtype="<f4").tobytes())
        self.n += len(samples)

    def close(self) -> None:
        if not self._f.closed:
            self._header()
            self._f.close()


# --------------------------------------------------------------------------------------------- loop


async def _publish_speeds(sim: Simulation, t_s: float, mqtt: MqttPublisher | None,
                          opcua: OpcUaPublisher | None) -> None:
    """Every measured machine speed at ``t_s`` in r/min (a machine without ``speed_tag`` has no measurement)."""
    for m in sim.machines:
        if not m.speed_tag:
            continue
        rpm = sim.speed_hz(m.machine_id, t_s) * 60
        if mqtt is not None:
            mqtt.publish_speed(sim.speed_topic(m.machine_id), rpm)
        if opcua is not None:
            await opcua.publish_speed(m.machine_id, rpm)


async def _publish_block(sim: Simulation, pid: str, b: Block, mqtt: MqttPublisher | None,
                         opcua: OpcUaPublisher | None, wav: dict[str, WavWriter] | None) -> None:
    if mqtt is not None:
        mqtt.publish_block(sim.topic(pid), b)
    if opcua is not None:
        await opcua.publish_block(b)
    if wav is not None:
        wav[pid].write(b.samples)


async def stream(sim: Simulation, *, rate: float, duration_s: float | None,
                 mqtt: MqttPublisher | None = None, opcua: OpcUaPublisher | None = None,
                 wav: dict[str, WavWriter] | None = None, max_step_s: float = 1.0,
                 stop: asyncio.Event | None = None, on_blocks: Callable[[float, list[Block]], None] | None = None
                 ) -> float:
    """Generate blocks at ``rate`` × real time (``rate`` very large: as fast as possible) until
    ``duration_s`` of simulated time (``None``: until ``stop``) and hand them to the outputs.

    Returns the simulated time reached.
    """
    if rate <= 0:
        raise ValueError(f"rate {rate:g} must be > 0")
    sensor_to_point = {p.sensor_id: p.point_id for p in sim.points}
    start = time.monotonic()
    t_sim = 0.0
    next_speed = 0.0
    while True:
        if stop is not None and stop.is_set():
            break
        target = (time.monotonic() - start) * rate
        if duration_s is not None:
            target = min(target, duration_s)
        step_to = min(target, t_sim + max_step_s)
        if step_to > t_sim:
            while next_speed <= step_to:
                await _publish_speeds(sim, next_speed, mqtt, opcua)
                next_speed += SPEED_INTERVAL_S
            blocks = sim.blocks_until(step_to)
            for b in blocks:
                await _publish_block(sim, sensor_to_point[b.sensor_id], b, mqtt, opcua, wav)
            if on_blocks is not None:
                on_blocks(step_to, blocks)
            t_sim = step_to
        if duration_s is not None and t_sim >= duration_s:
            break
        await asyncio.sleep(0.02 if step_to >= target else 0)
    return t_sim
