"""OpcUaSource against a real asyncua server started by each test on 127.0.0.1 and a free port."""

from __future__ import annotations

import asyncio
import contextlib
import datetime
import math
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import pytest_asyncio
import structlog
from asyncua import Server, ua
from asyncua.crypto.permission_rules import User, UserRole
from opcua_certs import make_cert
from prometheus_client import CollectorRegistry
from servers import free_port

from edgevib.common.wire import Block
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import parse_config
from edgevib.daemon.interfaces import ConfigError, SourceError
from edgevib.daemon.sources.opcua import NodeSpec, OpcUaSource

# one event loop for the module, so that one server (its address space takes seconds to build) serves the tests
pytestmark = [pytest.mark.network, pytest.mark.asyncio(loop_scope="module")]

FS_HZ = 25600.0
N = 2048
EPOCH = datetime.datetime(2026, 12, 1, 6, 0, 0, tzinfo=datetime.UTC)


@dataclass
class FakeIngest:
    """Records every call a source makes."""

    blocks: list[tuple[str, Block, int, str | None]] = field(default_factory=list)
    speeds: list[tuple[str, str, float]] = field(default_factory=list)
    rejects: list[tuple[str, str, str, str | None]] = field(default_factory=list)
    connections: list[bool] = field(default_factory=list)

    def payload(self, source: str, topic: str | None, payload: bytes, received_ns: int) -> None:
        raise AssertionError("an OPC UA source hands over decoded blocks, not payloads")

    def block(self, source: str, block: Block, received_ns: int, topic: str | None = None) -> None:
        self.blocks.append((source, block, received_ns, topic))

    def speed(self, source: str, tag: str, value: float, received_ns: int) -> None:
        self.speeds.append((source, tag, value))

    def reject(self, source: str, reason: str, detail: str, topic: str | None = None) -> None:
        self.rejects.append((source, reason, detail, topic))

    def connection(self, source: str, connected: bool) -> None:
        self.connections.append(connected)


