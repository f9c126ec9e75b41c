"""The alarm layer's pure core (edgevib.daemon.alarms.core) and its lock-free views.

Limits: ISO 20816-3 group 2 rigid boundaries B/C 2.8 and C/D 4.5 mm/s r.m.s. (FIELD_NOTES §1, the standard's
table), the defaults of a point's velocity limit.  Debounce: ANSI/ISA-18.2-2016 on-delay — an alarm is annunciated
only after ``on_delay_frames`` consecutive values beyond its set point.
"""

from __future__ import annotations

import ast
import asyncio
import copy
import dataclasses
import json
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from alarmkit import alarm_layer, frame_result, small_config
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import edgevib.daemon.alarms.core as core_module
from edgevib.daemon.alarms.core import (
    AlarmCore,
    Command,
    Effects,
    Frames,
    Now,
    SourceChange,
    Tick,
    decide,
)
from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.alarms.feed import ALARM_TYPE
from edgevib.daemon.alarms.state import SensorState
from edgevib.pipelines.health import SensorHealth

POINT, MACHINE = "P-101-DE-H", "P-101"
T0 = 1_780_000_000.0
HEALTHY = SensorHealth(faults=(), detail="", mean_g=0.0, std_g=0.14, repeat_fraction=0.0, clip_fraction=0.0,
                       step_g=0.0, spike_count=0, noise_density_ug_rthz=None, bias_v=None)

# one input: ("frames", [velocities]), ("tick", seconds later), ("source", connected), ("cmd", name)
_inputs = st.lists(st.one_of(
    st.tuples(st.just("frames"), st.lists(st.floats(0.0, 12.0), min_size=1, max_size=4)),
    st.tuples(st.just("tick"), st.floats(0.1, 90.0)),
    st.tuples(st.just("source"), st.booleans()),
    st.tuples(st.just("cmd"), st.sampled_from(["ack", "shelve", "unshelve", "relearn"])),
), min_size=1, max_size=25)


ISO = {"velocity_rms_mm_s": {"rule": "iso"}}
LEARNING = {"velocity_rms_mm_s": {"rule": "iso-baseline"}, "kurtosis": {"alert": 5.0, "danger": 10.0}}


def _core(tmp: Path, limits: dict[str, Any] = LEARNING) -> AlarmCore:
    cfg = small_config(tmp / "state", limits=limits, alarms={"baseline_frames": 5})
    core = AlarmCore(cfg, cfg.alarm_settings)
    core.restore({}, {}, {}, {}, Now(mono=0.0, wall=T0))
    return core


def _replay(core: AlarmCore, script: list[tuple[str, Any]],
            check: Callable[[AlarmCore, Effects], None] | None = None) -> list[Effects]:
    """Feed a script of inputs; frames 0.64 s apart (8192 samples at 12.8 kHz), the clocks moving with them."""
    out: list[Effects] = []
    mono, t, seed = 0.0, T0, 0
    for kind, arg in script:
        if kind == "frames":
            results = []
            for v in arg:
                mono, t, seed = mono + 0.64, t + 0.64, seed + 1
                results.append(frame_result(POINT, MACHINE, t, v, seed=seed, health=HEALTHY))
            inp: Any = Frames(results)
        elif kind == "tick":
            mono, t = mono + arg, t + arg
            inp = Tick({POINT: t})
        elif kind == "source":
            inp = SourceChange("sim", arg)
        else:
            req = {"cmd": arg, "point": POINT, "by": "J. Operator"}
            if arg == "shelve":
                req.update(reason="coupling work", duration_s=600.0)
            inp = Command(req)
        core, eff = decide(core, inp, Now(mono=mono, wall=t))
        if check is not None:
            check(core, eff)
        out.append(eff)
    return out


