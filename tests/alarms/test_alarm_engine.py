"""The alarm layer (edgevib.daemon.alarms.engine) on simulated streams and hand-made frames.

Limits: ISO 20816-3 group 2 rigid boundaries B/C 2.8 and C/D 4.5 mm/s r.m.s. (FIELD_NOTES §1, the standard's
table); the iso-baseline rule is the ISO 10816-3/20816-3 guidance alarm = baseline + 0.25 × B/C, at most
1.25 × B/C.  Sensor-fault signatures are common practice (FIELD_NOTES §6); a sensor fault must never be reported
as a machine fault (the issue).
"""

from __future__ import annotations

import asyncio
import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import structlog.testing
from alarmkit import alarm_layer, frame_result, small_config, started_layer
from framekit import Tracked
from prometheus_client import CollectorRegistry
from scipy.io import wavfile

from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.alarms.feed import ALARM_TYPE, SENSOR_TYPE

# Absolute limits on impact indicators: electrical spikes or clipping would trip these if the health gate failed.
IMPACT_LIMITS = {"kurtosis": {"alert": 5.0, "danger": 10.0}, "acceleration_peak_g": {"alert": 1.0, "danger": 5.0},
                 "crest_factor": {"alert": 6.0, "danger": 9.0}}


async def run_sim(layer: AlarmLayer, frames: Any, until_s: float, step_s: float = 1.0) -> list[dict[str, Any]]:
    events: list[dict[str, Any]] = []
    layer.subscribe(events.append)
    await layer.start()
    try:
        t = step_s
        while t <= until_s + 1e-9:
            await layer.on_frames(frames.until(t))
            t += step_s
    finally:
        await layer.stop()
    return events


def alarm_events(events: list[dict[str, Any]], point: str | None = None) -> list[dict[str, Any]]:
    return [e for e in events if e["type"] == ALARM_TYPE and (point is None or e["data"]["point"] == point)]


async def test_sensor_faults_give_sensor_events_only(sim_config: Any) -> None:
    _, cfg, frames = sim_config("sensor-faults", extra={"alarms": {"startup_grace_s": 0.0}}, limits=IMPACT_LIMITS)
    layer = alarm_layer(cfg)
    with structlog.testing.capture_logs() as logs:
        events = await run_sim(layer, frames, 75.0)
    levels = {(e["event"], e["log_level"]) for e in logs if e["event"].startswith("sensor ")}
    assert levels == {("sensor fault", "warning"), ("sensor recovered", "info")}  # recovery is no warning
    raised = [e for e in alarm_events(events) if e["data"]["transition"] in ("raised", "escalated")]
    assert raised == []
    first = {}
    for e in events:
        if e["type"] == SENSOR_TYPE and e["data"]["transition"] == "raised":
            first.setdefault(e["data"]["point"], e["data"]["fault"])
            assert e["data"]["state"] == "sensor-fault"
            assert "not a machine finding" in e["data"]["advice"]
    assert first.get("M-301-DE-H") == "flatline"
    assert first.get("M-301-DE-V") == "clipping"
    assert first.get("M-301-DE-A") in ("bias", "dc-step")
    assert first.get("M-301-NDE-H") in ("bias", "clipping", "dc-step")
    assert first.get("M-301-NDE-V") == "spikes"
    assert "M-301-REF-H" not in first
    # The intermittent faults do not chatter: once a fault relapses it clears only after 30 s healthy (then 60 s,
    # …), which a cable with an episode a second never gives: raised, perhaps cleared, raised again and kept.
    for flaky in ("M-301-NDE-H", "M-301-NDE-V"):
        sensor_events = [e["data"]["transition"] for e in events if e["type"] == SENSOR_TYPE
                         and e["data"]["point"] == flaky]
        assert len(sensor_events) <= 3 and sensor_events[-1] == "raised", (flaky, sensor_events)
    assert layer.state_text("M-301-DE-H") == "sensor: flatline" and layer.state_text("M-301-REF-H") == "normal"



