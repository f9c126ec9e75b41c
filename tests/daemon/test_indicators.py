"""The indicator registry drives every place an indicator is published (Prometheus, the MQTT document, OPC UA
values and address space, the offline ``analyze --json`` document, alarm limits and their evaluation, the severity
history, the view, the demo table when an entry asks for a column) and README's reference tables."""

from __future__ import annotations

import json
import math
import re
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

import edgevib.daemon.indicators as registry_module
from edgevib.daemon.alarms.core import AlarmCore, Frames, Now, decide
from edgevib.daemon.cli import main as cli_main
from edgevib.daemon.config import Config, parse_config
from edgevib.daemon.frames import Stats
from edgevib.daemon.indicators import (
    BAND_SOURCES,
    FAMILIES,
    LIMITABLE,
    REGISTRY,
    Indicator,
    readme_blocks,
    readme_tables,
)
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.service import render_table
from edgevib.daemon.sinks.mqtt import indicator_document
from edgevib.daemon.sinks.opcua import _variables, indicator_values
from edgevib.daemon.sinks.prometheus import PrometheusSink
from edgevib.daemon.trendwatch import HISTORY_INDICATORS, frame_values
from edgevib.daemon.web.api import indicator_rows
from edgevib.pipelines.alarm import display_severity
from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.machine_state import MachineState
from edgevib.pipelines.types import BearingGeometry

README = Path(__file__).resolve().parents[2] / "README.md"
FS, N, SHAFT_HZ = 25600.0, 16384, 24.75
ORDERS = ("0.5x", "1x", "2x", "3x")
BEARING = BearingGeometry(9, 0.3126, 1.537)  # 6205 (CWRU documentation), inches


def _frame() -> FrameResult:
    """A frame where every indicator is available: a 1× line, and outer-race impacts for the envelope families
    (a 6205 bearing at 24.75 Hz: BPFO = 3.5848 × fr, CWRU documentation; FIELD_NOTES §2)."""
    t = np.arange(N) / FS
    rng = np.random.default_rng(7)
    x = 0.3 * np.sin(2 * np.pi * SHAFT_HZ * t) + 0.02 * rng.standard_normal(N)
    bpfo = 3.5848 * SHAFT_HZ
    x += 0.5 * np.sin(2 * np.pi * 4000.0 * t) * (1 + np.cos(2 * np.pi * bpfo * t))
    # faint modulations at the other families' frequencies (FTF 0.39828, 2 × BSF 4.7135 × fr): each family's
    # window then holds a local maximum, so its amplitude and level exist (a window without one reads None)
    for m in (0.39828, 4.7135):
        x += 0.02 * np.sin(2 * np.pi * 4000.0 * t) * np.cos(2 * np.pi * m * SHAFT_HZ * t)
    plan = make_plan(FS, N, envelope_band_hz=(2500.0, 10000.0), bearing=BEARING, speed_range_hz=(10.0, 50.0))
    ind = analyze_frames(x, plan, [SHAFT_HZ])[0]
    return FrameResult("P-101-DE-H", "P-101", 1_764_633_600_000_000_000, 0, FS, ind, "B", x.astype(np.float32),
                       axis="horizontal", trend={"velocity_rms_mm_s": ind.velocity_rms_mm_s or 0.0},
                       envelope_band_source="configured")


def _keys(ind: Indicator) -> tuple[str, ...]:
    return ORDERS if ind.per == "order" else FAMILIES if ind.per == "family" else \
        BAND_SOURCES if ind.per == "band_source" else ("",)


def _has(doc: dict[str, Any], path: str, key: str) -> bool:
    node: Any = doc
    for part in (p.format(key=key) for p in path.split(".")):
        if not isinstance(node, dict) or part not in node:
            return False
        node = node[part]
    return node is not None


def _config(limits: dict[str, Any]) -> Config:
    """Pump P-101 (ISO group 2, rigid) with one point and the given limits; alarms judge from the first frame."""
    return parse_config({
        "sources": [{"name": "sim", "type": "simulated"}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "sim", "fs_hz": FS, "block_samples": 4096,
                    "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04},
                    "limits": limits}],
        "alarms": {"startup_grace_s": 0.0, "on_delay_frames": 1}}, plans=True)


