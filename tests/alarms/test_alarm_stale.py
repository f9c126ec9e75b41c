"""Stale periods in the pure alarm state machine: an alarm returns to normal only on a good value.

ANSI/ISA-18.2-2016 (FIELD_NOTES §7): return to normal needs a good value below the limit; a latched or
unacknowledged alarm stays until acknowledged; loss of the data path is neither a machine alarm nor a transducer
fault.  The properties below are checked over random sequences of values, gaps (non-finite values), stale
periods, suppressions and operator actions.
"""

from __future__ import annotations

import math

from hypothesis import given, settings
from hypothesis import strategies as st

from edgevib.pipelines.alarm import (
    AlarmState,
    Delay,
    Level,
    LimitSpec,
    acknowledge,
    display_severity,
    isa_state,
    mark_stale,
    process_severity,
    shelve,
    step,
    unshelve,
)

ALERT = Level(4.0, 3.6)
DANGER = Level(8.0, 7.2)

# One operation: a frame value (finite or a gap), a stale mark, a suppressed frame, or an operator action.
ops = st.one_of(
    st.tuples(st.just("value"), st.floats(0.0, 12.0)),
    st.tuples(st.just("gap"), st.sampled_from([math.nan, math.inf])),
    st.tuples(st.just("stale"), st.sampled_from(["source-down", "no-data"])),
    st.tuples(st.just("suppressed"), st.sampled_from(["machine-stopped", "start-up-grace", "sensor-fault"])),
    st.tuples(st.just("ack"), st.none()),
    st.tuples(st.just("shelve"), st.floats(0.5, 20.0)),
    st.tuples(st.just("unshelve"), st.none()),
)


def apply(s: AlarmState, op: tuple[str, object], t: float, spec: LimitSpec) -> tuple[AlarmState, tuple]:
    kind, arg = op
    if kind == "value" or kind == "gap":
        return step(s, float(arg), t, spec)  # type: ignore[arg-type]
    if kind == "stale":
        return mark_stale(s, str(arg), t, spec)
    if kind == "suppressed":
        return step(s, 5.0, t, spec, suppress=str(arg))
    if kind == "ack":
        return acknowledge(s, t, spec)
    if kind == "shelve":
        return shelve(s, "permit 4711", t + float(arg), t, spec)  # type: ignore[arg-type]
    return unshelve(s, t, spec)


@settings(max_examples=300, deadline=None)
@given(seq=st.lists(ops, max_size=80), on=st.integers(1, 4), off=st.integers(1, 4), latching=st.booleans())
def test_no_return_to_normal_without_a_good_value(seq: list[tuple[str, object]], on: int, off: int,
                                                  latching: bool) -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER, on_delay=Delay(frames=on), off_delay=Delay(frames=off),
                     latching=latching)
    s = AlarmState()
    for i, op in enumerate(seq):
        before = s
        s, events = apply(s, op, float(i), spec)
        good = op[0] == "value" and math.isfinite(float(op[1]))  # type: ignore[arg-type]
        # The process severity falls only on a good value below the clear threshold of the level left.
        if process_severity(s) < process_severity(before):
            assert good, (op, before, s)
            left = DANGER if process_severity(before) == 2 else ALERT
            assert float(op[1]) < left.clear  # type: ignore[arg-type]
        # An unacknowledged alarm becomes acknowledged only by an acknowledge.
        if not before.acked and s.acked:
            assert op[0] == "ack"
        # Cleared / deescalated transitions carry the good value behind them.
        for e in events:
            if e.kind in ("cleared", "deescalated"):
                assert good and e.value == float(op[1])  # type: ignore[arg-type]
        # A stale mark changes no operator-visible state and announces nothing (an expired shelf aside).
        if op[0] == "stale":
            assert s.stale == op[1]
            assert process_severity(s) == process_severity(before) and s.acked == before.acked
            assert s.latched == before.latched
            assert [e.kind for e in events] in ([], ["unshelved"])
        # Only a finite value ends a stale period.
        if before.stale is not None and s.stale is None:
            assert op[0] in ("value", "suppressed")


def test_stale_danger_keeps_state_and_is_judged_again_on_fresh_values() -> None:
    spec = LimitSpec(alert=ALERT, danger=DANGER, on_delay=Delay(frames=2), off_delay=Delay(frames=2))
    s = AlarmState()
    for t, v in enumerate([9.0, 9.0]):
        s, _ = step(s, v, float(t), spec)
    assert isa_state(s, spec) == "unacknowledged" and display_severity(s, spec) == 2
    s, ev = mark_stale(s, "source-down", 2.0, spec)
    assert ev == () and s.stale == "source-down" and isa_state(s, spec) == "unacknowledged"
    for t in range(3, 40):  # the outage: no values at all, or gaps
        s, ev = step(s, math.nan, float(t), spec)
        assert ev == () and isa_state(s, spec) == "unacknowledged" and s.stale == "source-down"
    s, ev = step(s, 1.0, 40.0, spec)  # the first good value: judged again, the off-delay starts afresh
    assert ev == () and s.stale is None and display_severity(s, spec) == 2
    s, ev = step(s, 1.0, 41.0, spec)
    assert [(e.kind, e.to_state, e.value) for e in ev] == [("cleared", "rtn-unacknowledged", 1.0)]


def test_a_pending_delay_does_not_span_a_stale_period() -> None:
    spec = LimitSpec(alert=ALERT, on_delay=Delay(frames=2))
    s, _ = step(AlarmState(), 5.0, 0.0, spec)  # one frame of two above the set point
    s, _ = mark_stale(s, "no-data", 1.0, spec)
    s, ev = step(s, 5.0, 10.0, spec)  # the run restarted: one frame again
    assert ev == ()
    s, ev = step(s, 5.0, 11.0, spec)
    assert [e.kind for e in ev] == ["raised"]
