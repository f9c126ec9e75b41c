"""The pure alarm state machine (edgevib.pipelines.alarm): debounce, hysteresis, ISA-18.2 style states.

The state names and their meaning follow ANSI/ISA-18.2-2016 (normal, unacknowledged, acknowledged,
returned-to-normal unacknowledged, latched, shelved, suppressed); on/off delays and a deadband under the set
point are common practice against chatter (FIELD_NOTES §7).  The expected results below follow from the delay
definitions in the module docstring, not from the implementation.
"""

from __future__ import annotations

import itertools
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from edgevib.pipelines.alarm import (
    AlarmState,
    Delay,
    Level,
    LimitSpec,
    Transition,
    acknowledge,
    display_severity,
    isa_state,
    level_with_deadband,
    shelve,
    step,
    unshelve,
)

ALERT = Level(4.0, 3.6)
DANGER = Level(8.0, 7.2)


def run(spec: LimitSpec, values: list[float], times: list[float] | None = None,
        state: AlarmState | None = None) -> tuple[AlarmState, list[tuple[int, Transition]]]:
    s = state or AlarmState()
    out: list[tuple[int, Transition]] = []
    for i, v in enumerate(values):
        t = float(i) if times is None else times[i]
        s, ev = step(s, v, t, spec)
        out += [(i, e) for e in ev]
    return s, out


delays = st.integers(min_value=1, max_value=6)


@settings(max_examples=200, deadline=None)
@given(on=delays, off=delays,
       prefix=st.lists(st.floats(0.0, 12.0), max_size=30),
       inside=st.lists(st.floats(ALERT.clear, ALERT.set_point, exclude_max=True), min_size=1, max_size=60))
def test_no_chatter_inside_the_deadband(on: int, off: int, prefix: list[float], inside: list[float]) -> None:
    spec = LimitSpec(alert=ALERT, on_delay=Delay(frames=on), off_delay=Delay(frames=off))
    s, _ = run(spec, prefix)
    active = s.alert.active
    for j, v in enumerate(inside):
        s, ev = step(s, v, float(len(prefix) + j), spec)
        assert ev == ()
        assert s.alert.active == active


@settings(max_examples=200, deadline=None)
@given(on=delays, above=st.integers(0, 12), over=st.floats(ALERT.set_point, 7.9))
def test_on_delay_frames_exact(on: int, above: int, over: float) -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER, on_delay=Delay(frames=on))
    _, events = run(spec, [over] * above + [1.0])
    raised = [(i, e) for i, e in events if e.kind == "raised"]
    if above >= on:
        assert [i for i, _ in raised] == [on - 1]
        assert raised[0][1].to_severity == 1 and raised[0][1].limit == ALERT.set_point
    else:
        assert raised == []


@settings(max_examples=200, deadline=None)
@given(delay_s=st.floats(0.0, 20.0), gaps=st.lists(st.floats(0.01, 3.0), min_size=1, max_size=40))
def test_on_delay_seconds_exact(delay_s: float, gaps: list[float]) -> None:
    spec = LimitSpec(alert=ALERT, on_delay=Delay(seconds=delay_s))
    times = [100.0]
    for g in gaps:
        times.append(times[-1] + g)
    _, events = run(spec, [5.0] * len(times), times)
    expected = next((i for i, t in enumerate(times) if t - times[0] >= delay_s), None)
    assert [i for i, e in events if e.kind == "raised"] == ([] if expected is None else [expected])


@settings(max_examples=200, deadline=None)
@given(off=delays, below=st.integers(0, 12))
def test_off_delay_frames_exact(off: int, below: int) -> None:
    spec = LimitSpec(alert=ALERT, off_delay=Delay(frames=off))
    s, events = run(spec, [5.0])
    assert [e.kind for _, e in events] == ["raised"]
    _, events = run(spec, [3.0] * below + [5.0], state=s)
    cleared = [i for i, e in events if e.kind == "cleared"]
    assert cleared == ([off - 1] if below >= off else [])


