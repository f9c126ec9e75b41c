"""The alarm state machine of one limit (one point × one indicator): pure, no clocks, no I/O.

Two levels, *alert* and *danger*, each a set point with a clear threshold below it (the deadband): a level
becomes active only after the value has stayed at or above its set point for the on-delay, and clears only after
it has stayed below its clear threshold for the off-delay.  A delay is a number of consecutive frames and/or a
time span; both must be met.  A value inside the deadband keeps the level as it is and restarts any pending
delay, so a value hovering at the limit cannot chatter.

On top of the debounced process severity (0 normal, 1 alert, 2 danger) sit the operator-facing states of
ANSI/ISA-18.2-2016 (FIELD_NOTES §7)::

    normal            nothing to show
    unacknowledged    active, not yet acknowledged (raised or escalated since the last acknowledge)
    acknowledged      active and acknowledged
    rtn-unacknowledged  returned to normal before anyone acknowledged it
    latched           a latching limit whose value has fallen back: it shows its highest severity until an
                      acknowledge resets it
    shelved           hidden by an operator, with a reason and an expiry; tracking continues underneath
    suppressed        hidden by design (machine stopped, start-up grace, sensor fault); level tracking pauses
                      (the active levels are kept) and resumes on the first frames after

A limit whose data stopped (its source is down, its sensor silent) is *stale* (:func:`mark_stale`): it keeps its
levels, acknowledgement, latch and shelf, only the pending debounce runs restart; the first finite value after
the gap clears the flag and is judged as usual.  So an alarm returns to normal only on a good value below its
clear threshold (ANSI/ISA-18.2: return to normal needs a good value), never because data stopped.

Every function returns a new frozen :class:`AlarmState` and a tuple of :class:`Transition` events; time is a
parameter (``now_s``, seconds on any monotonic-enough scale the caller keeps consistent).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Literal

__all__ = [
    "ALARM_STATES",
    "AlarmState",
    "Delay",
    "IsaState",
    "Level",
    "LevelTrack",
    "LimitSpec",
    "Transition",
    "TransitionKind",
    "acknowledge",
    "display_severity",
    "expire_shelf",
    "isa_state",
    "level_with_deadband",
    "mark_stale",
    "process_severity",
    "shelve",
    "step",
    "unshelve",
]

IsaState = Literal["normal", "unacknowledged", "acknowledged", "rtn-unacknowledged", "latched", "shelved",
                   "suppressed"]
ALARM_STATES: tuple[IsaState, ...] = ("normal", "unacknowledged", "acknowledged", "rtn-unacknowledged", "latched",
                                      "shelved", "suppressed")
TransitionKind = Literal["raised", "escalated", "deescalated", "cleared", "latched", "acknowledged", "reset",
                         "shelved", "unshelved", "suppressed", "unsuppressed"]
SEVERITY_NAMES = ("normal", "alert", "danger")


@dataclass(frozen=True, slots=True)
class Level:
    """A set point and its clear threshold (``clear < set_point``), in the indicator's unit."""

    set_point: float
    clear: float

    def __post_init__(self) -> None:
        if not (math.isfinite(self.set_point) and math.isfinite(self.clear)):
            raise ValueError(f"level set point {self.set_point!r} and clear {self.clear!r} must be finite")
        if not self.clear < self.set_point:
            raise ValueError(f"clear threshold {self.clear:g} must be below the set point {self.set_point:g}")


def level_with_deadband(set_point: float, deadband: float) -> Level:
    """A level whose clear threshold is ``deadband`` (a fraction, 0 < deadband < 1) of the set point below it."""
    if not 0.0 < deadband < 1.0:
        raise ValueError(f"deadband {deadband:g} must be a fraction between 0 and 1")
    if set_point == 0.0:
        raise ValueError("a relative deadband needs a non-zero set point")
    return Level(set_point, set_point - deadband * abs(set_point))


