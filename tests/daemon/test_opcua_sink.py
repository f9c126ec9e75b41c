"""OpcUaIndicatorSink: a real asyncua server on 127.0.0.1 and a free port, read back with an asyncua client."""

from __future__ import annotations

import asyncio
import datetime
import math
from collections.abc import AsyncIterator
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest
from asyncua import Client, ua
from framekit import frame_indicators
from servers import free_port

from edgevib.daemon.config import parse_config
from edgevib.daemon.interfaces import ConfigError, FrameResult
from edgevib.daemon.sinks.opcua import INDICATORS, NAMESPACE_URI, OpcUaIndicatorSink, node_id_string
from edgevib.pipelines.types import FamilyResult

pytestmark = pytest.mark.network

SITE = "quarry-lane"
T_END_NS = 1_796_112_000_123_400_000  # 2026-12-01 08:00:00.1234 UTC


def sine_result(point: str, machine: str, *, shaft_hz: float | None, zone: str | None,
                t_end_ns: int = T_END_NS, orders: dict[str, float] | None = None,
                envelope: dict[str, FamilyResult] | None = None) -> FrameResult:
    """Indicators of a pure 1 g-amplitude sine: r.m.s. 1/√2 g, peak 1 g, crest factor √2, kurtosis 1.5,
    skewness 0 (closed form for a sine, common practice); velocity at 50 Hz: 9.80665/(2π·50) m/s amplitude."""
    fs_hz, n = 25600.0, 16384
    t = np.arange(n) / fs_hz
    x = np.sin(2 * np.pi * 50.0 * t)
    v_amp_mm_s = 9.80665e3 / (2 * np.pi * 50.0)
    ind = frame_indicators(
        acceleration_rms_g=1 / math.sqrt(2), acceleration_peak_g=1.0, acceleration_peak_to_peak_g=2.0,
        crest_factor=math.sqrt(2), kurtosis=1.5, skewness=0.0, mean_g=0.0,
        velocity_rms_mm_s=v_amp_mm_s / math.sqrt(2), velocity_peak_mm_s=v_amp_mm_s,
        displacement_pp_um=2 * v_amp_mm_s / (2 * np.pi * 50.0) * 1e3,
        shaft_hz=shaft_hz, shaft_estimated=False, orders_mm_s=orders or {}, envelope=envelope or {})
    return FrameResult(point_id=point, machine_id=machine, t_end_ns=t_end_ns, received_ns=t_end_ns + 5_000_000,
                       fs_hz=fs_hz, indicators=ind, iso_zone=zone, samples=x,
                       trend={"velocity_rms_mm_s": 21.5})


@pytest.fixture
async def sink() -> AsyncIterator[OpcUaIndicatorSink]:
    s = OpcUaIndicatorSink(listen=f"127.0.0.1:{free_port()}", site=SITE,
                           points=[("P-101-DE-H", "P-101"), ("F-201-NDE-V", "F-201")])
    await asyncio.wait_for(s.start(), 30)
    try:
        yield s
    finally:
        await asyncio.wait_for(s.stop(), 15)


@pytest.fixture
async def client(sink: OpcUaIndicatorSink) -> AsyncIterator[Client]:
    c = Client(sink.endpoint, timeout=5)
    await asyncio.wait_for(c.connect(), 15)
    try:
        yield c
    finally:
        await asyncio.wait_for(c.disconnect(), 15)


async def read(client: Client, idx: int, machine: str, point: str, name: str) -> ua.DataValue:
    node = client.get_node(node_id_string(idx, SITE, machine, point, name))
    return await node.read_data_value(raise_on_bad_status=False)