@settings(max_examples=100, deadline=None)
@given(on=st.integers(2, 6), repeats=st.integers(1, 10))
def test_interrupted_run_restarts_the_on_delay(on: int, repeats: int) -> None:
    spec = LimitSpec(alert=ALERT, on_delay=Delay(frames=on))
    # on-1 frames above the set point, then one inside the deadband: never long enough.
    _, events = run(spec, ([5.0] * (on - 1) + [3.8]) * repeats)
    assert events == []


@settings(max_examples=200, deadline=None)
@given(values=st.lists(st.floats(0.0, 12.0), max_size=80), on=delays, off=delays)
def test_latched_severity_never_falls_without_acknowledge(values: list[float], on: int, off: int) -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER, on_delay=Delay(frames=on), off_delay=Delay(frames=off),
                     latching=True)
    s, last = AlarmState(), 0
    for i, v in enumerate(values):
        s, _ = step(s, v, float(i), spec)
        assert display_severity(s, spec) >= last
        last = display_severity(s, spec)


@settings(max_examples=200, deadline=None)
@given(values=st.lists(st.floats(0.0, 12.0), max_size=80), on=delays, off=delays)
def test_raises_and_clears_alternate(values: list[float], on: int, off: int) -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER, on_delay=Delay(frames=on), off_delay=Delay(frames=off))
    _, events = run(spec, values)
    kinds = [e.kind for _, e in events if e.kind in ("raised", "cleared")]
    assert all(a != b for a, b in itertools.pairwise(kinds))
    assert not kinds or kinds[0] == "raised"
    for _, e in events:  # severities move one consistent way per kind
        assert (e.to_severity > e.from_severity) == (e.kind in ("raised", "escalated"))


def test_acknowledge_semantics() -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER)
    s, ev = step(AlarmState(), 5.0, 0.0, spec)
    assert [e.kind for e in ev] == ["raised"] and isa_state(s, spec) == "unacknowledged"
    s, ev = acknowledge(s, 1.0, spec)
    assert [e.kind for e in ev] == ["acknowledged"] and isa_state(s, spec) == "acknowledged"
    assert acknowledge(s, 1.5, spec) == (s, ())  # nothing more to acknowledge
    s, ev = step(s, 9.0, 2.0, spec)  # escalation needs a new acknowledge
    assert [(e.kind, e.to_severity) for e in ev] == [("escalated", 2)] and isa_state(s, spec) == "unacknowledged"
    s, ev = step(s, 5.0, 3.0, spec)
    assert [(e.kind, e.to_severity) for e in ev] == [("deescalated", 1)]
    s, ev = step(s, 1.0, 4.0, spec)  # back to normal before anyone acknowledged
    assert [e.kind for e in ev] == ["cleared"] and isa_state(s, spec) == "rtn-unacknowledged"
    s, ev = acknowledge(s, 5.0, spec)
    assert isa_state(s, spec) == "normal" and [e.to_state for e in ev] == ["normal"]


def test_latch_holds_until_reset() -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER, latching=True)
    s, _ = step(AlarmState(), 9.0, 0.0, spec)
    s, _ = acknowledge(s, 1.0, spec)
    s, ev = step(s, 1.0, 2.0, spec)
    assert [e.kind for e in ev] == ["latched"]
    assert isa_state(s, spec) == "latched" and display_severity(s, spec) == 2
    s, ev = step(s, 5.0, 3.0, spec)  # an alert-level value under a danger latch changes nothing visible
    assert ev == () and display_severity(s, spec) == 2
    s, ev = acknowledge(s, 4.0, spec)  # reset down to the current process severity
    assert [e.kind for e in ev] == ["reset"] and display_severity(s, spec) == 1
    assert isa_state(s, spec) == "acknowledged"