@dataclass(frozen=True, slots=True)
class Delay:
    """A debounce delay: at least ``frames`` consecutive frames (≥ 1) spanning at least ``seconds`` (≥ 0).

    The condition is met on the ``frames``-th consecutive qualifying frame whose time is at least ``seconds``
    after the first frame of the run.  ``Delay()`` acts on the first qualifying frame.
    """

    frames: int = 1
    seconds: float = 0.0

    def __post_init__(self) -> None:
        if self.frames < 1:
            raise ValueError(f"a delay counts at least 1 frame, got {self.frames}")
        if not (math.isfinite(self.seconds) and self.seconds >= 0.0):
            raise ValueError(f"a delay of {self.seconds!r} s must be finite and ≥ 0")


@dataclass(frozen=True, slots=True)
class LimitSpec:
    """Both levels of one limit (either may be ``None``: not configured or not yet learned) and its behaviour."""

    alert: Level | None = None
    danger: Level | None = None
    on_delay: Delay = Delay()
    off_delay: Delay = Delay()
    latching: bool = False

    def __post_init__(self) -> None:
        if self.alert is not None and self.danger is not None and self.danger.set_point <= self.alert.set_point:
            raise ValueError(f"danger set point {self.danger.set_point:g} must be above the alert set point "
                             f"{self.alert.set_point:g}")

    def level(self, severity: int) -> Level | None:
        return self.danger if severity == 2 else self.alert if severity == 1 else None


@dataclass(frozen=True, slots=True)
class LevelTrack:
    """Debounce state of one level: whether it is active and the current run toward the opposite condition."""

    active: bool = False
    run_frames: int = 0
    run_start_s: float | None = None


@dataclass(frozen=True, slots=True)
class AlarmState:
    """Everything the state machine remembers about one limit (persisted by the daemon between runs)."""

    alert: LevelTrack = LevelTrack()
    danger: LevelTrack = LevelTrack()
    acked: bool = True
    latched: int = 0
    shelved_until_s: float | None = None
    shelve_reason: str | None = None
    suppressed: str | None = None
    last_value: float | None = None  # the latest finite value given to step (suppressed or not)
    since_s: float | None = None  # when the operator-facing state last changed
    stale: str | None = None  # why no good value arrives ("source-down", "no-data"); None: data flows


@dataclass(frozen=True, slots=True)
class Transition:
    """One operator-visible change.  ``limit``/``clear`` are those of the level concerned (the higher of
    ``from_severity`` and ``to_severity``), ``None`` for operator actions on a normal alarm."""

    kind: TransitionKind
    from_state: IsaState
    to_state: IsaState
    from_severity: int
    to_severity: int
    value: float | None
    limit: float | None
    clear: float | None
    at_s: float
    reason: str | None = None


# --------------------------------------------------------------------------------------------- derived views


def process_severity(state: AlarmState) -> int:
    """The debounced severity of the process value alone: 2 danger, 1 alert, 0 normal."""
    return 2 if state.danger.active else 1 if state.alert.active else 0


def display_severity(state: AlarmState, spec: LimitSpec) -> int:
    """The annunciated severity: the process severity, or the latched one if higher on a latching limit."""
    p = process_severity(state)
    return max(p, state.latched) if spec.latching else p


def isa_state(state: AlarmState, spec: LimitSpec) -> IsaState:
    """The ISA-18.2 style state of an alarm."""
    if state.suppressed is not None:
        return "suppressed"
    if state.shelved_until_s is not None:
        return "shelved"
    p, d = process_severity(state), display_severity(state, spec)
    if d > p:
        return "latched"
    if p > 0:
        return "acknowledged" if state.acked else "unacknowledged"
    return "normal" if state.acked else "rtn-unacknowledged"


# --------------------------------------------------------------------------------------------- the step


def _track(track: LevelTrack, level: Level | None, value: float, now_s: float, spec: LimitSpec) -> LevelTrack:
    if level is None:
        return LevelTrack()
    if not track.active:
        qualifies, delay = value >= level.set_point, spec.on_delay
    else:
        qualifies, delay = value < level.clear, spec.off_delay
    if not qualifies:
        return LevelTrack(active=track.active)
    start = now_s if track.run_start_s is None else track.run_start_s
    frames = track.run_frames + 1
    if frames >= delay.frames and now_s - start >= delay.seconds:
        return LevelTrack(active=not track.active)
    return LevelTrack(active=track.active, run_frames=frames, run_start_s=start)


