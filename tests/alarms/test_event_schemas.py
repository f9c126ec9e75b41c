"""The JSON Schemas of the alarm feed's event data (edgevib/daemon/schemas): valid draft 2020-12 schemas (checked
against the published meta-schema bundled with the ``jsonschema`` package), in step with the code's enumerations,
and met by the events the alarm layer really emits; every field an event carries is listed in its schema."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, get_args

import numpy as np
import pytest
from alarmkit import alarm_layer, frame_result, small_config, started_layer
from jsonschema import Draft202012Validator
from jsonschema.exceptions import ValidationError

from edgevib.daemon.alarms import feed
from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.alarms.feed import ALARM_TYPE, BASELINE_TYPE, SENSOR_TYPE
from edgevib.daemon.config import parse_config
from edgevib.daemon.eventschemas import EVENT_TYPES, schema
from edgevib.daemon.trendwatch import create_trend_watch
from edgevib.pipelines.alarm import ALARM_STATES, SEVERITY_NAMES, TransitionKind
from edgevib.pipelines.health import FAULT_ORDER
from edgevib.pipelines.machine_state import MACHINE_STATES

SCHEMA_URI = "https://schemas.quarry-lane.invalid/edgevib/{type}.json"
FEED = {"enabled": False, "dataschema": SCHEMA_URI}  # no broker: events reach the listeners and the outbox


def check_event(event: dict[str, Any]) -> None:
    """``event``'s data validates against its type's schema, lists no field the schema does not, and its
    ``dataschema`` attribute names that schema's file."""
    sch = schema(event["type"])
    Draft202012Validator(sch).validate(event["data"])
    unlisted = set(event["data"]) - set(sch["properties"])
    assert not unlisted, f"{event['type']} carries fields its schema does not list: {sorted(unlisted)}"
    assert event["dataschema"] == SCHEMA_URI.format(type=event["type"])


def test_every_schema_is_a_valid_draft_2020_12_schema() -> None:
    assert EVENT_TYPES
    for name in EVENT_TYPES:
        sch = schema(name)
        Draft202012Validator.check_schema(sch)  # the JSON Schema meta-schema (json-schema.org, draft 2020-12)
        assert sch["$schema"] == "https://json-schema.org/draft/2020-12/schema"
        assert set(sch["required"]) <= set(sch["properties"]), name


def test_every_event_type_of_the_feed_has_a_schema() -> None:
    assert {ALARM_TYPE, SENSOR_TYPE, BASELINE_TYPE} <= set(EVENT_TYPES)
    feed_types = {v for v in vars(feed).values() if isinstance(v, str) and v.startswith("io.edgevib.")}
    assert feed_types == set(EVENT_TYPES)


def test_enumerations_agree_with_the_code() -> None:
    alarm = schema(ALARM_TYPE)["properties"]
    assert alarm["transition"]["enum"] == list(get_args(TransitionKind))
    assert alarm["alarm_state"]["enum"] == alarm["from_alarm_state"]["enum"] == list(ALARM_STATES)
    assert alarm["state"]["enum"] == alarm["from_state"]["enum"] == list(SEVERITY_NAMES)
    for name in EVENT_TYPES:
        props = schema(name)["properties"]
        if "machine_state" in props:
            assert set(props["machine_state"]["enum"]) == set(MACHINE_STATES), name
    assert schema(SENSOR_TYPE)["properties"]["fault"]["enum"] == [*FAULT_ORDER, "no-data"]


def test_a_wrong_event_is_rejected() -> None:
    # shows that check_event can fail: an unknown transition, a missing field, an unlisted field
    good = {"site": "quarry-lane", "machine": "P-101", "point": "P-101-DE-H", "axis": None, "machine_state": "running",
            "transition": "raised", "state": "sensor-fault", "fault": "flatline", "detail": "std 0 g",
            "advice": "Check the sensor."}
    event = {"type": SENSOR_TYPE, "dataschema": SCHEMA_URI.format(type=SENSOR_TYPE), "data": good}
    check_event(event)
    with pytest.raises(ValidationError):
        check_event({**event, "data": {**good, "transition": "exploded"}})
    with pytest.raises(ValidationError):
        check_event({**event, "data": {k: v for k, v in good.items() if k != "advice"}})
    with pytest.raises(ValidationError):
        check_event({**event, "data": {**good, "point": "P-101/DE+H"}})  # not a portable id
    with pytest.raises(AssertionError, match="does not list"):
        check_event({**event, "data": {**good, "colour": "red"}})


async def _feed(layer: AlarmLayer, values: list[float], t0: float) -> None:
    for i, v in enumerate(values):
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", t0 + i, v, seed=i)])