def _plain(eff: Effects) -> str:
    """Everything an effect says, as text (NaN compares equal to itself here)."""
    return json.dumps({"events": [(e.type, e.point, e.data, e.t_ns, e.history, e.at_s,
                                   None if e.capture is None else (e.capture.indicator, e.capture.severity))
                                  for e in eff.events],
                       "alarms": sorted((str(k), repr(v)) for k, v in eff.alarms.items()),
                       "sensors": sorted((k, repr(v)) for k, v in eff.sensors.items()),
                       "baselines": sorted((str(k), repr(v)) for k, v in eff.baselines.items()),
                       "sources": sorted((k, repr(v)) for k, v in eff.sources.items()),
                       "forget": sorted(eff.forget), "points": sorted(eff.points), "reply": eff.reply},
                      default=str, sort_keys=True)


def test_the_core_module_does_no_io() -> None:
    # The core is pure by construction: none of the modules that do I/O, keep time, log or run threads is imported.
    tree = ast.parse(Path(core_module.__file__).read_text(encoding="utf-8"))
    imported = {a.name.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    imported |= {(n.module or "").split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)}
    assert imported.isdisjoint({"time", "logging", "structlog", "threading", "asyncio", "sqlite3", "os", "socket",
                                "random", "uuid", "pathlib", "concurrent"}), imported
    calls = {n.func.id for n in ast.walk(tree) if isinstance(n, ast.Call) and isinstance(n.func, ast.Name)}
    assert "open" not in calls and "print" not in calls


def test_a_frame_time_keeps_every_other_sensor_field() -> None:
    # The per-frame shortcut equals dataclasses.replace (the standard library's reference) field by field, on a
    # state where every field differs from its default: a field added to SensorState and forgotten there fails.
    values = ("flatline", "stuck", 12.5, 3, 40.0, 2, "coasting", 7.5)
    s = SensorState(**{f.name: v for f, v in zip(dataclasses.fields(SensorState), values, strict=True)})
    assert all(getattr(s, f.name) != f.default for f in dataclasses.fields(SensorState))
    assert core_module._at_frame(s, 99.25) == dataclasses.replace(s, last_frame_s=99.25)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(script=_inputs)
def test_decide_gives_the_same_effects_for_the_same_inputs(tmp_path: Path, script: list[tuple[str, Any]]) -> None:
    # A pure function of its inputs: two equal cores fed the same inputs decide the same, step by step.
    a = _core(tmp_path)
    b = copy.deepcopy(a)
    ea, eb = _replay(a, script), _replay(b, script)
    assert [_plain(e) for e in ea] == [_plain(e) for e in eb]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(script=_inputs)
def test_decide_persists_what_it_holds(tmp_path: Path, script: list[tuple[str, Any]]) -> None:
    # Every state row a decision asks to persist is the core's state after it, the snapshot is that state, and
    # every event names the configured point (or, for a source event, the source): what is committed is shown.
    def check(core: AlarmCore, eff: Effects) -> None:
        assert all(e.point in ("", POINT) and e.subject in (POINT, "sim") for e in eff.events)
        assert all(core.alarms[k] == v for k, v in eff.alarms.items())
        assert all(core.sensors[k] == v for k, v in eff.sensors.items())
        assert all(core.baselines[k] == v for k, v in eff.baselines.items())
        snap = core.snapshot()
        assert dict(snap.alarms) == core.alarms and dict(snap.sensors) == core.sensors

    _replay(_core(tmp_path), script, check)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(values=st.lists(st.floats(0.3, 2.79), min_size=1, max_size=30))
def test_below_zone_b_c_nothing_is_raised(tmp_path: Path, values: list[float]) -> None:
    # ISO 20816-3 group 2 rigid: below the B/C boundary 2.8 mm/s a running machine is acceptable for unrestricted
    # long-term operation — no velocity alarm, whatever the sequence.
    core = _core(tmp_path, ISO)
    effs = _replay(core, [("frames", values)])
    raised = [e for eff in effs for e in eff.events if e.type == ALARM_TYPE and e.data["indicator"] ==
              "velocity_rms_mm_s" and e.data["transition"] in ("raised", "escalated")]
    assert raised == []