def _limit_of(spec: LimitSpec, a: int, b: int) -> tuple[float | None, float | None]:
    level = spec.level(max(a, b))
    return (None, None) if level is None else (level.set_point, level.clear)


def _transition(kind: TransitionKind, before: AlarmState, after: AlarmState, spec: LimitSpec, value: float | None,
                now_s: float, reason: str | None = None) -> Transition:
    fs, ts = display_severity(before, spec), display_severity(after, spec)
    limit, clear = _limit_of(spec, fs, ts)
    return Transition(kind, isa_state(before, spec), isa_state(after, spec), fs, ts, value, limit, clear, now_s,
                      reason)


def _stamp(before: AlarmState, after: AlarmState, spec: LimitSpec, now_s: float) -> AlarmState:
    if isa_state(before, spec) != isa_state(after, spec) or display_severity(before, spec) != display_severity(
            after, spec):
        return replace(after, since_s=now_s)
    return after


def _paused(track: LevelTrack) -> LevelTrack:
    """A level whose pending delay restarts (its active flag is kept)."""
    return LevelTrack(active=track.active)


def mark_stale(state: AlarmState, reason: str, now_s: float,
               spec: LimitSpec) -> tuple[AlarmState, tuple[Transition, ...]]:
    """No good value arrives for a while (``reason``: ``"source-down"``, ``"no-data"``): keep every level, the
    acknowledgement, latch and shelf; restart pending delays; annunciate nothing.  The next finite value given to
    :func:`step` ends the stale period.  An expired shelf still ends (the only possible transition)."""
    if not reason:
        raise ValueError("a stale period needs a reason")
    state, events = expire_shelf(state, now_s, spec)
    after = replace(state, alert=_paused(state.alert), danger=_paused(state.danger), stale=reason)
    return after, events


def expire_shelf(state: AlarmState, now_s: float, spec: LimitSpec) -> tuple[AlarmState, tuple[Transition, ...]]:
    """Unshelve when the shelf has expired (``now_s >= shelved_until_s``); otherwise nothing changes."""
    if state.shelved_until_s is None or now_s < state.shelved_until_s:
        return state, ()
    return unshelve(state, now_s, spec, reason="shelf expired")


def step(state: AlarmState, value: float, now_s: float, spec: LimitSpec,
         suppress: str | None = None) -> tuple[AlarmState, tuple[Transition, ...]]:
    """Feed one frame's indicator value taken at ``now_s``.

    ``suppress`` names a suppression reason (``"machine-stopped"``, ``"start-up-grace"``, ``"sensor-fault"``):
    while it is given, level tracking pauses (active levels are kept, pending delays restart) and nothing is
    annunciated.  A non-finite ``value`` is ignored (apart from shelf expiry and the end of a suppression); a
    finite one ends a stale period (:func:`mark_stale`).
    """
    state, events = expire_shelf(state, now_s, spec)
    out = list(events)
    if state.stale is not None and math.isfinite(value):
        state = replace(state, stale=None)
    if suppress is not None:
        # the latest finite value is kept (it is what the alarm last read, shown as such), never judged
        seen = value if math.isfinite(value) else state.last_value
        if state.suppressed == suppress:
            return replace(state, last_value=seen), tuple(out)
        before = state
        after = replace(state, alert=_paused(state.alert), danger=_paused(state.danger), suppressed=suppress,
                        last_value=seen)
        # A normal (or shelved) alarm goes quietly; a visible one announces that it is now hidden.
        if isa_state(before, spec) not in ("normal", "shelved", "suppressed"):
            out.append(_transition("suppressed", before, after, spec, state.last_value, now_s, suppress))
        return _stamp(before, after, spec, now_s), tuple(out)
    if state.suppressed is not None:
        before = state
        state = replace(state, suppressed=None)
        if isa_state(state, spec) not in ("normal", "shelved"):
            # the value that ends the suppression is this frame's, not the one frozen when it began
            shown = value if math.isfinite(value) else state.last_value
            out.append(_transition("unsuppressed", before, state, spec, shown, now_s, before.suppressed))
        state = _stamp(before, state, spec, now_s)
    if not math.isfinite(value):
        return state, tuple(out)
    before = state
    after = replace(state, alert=_track(state.alert, spec.alert, value, now_s, spec),
                    danger=_track(state.danger, spec.danger, value, now_s, spec), last_value=value)
    p_before, p_after = process_severity(before), process_severity(after)
    if spec.latching:
        after = replace(after, latched=max(after.latched, p_after))
    d_before, d_after = display_severity(before, spec), display_severity(after, spec)
    if d_after > d_before:
        after = replace(after, acked=False)
    if after.shelved_until_s is None:
        kind: TransitionKind | None = None
        if d_after > d_before:
            kind = "raised" if d_before == 0 else "escalated"
        elif d_after < d_before:
            kind = "cleared" if d_after == 0 else "deescalated"
        elif p_after < p_before and isa_state(after, spec) == "latched" and isa_state(before, spec) != "latched":
            kind = "latched"
        if kind is not None:
            out.append(_transition(kind, before, after, spec, value, now_s))
    return _stamp(before, after, spec, now_s), tuple(out)


