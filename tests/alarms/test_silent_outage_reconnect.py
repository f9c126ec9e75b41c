"""A source down for lack of data whose connection is then lost and restored: its return is its data.

Practice (FIELD_NOTES §7): loss of the data path is a communication fault of the source, annunciated once.  A
source announced down because none of its points delivers (a gateway behind a live broker stopped) is not back
when the connection to the broker returns — not even after the broker itself dropped meanwhile, which only changes
the reason it is down.  Over the whole episode: exactly one ``down`` and one ``up``, the ``up`` on data flowing.
ISO 20816-3 group 2 rigid (FIELD_NOTES §1): C/D 4.5 mm/s r.m.s., the point's default danger set point.
"""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path
from typing import Any

from alarmkit import frame_result, small_config

from edgevib.daemon.alarms.core import AlarmCore, EventOut, Frames, Input, Now, SourceChange, Tick, decide
from edgevib.daemon.alarms.feed import SENSOR_TYPE, SOURCE_DOWN_TYPE, SOURCE_UP_TYPE
from edgevib.daemon.alarms.state import SourceState
from edgevib.pipelines.health import SensorHealth
from edgevib.pipelines.machine_state import MachineState

POINT, MACHINE = "P-101-DE-H", "P-101"
T0 = 1_780_000_000.0
HEALTHY = SensorHealth(faults=(), detail="", mean_g=0.0, std_g=0.14, repeat_fraction=0.0, clip_fraction=0.0,
                       step_g=0.0, spike_count=0, noise_density_ug_rthz=None, bias_v=None)


class Run:
    """One core and its clocks (monotonic from 0, wall from T0), every event it emits kept in order."""

    def __init__(self, core: AlarmCore) -> None:
        self.core, self.mono = core, 0.0
        self.events: list[EventOut] = []

    def at(self, inp: Input, dt_s: float = 0.0) -> None:
        self.mono += dt_s
        self.core, eff = decide(self.core, inp, Now(self.mono, T0 + self.mono))
        self.events += eff.events

    def frames(self, velocities: list[float]) -> None:
        for v in velocities:
            r = frame_result(POINT, MACHINE, T0 + self.mono + 0.64, v, seed=len(self.events), health=HEALTHY,
                             machine_state=MachineState(state="running", since_s=T0))
            self.at(Frames([r]), 0.64)

    def of(self, type_: str) -> list[dict[str, Any]]:
        return [e.data for e in self.events if e.type == type_]


def _silent_then_lost(tmp: Path) -> Run:
    cfg = small_config(tmp / "state")
    core = AlarmCore(cfg, cfg.alarm_settings)
    core.restore({}, {}, {}, {}, Now(0.0, T0))
    run = Run(core)
    run.at(SourceChange("sim", True))
    run.frames([6.0, 6.0])  # a danger, unacknowledged
    for _ in range(60):  # the broker answers, nothing is delivered: the source is down, silent
        run.at(Tick(), 1.0)
    down = run.of(SOURCE_DOWN_TYPE)
    assert len(down) == 1 and down[0]["silent"] is True
    run.at(SourceChange("sim", False), 1.0)  # now the broker connection drops as well …
    run.at(Tick(), 1.0)
    assert run.core.source_states["sim"].down and run.core.source_states["sim"].reason == "connection lost"
    run.at(SourceChange("sim", True), 5.0)  # … and comes back, the gateway behind it still stopped
    for _ in range(10):
        run.at(Tick(), 1.0)
    return run


def test_a_reconnect_after_a_silent_outage_turned_connection_lost_is_not_a_return(tmp_path: Path) -> None:
    run = _silent_then_lost(tmp_path)
    assert run.of(SOURCE_UP_TYPE) == []  # connected again, but no data: still down
    assert run.core.source_states["sim"].down and len(run.of(SOURCE_DOWN_TYPE)) == 1
    assert run.core.alarms[(POINT, "velocity_rms_mm_s")].stale == "source-down"
    run.frames([6.0])  # the gateway sends again: that is the return, announced once
    up = run.of(SOURCE_UP_TYPE)
    assert len(up) == 1 and up[0]["reason"] == "data flows again"
    run.frames([6.0, 6.0])
    for _ in range(5):
        run.at(Tick(), 0.5)
    assert len(run.of(SOURCE_DOWN_TYPE)) == 1 and len(run.of(SOURCE_UP_TYPE)) == 1
    assert run.of(SENSOR_TYPE) == []  # a data-path matter, never blamed on the sensor


def test_the_state_kept_for_a_restart_still_waits_for_data(tmp_path: Path) -> None:
    # What is persisted (the source's row) says the return is data, so a restart reconnecting keeps waiting.
    run = _silent_then_lost(tmp_path)
    st = run.core.source_states["sim"]
    assert st.down
    cfg = small_config(tmp_path / "state")
    core = AlarmCore(cfg, cfg.alarm_settings)
    row = json.loads(json.dumps(asdict(st)))  # the source's row as the state store writes and reads it
    core.restore(dict(run.core.alarms), {}, dict(run.core.sensors), {"sim": SourceState(**row)},
                 Now(0.0, T0 + run.mono))
    again = Run(core)
    again.mono = run.mono
    again.at(SourceChange("sim", True), 1.0)
    for _ in range(40):
        again.at(Tick(), 1.0)
    assert again.of(SOURCE_UP_TYPE) == [] and again.of(SOURCE_DOWN_TYPE) == []
    again.frames([1.0])
    assert [u["reason"] for u in again.of(SOURCE_UP_TYPE)] == ["data flows again"]