async def test_the_healthy_reference_of_sensor_faults_stays_normal_on_its_emitted_limits(sim_config: Any) -> None:
    # The scenario's own truth calls its reference point normal; the limits its --emit-config writes (ISO 20816-3
    # group 2 rigid, 1x alert at 0.5 x B/C = 1.4 mm/s) must agree, or the demo of sensor faults shows a machine alarm.
    from alarmkit import SimFrames

    from edgevib.daemon.config import parse_config

    sim, cfg, _ = sim_config("sensor-faults")
    doc = sim.daemon_config(source={"name": "sim", "type": "simulated", "scenario": "sensor-faults"}, limits=True,
                            frame_samples=8192, overlap=0.0,
                            extra={"site": {"name": "quarry-lane", "state_dir": str(cfg.site.state_dir)},
                                   "alarms": {"startup_grace_s": 0.0}})
    cfg = parse_config(doc, cfg.site.state_dir)
    frames = SimFrames(sim, cfg)
    truth = sim.truth(10.0)["points"]["M-301-REF-H"]
    ref = next(p for p in cfg.points if p.id == "M-301-REF-H")
    assert truth["expected_state"] == "normal"
    alert = ref.limits.imbalance_1x_mm_s.alert
    assert alert.kind == "absolute" and truth["orders_mm_s"]["1"] < 0.9 * alert.value
    events = await run_sim(alarm_layer(cfg), frames, 12.0)
    assert alarm_events(events, "M-301-REF-H") == []

async def test_without_the_health_gate_the_same_faults_would_trip_machine_alarms(sim_config: Any) -> None:
    # Shows that the previous test can fail: with sensor-health checks off, spikes and rail hits raise alarms.
    _, cfg, frames = sim_config("sensor-faults", extra={"alarms": {"startup_grace_s": 0.0,
                                                                   "health": {"enabled": False}}},
                                limits=IMPACT_LIMITS)
    events = await run_sim(alarm_layer(cfg), frames, 15.0)
    points = {e["data"]["point"] for e in alarm_events(events) if e["data"]["transition"] == "raised"}
    assert {"M-301-NDE-V", "M-301-NDE-H"} <= points