def test_on_delay_raises_after_two_frames_and_asks_for_a_capture(tmp_path: Path) -> None:
    # ANSI/ISA-18.2 on-delay of 2 frames: one value above C/D 4.5 mm/s alone raises nothing, the second raises
    # danger; the transition asks for the waveform behind it.
    core = _core(tmp_path, ISO)
    first, second = _replay(core, [("frames", [6.0]), ("frames", [6.0])])
    assert [e for e in first.events if e.type == ALARM_TYPE] == []
    raised = [e for e in second.events if e.type == ALARM_TYPE]
    assert [(e.data["transition"], e.data["state"], e.data["limit"]) for e in raised] == [("raised", "danger", 4.5)]
    assert raised[0].capture is not None and raised[0].capture.severity == "danger"


def _state_of(layer: AlarmLayer, indicator: str) -> float:
    values = [s.value for fam in layer.collector.collect() if fam.name == "edgevib_alarm_state"
              for s in fam.samples if s.labels["indicator"] == indicator]
    assert len(values) == 1
    return values[0]


async def test_a_scrape_during_a_decision_reads_the_previous_snapshot(short_tmp: Path) -> None:
    # No lock between the decision thread and readers: while a decision is held half-way (a frame listener waits),
    # the collector, the list document and the state text answer at once with the state before it.
    cfg = small_config(short_tmp / "state")
    layer = alarm_layer(cfg)
    entered, release = threading.Event(), threading.Event()
    hold = {"on": False}

    def listener(_r: Any, _reason: str | None) -> None:
        if hold["on"]:
            entered.set()
            release.wait(30.0)

    layer.frame_listeners.append(listener)
    await layer.start()
    loop = asyncio.get_running_loop()
    try:
        await layer.on_frames([frame_result(POINT, MACHINE, T0 + 0.64, 6.0, seed=1)])
        assert _state_of(layer, "velocity_rms_mm_s") == 0.0  # one frame above C/D: not raised yet (on-delay 2)
        hold["on"] = True
        task = loop.create_task(layer.on_frames([frame_result(POINT, MACHINE, T0 + 1.28, 6.0, seed=2)]))
        assert await loop.run_in_executor(None, entered.wait, 30.0)

        def read() -> tuple[float, str | None, str]:
            return (_state_of(layer, "velocity_rms_mm_s"), layer.state_text(POINT),
                    layer.snapshot(POINT)["alarms"][0]["severity"])

        # read on another thread, as the scrape does; a reader waiting for the decision would never return
        during = await asyncio.wait_for(loop.run_in_executor(None, read), 30.0)
        assert during == (0.0, "normal", "normal")
        release.set()
        await task
        assert read() == (2.0, "DANGER velocity_rms_mm_s", "danger")
    finally:
        release.set()
        await layer.stop()


def test_the_store_commits_waiting_decisions_in_one_transaction(tmp_path: Path) -> None:
    # Decisions queued while the store is busy are committed together (one BEGIN … COMMIT), each caller's future
    # answering with its own events, in order; the state rows of every one of them are on disk afterwards.
    from edgevib.daemon.alarms.state import StateStore
    from edgevib.daemon.alarms.store import AlarmStore

    cfg = small_config(tmp_path / "state", feed={"enabled": False})
    core = _core(tmp_path)
    store = AlarmStore(cfg.alarm_settings, ["mqtt"])
    store.open().result(30.0)
    assert store.db is not None
    transactions = []
    real = store.db.transaction

    def counted() -> Any:
        transactions.append(1)
        return real()

    store.db.transaction = counted  # type: ignore[method-assign]
    busy, release = threading.Event(), threading.Event()
    try:
        store.call(lambda: (busy.set(), release.wait(30.0)))
        assert busy.wait(30.0)
        effs = _replay(core, [("frames", [6.0]), ("frames", [6.0]), ("frames", [1.0])])
        futures = [store.submit(e) for e in effs]
        release.set()
        committed = [f.result(30.0) for f in futures]
        assert len(transactions) == 1
        assert [[e.type for e in events] for events in committed] == [[e.type for e in eff.events] for eff in effs]
        assert store.outbox is not None and store.outbox.depth() == sum(len(c) for c in committed) > 0
        state = StateStore(store.db).load_alarms()
        assert state[(POINT, "velocity_rms_mm_s")] == core.alarms[(POINT, "velocity_rms_mm_s")]
    finally:
        release.set()
        store.close()
