"""Acknowledging a point whose alarm is suppressed: never silent.

ANSI/ISA-18.2-2016 and IEC 62682 (FIELD_NOTES §7; the detail recalled from memory): an alarm suppressed by design
(machine stopped, start-up grace, sensor fault) is not annunciated, and acknowledgement is the operator's response
to an annunciated alarm.  So a suppressed alarm is treated as a shelved one is: a point-wide acknowledge leaves it
(and says so in its reply), an acknowledge naming it is refused with the reason, and when the suppression ends it
shows as it stands — an unacknowledged alarm still unacknowledged, acknowledged then with its own event.
ISO 20816-3 group 2 rigid (FIELD_NOTES §1): C/D 4.5 mm/s r.m.s., the point's default danger set point.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

import pytest
from alarmkit import frame_result, small_config

from edgevib.daemon.alarms.control import CommandError
from edgevib.daemon.alarms.core import AlarmCore, Command, Effects, Frames, Now, decide
from edgevib.daemon.alarms.feed import ALARM_TYPE
from edgevib.pipelines.alarm import AlarmState, LimitSpec, acknowledge, isa_state, shelve, step
from edgevib.pipelines.health import SensorHealth
from edgevib.pipelines.machine_state import MachineState

POINT, MACHINE = "P-101-DE-H", "P-101"
KEY = (POINT, "velocity_rms_mm_s")
T0 = 1_780_000_000.0
HEALTHY = SensorHealth(faults=(), detail="", mean_g=0.0, std_g=0.14, repeat_fraction=0.0, clip_fraction=0.0,
                       step_g=0.0, spike_count=0, noise_density_ug_rthz=None, bias_v=None)
LIMITS = {"velocity_rms_mm_s": {"rule": "iso"}, "kurtosis": {"alert": 5.0, "danger": 10.0}}


class Plant:
    """A core fed frames 0.64 s apart (8192 samples at 12.8 kHz) with a chosen machine state."""

    def __init__(self, tmp: Path) -> None:
        cfg = small_config(tmp / "state", limits=LIMITS)
        self.core = AlarmCore(cfg, cfg.alarm_settings)
        self.core.restore({}, {}, {}, {}, Now(mono=0.0, wall=T0))
        self.mono, self.t, self.seed = 0.0, T0, 0

    def frames(self, velocities: list[float], machine: str = "running") -> list[Effects]:
        out = []
        for v in velocities:
            self.mono, self.t, self.seed = self.mono + 0.64, self.t + 0.64, self.seed + 1
            r = frame_result(POINT, MACHINE, self.t, v, seed=self.seed, health=HEALTHY,
                             machine_state=MachineState(state=machine, since_s=T0))  # type: ignore[arg-type]
            self.core, eff = decide(self.core, Frames([r]), Now(self.mono, self.t))
            out.append(eff)
        return out

    def ack(self, indicator: str | None = None) -> Effects:
        req: dict[str, Any] = {"cmd": "ack", "point": POINT, "by": "J. Operator"}
        if indicator is not None:
            req["indicator"] = indicator
        self.core, eff = decide(self.core, Command(req), Now(self.mono, self.t))
        return eff

    def state(self) -> str:
        return isa_state(self.core.alarms[KEY], self.core.specs[KEY])


def _danger_then_stopped(tmp: Path) -> Plant:
    plant = Plant(tmp)
    plant.frames([6.0, 6.0])  # on-delay of 2 frames above C/D 4.5 mm/s: danger, unacknowledged
    assert plant.state() == "unacknowledged"
    plant.frames([6.0], machine="stopped")  # suppressed by design while the machine stands
    assert plant.state() == "suppressed" and plant.core.alarms[KEY].suppressed == "machine-stopped"
    return plant


def test_a_point_wide_ack_leaves_a_suppressed_alarm_unacknowledged_and_says_so(tmp_path: Path) -> None:
    plant = _danger_then_stopped(tmp_path)
    eff = plant.ack()
    assert not plant.core.alarms[KEY].acked  # not acknowledged behind the operator's back
    assert [e for e in eff.events if e.data.get("indicator") == KEY[1]] == []
    assert eff.reply["changed"] == 0
    assert eff.reply["not_acknowledged"] == [{"indicator": KEY[1], "state": "suppressed",
                                               "reason": "machine-stopped"}]
    # The machine runs again: the danger shows as it stands, unacknowledged, and its acknowledge is an event.
    shown = plant.frames([6.0])[0]
    assert [(e.data["transition"], e.data["alarm_state"]) for e in shown.events if e.type == ALARM_TYPE] == \
        [("unsuppressed", "unacknowledged")]
    eff = plant.ack()
    assert plant.core.alarms[KEY].acked and eff.reply == {"changed": 1, "events": 1}
    assert [(e.data["transition"], e.data["alarm_state"], e.data["by"]) for e in eff.events] == \
        [("acknowledged", "acknowledged", "J. Operator")]


def test_an_ack_naming_a_suppressed_alarm_is_refused_with_the_reason(tmp_path: Path) -> None:
    plant = _danger_then_stopped(tmp_path)
    before = plant.core.alarms[KEY]
    with pytest.raises(CommandError, match=r"velocity_rms_mm_s on P-101-DE-H is suppressed \(machine-stopped\)"):
        plant.ack("velocity_rms_mm_s")
    assert plant.core.alarms[KEY] == before


def test_a_suppressed_sensor_fault_alarm_is_left_as_well(tmp_path: Path) -> None:
    # A sensor fault suppresses the point's machine alarms (API 670 "not OK", FIELD_NOTES §7): same rule.
    plant = Plant(tmp_path)
    plant.frames([6.0, 6.0])
    faulty = replace(HEALTHY, faults=("flatline",), detail="flat signal")
    plant.mono, plant.t = plant.mono + 0.64, plant.t + 0.64
    r = frame_result(POINT, MACHINE, plant.t, 6.0, seed=99, health=faulty)
    plant.core, _ = decide(plant.core, Frames([r]), Now(plant.mono, plant.t))
    assert plant.core.alarms[KEY].suppressed == "sensor-fault"
    eff = plant.ack()
    assert not plant.core.alarms[KEY].acked and eff.reply["changed"] == 0
    assert {"indicator": KEY[1], "state": "suppressed", "reason": "sensor-fault"} in eff.reply["not_acknowledged"]


def test_the_pure_acknowledge_changes_no_hidden_alarm() -> None:
    # The state machine itself: acknowledging a suppressed or shelved alarm changes nothing (no silent record).
    from edgevib.pipelines.alarm import Level

    spec = LimitSpec(danger=Level(4.5, 4.05))
    s, _ = step(AlarmState(), 6.0, 0.0, spec)
    assert isa_state(s, spec) == "unacknowledged"
    hidden, _ = step(s, 6.0, 1.0, spec, suppress="machine-stopped")
    assert acknowledge(hidden, 2.0, spec) == (hidden, ())
    shelved, _ = shelve(s, "coupling work", 100.0, 1.0, spec)
    assert acknowledge(shelved, 2.0, spec) == (shelved, ())


def test_a_stale_alarm_is_acknowledged_with_an_event_that_says_it_is_stale(tmp_path: Path) -> None:
    # A stale alarm (its source down) is not hidden: it stays shown with its state, flagged stale (issue-9 rule,
    # FIELD_NOTES §7: an unacknowledged alarm keeps its state through a loss of the data path), so acknowledging
    # it is an operator action like any other — visible, with its event marked stale.
    from edgevib.daemon.alarms.core import SourceChange, Tick

    plant = Plant(tmp_path)
    plant.core, _ = decide(plant.core, SourceChange("sim", True), Now(plant.mono, plant.t))
    plant.frames([6.0, 6.0])
    plant.core, _ = decide(plant.core, SourceChange("sim", False), Now(plant.mono, plant.t))
    plant.core, _ = decide(plant.core, Tick(), Now(plant.mono + 1.0, plant.t + 1.0))
    assert plant.core.alarms[KEY].stale == "source-down" and plant.state() == "unacknowledged"
    eff = plant.ack()
    assert plant.core.alarms[KEY].acked and eff.reply == {"changed": 1, "events": 1}
    assert [(e.data["transition"], e.data["stale"]) for e in eff.events] == [("acknowledged", "source-down")]


def test_the_command_line_names_what_a_point_wide_ack_left(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    # `edgevib alarms ack POINT` prints the core's reply: the suppressed alarm it left, and why.
    import edgevib.daemon.alarms.control as control
    from edgevib.daemon.cli import main

    plant = _danger_then_stopped(tmp_path)
    sent: list[dict[str, Any]] = []

    def answer(_path: Any, req: dict[str, Any], timeout_s: float = 0.0) -> dict[str, Any]:
        sent.append(req)
        try:
            return {"ok": True, "result": plant.ack(req.get("indicator")).reply}
        except CommandError as exc:
            return {"ok": False, "error": str(exc)}

    monkeypatch.setattr(control, "request", answer)
    assert main(["alarms", "--state-dir", str(tmp_path), "ack", POINT]) == 0
    out = capsys.readouterr().out
    assert "ack: 0 alarm(s) changed" in out
    assert "not acknowledged: velocity_rms_mm_s is suppressed (machine-stopped)" in out
    assert main(["alarms", "--state-dir", str(tmp_path), "ack", POINT, "--indicator", "velocity_rms_mm_s"]) == 2
    assert "is suppressed (machine-stopped)" in capsys.readouterr().err
    assert [r["cmd"] for r in sent] == ["ack", "ack"]