async def test_alarm_and_baseline_events_meet_their_schemas(short_tmp: Path) -> None:
    # ISO 20816-3 group 2, rigid: B/C 2.8 mm/s, C/D 4.5 mm/s (FIELD_NOTES §1, the standard's table)
    cfg = small_config(short_tmp, feed=FEED, alarms={"baseline_frames": 5},
                       limits={"velocity_rms_mm_s": {"rule": "iso-baseline"},
                               "kurtosis": {"alert": 5.0, "danger": 10.0}})
    layer, events = await started_layer(cfg)
    try:
        await _feed(layer, [1.0, 1.2, 0.8, 1.0, 1.0], t0=1000.0)  # learned
        await _feed(layer, [3.0, 3.0, 5.0, 5.0], t0=2000.0)  # raised, escalated
        for cmd in ({"cmd": "ack", "point": "P-101-DE-H", "by": "operator"},
                    {"cmd": "shelve", "point": "P-101-DE-H", "reason": "pump on test run", "duration_s": 600.0},
                    {"cmd": "unshelve", "point": "P-101-DE-H", "by": "operator"},
                    {"cmd": "relearn", "point": "P-101-DE-H", "by": "analyst"}):
            await layer.command(cmd)
        await _feed(layer, [1.0] * 6, t0=3000.0)  # cleared, learned again
    finally:
        await layer.stop()
    kinds = {(e["type"], e["data"]["transition"]) for e in events}
    assert {(ALARM_TYPE, "raised"), (ALARM_TYPE, "escalated"), (ALARM_TYPE, "acknowledged"),
            (ALARM_TYPE, "shelved"), (ALARM_TYPE, "unshelved"), (BASELINE_TYPE, "learned"),
            (BASELINE_TYPE, "relearn")} <= kinds, kinds
    for e in events:
        check_event(e)


async def test_sensor_fault_events_meet_their_schema(sim_config: Any) -> None:
    _, cfg, frames = sim_config("sensor-faults", extra={"alarms": {"startup_grace_s": 0.0}, "feed": FEED})
    layer, events = await started_layer(cfg)
    try:
        for t in range(1, 16):
            await layer.on_frames(frames.until(float(t)))
    finally:
        await layer.stop()
    sensor = [e for e in events if e["type"] == SENSOR_TYPE]
    # the scenario's faults: flatline, clipping, bias or DC step, spikes (tests/alarms/test_alarm_engine.py)
    assert {e["data"]["fault"] for e in sensor} >= {"flatline", "clipping", "spikes"}
    for e in events:
        check_event(e)


async def test_an_alarm_event_with_its_trend_meets_the_schema(short_tmp: Path) -> None:
    # a level rising 0.05 mm/s per day from 1 mm/s for 30 days, then a frame above B/C 2.8 mm/s raises the alert
    cfg = parse_config({
        "site": {"name": "quarry-lane", "state_dir": str(short_tmp)},
        "analysis": {"frame_samples": 8192, "overlap": 0.0},
        "sources": [{"name": "sim", "type": "simulated", "scenario": "demo"}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "sim",
                    "sensor": "QL-P101-DE-H", "fs_hz": 12800.0, "block_samples": 4096}],
        "alarms": {"startup_grace_s": 0.0, "on_delay_frames": 1},
        "trend": {"evaluate_s": 3600.0, "min_span_h": 24.0},
        "feed": FEED,
    }, short_tmp)
    layer = alarm_layer(cfg)
    watch = create_trend_watch(cfg, layer)
    assert watch is not None
    events: list[dict[str, Any]] = []
    layer.subscribe(events.append)
    await layer.start()
    await watch.start()
    try:
        days = np.arange(0, 30, 1 / 12)  # a frame every two hours
        rng = np.random.default_rng(1)
        values = (1.0 + 0.05 * days) * np.exp(0.03 * rng.standard_normal(days.size))
        t0 = 1_780_000_000.0
        for k in range(0, days.size, 60):
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", t0 + days[i] * 86400.0, float(values[i]),
                                                seed=i) for i in range(k, min(k + 60, days.size))])
        assert watch.evaluate_all() >= 1
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", t0 + 30.1 * 86400.0, 3.2, seed=9000)])
    finally:
        await watch.stop()
        await layer.stop()
    raised = [e for e in events if e["type"] == ALARM_TYPE and e["data"]["transition"] == "raised"]
    assert raised and raised[-1]["data"]["trend"]["limits"], raised
    for e in events:
        check_event(e)


def test_event_schemas_command_writes_the_shipped_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from edgevib.daemon.cli import main

    assert main(["event-schemas", str(tmp_path / "out")]) == 0
    written = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert written == sorted(f"{t}.json" for t in EVENT_TYPES)
    for t in EVENT_TYPES:
        assert json.loads((tmp_path / "out" / f"{t}.json").read_text()) == schema(t)
    blocker = tmp_path / "file"
    blocker.write_text("")
    assert main(["event-schemas", str(blocker)]) == 2
    assert "cannot write into" in capsys.readouterr().err
