"""Data gaps in the alarm layer: a source down versus a sensor silent, stale alarms, the durable history.

Practice (FIELD_NOTES §7, ANSI/ISA-18.2-2016): loss of the data path is a communication fault of the source,
annunciated once, neither a machine alarm nor a transducer fault; an active or unacknowledged alarm keeps its
state through the loss and returns to normal only on a good value.  ISO 20816-3 group 2 rigid (FIELD_NOTES §1):
B/C 2.8, C/D 4.5 mm/s r.m.s.
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from alarmkit import alarm_layer, frame_result, started_layer
from prometheus_client import CollectorRegistry

from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.alarms.feed import ALARM_TYPE, SENSOR_TYPE, SOURCE_DOWN_TYPE, SOURCE_UP_TYPE
from edgevib.daemon.config import Config, parse_config
from edgevib.daemon.frames import Stats
from edgevib.daemon.sinks.prometheus import PrometheusSink
from edgevib.pipelines.machine_state import MachineState

POINTS = ("P-101-DE-H", "P-101-NDE-H")
T0 = 1_780_000_000.0  # frame times: Unix seconds in 2026 (the history keeps [alarms] history_days of them)
RUNNING = MachineState(state="running", since_s=T0)  # the state the daemon's tracker attaches


def two_points(state_dir: Path) -> Config:
    """Pump P-101 (group 2, rigid) with two points on one source, ``plant``."""
    doc: dict[str, Any] = {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": 8192, "overlap": 0.0},
        "sources": [{"name": "plant", "type": "simulated", "scenario": "demo"}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": pid, "machine": "P-101", "axis": "horizontal", "source": "plant",
                    "sensor": f"S-{pid}", "fs_hz": 12800.0, "block_samples": 4096} for pid in POINTS],
        "alarms": {"startup_grace_s": 0.0, "on_delay_frames": 2, "off_delay_frames": 2},
    }
    return parse_config(doc, state_dir)


class Clock:
    """A monotonic clock the test moves by hand."""

    def __init__(self) -> None:
        self.t = 1000.0

    def __call__(self) -> float:
        return self.t


async def make_layer(cfg: Config, clock: Clock, events: list[dict[str, Any]], **seams: Any) -> AlarmLayer:
    # sources tracked as in the daemon
    layer, _ = await started_layer(cfg, events=events, monotonic=clock, tracks_sources=True, **seams)
    return layer


async def tick(layer: AlarmLayer) -> None:
    await layer.tick()


async def frames(layer: AlarmLayer, clock: Clock, t0: float, values: dict[str, list[float]]) -> None:
    n = max(len(v) for v in values.values())
    for i in range(n):
        clock.t += 0.64
        batch = [frame_result(pid, "P-101", T0 + t0 + 0.64 * i, v[i], seed=i, machine_state=RUNNING)
                 for pid, v in values.items() if i < len(v)]
        await layer.on_frames(batch)


def of_type(events: list[dict[str, Any]], *types: str) -> list[dict[str, Any]]:
    return [e for e in events if e["type"] in types]


async def test_source_down_is_one_event_and_keeps_an_unacknowledged_danger(short_tmp: Path) -> None:
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    try:
        layer.on_source("plant", True)
        await tick(layer)
        await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})  # danger: > C/D 4.5
        assert layer.state_text(POINTS[0]) == "DANGER velocity_rms_mm_s"
        layer.on_source("plant", False)
        for _ in range(120):  # two minutes of outage, one tick a second
            clock.t += 1.0
            await tick(layer)
        down = of_type(events, SOURCE_DOWN_TYPE)
        assert len(down) == 1 and down[0]["subject"] == "plant"
        assert down[0]["data"]["points"] == list(POINTS) and down[0]["data"]["reason"] == "connection lost"
        assert down[0]["data"]["stale_alarms"] == [{"point": POINTS[0], "indicator": "velocity_rms_mm_s",
                                                    "alarm_state": "unacknowledged", "severity": "danger"}]
        assert of_type(events, SENSOR_TYPE) == []
        row = layer.snapshot(POINTS[0])["alarms"][0]
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", "source-down")
        assert layer.state_text(POINTS[0]) == "DANGER velocity_rms_mm_s (stale: source-down)"
        _topic, body = layer.state_messages()[POINTS[0]]
        assert b'"stale":"source-down"' in body and b'"state":"danger"' in body
        layer.on_source("plant", True)
        await tick(layer)
        up = of_type(events, SOURCE_UP_TYPE)
        assert len(up) == 1 and up[0]["data"]["down_for_s"] == pytest.approx(0.0, abs=5.0)
        # Fresh frames: the danger is judged again (still unacknowledged), then clears on good values.
        await frames(layer, clock, 300.0, {POINTS[0]: [6.0], POINTS[1]: [1.0]})
        row = layer.snapshot(POINTS[0])["alarms"][0]
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", None)
        await frames(layer, clock, 301.0, {POINTS[0]: [1.0, 1.0], POINTS[1]: [1.0, 1.0]})
        cleared = [e["data"] for e in of_type(events, ALARM_TYPE) if e["data"]["transition"] == "cleared"]
        assert [(d["value"], d["alarm_state"]) for d in cleared] == [(1.0, "rtn-unacknowledged")]
        assert len(of_type(events, SOURCE_DOWN_TYPE, SOURCE_UP_TYPE)) == 2 and of_type(events, SENSOR_TYPE) == []
    finally:
        await layer.stop()


async def test_source_down_survives_a_restart(short_tmp: Path) -> None:
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    layer.on_source("plant", True)
    await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})
    layer.on_source("plant", False)
    await tick(layer)
    await layer.stop()  # as after a crash: nothing more is written on the way down
    layer = await make_layer(cfg, clock, events)  # the source is still unreachable
    try:
        for _ in range(60):
            clock.t += 1.0
            await tick(layer)
        assert len(of_type(events, SOURCE_DOWN_TYPE)) == 1 and of_type(events, SENSOR_TYPE) == []
        row = layer.snapshot(POINTS[0])["alarms"][0]
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", "source-down")
        layer.on_source("plant", True)
        await tick(layer)
        assert len(of_type(events, SOURCE_UP_TYPE)) == 1
    finally:
        await layer.stop()


async def test_a_silent_sensor_is_a_sensor_fault_while_its_source_delivers(short_tmp: Path) -> None:
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})
        # P-101-DE-H falls silent; P-101-NDE-H keeps delivering.
        await frames(layer, clock, 102.0, {POINTS[1]: [1.0] * 20})
        await tick(layer)
        faults = [e["data"] for e in of_type(events, SENSOR_TYPE)]
        assert [(d["point"], d["fault"], d["transition"]) for d in faults] == [(POINTS[0], "no-data", "raised")]
        assert of_type(events, SOURCE_DOWN_TYPE) == []
        row = layer.snapshot(POINTS[0])["alarms"][0]  # the danger is kept, not suppressed to normal
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", "no-data")
        await frames(layer, clock, 120.0, {POINTS[0]: [6.0], POINTS[1]: [1.0]})  # it delivers again
        assert [e["data"]["transition"] for e in of_type(events, SENSOR_TYPE)] == ["raised", "cleared"]
        row = layer.snapshot(POINTS[0])["alarms"][0]
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", None)
    finally:
        await layer.stop()


async def test_every_point_silent_is_a_source_matter(short_tmp: Path) -> None:
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [1.0] * 3, POINTS[1]: [1.0] * 3})
        for _ in range(40):  # connected, but the gateway behind the broker stopped: nothing arrives
            clock.t += 1.0
            await tick(layer)
        down = of_type(events, SOURCE_DOWN_TYPE)
        assert len(down) == 1 and down[0]["data"]["silent"] is True and of_type(events, SENSOR_TYPE) == []
        await frames(layer, clock, 200.0, {POINTS[1]: [1.0]})  # data again
        assert len(of_type(events, SOURCE_UP_TYPE)) == 1
    finally:
        await layer.stop()


async def test_an_unreachable_source_at_start_is_announced_once(short_tmp: Path) -> None:
    clock, events = Clock(), []
    layer = await make_layer(two_points(short_tmp), clock, events)
    try:
        for _ in range(60):
            clock.t += 1.0
            await tick(layer)
        down = of_type(events, SOURCE_DOWN_TYPE)
        assert [d["data"]["reason"] for d in down] == ["not reachable since start"]
        assert of_type(events, SENSOR_TYPE) == []
    finally:
        await layer.stop()


async def test_history_from_the_durable_store(short_tmp: Path) -> None:
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    layer.on_source("plant", True)
    await frames(layer, clock, 100.0, {POINTS[0]: [3.5, 3.5, 6.0, 6.0], POINTS[1]: [1.0] * 4})
    await layer.command({"cmd": "ack", "point": POINTS[0], "by": "J. Operator"})
    await layer.command({"cmd": "shelve", "point": POINTS[0], "reason": "coupling work", "duration_s": 7200.0,
                         "by": "J. Operator"})
    await layer.stop()
    layer = await make_layer(cfg, clock, events)  # read back after a restart
    try:
        rows = layer.history(POINTS[0])
        assert [(r.transition, r.state) for r in rows] == [("shelved", "danger"), ("acknowledged", "danger"),
                                                           ("escalated", "danger"), ("raised", "alert")]
        raised = rows[-1]
        assert raised.value == pytest.approx(3.5) and raised.limit == pytest.approx(2.8)  # ISO B/C
        assert raised.capture is not None and raised.kind == "alarm" and raised.machine_state is not None
        assert rows[1].by == "J. Operator" and rows[1].at_s is not None
        assert rows[0].reason == "coupling work"
        assert layer.history(POINTS[1]) == []
        assert [r.transition for r in layer.history(POINTS[0], limit=1)] == ["shelved"]
        assert [r.transition for r in layer.history(POINTS[0], since_s=T0 + 101.0)] == ["shelved", "acknowledged",
                                                                                 "escalated"]
        with pytest.raises(ValueError, match="limit"):
            layer.history(limit=0)
        listed = await layer.command({"cmd": "history", "point": POINTS[0], "limit": 2})
        assert [r["transition"] for r in listed] == ["shelved", "acknowledged"]
    finally:
        await layer.stop()


async def test_source_events_meet_their_schemas(short_tmp: Path) -> None:
    from jsonschema import Draft202012Validator

    from edgevib.daemon.eventschemas import schema

    clock, events = Clock(), []
    layer = await make_layer(two_points(short_tmp), clock, events)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})
        layer.on_source("plant", False)
        await tick(layer)
        layer.on_source("plant", True)
        await tick(layer)
    finally:
        await layer.stop()
    mine = of_type(events, SOURCE_DOWN_TYPE, SOURCE_UP_TYPE)
    assert [e["type"] for e in mine] == [SOURCE_DOWN_TYPE, SOURCE_UP_TYPE]
    for e in events:
        sch = schema(e["type"])
        Draft202012Validator(sch).validate(e["data"])  # JSON Schema draft 2020-12 (json-schema.org)
        assert set(e["data"]) <= set(sch["properties"]), e["type"]


async def test_points_whose_blocks_arrive_are_not_silent(short_tmp: Path) -> None:
    # Frames wait for analysis (or a lossy link leaves them incomplete) while blocks keep arriving: no gap at all.
    import time

    clock, events = Clock(), []
    layer = await make_layer(two_points(short_tmp), clock, events,
                             block_arrival=lambda pid: time.time() if pid == POINTS[0] else None)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [1.0] * 3, POINTS[1]: [1.0] * 3})
        for _ in range(40):
            clock.t += 1.0
            await tick(layer)
        assert of_type(events, SOURCE_DOWN_TYPE, SENSOR_TYPE) == []  # one point's blocks arrive: no source matter
        await frames(layer, clock, 200.0, {POINTS[0]: [1.0] * 20})  # … and its frames again: the other is silent
        await tick(layer)
        faults = [(e["data"]["point"], e["data"]["fault"]) for e in of_type(events, SENSOR_TYPE)]
        assert faults == [(POINTS[1], "no-data")] and of_type(events, SOURCE_DOWN_TYPE) == []
    finally:
        await layer.stop()


async def test_alarms_of_indicators_absent_while_stopped_are_suppressed_too(short_tmp: Path) -> None:
    # A standing machine's frames carry no orders (absent, not zero): its order alarms are suppressed with the
    # others, not left showing their last running state (ISO 20816-3 group 2 rigid B/C 2.8 mm/s; the 1x limits
    # below are the simulator's demo starting point, common practice).
    import dataclasses

    from alarmkit import small_config

    from edgevib.pipelines.machine_state import MachineState

    cfg = small_config(short_tmp, limits={"imbalance_1x_mm_s": {"alert": 1.4, "danger": 2.8}})
    layer, events = await started_layer(cfg)
    try:
        running = MachineState(state="running", since_s=0.0)
        stopped = MachineState(state="stopped", since_s=T0 + 10.0)
        for i in range(3):
            r = frame_result("P-101-DE-H", "P-101", T0 + i, 2.0, seed=i, orders_mm_s={"1x": 2.0})
            await layer.on_frames([dataclasses.replace(r, machine_state=running)])
        assert layer.state_text("P-101-DE-H") == "ALERT imbalance_1x_mm_s"
        r = frame_result("P-101-DE-H", "P-101", T0 + 10.0, 0.01, seed=9, orders_mm_s={})
        await layer.on_frames([dataclasses.replace(r, machine_state=stopped)])
        rows = {a["indicator"]: a for a in layer.snapshot()["alarms"]}
        assert rows["imbalance_1x_mm_s"]["state"] == "suppressed"
        assert rows["imbalance_1x_mm_s"]["suppressed"] == "machine-stopped"
        assert [e["data"]["transition"] for e in of_type(events, ALARM_TYPE)] == ["raised", "suppressed"]
        assert layer.state_text("P-101-DE-H") == "stopped"
    finally:
        await layer.stop()


async def test_operator_actions_during_an_outage_take_the_time_of_the_action(short_tmp: Path) -> None:
    # ISA-18.2 (FIELD_NOTES §7): an acknowledgement or shelve is recorded when the operator acts; a shelve runs
    # for its duration from then, even while the point's data is stale.
    clock, wall = Clock(), Clock()
    wall.t = T0 + 102.0
    layer, _ = await started_layer(two_points(short_tmp), monotonic=clock, clock=wall, tracks_sources=True)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})
        layer.on_source("plant", False)
        await tick(layer)
        for _ in range(300):  # five minutes of outage
            clock.t += 1.0
            wall.t += 1.0
            await tick(layer)
        await layer.command({"cmd": "ack", "point": POINTS[0], "by": "A. Operator"})
        await layer.command({"cmd": "shelve", "point": POINTS[1], "reason": "cable work", "duration_s": 120.0})
        acted = wall.t
        rows = layer.history()
        assert [(r.kind, r.transition) for r in rows[:3]] == [("alarm", "shelved"), ("alarm", "acknowledged"),
                                                             ("source", "down")]
        assert [r.t_s for r in rows] == sorted((r.t_s for r in rows), reverse=True)  # newest first
        assert rows[1].t_s == pytest.approx(acted) and rows[0].t_s == pytest.approx(acted)
        shelf = next(a for a in layer.snapshot(POINTS[1])["alarms"] if a["shelved_until_s"] is not None)
        assert shelf["since_s"] == pytest.approx(acted) and shelf["shelved_until_s"] == pytest.approx(acted + 120.0)
        for _ in range(60):  # still shelved a minute on, though the outage is longer than the shelve
            clock.t += 1.0
            wall.t += 1.0
            await tick(layer)
        assert layer.snapshot(POINTS[1])["alarms"][0]["shelved_until_s"] == pytest.approx(acted + 120.0)
    finally:
        await layer.stop()


async def test_a_suppressed_alarm_shows_the_latest_value(short_tmp: Path) -> None:
    # Suppression stops the judging, not the measuring (ISA-18.2 suppressed-by-design: the alarm is not annunciated;
    # the process value stays visible).  ISO 20816-3 group 2 rigid B/C 2.8 mm/s (FIELD_NOTES §1).
    import dataclasses
    import json

    from alarmkit import small_config

    from edgevib.pipelines.machine_state import MachineState

    layer = alarm_layer(small_config(short_tmp, limits={"imbalance_1x_mm_s": {"alert": 1.4, "danger": 2.8}}))
    await layer.start()
    try:
        running = MachineState(state="running", since_s=0.0)
        stopped = MachineState(state="stopped", since_s=T0 + 10.0)
        starting = MachineState(state="starting", since_s=T0 + 20.0)
        for i in range(3):
            r = frame_result("P-101-DE-H", "P-101", T0 + i, 3.0, seed=i, orders_mm_s={"1x": 2.0})
            await layer.on_frames([dataclasses.replace(r, machine_state=running)])
        for i, v in enumerate([0.05, 0.03]):
            r = frame_result("P-101-DE-H", "P-101", T0 + 10.0 + i, v, seed=9, orders_mm_s={})
            await layer.on_frames([dataclasses.replace(r, machine_state=stopped)])
        rows = {a["indicator"]: a for a in layer.snapshot()["alarms"]}
        assert rows["velocity_rms_mm_s"]["suppressed"] == "machine-stopped"
        assert rows["velocity_rms_mm_s"]["value"] == pytest.approx(0.03)  # the latest frame's, not the first's
        assert rows["imbalance_1x_mm_s"]["value"] is None  # absent while standing, not a stale running value
        for i, v in enumerate([0.8, 1.6]):
            r = frame_result("P-101-DE-H", "P-101", T0 + 20.0 + i, v, seed=9, orders_mm_s={"1x": v / 2})
            await layer.on_frames([dataclasses.replace(r, machine_state=starting)])
        _topic, body = layer.state_messages()["P-101-DE-H"]
        alarms = json.loads(body)["alarms"]
        assert alarms["velocity_rms_mm_s"]["value"] == pytest.approx(1.6)
        assert alarms["imbalance_1x_mm_s"]["value"] == pytest.approx(0.8)
        assert alarms["velocity_rms_mm_s"]["suppressed"] is not None  # still not judged in the start-up
    finally:
        await layer.stop()


async def test_a_machine_whose_every_point_is_stale_has_an_unknown_state(short_tmp: Path) -> None:
    # Practice (FIELD_NOTES §7, common practice): without data the machine's present state is not known; the last
    # known state is kept apart, and fresh frames judge it again.  1.0 mm/s is above the 0.2 mm/s run level.
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    stats = Stats()
    sink = PrometheusSink(site="quarry-lane", points=cfg.points, stats=stats, registry=CollectorRegistry(),
                          serve=False)
    judged = PrometheusSink(site="quarry-lane", points=cfg.points, stats=stats, registry=CollectorRegistry(),
                            serve=False)
    judged.collector.machine_stale = layer.machine_stale  # as the daemon wires it with an alarm layer
    for s in (sink, judged):
        s.registry.register(s.collector)

    def message() -> dict[str, Any]:
        return dict(json.loads(layer.state_messages()[POINTS[0]][1]))

    def metric(s: PrometheusSink) -> str:
        on = [m.labels["state"] for fam in s.registry.collect() if fam.name == "edgevib_machine_state"
              for m in fam.samples if m.value == 1.0]
        assert len(on) == 1, on
        return on[0]

    async def deliver(t0: float) -> None:
        before = len(layer.view.last_frame)
        await frames(layer, clock, t0, {pid: [1.0] * 3 for pid in POINTS})
        assert len(layer.view.last_frame) >= before
        ms = layer.view.machine_states["P-101"]
        results = [replace(frame_result(pid, "P-101", T0 + t0 + 2.0, 1.0), machine_state=ms) for pid in POINTS]
        for s in (sink, judged):
            await s.on_frames(results)

    try:
        layer.on_source("plant", True)
        stats.connected["plant"] = True
        await tick(layer)
        await deliver(100.0)
        msg = message()
        assert (msg["machine_state"], msg["last_machine_state"]) == ("running", None)
        assert metric(sink) == metric(judged) == "running"
        layer.on_source("plant", False)
        stats.connected["plant"] = False
        for _ in range(5):
            clock.t += 1.0
            await tick(layer)
        msg = message()
        assert (msg["machine_state"], msg["last_machine_state"]) == ("unknown", "running")
        assert msg["last_machine_state_since"] is not None and msg["start_up_grace_left_s"] is None
        row = layer.snapshot(POINTS[0])["points"][POINTS[0]]
        assert (row["machine_state"], row["last_machine_state"]) == ("unknown", "running")
        assert layer.machine_view("P-101")["state"] == "unknown"
        assert metric(sink) == metric(judged) == "unknown"
        layer.on_source("plant", True)  # connected again: stale until the points' next frames
        stats.connected["plant"] = True
        await tick(layer)
        assert message()["machine_state"] == "unknown" and metric(judged) == "unknown"
        await deliver(300.0)
        msg = message()
        assert (msg["machine_state"], msg["last_machine_state"], msg["last_machine_state_since"]) == \
            ("running", None, None)
        assert metric(sink) == metric(judged) == "running"
    finally:
        await layer.stop()


async def test_an_action_during_an_outage_says_the_machine_state_is_unknown(short_tmp: Path) -> None:
    # Practice (FIELD_NOTES §7): without data the machine's present state is not known; an event made meanwhile (an
    # acknowledgement) says so, as the state message does, and keeps the last known state apart.
    clock, events = Clock(), []
    layer = await make_layer(two_points(short_tmp), clock, events)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [6.0, 6.0], POINTS[1]: [1.0, 1.0]})  # above C/D 4.5 mm/s
        raised = [e["data"] for e in of_type(events, ALARM_TYPE)]
        assert raised and raised[-1]["machine_state"] == "running" and "last_machine_state" not in raised[-1]
        layer.on_source("plant", False)
        await tick(layer)
        await layer.command({"cmd": "ack", "point": POINTS[0], "by": "J. Operator"})
        ack = [e["data"] for e in of_type(events, ALARM_TYPE) if e["data"]["transition"] == "acknowledged"]
        assert len(ack) == 1
        assert (ack[0]["machine_state"], ack[0]["last_machine_state"], ack[0]["stale"]) == \
            ("unknown", "running", "source-down")
        row = layer.history(POINTS[0], limit=1)[0]
        assert (row.transition, row.machine_state) == ("acknowledged", "unknown")
    finally:
        await layer.stop()


async def test_a_point_refused_for_its_configuration_is_no_sensor_fault(short_tmp: Path) -> None:
    # A point whose blocks the daemon refuses (a server's EngineeringUnits m/s² against a configured unit g, a
    # sample rate not the configured one) receives nothing: a configuration matter, not a transducer fault
    # (FIELD_NOTES §7: a sensor fault is a finding about the transducer or its cable).
    from edgevib.daemon.frames import BlockIngest

    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    ingest = BlockIngest(cfg, Stats())
    ingest.reject("plant", "wrong_sample_rate", "block at 25600 Hz, point configured for 12800 Hz", "t",
                  point=POINTS[0])
    assert ingest.config_refusal(POINTS[0]) == ("wrong_sample_rate: block at 25600 Hz, point configured for "
                                                "12800 Hz")
    assert ingest.config_refusal(POINTS[1]) is None
    layer = await make_layer(cfg, clock, events, config_refusal=ingest.config_refusal)
    try:
        layer.on_source("plant", True)
        await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})
        await frames(layer, clock, 102.0, {POINTS[1]: [1.0] * 20})  # P-101-DE-H receives nothing now
        await tick(layer)
        assert of_type(events, SENSOR_TYPE) == [] and of_type(events, SOURCE_DOWN_TYPE) == []
        row = layer.snapshot(POINTS[0])["alarms"][0]  # kept, stale, and says why
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", "config-mismatch")
        # A block accepted since (the configuration put right): a later silence is the sensor's again.
        ingest.last_block_ns[POINTS[0]] = ingest.clock_ns()
        assert ingest.config_refusal(POINTS[0]) is None
        await frames(layer, clock, 120.0, {POINTS[0]: [6.0], POINTS[1]: [1.0]})
        await frames(layer, clock, 121.0, {POINTS[1]: [1.0] * 20})
        await tick(layer)
        assert [(e["data"]["point"], e["data"]["fault"]) for e in of_type(events, SENSOR_TYPE)] == \
            [(POINTS[0], "no-data")]
    finally:
        await layer.stop()


def test_an_opc_ua_node_refusal_names_its_point(tmp_path: Path) -> None:
    # The OPC UA source refuses a node by its node id (the ingest's topic); the point is the one reading that node.
    from edgevib.daemon.frames import BlockIngest

    doc: dict[str, Any] = {
        "site": {"name": "quarry-lane", "state_dir": str(tmp_path)},
        "sources": [{"name": "gw", "type": "opcua", "endpoint": "opc.tcp://127.0.0.1:4840/"}],
        "machines": [{"id": "K-701", "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": f"K-701-{c}", "machine": "K-701", "axis": "horizontal", "source": "gw", "sensor": c,
                    "node": f"ns=2;s=pt/{c}", "fs_hz": 12800.0, "block_samples": 4096, "unit": "g"}
                   for c in ("A", "B")],
    }
    ingest = BlockIngest(parse_config(doc, tmp_path), Stats())
    ingest.reject("gw", "config_mismatch", "node ns=2;s=pt/B: unit m/s² on the server, g configured; not read",
                  "ns=2;s=pt/B")
    ingest.reject("gw", "malformed", "bad block", "ns=2;s=pt/A")  # not a configuration matter
    assert ingest.config_refusal("K-701-B") is not None and "config_mismatch: node ns=2;s=pt/B" in \
        str(ingest.config_refusal("K-701-B"))
    assert ingest.config_refusal("K-701-A") is None


async def test_a_restart_during_a_silent_outage_neither_repeats_nor_forgets_it(short_tmp: Path) -> None:
    # The broker is up but the gateway behind it stopped: one down; a restart of the daemon reconnects to the
    # broker, which is not the source's return (FIELD_NOTES §7: annunciated once); its data flowing again is.
    clock, events = Clock(), []
    cfg = two_points(short_tmp)
    layer = await make_layer(cfg, clock, events)
    layer.on_source("plant", True)
    await frames(layer, clock, 100.0, {POINTS[0]: [6.0] * 3, POINTS[1]: [1.0] * 3})
    clock.t += 40.0  # past the start allowance and the no-data interval, nothing delivered
    await tick(layer)
    down = of_type(events, SOURCE_DOWN_TYPE)
    assert len(down) == 1 and down[0]["data"]["silent"] is True
    await layer.stop()
    layer = await make_layer(cfg, clock, events)  # the same state directory; the gateway is still stopped
    try:
        layer.on_source("plant", True)  # the broker answers at start
        for _ in range(90):
            clock.t += 1.0
            await tick(layer)
        assert len(of_type(events, SOURCE_DOWN_TYPE)) == 1 and of_type(events, SOURCE_UP_TYPE) == []
        assert of_type(events, SENSOR_TYPE) == []
        row = layer.snapshot(POINTS[0])["alarms"][0]
        assert (row["state"], row["severity"], row["stale"]) == ("unacknowledged", "danger", "source-down")
        await frames(layer, clock, 300.0, {POINTS[0]: [6.0], POINTS[1]: [1.0]})  # the gateway sends again
        up = of_type(events, SOURCE_UP_TYPE)
        assert len(up) == 1 and up[0]["data"]["reason"] == "data flows again"
        assert len(of_type(events, SOURCE_DOWN_TYPE)) == 1
    finally:
        await layer.stop()
