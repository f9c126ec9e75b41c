"""Machine state from speed readings and vibration levels: pure, no clocks, no I/O.

A machine is ``stopped``, ``starting`` (run-up and start-up grace), ``running``, ``coasting`` (running down), or
``unknown`` (nothing observed yet, or no healthy point to judge by).  A stopped or coasting machine is a normal
operating state, not a fault (FIELD_NOTES §7).

The state is judged from, in order of preference:

* a **measured speed** (a speed tag): turning at or above ``run_speed_hz``; a turning machine counts as stopped
  again only below ``(1 − hysteresis) × run_speed_hz``, so a machine idling near the threshold does not flap.  The
  least-squares slope of the readings over ``trend_window_s`` tells a run-up from a coast-down: a speed changing
  by at least ``speed_change_per_s`` of itself per second;
* otherwise the **overall level** of the machine's healthy points (a fixed configured speed or a speed estimated
  from the spectrum says nothing about standstill): a point votes "turning" at or above ``run_level_mm_s``
  velocity r.m.s. (below ``(1 − hysteresis) × run_level_mm_s`` once the machine turns); the machine turns while
  any healthy point votes so.  A level cannot tell a coast-down, so such machines go from running to stopped
  directly.

A change between stopped and turning further needs a **dwell**: the opposite verdict on ``dwell_frames``
consecutive frames spanning at least ``dwell_s`` (a level straddling the threshold, one noisy frame below or above
it, changes nothing; a real stop or start is told at most that late).  A start is dated from the first frame of
the dwell, so the start-up grace is not lengthened by it.

A start (stopped → turning) opens a ``startup_grace_s`` interval: the machine is ``starting`` until the grace is
over and it no longer accelerates.  A machine first seen already turning (the monitor just started) is
``running`` unless it is accelerating — a restart of the monitor is not a start of the machine.

Every function returns a new frozen :class:`MachineState`; time (``t_s``) is a parameter on the frames'
measurement timeline.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Literal

__all__ = [
    "MACHINE_STATES",
    "MachineState",
    "MachineStateName",
    "MachineStateSpec",
    "observe",
    "speed_slope_per_s",
]

MachineStateName = Literal["unknown", "stopped", "starting", "running", "coasting"]
MACHINE_STATES: tuple[MachineStateName, ...] = ("unknown", "stopped", "starting", "running", "coasting")
TURNING: frozenset[str] = frozenset({"starting", "running", "coasting"})


@dataclass(frozen=True, slots=True)
class MachineStateSpec:
    """Thresholds of one machine's state judgement (see the module docstring).

    ``run_speed_hz`` ≥ 0, ``run_level_mm_s`` ≥ 0, 0 ≤ ``hysteresis`` < 1, ``startup_grace_s`` ≥ 0,
    ``speed_change_per_s`` > 0, ``trend_window_s`` > 0, ``dwell_frames`` ≥ 1, ``dwell_s`` ≥ 0 (the defaults,
    1 and 0, are no dwell).
    """

    run_speed_hz: float = 1.0
    run_level_mm_s: float = 0.2
    hysteresis: float = 0.2
    startup_grace_s: float = 30.0
    speed_change_per_s: float = 0.02
    trend_window_s: float = 3.0
    dwell_frames: int = 1
    dwell_s: float = 0.0

    def __post_init__(self) -> None:
        if isinstance(self.dwell_frames, bool) or not isinstance(self.dwell_frames, int) or self.dwell_frames < 1:
            raise ValueError(f"dwell_frames = {self.dwell_frames!r} must be an integer ≥ 1")
        for name in ("run_speed_hz", "run_level_mm_s", "startup_grace_s", "dwell_s"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0):
                raise ValueError(f"{name} = {v!r} must be finite and ≥ 0")
        if not 0.0 <= self.hysteresis < 1.0:
            raise ValueError(f"hysteresis {self.hysteresis!r} must be a fraction in [0, 1)")
        for name in ("speed_change_per_s", "trend_window_s"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v > 0):
                raise ValueError(f"{name} = {v!r} must be finite and > 0")


@dataclass(frozen=True, slots=True)
class MachineState:
    """What is known of one machine.

    ``since_s``: when the present state began; ``started_s``: when the present run began (``None`` when the
    machine was first seen turning); ``basis``: what the latest judgement rested on (``"speed"``, ``"level"`` or
    ``"none"``); ``speed_hz``: the latest measured speed; ``votes``: each healthy point's latest level verdict;
    ``speeds``: the measured ``(t_s, hz)`` readings within the trend window; ``last_s``: the latest time observed;
    ``pending_frames`` / ``pending_since_s``: how many consecutive frames, since when, have said the opposite of
    ``turning`` (a change waiting for its dwell).
    """

    state: MachineStateName = "unknown"
    since_s: float | None = None
    started_s: float | None = None
    basis: Literal["speed", "level", "none"] = "none"
    speed_hz: float | None = None
    votes: tuple[tuple[str, bool], ...] = ()
    speeds: tuple[tuple[float, float], ...] = ()
    last_s: float | None = None
    pending_frames: int = 0
    pending_since_s: float | None = None

    @property
    def turning(self) -> bool:
        return self.state in TURNING

    def grace_until_s(self, spec: MachineStateSpec) -> float | None:
        """End of the start-up grace while ``starting`` (``None`` otherwise)."""
        if self.state != "starting" or self.started_s is None:
            return None
        return self.started_s + spec.startup_grace_s


def speed_slope_per_s(readings: tuple[tuple[float, float], ...]) -> float | None:
    """Least-squares slope (Hz/s) of ``(t_s, hz)`` readings; ``None`` for fewer than 3 or no time spread."""
    if len(readings) < 3:
        return None
    n = len(readings)
    mt = sum(t for t, _ in readings) / n
    mf = sum(f for _, f in readings) / n
    den = sum((t - mt) ** 2 for t, _ in readings)
    if den <= 0:
        return None
    return sum((t - mt) * (f - mf) for t, f in readings) / den


def observe(state: MachineState, spec: MachineStateSpec, t_s: float, point: str, *,
            speed_hz: float | None = None, velocity_rms_mm_s: float | None = None,
            healthy: bool = True) -> MachineState:
    """One frame's evidence about the machine.

    Parameters
    ----------
    t_s : the frame's time, s (frames of several points may arrive slightly out of order: the state's own times
        never go backwards).
    point : the point the frame belongs to (its level votes for the machine).
    speed_hz : the measured shaft speed (a speed tag), Hz ≥ 0; ``None`` when there is none (a fixed or estimated
        speed is not a measurement of standstill).
    velocity_rms_mm_s : the frame's overall velocity r.m.s.
    healthy : ``False`` when the point has a sensor fault: its level does not vote.
    """
    turning_before = state.turning
    now = t_s if state.last_s is None else max(t_s, state.last_s)
    votes = dict(state.votes)
    if not healthy:
        votes.pop(point, None)
    elif velocity_rms_mm_s is not None and math.isfinite(velocity_rms_mm_s):
        # the machine's state, not the point's own last verdict, sets the threshold: while a change waits for its
        # dwell, a frame back on the machine's side of the band ends the wait
        level = spec.run_level_mm_s * (1.0 - spec.hysteresis) if turning_before else spec.run_level_mm_s
        votes[point] = velocity_rms_mm_s >= level
    speeds = state.speeds
    rate: float | None = None
    if speed_hz is not None and math.isfinite(speed_hz) and speed_hz >= 0:
        basis: Literal["speed", "level", "none"] = "speed"
        speeds = tuple(sorted((*state.speeds, (t_s, float(speed_hz)))))
        speeds = tuple(r for r in speeds if r[0] >= now - spec.trend_window_s)
        if not speeds:  # a reading older than the trend window: no news of the speed
            return replace(state, votes=tuple(sorted(votes.items())), last_s=now)
        # The newest reading in time decides (a point's frame may arrive after a newer one of another point).
        current = speeds[-1][1]
        threshold = spec.run_speed_hz * (1.0 - spec.hysteresis) if turning_before else spec.run_speed_hz
        turning: bool | None = current >= threshold and current > 0
        slope = speed_slope_per_s(speeds) if speeds[-1][0] - speeds[0][0] >= 0.5 * spec.trend_window_s else None
        if slope is not None:
            rate = slope / max(current, spec.run_speed_hz, 1e-9)
        latest_speed: float | None = current
    else:
        basis = "level" if votes else "none"
        speeds = ()
        turning = any(votes.values()) if votes else None
        latest_speed = None
    turning, pending_frames, pending_since = _dwell(state, spec, turning, now)
    accel = rate is not None and rate >= spec.speed_change_per_s
    decel = rate is not None and rate <= -spec.speed_change_per_s
    started = state.started_s
    prev = state.state
    new: MachineStateName
    if turning is None:
        new = "unknown"
    elif not turning:
        new = "stopped"
        started = None
    elif prev == "stopped" or (prev == "unknown" and accel):
        started = state.pending_since_s if prev == "stopped" and state.pending_since_s is not None else now
        new = "starting"
    elif prev == "unknown" and basis == "speed" and rate is None:
        new = "unknown"  # turning, but whether it runs up is not known before the readings span the window
    elif prev == "unknown":
        new = "running"
    elif prev == "starting":
        in_grace = started is not None and now - started < spec.startup_grace_s
        new = "coasting" if decel else "starting" if accel or in_grace else "running"
    else:
        new = "coasting" if decel else "running"
    if new == "starting" and started is not None and not accel and now - started >= spec.startup_grace_s:
        new = "running"  # a zero grace: a steady start is running at once
    since = state.since_s if new == prev else now
    # every field given: the constructor itself (``dataclasses.replace`` looks the fields up on every call, once
    # per analysed frame here)
    return MachineState(state=new, since_s=since, started_s=started, basis=basis, speed_hz=latest_speed,
                        votes=tuple(sorted(votes.items())), speeds=speeds, last_s=now, pending_frames=pending_frames,
                        pending_since_s=pending_since)


def _dwell(state: MachineState, spec: MachineStateSpec, turning: bool | None,
           now: float) -> tuple[bool | None, int, float | None]:
    """The verdict after the dwell, and the pending change's frame count and first time.  Only a change between
    stopped and turning waits (a first verdict, or one from nothing to judge by, is taken at once)."""
    if turning is None or state.state == "unknown" or turning == state.turning:
        return turning, 0, None
    frames = state.pending_frames + 1
    since = now if state.pending_since_s is None else state.pending_since_s
    if frames >= spec.dwell_frames and now - since >= spec.dwell_s:
        return turning, 0, None
    return state.turning, frames, since
