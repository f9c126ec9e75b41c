"""edgevib's OPC UA source and server against a second OPC UA stack, node-opcua (Node.js, npm registry).

* Source: a node-opcua "gateway" writes blocks back to back (no pause between writes).  With the former 50 ms
  sampling interval half of them were lost; sampling interval 0 (every write reported, OPC 10000-4 §5.12.1.2) and
  a queue sized for the block rate deliver every block, in order.  Int16 counts are scaled.  A node whose
  EngineeringUnits (UNECE code, OPC 10000-8 §5.6.3) disagree with the configured unit is not read.
* Server: node-opcua's client reads the namespace: indicators are AnalogItemType (i=2368) with EngineeringUnits
  whose UnitId node-opcua's own UNECE conversion gives (Hz = "HTZ" = 4740186), an EURange; the ISO zone is a
  MultiStateDiscreteType (i=2376) with EnumStrings; endpoints offer None and Basic256Sha256 and no user-name token.
"""

from __future__ import annotations

import asyncio
import json
import math
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from nodeopcua import JS, node_env
from servers import free_port

from edgevib.common.wire import Block
from edgevib.daemon.sources.opcua import NodeSpec, OpcUaSource

pytestmark = [pytest.mark.network, pytest.mark.slow]

FS, N = 25600.0, 2560
G = 9.80665  # standard gravity, exact (3rd CGPM 1901)


class _Ingest:
    def __init__(self) -> None:
        self.blocks: list[Block] = []
        self.rejected: list[tuple[str, str]] = []
        self.states: list[bool] = []

    def payload(self, *_a: object) -> None: ...
    def speed(self, *_a: object) -> None: ...

    def block(self, _source: str, block: Block, _received_ns: int, _topic: str | None = None) -> None:
        self.blocks.append(block)

    def reject(self, _s: str, reason: str, detail: str, _t: str | None = None, *, received: bool = False) -> None:
        self.rejected.append((reason, detail))

    def connection(self, _s: str, connected: bool) -> None:
        self.states.append(connected)


class Gateway:
    """gateway.js in a child process; ``write(n)`` makes it write n blocks per variable back to back."""

    def __init__(self, units: str = "m/s2", reporting: str = "exception") -> None:
        self.port = free_port()
        self.proc = subprocess.Popen(["node", str(JS / "gateway.js"), str(self.port), str(FS), str(N), units,
                                      reporting],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                                     env=node_env(), text=True, bufsize=1)
        line = self._line("ready").split()
        self.endpoint, self.ns = line[1], int(line[2])

    async def write(self, n: int) -> None:
        assert self.proc.stdin is not None and self.proc.stdout is not None
        self.proc.stdin.write(f"write {n}\n")
        self.proc.stdin.flush()
        line = await asyncio.to_thread(self._line, "wrote")
        assert line.strip() == f"wrote {n}", line

    def _line(self, word: str) -> str:
        """The next stdout line starting with ``word`` (node-opcua prints its own notices there too)."""
        assert self.proc.stdout is not None
        while True:
            line = self.proc.stdout.readline()
            if not line:
                raise RuntimeError(f"gateway ended before printing {word!r}")
            if line.startswith(word):
                return line

    def close(self) -> None:
        if self.proc.poll() is None:
            try:
                assert self.proc.stdin is not None
                self.proc.stdin.write("quit\n")
                self.proc.stdin.flush()
                self.proc.wait(10)
            except (OSError, subprocess.TimeoutExpired):
                self.proc.kill()
                self.proc.wait(5)


async def _until(pred: Any, timeout_s: float = 30.0) -> bool:
    for _ in range(int(timeout_s / 0.05)):
        if pred():
            return True
        await asyncio.sleep(0.05)
    return bool(pred())


async def test_source_gets_every_block_a_gateway_writes_back_to_back() -> None:
    gw = Gateway()
    ingest = _Ingest()
    f_node, i_node = f"ns={gw.ns};s=QL-P101-DE-H", f"ns={gw.ns};s=QL-P101-NDE-H"
    src = OpcUaSource(name="gw", endpoint=gw.endpoint, ingest=ingest, nodes={
        f_node: NodeSpec("QL-P101-DE-H", fs_hz=FS, unit="m/s2", block_samples=N),
        i_node: NodeSpec("QL-P101-NDE-H", fs_hz=FS, unit="m/s2", block_samples=N, scale=0.001)},
        reconnect_min_s=0.2)
    task = asyncio.create_task(src.run())
    try:
        assert await _until(lambda: src.connected)
        await asyncio.sleep(0.5)
        await gw.write(40)
        assert await _until(lambda: len(ingest.blocks) >= 80), (len(ingest.blocks), ingest.rejected)
        await asyncio.sleep(0.5)
    finally:
        await src.stop()
        await asyncio.wait_for(task, 15)
        gw.close()
    assert ingest.rejected == []
    by = {s: [b for b in ingest.blocks if b.sensor_id == s] for s in ("QL-P101-DE-H", "QL-P101-NDE-H")}
    for blocks in by.values():
        assert [b.seq for b in blocks] == list(range(40))  # none lost, no gap counted
    # the samples: 1 g peak at 47.3 Hz in m/s² (gateway.js; not a whole number of cycles per block, so every block
    # differs); Int16 counts of 0.001 m/s² scaled back
    k = 7
    t = (k * N + np.arange(N)) / FS
    expected = G * np.sin(2 * np.pi * 47.3 * t)
    np.testing.assert_allclose(by["QL-P101-DE-H"][k].samples, expected, rtol=0, atol=1e-12)
    np.testing.assert_allclose(by["QL-P101-NDE-H"][k].samples, expected, rtol=0, atol=0.0005 + 1e-12)
    # block times from the source timestamps (block end, ms resolution of a JavaScript Date)
    dt = [b.t0_ns - a.t0_ns for a, b in zip(by["QL-P101-DE-H"], by["QL-P101-DE-H"][1:], strict=False)]
    assert all(abs(d - N / FS * 1e9) <= 1e6 for d in dt)


