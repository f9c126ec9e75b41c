"""A daemon restart during a silent outage: a stale alarm keeps showing its last known value and time.

Practice (FIELD_NOTES §7; ANSI/ISA-18.2-2016): an active alarm keeps its state through a loss of the data path and
is flagged stale; the operator still sees what it last read and when, and what the machine was last doing.  A
restart changes none of that: what `edgevib alarms list` showed before it, it shows after it (from the state
database), until data flows again.  ISO 20816-3 group 2 rigid (FIELD_NOTES §1): C/D 4.5 mm/s r.m.s., the point's
default danger set point.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from alarmkit import frame_result, small_config

from edgevib.daemon.alarmctl import _print_list
from edgevib.daemon.alarms.core import AlarmCore, Effects, Frames, Input, Now, SourceChange, Tick, decide
from edgevib.daemon.alarms.outbox import Database
from edgevib.daemon.alarms.state import StateStore
from edgevib.daemon.alarms.views import list_doc, state_messages
from edgevib.pipelines.health import SensorHealth
from edgevib.pipelines.machine_state import MachineState

POINT, MACHINE = "P-101-DE-H", "P-101"
KEY = (POINT, "velocity_rms_mm_s")
T0 = 1_780_000_000.0
HEALTHY = SensorHealth(faults=(), detail="", mean_g=0.0, std_g=0.14, repeat_fraction=0.0, clip_fraction=0.0,
                       step_g=0.0, spike_count=0, noise_density_ug_rthz=None, bias_v=None)


class Daemon:
    """A core whose every decision's rows are committed to a real state database, as the store does."""

    def __init__(self, tmp: Path, mono: float) -> None:
        self.cfg = small_config(tmp / "state")
        self.db = Database(tmp / "state" / "alarms.sqlite")
        self.state = StateStore(self.db)
        self.core = AlarmCore(self.cfg, self.cfg.alarm_settings)
        self.mono = mono
        self.core.restore(self.state.load_alarms(), self.state.load_baselines(), self.state.load_sensors(),
                          self.state.load_sources(), self.now())

    def now(self) -> Now:
        return Now(self.mono, T0 + self.mono)

    def at(self, inp: Input, dt_s: float = 0.0) -> Effects:
        self.mono += dt_s
        self.core, eff = decide(self.core, inp, self.now())
        with self.db.transaction() as conn:
            self.state.save(conn, alarms=eff.alarms, sensors=eff.sensors, baselines=eff.baselines,
                            sources=eff.sources)
        return eff

    def frame(self, velocity: float, machine: str = "running") -> None:
        r = frame_result(POINT, MACHINE, T0 + self.mono + 0.64, velocity, seed=round(self.mono), health=HEALTHY,
                         machine_state=MachineState(state=machine, since_s=T0 + 0.64))  # type: ignore[arg-type]
        self.at(Frames([r]), 0.64)

    def listing(self) -> dict[str, Any]:
        # the list command's document as the socket sends it (JSON)
        doc: dict[str, Any] = json.loads(json.dumps(list_doc(self.core.snapshot())))
        return doc


def _row(doc: dict[str, Any]) -> tuple[Any, ...]:
    a = next(a for a in doc["alarms"] if (a["point"], a["indicator"]) == KEY)
    pt = doc["points"][POINT]
    return a["state"], a["severity"], a["stale"], a["value"], pt["time"], pt["machine_state"], \
        pt["last_machine_state"]


@pytest.mark.parametrize("machine", ["running", "stopped"])
def test_a_restart_during_a_silent_outage_keeps_the_last_value_time_and_machine_state(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], machine: str) -> None:
    first = Daemon(tmp_path, 0.0)
    first.at(SourceChange("sim", True))
    first.frame(6.0)
    first.frame(6.5)  # danger (on-delay of 2 frames above 4.5 mm/s), unacknowledged
    if machine == "stopped":
        first.frame(0.05, machine="stopped")  # the machine stops: suppressed, its latest value still shown
    last_t = T0 + first.mono
    for _ in range(60):  # the broker answers, the gateway behind it sends nothing: down, silent
        first.at(Tick(), 1.0)
    assert first.core.source_states["sim"].down
    before = _row(first.listing())
    assert before[2] == "source-down" and before[3] == (6.5 if machine == "running" else 0.05)
    assert before[5] == "unknown" and before[6] == machine  # every point stale: the state now is not known
    first.db.close()

    second = Daemon(tmp_path, first.mono + 5.0)  # restart: the same state database, the outage goes on
    second.at(SourceChange("sim", True))
    for _ in range(5):
        second.at(Tick(), 1.0)
    after = _row(second.listing())
    assert after == before
    assert after[4] is not None and abs(last_t - _parse(after[4])) < 1.0
    # … in the table the operator reads, and in the retained state message
    _print_list(second.listing())
    out = capsys.readouterr().out
    line = next(ln for ln in out.splitlines() if ln.startswith(POINT) and "velocity_rms_mm_s" in ln)
    assert f"last {machine}" in line and ("6.5" if machine == "running" else "0.05") in line
    msg = json.loads(state_messages(second.core.snapshot())[POINT][1])
    assert msg["time"] == before[4] and msg["last_machine_state"] == machine
    assert msg["alarms"]["velocity_rms_mm_s"]["value"] == before[3]
    second.db.close()


def test_after_a_restart_operator_actions_run_on_the_wall_clock_until_data_flows(tmp_path: Path) -> None:
    # The restored time of the last frame is shown, not taken as "now": a shelf set after a restart, before any
    # frame, runs from the action (the wall clock), as it did before the restored time was kept.
    first = Daemon(tmp_path, 0.0)
    first.at(SourceChange("sim", True))
    first.frame(6.0)
    first.frame(6.0)
    first.db.close()
    second = Daemon(tmp_path, first.mono + 3600.0)  # restarted an hour later; the source is up, no frame yet
    second.at(SourceChange("sim", True))
    second.at(Tick(), 1.0)
    assert second.core.stale.get(POINT) is None  # within the start allowance: not stale yet
    second.at(_shelve(600.0))
    until = second.core.alarms[KEY].shelved_until_s
    assert until is not None and abs(until - (T0 + second.mono + 600.0)) < 1e-6
    second.db.close()


def _shelve(duration_s: float) -> Input:
    from edgevib.daemon.alarms.core import Command

    return Command({"cmd": "shelve", "point": POINT, "reason": "coupling work", "duration_s": duration_s,
                    "by": "J. Operator"})


def _parse(rfc3339: str) -> float:
    from datetime import datetime

    return datetime.fromisoformat(rfc3339.replace("Z", "+00:00")).timestamp()