# --------------------------------------------------------------------------------------------- operator actions


def acknowledge(state: AlarmState, now_s: float, spec: LimitSpec) -> tuple[AlarmState, tuple[Transition, ...]]:
    """Acknowledge: an unacknowledged alarm becomes acknowledged, a returned-to-normal one normal, and a latched
    one is reset to the current process severity.  Acknowledging anything else changes nothing (no events).

    A hidden alarm (shelved, or suppressed by design) is not acknowledged either: acknowledgement is the
    operator's response to an annunciated alarm (ANSI/ISA-18.2-2016, IEC 62682; from memory), so an alarm hidden
    meanwhile shows again as it stands, an unacknowledged one still unacknowledged, and is acknowledged then with
    its event — never silently while nobody can see it."""
    before = state
    was = isa_state(state, spec)
    if was in ("normal", "acknowledged", "shelved", "suppressed"):
        return state, ()
    kind: TransitionKind = "acknowledged"
    after = replace(state, acked=True)
    if spec.latching and state.latched > process_severity(state):
        after = replace(after, latched=process_severity(state))
        kind = "reset"
    if isa_state(after, spec) == was and display_severity(after, spec) == display_severity(before, spec) and \
            after.acked == before.acked:
        return state, ()
    return _stamp(before, after, spec, now_s), (_transition(kind, before, after, spec, state.last_value, now_s),)


def shelve(state: AlarmState, reason: str, until_s: float, now_s: float,
           spec: LimitSpec) -> tuple[AlarmState, tuple[Transition, ...]]:
    """Shelve until ``until_s`` (must lie after ``now_s``) for ``reason`` (non-empty).  Re-shelving replaces the
    expiry and reason."""
    if not reason.strip():
        raise ValueError("shelving needs a reason")
    if not (math.isfinite(until_s) and until_s > now_s):
        raise ValueError(f"shelf expiry {until_s!r} must be finite and after now ({now_s:g})")
    before = state
    after = replace(state, shelved_until_s=until_s, shelve_reason=reason)
    return _stamp(before, after, spec, now_s), (
        _transition("shelved", before, after, spec, state.last_value, now_s, reason),)


def unshelve(state: AlarmState, now_s: float, spec: LimitSpec,
             reason: str | None = None) -> tuple[AlarmState, tuple[Transition, ...]]:
    """Return a shelved alarm to the state its tracking reached meanwhile (an active one shows again)."""
    if state.shelved_until_s is None:
        return state, ()
    before = state
    after = replace(state, shelved_until_s=None, shelve_reason=None)
    return _stamp(before, after, spec, now_s), (
        _transition("unshelved", before, after, spec, state.last_value, now_s, reason),)
