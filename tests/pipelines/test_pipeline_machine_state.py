"""Machine state (edgevib.pipelines.machine_state) on speed and level histories with known answers.

The definitions are common practice (FIELD_NOTES §7: a stopped machine is a normal state; alarms are inhibited
while stopped and during a start-up interval, API 670 from memory): a run threshold with hysteresis so that a
machine idling at the threshold does not flap, a start-up grace after each start, a run-up or coast-down told by
the speed changing fast relative to itself.  Crossing times of linear ramps are plain arithmetic.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from edgevib.pipelines.machine_state import MachineState, MachineStateSpec, observe, speed_slope_per_s

SPEC = MachineStateSpec(run_speed_hz=1.0, run_level_mm_s=0.2, hysteresis=0.2, startup_grace_s=10.0,
                        speed_change_per_s=0.02, trend_window_s=3.0)
DT = 0.25  # s between frames


def run_speeds(profile: list[tuple[float, float]], spec: MachineStateSpec = SPEC,
               point: str = "P-1") -> list[tuple[float, MachineState]]:
    s = MachineState()
    out = []
    for t, f in profile:
        s = observe(s, spec, t, point, speed_hz=f, velocity_rms_mm_s=1.0)
        out.append((t, s))
    return out


def ramp(t0: float, t1: float, f0: float, f1: float, t_end: float, start: float = 0.0) -> list[tuple[float, float]]:
    """Speed f0 until t0, linear to f1 at t1, held to t_end; one reading every DT."""
    out = []
    t = start
    while t <= t_end + 1e-9:
        f = f0 if t <= t0 else f1 if t >= t1 else f0 + (f1 - f0) * (t - t0) / (t1 - t0)
        out.append((round(t, 6), f))
        t += DT
    return out


def changes(history: list[tuple[float, MachineState]]) -> list[tuple[float, str]]:
    out: list[tuple[float, str]] = []
    for t, s in history:
        if not out or out[-1][1] != s.state:
            out.append((t, s.state))
    return out


def test_slope_of_a_line() -> None:
    # least squares recovers the slope of exact linear data (arithmetic)
    assert speed_slope_per_s(((0.0, 1.0), (1.0, 3.0), (2.0, 5.0))) == pytest.approx(2.0)
    assert speed_slope_per_s(((0.0, 1.0), (1.0, 3.0))) is None
    assert speed_slope_per_s(((1.0, 1.0), (1.0, 3.0), (1.0, 5.0))) is None


def test_run_up_run_coast_down_stop() -> None:
    # standstill, a 0 → 25 Hz run-up over 20 s (1.25 Hz/s: far above 2 %/s of 25 Hz), run, coast down over 15 s
    prof = ramp(5.0, 25.0, 0.0, 25.0, 60.0)
    prof = [(t, f) for t, f in prof if t < 45] + [(t, 25.0 * (1 - (t - 45.0) / 15.0) if t < 60 else 0.0)
                                                   for t, _ in ramp(0, 1, 0, 0, 70.0, start=45.0)]
    ch = changes(run_speeds(prof))
    states = [s for _, s in ch]
    assert states == ["stopped", "starting", "running", "coasting", "stopped"]
    t_start = dict((s, t) for t, s in ch)["starting"]
    # 1 Hz is crossed at 5 + 20 × 1/25 = 5.8 s (arithmetic), the next frame after it
    assert 5.8 <= t_start <= 5.8 + DT
    # running once the grace (10 s after the start) is over and the run-up has ended (25 s), within the window
    t_run = dict((s, t) for t, s in ch)["running"]
    assert 25.0 <= t_run <= 25.0 + SPEC.trend_window_s + DT
    # coasting within the trend window after 45 s; stopped below (1 − 0.2) × 1 Hz = 0.8 Hz: at 45 + 15 × 0.968
    t_coast = dict((s, t) for t, s in ch)["coasting"]
    assert 45.0 < t_coast <= 45.0 + SPEC.trend_window_s
    t_stop = [t for t, s in ch][-1]
    assert 45.0 + 15.0 * (1 - 0.8 / 25.0) <= t_stop <= 45.0 + 15.0 * (1 - 0.8 / 25.0) + DT


def test_grace_outlasts_a_short_run_up_and_zero_grace_runs_at_once() -> None:
    prof = ramp(1.0, 3.0, 0.0, 25.0, 30.0)
    ch = dict((s, t) for t, s in changes(run_speeds(prof)))
    assert ch["starting"] <= 1.0 + DT + 0.04 * 2
    assert ch["running"] == pytest.approx(ch["starting"] + 10.0, abs=DT)  # the grace, not the 2-s ramp
    # no grace: "starting" only while the readings in the trend window still rise
    quick = MachineStateSpec(run_speed_hz=1.0, startup_grace_s=0.0)
    step = [(t * DT, 0.0) for t in range(12)] + [(t * DT, 25.0) for t in range(12, 60)]
    ch = changes(run_speeds(step, quick))
    assert [s for _, s in ch] == ["stopped", "starting", "running"]
    assert ch[2][0] <= 3.0 + quick.trend_window_s + DT
    # and a speed already steady in the window when it crosses the threshold runs at once
    s = observe(MachineState(state="stopped"), quick, 10.0, "A", speed_hz=25.0)
    assert s.state == "running"


def test_monitor_started_on_a_running_machine_is_not_a_start() -> None:
    # the daemon restarts while the machine runs steadily: no start-up grace (which would hide its alarms)
    hist = run_speeds([(t * DT, 24.75) for t in range(40)])
    assert hist[0][1].state == "unknown"  # the speed trend is not known before the readings span the window
    assert {s.state for t, s in hist if t >= SPEC.trend_window_s / 2} == {"running"}
    assert all(s.started_s is None for _, s in hist)


def test_slow_speed_change_of_a_variable_speed_drive_stays_running() -> None:
    # 25 → 20 Hz over 100 s: 0.05 Hz/s, 0.2–0.25 %/s of the speed, well under 2 %/s
    prof = ramp(10.0, 110.0, 25.0, 20.0, 120.0)
    states = {s.state for t, s in run_speeds(prof) if t >= 2.0}
    assert states == {"running"}


def test_frames_out_of_time_order_keep_the_newest_speed() -> None:
    # a late frame of another point carrying an older reading (standstill) does not stop a running machine
    s = MachineState()
    for t in range(0, 12):
        s = observe(s, SPEC, float(t), "A", speed_hz=25.0)
    assert s.state == "running"
    s = observe(s, SPEC, 9.5, "B", speed_hz=0.0)
    assert s.state == "running" and s.speed_hz == 25.0
    s = observe(s, SPEC, 0.5, "B", speed_hz=0.0)  # older than the trend window: no news at all
    assert s.state == "running"


@settings(max_examples=60, deadline=None)
@given(centre=st.floats(0.85, 0.95), amplitude=st.floats(0.0, 0.04), seed=st.integers(0, 10_000))
def test_idling_at_the_threshold_does_not_flap(centre: float, amplitude: float, seed: int) -> None:
    # property: once turning, a speed wandering inside the hysteresis band (0.8 … 1.0 × run speed) never counts as
    # stopped, whatever the wander
    import random

    rnd = random.Random(seed)
    s = MachineState()
    for t in range(10):
        s = observe(s, SPEC, t * DT, "A", speed_hz=1.2)
    assert s.turning
    for k in range(10, 200):
        f = centre + amplitude * (2 * rnd.random() - 1)
        s = observe(s, SPEC, k * DT, "A", speed_hz=f)
        assert s.state != "stopped", (k, f)


@settings(max_examples=60, deadline=None)
@given(levels=st.lists(st.floats(0.0, 0.5), min_size=5, max_size=60))
@example(levels=[0.0, 0.0, 0.0, 0.5, 0.16])  # exactly at the off threshold, as decimals
def test_level_votes_with_hysteresis(levels: list[float]) -> None:
    # property: without a speed, a machine turns exactly while its point's level stays above the hysteresis
    # threshold of its previous verdict (0.2 on; off below (1 − hysteresis) × 0.2, the module's documented rule:
    # 0.16 up to the rounding of that product, 0.16000000000000003 in doubles), and a start always begins with
    # "starting"
    off = SPEC.run_level_mm_s * (1.0 - SPEC.hysteresis)
    s = MachineState()
    turning = False
    for i, v in enumerate(levels):
        before = s.state
        s = observe(s, SPEC, float(i), "A", velocity_rms_mm_s=v)
        turning = v >= (off if turning else SPEC.run_level_mm_s)
        assert s.turning == turning and s.basis == "level"
        if turning and before == "stopped":
            assert s.state == "starting"
        if not turning:
            assert s.state == "stopped"


def test_faulty_points_do_not_vote() -> None:
    s = MachineState()
    s = observe(s, SPEC, 0.0, "A", velocity_rms_mm_s=2.0)
    s = observe(s, SPEC, 0.0, "B", velocity_rms_mm_s=2.0)
    assert s.state == "running"
    s = observe(s, SPEC, 1.0, "A", velocity_rms_mm_s=0.0)  # A's machine-side level fell: B still runs
    assert s.state == "running"
    s = observe(s, SPEC, 1.5, "B", velocity_rms_mm_s=45.0, healthy=False)  # B has a sensor fault: no vote
    assert s.state == "stopped" and dict(s.votes) == {"A": False}
    s = observe(s, SPEC, 2.0, "A", velocity_rms_mm_s=math.nan)  # nothing to say: state kept
    assert s.state == "stopped"
    only_faulty = observe(MachineState(), SPEC, 0.0, "B", velocity_rms_mm_s=3.0, healthy=False)
    assert only_faulty.state == "unknown"


def test_grace_countdown() -> None:
    hist = run_speeds(ramp(1.0, 3.0, 0.0, 25.0, 6.0))
    _, s = hist[-1]
    assert s.state == "starting" and s.grace_until_s(SPEC) == pytest.approx(s.started_s + 10.0)
    assert MachineState().grace_until_s(SPEC) is None


@pytest.mark.parametrize("kwargs", [{"hysteresis": 1.0}, {"run_speed_hz": -1.0}, {"speed_change_per_s": 0.0},
                                    {"startup_grace_s": math.inf}, {"trend_window_s": 0.0}])
def test_bad_specs_are_refused(kwargs: dict[str, float]) -> None:
    with pytest.raises(ValueError):
        MachineStateSpec(**kwargs)


# The daemon's default dwell ([alarms] run_dwell_frames = 3, run_dwell_s = 3): a change between stopped and turning
# holds for 3 consecutive frames over 3 s.  Common practice for a run/stop signal taken from a level (an on-delay
# and off-delay on a threshold with hysteresis, ISA-18.2's alarm delays from memory): one noisy frame changes
# nothing; a real stop or start is told at most the dwell late.
DWELL = MachineStateSpec(run_speed_hz=1.0, run_level_mm_s=0.2, hysteresis=0.2, startup_grace_s=10.0,
                         dwell_frames=3, dwell_s=3.0)


def run_levels(levels: list[tuple[float, str, float]], spec: MachineStateSpec = DWELL,
               state: MachineState | None = None) -> list[tuple[float, MachineState]]:
    s = state or MachineState()
    out = []
    for t, point, v in levels:
        s = observe(s, spec, t, point, velocity_rms_mm_s=v)
        out.append((t, s))
    return out


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_level_straddling_the_run_threshold_does_not_flap(seed: int) -> None:
    # An idling fan without speed tag (the reported case): two points, one frame a second each, levels scattered
    # over 0.17–0.24 mm/s around the 0.2 run threshold, with a lone frame below the 0.16 stop level now and then.
    import random

    rnd = random.Random(seed)
    frames = []
    for k in range(240):
        for point, centre in (("DE", 0.194), ("NDE", 0.17)):
            v = centre + rnd.uniform(-0.024, 0.046)
            if rnd.random() < 0.05:
                v = 0.146
            frames.append((float(k) + (0.5 if point == "NDE" else 0.0), point, v))
    running = MachineState(state="running", since_s=-100.0)
    assert {s.state for _, s in run_levels(frames, state=running)} == {"running"}
    # a stopped machine with levels of 0.12–0.19 mm/s and a lone frame at 0.23 now and then does not start
    stopped = MachineState(state="stopped", since_s=-100.0)
    low, spike = [], False
    for t, point, v in frames:
        if point == "DE":
            spike = not spike and rnd.random() < 0.05
            low.append((t, point, 0.23 if spike else v - 0.05 if v != 0.146 else 0.15))
    assert {s.state for _, s in run_levels(low, state=stopped)} == {"stopped"}
    # without the dwell, the same levels flap (what the dwell is for)
    no_dwell = MachineStateSpec(run_speed_hz=1.0, run_level_mm_s=0.2, hysteresis=0.2, startup_grace_s=10.0)
    single = [f for f in frames if f[1] == "DE"]
    if any(v < 0.16 for _, _, v in single):
        assert "stopped" in {s.state for _, s in run_levels(single, no_dwell, running)}


def test_real_stop_and_start_are_told_within_the_dwell() -> None:
    # running at 2 mm/s, stops at t = 20 s (0.01 mm/s), restarts at t = 60 s; a frame every 0.5 s
    frames = [(k * 0.5, "DE", 2.0 if k * 0.5 < 20.0 or k * 0.5 >= 60.0 else 0.01) for k in range(200)]
    ch = changes(run_levels(frames, state=MachineState(state="running", since_s=-100.0)))
    assert [s for _, s in ch] == ["running", "stopped", "starting", "running"]
    t = dict((s, t) for t, s in ch)
    # stopped 3 s after the first low frame (3 frames and 3 s: the time decides at 2 frames a second)
    assert t["stopped"] == pytest.approx(20.0 + 3.0)
    assert t["starting"] == pytest.approx(60.0 + 3.0)
    # the start is dated from its first frame: the grace ends 10 s after 60 s, not after the dwell
    s = dict(run_levels(frames, state=MachineState(state="running", since_s=-100.0)))[65.0]
    assert s.state == "starting" and s.grace_until_s(DWELL) == pytest.approx(70.0)
    assert t["running"] == pytest.approx(70.0)
    # frames far apart: the frame count decides (3 frames, 10 s apart → told on the third, 20 s after the first)
    sparse = [(0.0, "DE", 2.0), (10.0, "DE", 0.01), (20.0, "DE", 0.01), (30.0, "DE", 0.01)]
    assert [s.state for _, s in run_levels(sparse)] == ["running", "running", "running", "stopped"]


def test_one_frame_back_resets_the_dwell() -> None:
    # two low frames, one back above the stop level (0.16), two low again: never three low in a row
    levels = [2.0, 0.01, 0.01, 0.18, 0.01, 0.01, 0.18, 0.01, 0.01]
    hist = run_levels([(float(i) * 2.0, "DE", v) for i, v in enumerate(levels)])
    assert {s.state for _, s in hist} == {"running"}
    # a speed tag waits the same way
    s = MachineState()
    for k in range(20):
        s = observe(s, DWELL, k * 0.5, "DE", speed_hz=25.0)
    assert s.state == "running"
    s = observe(s, DWELL, 10.0, "DE", speed_hz=0.0)  # one reading of 0 (its slope may say coasting): not a stop
    assert s.turning and s.pending_frames == 1
    s = observe(s, DWELL, 10.5, "DE", speed_hz=25.0)
    assert s.turning and s.pending_frames == 0


@pytest.mark.parametrize("kwargs", [{"dwell_frames": 0}, {"dwell_s": -1.0}, {"dwell_s": math.nan}])
def test_bad_dwell_is_refused(kwargs: dict[str, float]) -> None:
    with pytest.raises(ValueError):
        MachineStateSpec(**kwargs)  # type: ignore[arg-type]