async def test_namespace_layout_and_initial_status(sink: OpcUaIndicatorSink, client: Client) -> None:
    idx = await client.get_namespace_index(NAMESPACE_URI)
    assert idx == sink.idx
    site = await client.nodes.objects.get_child(f"{idx}:{SITE}")
    point = await site.get_child([f"{idx}:P-101", f"{idx}:P-101-DE-H"])
    assert point.nodeid.to_string() == f"ns={idx};s={SITE}/P-101/P-101-DE-H"
    names = {(await c.read_browse_name()).Name for c in await point.get_children()}
    expected = set(INDICATORS) | {f"order_{k}_velocity_rms_mm_s" for k in ("0.5x", "1x", "2x", "3x")} | {
        f"envelope_{f}_{m}" for f in ("ftf", "bpfo", "bpfi", "bsf") for m in ("amplitude_g", "snr_db", "detected")}
    assert names == expected
    var = client.get_node(node_id_string(idx, SITE, "P-101", "P-101-DE-H", "velocity_rms_mm_s"))
    assert (await var.read_description()).Text == "Velocity r.m.s. in the point's velocity band (ISO 20816), mm/s"
    assert await var.read_data_type_as_variant_type() == ua.VariantType.Double
    eu = await (await var.get_child("0:EngineeringUnits")).read_value()
    assert eu.DisplayName.Text == "mm/s"
    dv = await read(client, idx, "P-101", "P-101-DE-H", "velocity_rms_mm_s")
    assert dv.StatusCode.value == ua.StatusCodes.BadWaitingForInitialData
    # a verdict: TwoStateDiscreteType (i=2373, OPC 10000-8 §5.3.3.2), Boolean, with its TrueState/FalseState texts
    verdict = client.get_node(node_id_string(idx, SITE, "P-101", "P-101-DE-H", "envelope_bpfo_detected"))
    assert await verdict.read_data_type_as_variant_type() == ua.VariantType.Boolean
    assert (await verdict.read_type_definition()).Identifier == ua.ObjectIds.TwoStateDiscreteType
    assert (await (await verdict.get_child("0:TrueState")).read_value()).Text == "detected"
    assert (await (await verdict.get_child("0:FalseState")).read_value()).Text == "not detected"


async def test_frame_values_are_published_with_status_and_timestamp(sink: OpcUaIndicatorSink,
                                                                    client: Client) -> None:
    idx = await client.get_namespace_index(NAMESPACE_URI)
    bpfo = FamilyResult(expected_hz=88.4, frequency_hz=88.9, amplitude_g=0.031, snr_db=14.2, harmonics_found=3,
                        detected=True)
    bpfi = FamilyResult(expected_hz=133.9, frequency_hz=None, amplitude_g=None, snr_db=None, harmonics_found=0)
    pump = sine_result("P-101-DE-H", "P-101", shaft_hz=24.67, zone="C", orders={"1x": 18.3, "2x": 2.1},
                       envelope={"bpfo": bpfo, "bpfi": bpfi})
    fan = sine_result("F-201-NDE-V", "F-201", shaft_hz=None, zone=None)
    await sink.on_frames([pump, fan])

    async def value(machine: str, point: str, name: str) -> Any:
        dv = await read(client, idx, machine, point, name)
        assert dv.StatusCode.is_good(), (name, dv.StatusCode)
        return dv.Value.Value

    ind = pump.indicators
    assert await value("P-101", "P-101-DE-H", "velocity_rms_mm_s") == ind.velocity_rms_mm_s  # Double: exact
    assert await value("P-101", "P-101-DE-H", "acceleration_rms_g") == 1 / math.sqrt(2)
    assert await value("P-101", "P-101-DE-H", "crest_factor") == math.sqrt(2)
    assert await value("P-101", "P-101-DE-H", "kurtosis") == 1.5
    assert await value("P-101", "P-101-DE-H", "shaft_hz") == 24.67
    assert await value("P-101", "P-101-DE-H", "iso_zone") == 2  # zone C: index into EnumStrings A, B, C, D
    assert await value("P-101", "P-101-DE-H", "velocity_rms_trend_mm_s") == 21.5
    assert await value("P-101", "P-101-DE-H", "order_1x_velocity_rms_mm_s") == 18.3
    assert await value("P-101", "P-101-DE-H", "envelope_bpfo_amplitude_g") == 0.031
    assert await value("P-101", "P-101-DE-H", "envelope_bpfo_snr_db") == 14.2
    assert await value("P-101", "P-101-DE-H", "envelope_bpfo_detected") is True  # the frame's verdict
    assert await value("P-101", "P-101-DE-H", "envelope_bpfi_detected") is False
    dv = await read(client, idx, "P-101", "P-101-DE-H", "velocity_rms_mm_s")
    assert dv.SourceTimestamp == datetime.datetime(2026, 12, 1, 8, 0, 0, 123400, tzinfo=datetime.UTC)

    # unavailable: no BSF family, no 0.5x order, the fan has no speed and no ISO group
    for machine, point, name in [("P-101", "P-101-DE-H", "envelope_bsf_amplitude_g"),
                                 ("P-101", "P-101-DE-H", "envelope_bsf_detected"),
                                 ("P-101", "P-101-DE-H", "order_0.5x_velocity_rms_mm_s"),
                                 ("F-201", "F-201-NDE-V", "shaft_hz"), ("F-201", "F-201-NDE-V", "iso_zone")]:
        dv = await read(client, idx, machine, point, name)
        assert dv.StatusCode.value == ua.StatusCodes.BadNoData, name
        assert dv.Value.Value is None
    assert await value("F-201", "F-201-NDE-V", "acceleration_peak_g") == 1.0

    # a non-finite indicator is published as unavailable, and a later good frame makes it good again
    nan_pump = sine_result("P-101-DE-H", "P-101", shaft_hz=math.nan, zone="B", t_end_ns=T_END_NS + 320_000_000)
    await sink.on_frames([nan_pump])
    dv = await read(client, idx, "P-101", "P-101-DE-H", "shaft_hz")
    assert dv.StatusCode.value == ua.StatusCodes.BadNoData
    await sink.on_frames([pump])
    assert await value("P-101", "P-101-DE-H", "shaft_hz") == 24.67