async def until(cond: Callable[[], bool], what: str, timeout_s: float = 15.0) -> None:
    """Wait (bounded) until ``cond()`` holds."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout_s
    while not cond():
        if loop.time() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        await asyncio.sleep(0.02)


def block_samples(k: int) -> list[float]:
    rng = np.random.default_rng(100 + k)  # seeded: each block index has its own known samples
    return [float(v) for v in rng.normal(0.0, 0.5, N)]


def block_time(k: int) -> datetime.datetime:
    """SourceTimestamp of block ``k``: the time just after its last sample, blocks back to back."""
    return EPOCH + datetime.timedelta(microseconds=round((k + 1) * N / FS_HZ * 1e6))


class UaServer:
    """A small asyncua server with the variables the tests need (one object per test, restartable)."""

    def __init__(self, port: int, user_manager: Any = None) -> None:
        self.port = port
        self.url = f"opc.tcp://127.0.0.1:{port}/edgevib-test/"
        self.server = Server(user_manager=user_manager)
        self.vars: dict[str, Any] = {}

    async def init(self, policies: list[Any] | None = None, cert: Any = None) -> UaServer:
        await self.server.init()
        self.server.set_endpoint(self.url)
        self.server.set_security_policy(policies or [ua.SecurityPolicyType.NoSecurity])
        if cert is not None:
            await self.server.set_application_uri(cert.application_uri)
            await self.server.load_certificate(str(cert.cert_der))
            await self.server.load_private_key(str(cert.key_pem))
        self.idx = await self.server.register_namespace("urn:fennick:quarry-lane:test")
        objects = self.server.nodes.objects
        acc = await objects.add_variable(self.nid("QL-P101-DE-H"), "QL-P101-DE-H",
                                         ua.Variant(block_samples(0), ua.VariantType.Double))
        await acc.add_property(self.idx, "SampleRate", FS_HZ)
        await acc.add_property(self.idx, "Unit", "g")
        self.vars["acc"] = acc
        await self.write("acc", block_samples(0), block_time(0))
        self.vars["bare"] = await objects.add_variable(self.nid("QL-M101-NDE-V"), "QL-M101-NDE-V",
                                                       ua.Variant(block_samples(0), ua.VariantType.Double))
        self.vars["bad"] = await objects.add_variable(self.nid("QL-F201-DE-H"), "QL-F201-DE-H",
                                                      ua.Variant([1.0, 2.0], ua.VariantType.Double))
        # variables whose type can never carry a block (the server refuses to change a variable's type)
        self.vars["text"] = await objects.add_variable(self.nid("QL-B301-DE-H"), "QL-B301-DE-H",
                                                       ua.Variant("garbage", ua.VariantType.String))
        self.vars["flags"] = await objects.add_variable(self.nid("QL-B301-NDE-H"), "QL-B301-NDE-H",
                                                        ua.Variant([True, False], ua.VariantType.Boolean))
        self.vars["speed"] = await objects.add_variable(self.nid("P-101.speed"), "P-101.speed", 1480.0)
        self.vars["empty"] = await objects.add_variable(  # created without a value, like a device before its 1st block
            self.nid("QL-F201-NDE-V"), "QL-F201-NDE-V", ua.Variant(None, ua.VariantType.Null),
            datatype=ua.NodeId(ua.ObjectIds.Double))
        return self

    def nid(self, name: str) -> ua.NodeId:
        return ua.NodeId(name, self.idx)

    def node_id(self, key: str) -> str:
        return str(self.vars[key].nodeid.to_string())

    async def write(self, key: str, value: Any, ts: datetime.datetime | None = None,
                    vtype: ua.VariantType | None = ua.VariantType.Double) -> None:
        variant = ua.Variant(value, vtype) if vtype is not None else ua.Variant(value)
        dv = ua.DataValue(variant, SourceTimestamp=ts, ServerTimestamp=ts or datetime.datetime.now(datetime.UTC))
        await self.server.write_attribute_value(self.vars[key].nodeid, dv)

    async def write_variant(self, key: str, variant: ua.Variant, ts: datetime.datetime) -> None:
        await self.server.write_attribute_value(self.vars[key].nodeid,
                                                ua.DataValue(variant, SourceTimestamp=ts, ServerTimestamp=ts))

    running = False

    async def start(self) -> None:
        await self.server.start()
        self.running = True

    async def stop(self) -> None:
        self.running = False
        await self.server.stop()

    async def reset(self) -> None:
        """Back to the initial values (for the next test on the shared server)."""
        if not self.running:
            await self.start()
        await self.write("acc", block_samples(0), block_time(0))
        await self.write("bad", [1.0, 2.0], datetime.datetime.now(datetime.UTC))
        await self.write("speed", 1480.0)


@pytest_asyncio.fixture(scope="module", loop_scope="module")
async def shared_server() -> AsyncIterator[UaServer]:
    srv = await UaServer(free_port()).init()
    await srv.start()
    try:
        yield srv
    finally:
        with contextlib.suppress(Exception):
            await srv.stop()


@pytest_asyncio.fixture(loop_scope="module")
async def opcua_server(shared_server: UaServer) -> UaServer:
    await shared_server.reset()
    return shared_server


@contextlib.asynccontextmanager
async def running(source: OpcUaSource) -> AsyncIterator[asyncio.Task[None]]:
    task = asyncio.create_task(source.run())
    try:
        yield task
    finally:
        await asyncio.wait_for(source.stop(), 15)
        await asyncio.wait_for(task, 15)


def make_source(srv: UaServer, ingest: FakeIngest, **kw: Any) -> OpcUaSource:
    args: dict[str, Any] = dict(
        name="booster-plc", endpoint=srv.url, ingest=ingest,
        nodes={srv.node_id("acc"): NodeSpec("QL-P101-DE-H")},
        speed_nodes={srv.node_id("speed"): "P-101.speed"},
        reconnect_min_s=0.1, reconnect_max_s=0.5, timeout_s=2.0)
    args.update(kw)
    return OpcUaSource(**args)


def check_block(block: Block, k: int, seq: int) -> None:
    assert block.sensor_id == "QL-P101-DE-H"
    assert block.fs_hz == FS_HZ  # read from the variable's SampleRate property
    assert block.unit == "g"
    assert block.seq == seq
    assert block.samples.dtype == np.float64 and block.samples.shape == (N,)
    np.testing.assert_array_equal(block.samples, np.asarray(block_samples(k)))  # Double array: exact
    # t0 = SourceTimestamp − n/fs; the blocks were written back to back, so t0(k) = EPOCH + k·n/fs
    expected_t0_ns = round(EPOCH.timestamp() * 1e9) + round(k * N / FS_HZ * 1e9)
    assert abs(block.t0_ns - expected_t0_ns) <= 1000  # OPC UA DateTime resolution is 100 ns; µs in datetime


async def test_subscribe_delivers_blocks_and_speed(opcua_server: UaServer) -> None:
    ingest = FakeIngest()
    source = make_source(opcua_server, ingest)
    async with running(source):
        await until(lambda: len(ingest.blocks) >= 1 and len(ingest.speeds) >= 1, "initial value")
        assert source.connected and ingest.connections == [True]
        for k in (1, 2):
            await opcua_server.write("acc", block_samples(k), block_time(k))
        await opcua_server.write("acc", block_samples(4), block_time(4))  # block 3 never published: a gap
        await opcua_server.write("speed", 1492.5, vtype=ua.VariantType.Double)
        await until(lambda: len(ingest.blocks) >= 4 and len(ingest.speeds) >= 2, "three more blocks and a speed")
    assert [b.seq for _, b, _, _ in ingest.blocks] == [0, 1, 2, 4]  # the skipped block leaves a gap in seq
    for (name, block, received_ns, topic), k in zip(ingest.blocks, (0, 1, 2, 4), strict=True):
        assert name == "booster-plc" and topic == opcua_server.node_id("acc") and received_ns > 0
        check_block(block, k, seq=k)
    assert ingest.speeds == [("booster-plc", "P-101.speed", 1480.0), ("booster-plc", "P-101.speed", 1492.5)]
    assert ingest.rejects == []
    assert ingest.connections == [True, False]  # stop() reports the disconnect


async def test_poll_mode_reads_each_new_value_once(opcua_server: UaServer) -> None:
    ingest = FakeIngest()
    source = make_source(opcua_server, ingest, mode="poll", poll_interval_s=0.05)
    async with running(source):
        await until(lambda: len(ingest.blocks) >= 1, "first polled block")
        await asyncio.sleep(0.3)  # several polls of the same value
        assert len(ingest.blocks) == 1
        await opcua_server.write("acc", block_samples(1), block_time(1))
        await until(lambda: len(ingest.blocks) >= 2, "second polled block")
        await asyncio.sleep(0.3)
    assert [b.seq for _, b, _, _ in ingest.blocks] == [0, 1]
    check_block(ingest.blocks[0][1], 0, seq=0)
    check_block(ingest.blocks[1][1], 1, seq=1)
    assert ingest.speeds[0] == ("booster-plc", "P-101.speed", 1480.0)


@pytest.mark.parametrize("mode", ["subscribe", "poll"])
async def test_malformed_values_are_rejected_and_good_blocks_flow(opcua_server: UaServer, mode: str) -> None:
    ingest = FakeIngest()
    bad, text, flags = (opcua_server.node_id(k) for k in ("bad", "text", "flags"))
    source = make_source(opcua_server, ingest, mode=mode, poll_interval_s=0.05,
                         nodes={opcua_server.node_id("acc"): NodeSpec("QL-P101-DE-H"),
                                bad: NodeSpec("QL-F201-DE-H", fs_hz=3200.0, unit="m/s2"),
                                text: NodeSpec("QL-B301-DE-H", fs_hz=3200.0),
                                flags: NodeSpec("QL-B301-NDE-H", fs_hz=3200.0)})
    async with running(source):
        await until(lambda: len(ingest.blocks) >= 2 and len(ingest.rejects) >= 2, "initial values of all nodes")
        hostile = [
            ua.Variant(7.5, ua.VariantType.Double),  # a scalar, not an array
            ua.Variant([], ua.VariantType.Double),
            ua.Variant([1.0, 2.0, 3.0, 4.0], ua.VariantType.Double, Dimensions=[2, 2]),
        ]
        for i, variant in enumerate(hostile):
            await opcua_server.write_variant("bad", variant, EPOCH + datetime.timedelta(seconds=10 + i))
            await until(lambda i=i: len(ingest.rejects) >= i + 3, f"rejection {i}")
        # NaN is not the source's business: it goes on to the ingest, which validates and rejects it
        await opcua_server.write("bad", [1.0, math.nan, 2.0], EPOCH + datetime.timedelta(seconds=20))
        await opcua_server.write("acc", block_samples(1), block_time(1))
        await until(lambda: len(ingest.blocks) >= 4, "NaN block and the next good block")
        await asyncio.sleep(0.2)  # more polls of the same bad values must not count again
    assert [r[1] for r in ingest.rejects] == ["malformed"] * 5
    assert sorted(r[3] or "" for r in ingest.rejects[:2]) == sorted([text, flags])
    assert [r[3] for r in ingest.rejects[2:]] == [bad] * 3
    details = [r[2] for r in ingest.rejects]
    for phrase in ("str, not a numeric array", "of type bool", "a scalar", "empty array", "2-D array of shape (2, 2)"):
        assert any(phrase in d for d in details), (phrase, details)
    good = [b for _, b, _, topic in ingest.blocks if topic == opcua_server.node_id("acc")]
    assert [b.seq for b in good] == [0, 1]
    check_block(good[1], 1, seq=1)
    nan_block = [b for _, b, _, topic in ingest.blocks if topic == bad][-1]
    assert nan_block.unit == "m/s2" and nan_block.fs_hz == 3200.0 and np.isnan(nan_block.samples[1])


async def test_unknown_node_and_missing_sample_rate_are_rejected(opcua_server: UaServer) -> None:
    ingest = FakeIngest()
    missing = f"ns={opcua_server.idx};s=QL-NOPE"
    source = make_source(opcua_server, ingest, speed_nodes={},
                         nodes={opcua_server.node_id("acc"): NodeSpec("QL-P101-DE-H"),
                                opcua_server.node_id("bare"): NodeSpec("QL-M101-NDE-V"),  # no SampleRate property
                                missing: NodeSpec("QL-NOPE", fs_hz=25600.0)})
    async with running(source):
        await until(lambda: len(ingest.blocks) >= 1 and len(ingest.rejects) >= 2, "block and rejections")
    assert sorted(r[1] for r in ingest.rejects) == ["no_sample_rate", "unknown_node"]
    assert {b.sensor_id for _, b, _, _ in ingest.blocks} == {"QL-P101-DE-H"}


async def test_start_stamped_values_and_an_empty_initial_value(opcua_server: UaServer) -> None:
    ingest = FakeIngest()
    empty = opcua_server.node_id("empty")
    source = make_source(opcua_server, ingest, speed_nodes={}, source_timestamp="start",
                         nodes={empty: NodeSpec("QL-F201-NDE-V", fs_hz=FS_HZ)})
    async with running(source):
        await until(lambda: source.connected, "connection")
        stamp = EPOCH + datetime.timedelta(seconds=30)
        await opcua_server.write("empty", block_samples(3), stamp)
        await until(lambda: len(ingest.blocks) >= 1, "the first written block")
    assert ingest.rejects == []  # a variable without a value yet is not a malformed block
    [(_, block, _, _)] = ingest.blocks
    assert block.seq == 0
    assert block.t0_ns == round(stamp.timestamp() * 1e9)  # "start": the stamp is the first sample's time
    np.testing.assert_array_equal(block.samples, np.asarray(block_samples(3)))


def sine_block(k: int, f_hz: float = 80.0, amp_g: float = 1.0) -> list[float]:
    """Block ``k`` of one continuous sine of ``amp_g`` at ``f_hz``."""
    t = (k * N + np.arange(N)) / FS_HZ
    return [float(v) for v in amp_g * np.sin(2 * np.pi * f_hz * t)]


@pytest.mark.slow
async def test_daemon_over_opcua_measures_and_counts_the_reconnect(opcua_server: UaServer, tmp_path: Path) -> None:
    doc = {
        "site": {"name": "quarry-lane", "state_dir": str(tmp_path)},
        "analysis": {"frame_samples": 4 * N, "overlap": 0.0, "workers": 1},
        "sources": [{"name": "booster-plc", "type": "opcua", "endpoint": opcua_server.url,
                     "reconnect_min_s": 0.1, "reconnect_max_s": 0.5}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "booster-plc", "sensor": "QL-P101-DE-H",
                    "node": opcua_server.node_id("acc"), "fs_hz": FS_HZ, "block_samples": N}],
    }
    config = parse_config(doc, base_dir=str(tmp_path))
    await opcua_server.write("acc", sine_block(0), block_time(0))
    daemon = Daemon(config, registry=CollectorRegistry(), serve_metrics=False)
    await daemon.start()
    try:
        await until(lambda: daemon.stats.connected.get("booster-plc", False), "the daemon's OPC UA connection")
        for k in range(1, 8):
            await opcua_server.write("acc", sine_block(k), block_time(k))
        await until(lambda: daemon.stats.frames_analysed.get("P-101-DE-H", 0) >= 2, "two frames")
        # sine acceleration a: velocity amplitude a/(2πf), r.m.s. amplitude/√2 (closed form, common practice)
        expected_mm_s = 1.0 * 9.80665 / (2 * np.pi * 80.0) / np.sqrt(2) * 1e3  # 13.80 mm/s
        v = daemon.latest["P-101-DE-H"].indicators.velocity_rms_mm_s
        assert v == pytest.approx(expected_mm_s, rel=0.03)

        await opcua_server.stop()
        await until(lambda: not daemon.stats.connected.get("booster-plc", True), "the loss")
        await opcua_server.start()
        await until(lambda: daemon.stats.connected.get("booster-plc", False), "the reconnect")
        for k in range(8, 16):
            await opcua_server.write("acc", sine_block(k), block_time(k))
        await until(lambda: daemon.stats.frames_analysed.get("P-101-DE-H", 0) >= 4, "frames after the restart")
        assert daemon.stats.reconnects.get("booster-plc") == 1
        assert sum(daemon.stats.blocks_rejected.values()) == 0
        assert daemon.latest["P-101-DE-H"].indicators.velocity_rms_mm_s == pytest.approx(expected_mm_s, rel=0.03)
    finally:
        await daemon.stop()


@pytest.mark.slow
@pytest.mark.parametrize("mode", ["subscribe", "poll"])
async def test_server_restart_reconnects_and_resumes(opcua_server: UaServer, mode: str) -> None:
    ingest = FakeIngest()
    source = make_source(opcua_server, ingest, mode=mode, poll_interval_s=0.05)
    async with running(source):
        await until(lambda: len(ingest.blocks) >= 1, "first block")
        await opcua_server.stop()
        await until(lambda: ingest.connections[-1] is False, "the loss to be reported")
        assert not source.connected
        await opcua_server.write("acc", block_samples(1), block_time(1))  # written while nobody listens
        await opcua_server.start()
        await until(lambda: ingest.connections.count(True) >= 2, "the reconnect")
        await until(lambda: len(ingest.blocks) >= 2, "the block after the restart")
        await opcua_server.write("acc", block_samples(2), block_time(2))
        await until(lambda: len(ingest.blocks) >= 3, "a block written after the reconnect")
    assert ingest.connections[:3] == [True, False, True]
    assert [b.seq for _, b, _, _ in ingest.blocks] == [0, 1, 2]  # no duplicate, sequence continues
    check_block(ingest.blocks[2][1], 2, seq=2)


@pytest.mark.slow
class OneUser:
    """asyncua user manager accepting exactly one user name and password."""

    def __init__(self, username: str, password: str) -> None:
        self.username, self.password = username, password

    def get_user(self, iserver: Any, username: str | None = None, password: str | None = None,
                 certificate: Any = None) -> User | None:
        if username == self.username and password == self.password:
            return User(role=UserRole.User)
        return None


async def test_basic256sha256_sign_and_encrypt_with_user_and_password(tmp_path: Path) -> None:
    server_cert = make_cert(tmp_path, "server", "urn:fennick:quarry-lane:test-server", server=True)
    client_cert = make_cert(tmp_path, "client", "urn:fennick:quarry-lane:edgevib", server=False)
    password = "quarry-lane-test-secret-7f3a"
    srv = UaServer(free_port(), user_manager=OneUser("edgevib", password))
    await srv.init([ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt], server_cert)
    srv.server.set_identity_tokens([ua.UserNameIdentityToken])  # no anonymous sessions
    await srv.start()
    secure: dict[str, Any] = dict(security_policy="Basic256Sha256", security_mode="SignAndEncrypt",
                                  cert_file=str(client_cert.cert_der), key_file=str(client_cert.key_pem),
                                  server_cert_file=str(server_cert.cert_der))
    try:
        ingest = FakeIngest()
        with structlog.testing.capture_logs() as events:
            source = make_source(srv, ingest, username="edgevib", password=password, **secure)
            async with running(source):
                await until(lambda: len(ingest.blocks) >= 1, "a block over the encrypted channel")
                await srv.write("acc", block_samples(1), block_time(1))
                await until(lambda: len(ingest.blocks) >= 2, "second block")
            check_block(ingest.blocks[1][1], 1, seq=1)
            assert ingest.connections[0] is True

            # a wrong password, and the same client without security, are both refused
            for kw in ({"username": "edgevib", "password": "wrong-" + password, **secure}, {}):
                refused = FakeIngest()
                async with running(make_source(srv, refused, **kw)):
                    await asyncio.sleep(1.0)
                assert refused.blocks == [] and True not in refused.connections
        errors = [str(e.get("error")) for e in events if e["event"] == "opcua_session_failed"]
        assert any("BadUserAccessDenied" in e for e in errors), errors  # the refusals were logged…
        assert password not in repr(events)  # …and the password never was
    finally:
        await srv.stop()


@pytest.mark.parametrize(("kw", "path"), [
    ({"mode": "push"}, "sources[0].mode"),
    ({"security_policy": "Basic128"}, "sources[0].security_policy"),
    ({"security_policy": "Basic256Sha256"}, "sources[0].security_policy"),  # needs cert_file and key_file
    ({"security_mode": "Encrypt"}, "sources[0].security_mode"),
    ({"endpoint": "http://127.0.0.1:4840"}, "sources[0].endpoint"),
    ({"reconnect_min_s": 5.0, "reconnect_max_s": 1.0}, "sources[0].reconnect_max_s"),
    ({"poll_interval_s": 0.0}, "sources[0].poll_interval_s"),
])
async def test_bad_connection_settings_are_refused_by_the_configuration(kw: dict[str, Any], path: str) -> None:
    # the source is built from the validated [[sources]] table: the configuration names the key
    source = {"name": "plc", "type": "opcua", "endpoint": "opc.tcp://127.0.0.1:4840/", **kw}
    with pytest.raises(ConfigError) as info:
        parse_config({
            "site": {"name": "quarry-lane"}, "sources": [source],
            "machines": [{"id": "P-101", "speed_rpm": 1480.0}],
            "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "plc", "node": "ns=2;s=QL-P101-DE-H",
                        "fs_hz": FS_HZ, "block_samples": N}]}, plans=False)
    assert info.value.path == path


@pytest.mark.parametrize(("kw", "path"), [
    ({"nodes": {"ns=2;s=a": NodeSpec("a", unit="mm/s")}}, "sources.plc.nodes['ns=2;s=a'].unit"),
    ({"nodes": {"ns=2;s=a": NodeSpec("a", fs_hz=-1.0)}}, "sources.plc.nodes['ns=2;s=a'].fs_hz"),
    ({"nodes": {"not a node id": NodeSpec("a")}}, "sources.plc.nodes['not a node id']"),
    ({"nodes": {}}, "sources.plc"),
])
async def test_bad_nodes_name_the_key(kw: dict[str, Any], path: str) -> None:
    args: dict[str, Any] = dict(name="plc", endpoint="opc.tcp://127.0.0.1:4840/", ingest=FakeIngest(),
                                nodes={"ns=2;s=QL-P101-DE-H": NodeSpec("QL-P101-DE-H")})
    args.update(kw)
    with pytest.raises(ConfigError) as info:
        OpcUaSource(**args)
    assert info.value.path == path


async def test_speed_without_a_value_yet_is_skipped_not_rejected() -> None:
    # OPC UA Part 4 (status codes): BadWaitingForInitialData means the server has no value yet, like a variable
    # created empty; neither is a bad reading, so neither is counted.  Another bad status and a non-number are.
    ingest = FakeIngest()
    node = "ns=2;s=quarry-lane/P-101/speed_rpm"
    source = OpcUaSource(name="booster-plc", endpoint="opc.tcp://127.0.0.1:4840/", ingest=ingest,
                         nodes={}, speed_nodes={node: "P-101.speed"})
    [key] = source._speed_nodes
    waiting = ua.DataValue(ua.Variant(None), StatusCode=ua.StatusCode(ua.StatusCodes.BadWaitingForInitialData))
    for dv in (None, ua.DataValue(ua.Variant(None)), waiting):
        source._on_value(key, dv, 1)
    assert ingest.rejects == [] and ingest.speeds == []
    source._on_value(key, ua.DataValue(ua.Variant(1480.0, ua.VariantType.Double)), 2)
    assert ingest.speeds == [("booster-plc", "P-101.speed", 1480.0)]
    source._on_value(key, ua.DataValue(ua.Variant(1480.0, ua.VariantType.Double),
                                       StatusCode=ua.StatusCode(ua.StatusCodes.BadSensorFailure)), 3)
    source._on_value(key, ua.DataValue(ua.Variant("fast", ua.VariantType.String)), 4)
    assert [r[1] for r in ingest.rejects] == ["bad_status", "malformed"]


async def test_untrusted_client_certificate_is_reported_in_one_line(tmp_path: Path) -> None:
    """A server whose trust store does not hold edgevib's certificate refuses the secure channel; the source says so
    (and what to trust where) instead of logging a crash (issue 13 §3: ``opcua_session_crashed error=AssertionError()``
    before)."""
    from asyncua.crypto.truststore import TrustStore
    from asyncua.crypto.validator import CertificateValidator, CertificateValidatorOptions

    server_cert = make_cert(tmp_path, "server", "urn:fennick:quarry-lane:test-server", server=True)
    client_cert = make_cert(tmp_path, "client", "urn:fennick:quarry-lane:edgevib", server=False)
    (tmp_path / "trusted").mkdir()
    stranger = make_cert(tmp_path / "other", "stranger", "urn:fennick:elsewhere:client", server=False)
    (tmp_path / "trusted" / "stranger.der").write_bytes(stranger.cert_der.read_bytes())
    store = TrustStore([tmp_path / "trusted"], [])  # trusts another application only
    await store.load()
    srv = UaServer(free_port())
    await srv.init([ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt], server_cert)
    srv.server.set_certificate_validator(CertificateValidator(
        CertificateValidatorOptions.TRUSTED | CertificateValidatorOptions.PEER_CLIENT, store))
    await srv.start()
    try:
        ingest = FakeIngest()
        with structlog.testing.capture_logs() as events:
            source = make_source(srv, ingest, security_policy="Basic256Sha256", security_mode="SignAndEncrypt",
                                 cert_file=str(client_cert.cert_der), key_file=str(client_cert.key_pem),
                                 server_cert_file=str(server_cert.cert_der))
            async with running(source):
                await asyncio.sleep(1.5)
        assert ingest.blocks == [] and True not in ingest.connections
    finally:
        await srv.stop()
    rejected = [e for e in events if e["event"] == "opcua_certificate_rejected"]
    assert rejected, [e["event"] for e in events]
    assert "rejected this client's certificate" in rejected[0]["problem"]
    assert "server_cert_file" in rejected[0]["problem"] and "cert_file" in rejected[0]["problem"]
    assert not [e for e in events if e["event"] == "opcua_session_crashed"]


@pytest.mark.parametrize(("cap_s", "outcomes", "expected_s"), [
    (None, [False] * 7, [0.5, 1.0, 2.0, 4.0, 8.0, 10.0, 10.0]),  # the configuration's defaults
    (3.0, [False] * 6, [0.5, 1.0, 2.0, 3.0, 3.0, 3.0]),
    (None, [False, False, False, True, False], [0.5, 1.0, 2.0, 0.5, 1.0]),  # a session that connected: anew
])
async def test_reconnect_backoff_doubles_up_to_the_configured_cap(cap_s: float | None, outcomes: list[bool],
                                                                   expected_s: list[float]) -> None:
    # Bounded exponential backoff (common practice): each failed attempt doubles the wait, up to the cap, so a
    # server that returns after an outage is tried again within the cap (default 10 s); a session that was
    # connected starts again from the minimum.  The waits are recorded, not waited.
    doc: dict[str, Any] = {"name": "plc", "type": "opcua", "endpoint": "opc.tcp://127.0.0.1:4840/"}
    if cap_s is not None:
        doc["reconnect_max_s"] = cap_s
    cfg = parse_config({
        "site": {"name": "quarry-lane"}, "sources": [doc],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "plc", "sensor": "QL-P101-DE-H",
                    "node": "ns=2;s=QL-P101-DE-H", "fs_hz": FS_HZ, "block_samples": N}]}).sources[0]
    src = OpcUaSource(name="plc", endpoint=cfg.endpoint, ingest=FakeIngest(),
                      nodes={"ns=2;s=QL-P101-DE-H": NodeSpec("QL-P101-DE-H")},
                      reconnect_min_s=cfg.reconnect_min_s, reconnect_max_s=cfg.reconnect_max_s)
    pending = list(outcomes)
    waits: list[float] = []

    async def session() -> bool:
        if pending.pop(0):
            return True  # connected, then lost
        raise SourceError("server unreachable")

    async def pause(delay_s: float) -> None:
        waits.append(delay_s)
        if not pending:
            src._stopping.set()

    src._session = session  # type: ignore[method-assign]
    src._pause = pause  # type: ignore[method-assign]
    await asyncio.wait_for(src.run(), 60.0)  # a guard against a loop that never stops, not a timing check
    assert waits == pytest.approx(expected_s)
