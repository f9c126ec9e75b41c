"""Machine state per machine, kept by the daemon from every analysed frame (see
:mod:`edgevib.pipelines.machine_state` for the judgement itself).

The tracker runs on the event loop as frames are turned into results: each frame's measured speed (a speed tag;
a fixed or estimated speed is no measurement of standstill) and overall velocity are evidence, and the result
carries the machine's state after it.  Readers on other threads (the metrics scrape, the alarm views) take
:meth:`MachineTracker.snapshot`, a copy of immutable states.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING

from edgevib.pipelines.machine_state import MachineState, MachineStateSpec, observe

if TYPE_CHECKING:
    from edgevib.daemon.config import AlarmsConfig, Config, MachineConfig

__all__ = ["MachineTracker", "state_spec"]


def state_spec(machine: MachineConfig, settings: AlarmsConfig) -> MachineStateSpec:
    """The state thresholds of a machine (``[[machines]] run_threshold_rpm``) under the ``[alarms]`` table
    (``run_threshold_velocity_mm_s``, ``run_hysteresis``, ``run_dwell_frames``, ``run_dwell_s``,
    ``startup_grace_s``, ``speed_change_per_s``, ``speed_trend_window_s``)."""
    s = settings
    return MachineStateSpec(run_speed_hz=float(machine.run_threshold_rpm) / 60.0,
                            run_level_mm_s=s.run_threshold_velocity_mm_s, hysteresis=s.run_hysteresis,
                            startup_grace_s=s.startup_grace_s, speed_change_per_s=s.speed_change_per_s,
                            trend_window_s=s.speed_trend_window_s, dwell_frames=s.run_dwell_frames,
                            dwell_s=s.run_dwell_s)


class MachineTracker:
    """The state of every machine of a configuration.

    ``healthy(point)`` tells whether a point's level may vote (``False`` while it has a sensor fault); the alarm
    layer provides it, the default trusts every point.
    """

    def __init__(self, config: Config, healthy: Callable[[str], bool] | None = None) -> None:
        self.healthy: Callable[[str], bool] = healthy or (lambda _point: True)
        self._states: dict[str, MachineState] = {}
        self.specs: dict[str, MachineStateSpec] = {}
        self.configure(config)

    def configure(self, config: Config) -> None:
        """(Re)build the thresholds; machines whose thresholds are unchanged keep their state."""
        specs = {m.id: state_spec(m, config.alarms) for m in config.machines}
        self._states = {mid: self._states[mid] if mid in self._states and self.specs.get(mid) == spec
                        else MachineState() for mid, spec in specs.items()}
        self.specs = specs

    def observe(self, machine_id: str, point_id: str, t_s: float, *, speed_hz: float | None,
                velocity_rms_mm_s: float | None, frame_healthy: bool = True) -> MachineState | None:
        """One frame's evidence; the machine's state after it (``None`` for an unknown machine).
        ``frame_healthy``: the frame's own sensor-health verdict (a faulty frame's level does not vote either)."""
        spec = self.specs.get(machine_id)
        if spec is None:
            return None
        try:
            healthy = frame_healthy and bool(self.healthy(point_id))
        except Exception:  # a view that fails must not stop the frames
            healthy = frame_healthy
        st = self._states.get(machine_id)
        st = observe(MachineState() if st is None else st, spec, t_s, point_id, speed_hz=speed_hz,
                     velocity_rms_mm_s=velocity_rms_mm_s, healthy=healthy)
        self._states[machine_id] = st
        return st

    def running(self, machine_id: str) -> bool:
        """Whether the machine runs now (its next frames' health is judged against a running machine)."""
        st = self._states.get(machine_id)
        return st is not None and st.state == "running"

    def snapshot(self) -> Mapping[str, MachineState]:
        """Every machine's latest state (a copy: safe to read from any thread)."""
        return dict(self._states)