async def test_subscribers_see_updates_and_new_points_appear(sink: OpcUaIndicatorSink, client: Client) -> None:
    idx = await client.get_namespace_index(NAMESPACE_URI)
    seen: list[Any] = []

    class Handler:
        def datachange_notification(self, node: Any, val: Any, data: Any) -> None:
            seen.append(val)

    sub = await client.create_subscription(50, Handler())
    await sub.subscribe_data_change(client.get_node(node_id_string(idx, SITE, "P-101", "P-101-DE-H", "kurtosis")))
    await sink.on_frames([sine_result("P-101-DE-H", "P-101", shaft_hz=24.67, zone="A")])
    loop = asyncio.get_running_loop()
    deadline = loop.time() + 10
    while 1.5 not in seen:
        assert loop.time() < deadline, f"no kurtosis update seen: {seen}"
        await asyncio.sleep(0.05)
    await sub.delete()

    # a point unknown at start (configuration reload) and an order outside the standard set
    await sink.on_frames([sine_result("B-301-DE-A", "B-301", shaft_hz=49.5, zone="A", orders={"4x": 0.7})])
    dv = await read(client, idx, "B-301", "B-301-DE-A", "order_4x_velocity_rms_mm_s")
    assert dv.StatusCode.is_good() and dv.Value.Value == 0.7
    dv = await read(client, idx, "B-301", "B-301-DE-A", "shaft_hz")
    assert dv.Value.Value == 49.5


async def test_reconfigure_removes_and_adds_points(sink: OpcUaIndicatorSink, client: Client) -> None:
    idx = await client.get_namespace_index(NAMESPACE_URI)
    await sink.on_frames([sine_result("P-101-DE-H", "P-101", shaft_hz=24.67, zone="B")])
    new_config = SimpleNamespace(points=[SimpleNamespace(id="P-101-DE-H", machine="P-101", orders=(0.5, 1.0)),
                                         SimpleNamespace(id="M-101-NDE-H", machine="M-101", orders=(1.0, 6.0))])
    await sink.reconfigure(new_config)
    dv = await read(client, idx, "P-101", "P-101-DE-H", "kurtosis")
    assert dv.StatusCode.is_good() and dv.Value.Value == 1.5  # the untouched point keeps its value
    dv = await read(client, idx, "M-101", "M-101-NDE-H", "order_6x_velocity_rms_mm_s")  # configured orders
    assert dv.StatusCode.value == ua.StatusCodes.BadWaitingForInitialData
    dv = await read(client, idx, "F-201", "F-201-NDE-V", "kurtosis")  # removed from the configuration
    assert dv.StatusCode.value == ua.StatusCodes.BadNodeIdUnknown


@pytest.mark.parametrize(("change", "path", "problem"), [
    ({"publish": {"opcua": {"enabled": True, "listen": "127.0.0.1"}}}, "publish.opcua.listen", "HOST:PORT"),
    ({"publish": {"opcua": {"enabled": True, "listen": "127.0.0.1:99999"}}}, "publish.opcua.listen",
     "outside 0..65535"),
    ({"publish": {"opcua": {"enabled": True, "listen": "127.0.0.1:0"}}}, "publish.opcua.listen", "fixed port"),
    ({"site": {"name": "a/b"}}, "site.name", "OPC UA node-id parts"),
    ({"machines": [{"id": "P/101", "speed_rpm": 1480.0}]}, "machines[0].id", "OPC UA node-id parts"),
])
def test_bad_settings_are_refused_by_the_configuration(change: dict[str, Any], path: str, problem: str) -> None:
    # the server is built from the validated configuration: its listen address and the ids of its node ids
    doc: dict[str, Any] = {
        "site": {"name": SITE}, "sources": [{"type": "simulated", "name": "sim"}],
        "machines": [{"id": "P-101", "speed_rpm": 1480.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "sim", "fs_hz": 25600.0,
                    "block_samples": 4096}], **change}
    with pytest.raises(ConfigError) as info:
        parse_config(doc, plans=False)
    assert info.value.path == path and problem in info.value.problem