def _offline_document(r: FrameResult, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> dict[str, Any]:
    """``edgevib analyze --json`` of the frame's samples, with the frame's speed, bearing and band."""
    path = tmp_path / "frame.npy"
    np.save(path, r.samples)
    b = BEARING
    code = cli_main(["analyze", str(path), "--fs", f"{FS:g}", "--rpm", f"{SHAFT_HZ * 60:g}", "--band", "2500:10000",
                     "--bearing", f"{b.elements},{b.ball_diameter},{b.pitch_diameter},0", "--json"])
    out = capsys.readouterr().out
    assert code == 0, out
    doc: dict[str, Any] = json.loads(out)
    return doc


def _raised(r: FrameResult) -> tuple[set[str], set[str]]:
    """(limit names configured, limit names the alarm core raises) for a limit on every limit-capable entry, set
    below the frame's value (a verdict limit: ``alert = true``), the frame judged on a running machine."""
    judged = replace(r, indicators=replace(r.indicators, envelope={  # every family detected: verdicts to judge
        k: replace(f, detected=True) for k, f in r.indicators.envelope.items()}),
        machine_state=MachineState(state="running", since_s=0.0, started_s=0.0, basis="speed"))
    limits: dict[str, Any] = {}
    for name, ind in LIMITABLE.items():
        v = ind.value(judged)
        assert v is not None and math.isfinite(v), f"the test frame should give {name} a value"
        limits[name] = {"alert": True} if name.endswith("_detected") else {"alert": v / 2 if v > 0 else v - 1}
    cfg = _config(limits)
    t_s = r.t_end_ns / 1e9
    core = AlarmCore(cfg, cfg.alarm_settings)
    core.restore({}, {}, {}, {}, Now(mono=0.0, wall=t_s))
    core, _ = decide(core, Frames([judged]), Now(mono=1.0, wall=t_s + 0.1))
    raised = {key[1] for key, state in core.alarms.items() if display_severity(state, core.specs[key]) >= 1}
    return {lim.indicator for lim in cfg.alarm_settings.limits}, raised


def test_every_registry_entry_appears_where_it_says(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    r = _frame()
    assert all(v is not None and math.isfinite(v) for i in REGISTRY for v in i.values(r).values()
               if i.per is None), "the test frame should make every scalar indicator available"
    sink = PrometheusSink(site="quarry-lane", points=[], stats=Stats(), registry=CollectorRegistry(), serve=False)
    sink.latest["P-101-DE-H"] = (("quarry-lane", "P-101", "P-101-DE-H", "horizontal"), r)
    exposed = {s.name for fam in sink.collector.collect() for s in fam.samples}
    mqtt = indicator_document("quarry-lane", "horizontal", r, ORDERS)
    opcua = indicator_values(r)
    address_space = {name for name, _unit, _text in _variables(ORDERS)}  # the nodes the OPC UA server builds
    report = _offline_document(r, tmp_path, capsys)
    limited, raised = _raised(r)
    table = render_table(_config({}), {"P-101-DE-H": r}, lambda _p: None, tty=False)
    generated = "\n".join(readme_tables().values())
    history = dict(zip(HISTORY_INDICATORS, frame_values(r).tolist(), strict=True))
    view = {row["name"]: row["value"] for row in indicator_rows(r)}
    for ind in REGISTRY:
        places = [ind.prometheus, ind.mqtt, ind.opcua, ind.report, ind.fault, ind.demo]
        assert any(p is not None for p in places), f"{ind.name} is published nowhere"
        if ind.prometheus is not None and ind.si is not None:
            name = f"edgevib_{ind.prometheus}" + (f"_{ind.si.suffix}" if ind.si.suffix else "")
            assert name in exposed and f"`{name}`" in generated, ind.name
        for key in _keys(ind):
            have = key in ind.values(r) and ind.values(r)[key] is not None
            if ind.mqtt is not None and have:
                assert _has(mqtt, ind.mqtt, key), (ind.name, key)
            if ind.mqtt_si is not None and have:
                assert _has(mqtt, ind.mqtt_si, key), (ind.name, key)
            if ind.opcua is not None:
                assert ind.opcua.format(key=key) in opcua, (ind.name, key)
                assert ind.opcua.format(key=key) in address_space, (ind.name, key)
            if ind.report is not None and have:
                assert _has(report, ind.report, key), (ind.name, key)
            view_name = f"{ind.name}.{key}" if key else ind.name
            assert view_name in view and (view[view_name] is not None) == have, (ind.name, key)
        if ind.fault is not None:
            assert ind.name in limited and f"`{ind.name}`" in generated, ind.name
            assert ind.name in raised, f"a limit on {ind.name} below its value raises no alarm"
            assert history[ind.name] == ind.value(r), ind.name  # the history records what a limit watches
        if ind.demo is not None:
            assert f" {ind.demo.key}=" in table, ind.name


def _cells(row: str) -> list[str]:
    """The cells of a Markdown table row: GitHub Flavored Markdown spec, "Tables (extension)": cells are split at
    pipes, and a pipe in a cell's content is escaped as ``\\|``."""
    return re.split(r"(?<!\\)\|", row.strip().removeprefix("|").removesuffix("|"))


def test_readme_reference_tables_match_the_registry(monkeypatch: pytest.MonkeyPatch) -> None:
    # refresh with: python -m edgevib.daemon.indicators README.md
    blocks = readme_blocks(README.read_text(encoding="utf-8"))
    assert blocks == readme_tables()
    # every row has its header's cells, also when a description holds a pipe (|x|)
    piped = Indicator("probe_ratio", "1", "Peak over the mean of √|x|, squared", read=lambda _r: 1.0,
                      si=registry_module.RATIO, prometheus="probe_ratio", mqtt="probe_ratio", opcua="probe_ratio",
                      report="probe_ratio", fault="impacting")
    monkeypatch.setattr(registry_module, "REGISTRY", (*REGISTRY, piped))
    for name, table in readme_tables().items():
        rows = table.splitlines()
        assert all(len(_cells(row)) == len(_cells(rows[0])) for row in rows), name
        assert any("√\\|x\\|" in row for row in rows), name


def test_unavailable_values_are_absent_or_null() -> None:
    r = _frame()
    none = FrameResult(r.point_id, r.machine_id, r.t_end_ns, 0, FS,
                       type(r.indicators)(**{**{f: getattr(r.indicators, f) for f in
                                               r.indicators.__dataclass_fields__},
                                            "shaft_hz": None, "orders_mm_s": {}, "envelope": {}}),
                       None, r.samples)
    doc = indicator_document("quarry-lane", "horizontal", none, ORDERS)
    assert doc["shaft_speed_hz"] is None and doc["envelope"] is None and doc["iso_zone"] is None
    assert doc["orders_velocity_rms_mm_s"] == dict.fromkeys(ORDERS)
    assert indicator_values(none)["iso_zone"][0] is None