def test_shelving_hides_and_expires() -> None:
    spec = LimitSpec(alert=ALERT)
    s, ev = shelve(AlarmState(), "pump on test run", 10.0, 0.0, spec)
    assert [e.kind for e in ev] == ["shelved"] and isa_state(s, spec) == "shelved"
    s, ev = step(s, 5.0, 5.0, spec)  # tracked but not annunciated
    assert ev == () and s.alert.active
    s, ev = step(s, 5.0, 10.0, spec)  # expiry at the first frame at or after the expiry time
    assert [e.kind for e in ev] == ["unshelved"] and isa_state(s, spec) == "unacknowledged"
    with pytest.raises(ValueError, match="reason"):
        shelve(s, " ", 20.0, 11.0, spec)
    with pytest.raises(ValueError, match="after now"):
        shelve(s, "x", 5.0, 11.0, spec)
    s2, _ = shelve(s, "x", 50.0, 11.0, spec)
    assert isa_state(unshelve(s2, 12.0, spec)[0], spec) == "unacknowledged"


@settings(max_examples=100, deadline=None)
@given(until=st.floats(1.0, 50.0), gaps=st.lists(st.floats(0.1, 5.0), min_size=1, max_size=40))
def test_shelf_expires_at_the_first_frame_after_expiry(until: float, gaps: list[float]) -> None:
    spec = LimitSpec(alert=ALERT)
    s, _ = shelve(AlarmState(), "maintenance", until, 0.0, spec)
    t, first = 0.0, None
    for i, g in enumerate(gaps):
        t += g
        s, ev = step(s, 1.0, t, spec)
        if any(e.kind == "unshelved" for e in ev):
            assert first is None
            first = i
    expected = next((i for i in range(len(gaps)) if sum(gaps[: i + 1]) >= until), None)
    assert first == expected


def test_suppression_is_quiet_for_normal_alarms_and_keeps_active_levels() -> None:
    spec = LimitSpec(alert=ALERT, on_delay=Delay(frames=2))
    s, ev = step(AlarmState(), 1.0, 0.0, spec, suppress="machine-stopped")
    assert ev == () and isa_state(s, spec) == "suppressed"
    s, ev = step(s, 9.0, 1.0, spec, suppress="machine-stopped")
    assert ev == ()
    s, ev = step(s, 5.0, 2.0, spec)  # suppression ends: the on-delay starts afresh
    assert ev == () and isa_state(s, spec) == "normal"
    s, ev = step(s, 5.0, 3.0, spec)
    assert [e.kind for e in ev] == ["raised"]
    s, ev = step(s, 5.0, 4.0, spec, suppress="sensor-fault")
    assert [(e.kind, e.reason) for e in ev] == [("suppressed", "sensor-fault")]
    # The suppressed alert kept its level: shown again when the suppression ends, and it returns to normal only
    # on a good value below its clear threshold (ANSI/ISA-18.2), here the first frame after (off-delay 1 frame).
    s, ev = step(s, 1.0, 5.0, spec)
    assert [(e.kind, e.to_state) for e in ev] == [("unsuppressed", "unacknowledged"), ("cleared", "rtn-unacknowledged")]
    # the unsuppressed event carries the value of the frame that ended the suppression (1.0), not the 5.0
    # frozen when it began (ANSI/ISA-18.2-2016: an alarm record reports the current process value; common practice)
    assert ev[0].value == 1.0


def test_non_finite_values_are_ignored_and_bad_specs_rejected() -> None:
    spec = LimitSpec(alert=ALERT)
    s, ev = step(AlarmState(), math.nan, 0.0, spec)
    assert ev == () and s == AlarmState()
    with pytest.raises(ValueError, match="below the set point"):
        Level(4.0, 4.0)
    with pytest.raises(ValueError, match="above the alert"):
        LimitSpec(alert=DANGER, danger=ALERT)
    with pytest.raises(ValueError, match="at least 1 frame"):
        Delay(frames=0)
    assert level_with_deadband(4.0, 0.1) == Level(4.0, 3.6)