@pytest.mark.slow
async def test_progression_escalates_in_order_and_spares_healthy_and_stopped_machines(sim_config: Any) -> None:
    sim, cfg, frames = sim_config("progression", limits={"imbalance_1x_mm_s": {"alert": 2.0, "danger": 4.0}})
    layer = alarm_layer(cfg)
    events = await run_sim(layer, frames, 230.0, step_s=2.0)
    vel = [e["data"] for e in alarm_events(events, "P-201-DE-H") if e["data"]["indicator"] == "velocity_rms_mm_s"]
    assert [(d["transition"], d["state"]) for d in vel][:2] == [("raised", "alert"), ("escalated", "danger")]
    assert vel[0]["limit"] == pytest.approx(2.8) and vel[1]["limit"] == pytest.approx(4.5)  # ISO G2 rigid
    # The simulator's analytic truth says when the zone boundaries are crossed; the alarm follows within the
    # on-delay (2 frames of 0.64 s) plus one 2 s feeding step.
    changes = sim.truth(230.0)["points"]["P-201-DE-H"]["progression"]["zone_changes"]
    t_bc = next(c["t_s"] for c in changes if c["to"] == "C")
    t_cd = next(c["t_s"] for c in changes if c["to"] == "D")
    times = [e["time"] for e in alarm_events(events, "P-201-DE-H") if e["data"]["indicator"] == "velocity_rms_mm_s"]
    t0 = sim.t0_ns / 1e9

    def rel(ts: str) -> float:
        return datetime.strptime(ts, "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC).timestamp() - t0

    assert t_bc <= rel(times[0]) <= t_bc + 6.0
    assert t_cd <= rel(times[1]) <= t_cd + 6.0
    imb = [e["data"] for e in alarm_events(events, "P-201-DE-H") if e["data"]["indicator"] == "imbalance_1x_mm_s"]
    assert imb and imb[0]["transition"] == "raised" and imb[0]["fault_kind"] == "imbalance"
    assert "imbalance" in imb[0]["advice"] and "not a protection system" in imb[0]["advice"]
    for healthy in ("M-201-DE-H", "P-203-DE-V", "F-202-DE-H"):
        assert alarm_events(events, healthy) == []
    assert not [e for e in events if e["type"] == SENSOR_TYPE]
    # Captures of both transitions, readable as WAV at the true rate, with their sidecars.
    for d in vel[:2]:
        wav = Path(cfg.alarm_settings.capture.dir) / d["capture"]
        rate, x = wavfile.read(wav)
        assert rate == 12800 and x.dtype == np.float32 and x.size == 8192
        side = json.loads(wav.with_suffix(".json").read_text())
        assert side["point"] == "P-201-DE-H" and side["fs_hz"] == 12800.0 and side["severity"] == d["state"]
        assert side["limits"]["danger"] == pytest.approx(4.5) and side["config_digest"] == cfg.digest


async def _feed(layer: AlarmLayer, values: list[float], t0: float = 1000.0, tracked: Tracked | None = None) -> None:
    """Frames 1 s apart of a running machine, or with the state ``tracked`` judges from their level."""
    for i, v in enumerate(values):
        batch = [frame_result("P-101-DE-H", "P-101", t0 + i, v, seed=i)]
        await layer.on_frames(batch if tracked is None else tracked(batch))


async def test_restart_restores_state_without_storm_or_loss(short_tmp: Path) -> None:
    cfg = small_config(short_tmp)
    events: list[dict[str, Any]] = []
    layer, _ = await started_layer(cfg, events=events)
    await _feed(layer, [1.0, 3.0, 3.0, 3.0])
    await layer.stop()
    assert [e["data"]["transition"] for e in events] == ["raised"]
    layer2 = alarm_layer(cfg)
    layer2.subscribe(events.append)
    await layer2.start()
    assert layer2.state_text("P-101-DE-H") == "ALERT velocity_rms_mm_s"  # not forgotten
    await _feed(layer2, [3.0, 3.1, 3.0], t0=2000.0)
    assert [e["data"]["transition"] for e in events] == ["raised"]  # no re-raise
    await _feed(layer2, [1.0, 1.0], t0=3000.0)
    assert [e["data"]["transition"] for e in events] == ["raised", "cleared"]
    assert events[-1]["data"]["alarm_state"] == "rtn-unacknowledged"
    await layer2.stop()


async def test_iso_baseline_rule_and_relearn(short_tmp: Path) -> None:
    cfg = small_config(short_tmp, alarms={"baseline_frames": 5},
                       limits={"velocity_rms_mm_s": {"rule": "iso-baseline"}})
    layer, events = await started_layer(cfg)
    row = layer.snapshot()["alarms"][0]
    assert row["alert"] == pytest.approx(2.8) and row["danger"] == pytest.approx(4.5)  # B/C until learned
    await _feed(layer, [1.0, 1.2, 0.8, 1.0, 1.0])
    row = layer.snapshot()["alarms"][0]
    assert row["baseline"]["learned"] and row["baseline"]["mean"] == pytest.approx(1.0)
    assert row["alert"] == pytest.approx(1.0 + 0.25 * 2.8)  # baseline + 0.25 × B/C
    assert row["danger"] == pytest.approx(4.5)  # never from the baseline
    assert [e["data"]["transition"] for e in events] == ["learned"]
    await _feed(layer, [2.0, 2.0], t0=2000.0)
    assert layer.state_text("P-101-DE-H") == "ALERT velocity_rms_mm_s"  # 2.0 ≥ 1.7, below B/C
    res = await layer.command({"cmd": "relearn", "point": "P-101-DE-H", "by": "analyst"})
    assert res["changed"] == 1
    assert layer.snapshot()["alarms"][0]["alert"] == pytest.approx(2.8)
    await _feed(layer, [3.0] * 5, t0=3000.0)  # a high baseline is capped at 1.25 × B/C
    assert layer.snapshot()["alarms"][0]["alert"] == pytest.approx(1.25 * 2.8)
    await layer.stop()


async def test_state_text_shows_every_active_alarm_worst_level_and_fault_pattern_first(short_tmp: Path) -> None:
    # group 2 rigid: ISO B/C 2.8, C/D 4.5 mm/s (the standard's table); fault-pattern limits 0.5 x / 1 x B/C as
    # the simulator emits them (common practice starting point)
    cfg = small_config(short_tmp, limits={"velocity_rms_mm_s": {"rule": "iso"},
                                          "imbalance_1x_mm_s": {"alert": 1.4, "danger": 2.8},
                                          "misalignment_2x_mm_s": {"alert": 1.4, "danger": 2.8}})
    layer = alarm_layer(cfg)
    await layer.start()
    orders = {"0.5x": 0.05, "1x": 5.5, "2x": 1.5, "3x": 0.05}  # 1x dominates: danger; 2x alert
    for i in range(3):
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", 100.0 + i, 5.8, seed=i, orders_mm_s=orders)])
    # velocity 5.8 > C/D 4.5 is danger too: both listed, the fault pattern first; the 2x alert follows (every
    # active alarm of the point is shown, the worst level first)
    assert layer.state_text("P-101-DE-H") == \
        "DANGER imbalance_1x_mm_s, velocity_rms_mm_s; ALERT misalignment_2x_mm_s"
    orders = {"0.5x": 0.05, "1x": 0.5, "2x": 1.6, "3x": 0.05}
    for i in range(4):
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", 200.0 + i, 3.0, seed=i, orders_mm_s=orders)])
    assert layer.state_text("P-101-DE-H") == "ALERT misalignment_2x_mm_s, velocity_rms_mm_s"  # 3.0 in zone C
    await layer.stop()


async def test_stopped_machine_and_start_up_grace_suppress(short_tmp: Path) -> None:
    cfg = small_config(short_tmp, alarms={"startup_grace_s": 5.0})
    layer, events = await started_layer(cfg)
    tracked = Tracked(cfg, layer.point_healthy)  # the machine's state judged from the level, as the daemon does
    await _feed(layer, [0.05] * 3 + [6.0] * 4, t0=100.0, tracked=tracked)  # stopped, then a start with a transient
    assert events == [] and layer.state_text("P-101-DE-H") == "starting"
    await _feed(layer, [6.0] * 3, t0=107.0, tracked=tracked)  # grace over: the on-delay starts afresh
    assert [(e["data"]["transition"], e["data"]["state"]) for e in events] == [("raised", "danger")]
    await layer.stop()


async def test_metrics_collector(short_tmp: Path) -> None:
    cfg = small_config(short_tmp)
    registry = CollectorRegistry()
    layer = alarm_layer(cfg, registry=registry)
    await layer.start()
    await _feed(layer, [5.0, 5.0])
    labels = {"site": "quarry-lane", "machine": "P-101", "point": "P-101-DE-H", "axis": "horizontal",
              "indicator": "velocity_rms_mm_s"}
    assert registry.get_sample_value("edgevib_alarm_state", labels) == 2.0
    assert registry.get_sample_value("edgevib_alarm_events_total", {"type": "raised"}) == 1.0
    assert registry.get_sample_value("edgevib_captures_stored") == 1.0
    assert registry.get_sample_value("edgevib_captures_bytes") > 8192 * 4
    assert registry.get_sample_value("edgevib_outbox_pending_events") == 0.0
    await layer.stop()


def test_capture_rotation_keeps_the_budget(tmp_path: Path) -> None:
    from edgevib.daemon.alarms.capture import CaptureStore
    from edgevib.daemon.alarms.config import CaptureConfig

    store = CaptureStore(CaptureConfig(enabled=True, dir=str(tmp_path), max_mb=3 * 33_500 / 2**20, max_files=100))
    names = []
    for i in range(6):
        r = frame_result("P-101-DE-H", "P-101", 1000.0 + i, 3.0, seed=i)
        names.append(store.save(r, indicator="velocity_rms_mm_s", transition="raised", severity="alert",
                                event_id=f"e{i}", limits={}, config_digest="d", site="quarry-lane"))
        asyncio.run(asyncio.sleep(0.01))  # distinct modification times
    kept = sorted(p.name for p in tmp_path.glob("*.wav"))
    assert store.bytes <= 3 * 33_500 and store.count == len(kept) < 6
    assert kept == sorted(names[-len(kept):])  # the oldest went first


@pytest.mark.parametrize(("fault", "phrase"), [
    ("bearing outer race", "Energy at an outer race defect frequency"),
    ("bearing inner race", "Energy at an inner race defect frequency"),
    ("bearing rolling element", "Energy at a rolling element defect frequency"),
    ("bearing cage", "Energy at a cage defect frequency"),
])
def test_bearing_advice_uses_the_right_article(fault: str, phrase: str) -> None:
    from edgevib.daemon.alarms.core import advice_text
    from edgevib.daemon.indicators import LIMITABLE as INDICATORS

    assert fault in {d.fault for d in INDICATORS.values()}  # the family names the layer really uses
    assert phrase in advice_text(1, fault, "raised", 30.0, None, None)