async def test_a_server_that_samples_instead_of_reporting_every_write_is_named() -> None:
    """node-opcua's default server answers sampling interval 0 with 100 ms (its MinSupportedSampleRate): changes
    within that window are merged, so back-to-back blocks are lost — and the source says so, naming the node."""
    from structlog.testing import capture_logs

    gw = Gateway(reporting="coalesce")
    ingest = _Ingest()
    node = f"ns={gw.ns};s=QL-P101-DE-H"
    src = OpcUaSource(name="gw", endpoint=gw.endpoint, ingest=ingest,
                      nodes={node: NodeSpec("QL-P101-DE-H", fs_hz=FS, unit="m/s2", block_samples=N)})
    with capture_logs() as logs:
        task = asyncio.create_task(src.run())
        try:
            assert await _until(lambda: src.connected)
        finally:
            await src.stop()
            await asyncio.wait_for(task, 15)
            gw.close()
    revised = [e for e in logs if e["event"] == "opcua_sampling_revised"]
    assert len(revised) == 1 and revised[0]["node"] == node and revised[0]["revised_ms"] > 0


async def test_engineering_units_that_disagree_with_the_configuration_are_refused() -> None:
    gw = Gateway()  # its variables say m/s² (UNECE MSK)
    ingest = _Ingest()
    src = OpcUaSource(name="gw", endpoint=gw.endpoint, ingest=ingest, nodes={
        f"ns={gw.ns};s=QL-P101-DE-H": NodeSpec("QL-P101-DE-H", fs_hz=FS, unit="g", block_samples=N),
        f"ns={gw.ns};s=QL-P101-NDE-H": NodeSpec("QL-P101-NDE-H", fs_hz=12800.0, unit="m/s2", block_samples=N)},
        reconnect_min_s=0.2)
    task = asyncio.create_task(src.run())
    try:
        assert await _until(lambda: len(ingest.rejected) >= 2)
    finally:
        await src.stop()
        await asyncio.wait_for(task, 15)
        gw.close()
    reasons = dict((d.split(":")[0], r) for r, d in ingest.rejected)
    assert set(reasons.values()) == {"config_mismatch"}
    details = " ".join(d for _, d in ingest.rejected)
    assert "EngineeringUnits say m/s2" in details and "25600 Hz" in details


async def test_indicator_server_read_by_node_opcua(tmp_path: Path) -> None:
    from tests_frames import sine_result

    from edgevib.daemon.sinks.opcua import OpcUaIndicatorSink

    port = free_port()
    sink = OpcUaIndicatorSink(listen=f"127.0.0.1:{port}", site="quarry-lane", points=[("P-101-DE-H", "P-101")],
                              state_dir=str(tmp_path / "state"))
    sink.severity_of = lambda _point: 2  # as the alarm layer would answer for a point at danger
    await sink.start()
    try:
        await sink.on_frames([sine_result("P-101-DE-H", "P-101", shaft_hz=24.75, zone="C")])
        proc = await asyncio.to_thread(subprocess.run, ["node", str(JS / "client.js"), sink.endpoint,
                                                        "urn:edgevib:indicators", "quarry-lane", "P-101",
                                                        "P-101-DE-H"], capture_output=True, text=True, timeout=120,
                                       env=node_env())
    finally:
        await sink.stop()
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = json.loads(next(line for line in reversed(proc.stdout.splitlines()) if line.startswith("{\"")))
    policies = {(e["policy"], e["mode"]) for e in out["endpoints"]}
    assert policies == {("None", "None"), ("Basic256Sha256", "Sign"), ("Basic256Sha256", "SignAndEncrypt")}
    assert all(e["tokens"] == ["Anonymous"] for e in out["endpoints"])  # no user name over any policy
    vel = out["velocity"]
    assert vel["type"] == "ns=0;i=2368"  # AnalogItemType
    assert vel["unitId"] == out["expected"]["C16"] and vel["namespaceUri"].endswith("/units/un/cefact")
    assert out["shaftUnitId"] == out["expected"]["hertz"] == 4740186  # node-opcua's standardUnits.hertz
    assert out["accelerationUnitId"] == out["expected"]["K40"]
    assert vel["range"][0] < vel["range"][1] and vel["status"] == "Good"
    assert math.isclose(vel["value"], 9.80665e3 / (2 * math.pi * 50.0) / math.sqrt(2), rel_tol=1e-12)
    zone = out["zone"]
    assert zone["type"] == "ns=0;i=2376"  # MultiStateDiscreteType
    assert zone["enumStrings"] == ["A", "B", "C", "D"] and zone["value"] == 2 and zone["dataType"] == "UInt32"
    alarm = out["alarm"]
    assert alarm["type"] == "ns=0;i=2376" and alarm["enumStrings"][alarm["value"]] == "danger"
