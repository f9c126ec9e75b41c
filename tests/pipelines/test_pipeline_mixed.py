"""Frames of different plans in one call (``analyze_mixed``): plans that differ only in the bearing and the speed
range share a call, and every result is, to the bit, that of its frame analysed alone with its own plan.

The oracle throughout is the single-plan analysis (``analyze_frames`` of one frame with its own plan); the frames
are real bearing faults (the CWRU recordings, datasets README) and impacts at the kinematic defect frequencies
(Randall & Antoni, MSSP 25 (2011) 485–520), so the envelope families are found, detected and judged ambiguous,
not merely absent."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.io

from edgevib.pipelines.analysis import analyze_frames, analyze_mixed, batch_key, kernel_for, make_plan
from edgevib.pipelines.bearings import defect_multiples
from edgevib.pipelines.detection import window_thresholds
from edgevib.pipelines.types import AnalysisPlan, BearingGeometry, FrameIndicators, PlanError, SignalError

FS, N = 25600.0, 16384
BAND = (4000.0, 9000.0)
B6205 = BearingGeometry(9, 0.3126, 1.537, 0.0)  # CWRU drive-end 6205 (datasets README)
B6203 = BearingGeometry(8, 0.2656, 1.122, 0.0)  # CWRU fan-end 6203 (datasets README)
BEARINGS = [B6205, B6203, BearingGeometry(12, 0.5, 3.0, 0.0), BearingGeometry(7, 0.3, 1.2, 15.0),
            BearingGeometry(16, 0.25, 2.4, 10.0)]
NAN = math.nan


def alone(x: np.ndarray, plans: list[AnalysisPlan], speeds: list[float] | None) -> list[FrameIndicators]:
    """The oracle: each frame analysed by itself with its own plan (the single-plan path)."""
    return [analyze_frames(x[i], plans[i], None if speeds is None else [speeds[i]])[0] for i in range(len(plans))]


def assert_as_alone(x: np.ndarray, plans: list[AnalysisPlan], speeds: list[float] | None) -> list[FrameIndicators]:
    together = analyze_mixed(x, plans, speeds)
    for i, (a, b) in enumerate(zip(together, alone(x, plans, speeds), strict=True)):
        assert a == b, (i, a, b)  # every field, the envelope FamilyResults included (dataclass equality)
    return together


def impacts(f_defect: float, n: int = N, resonance_hz: float = 6000.0, decay: float = 600.0) -> np.ndarray:
    """Decaying resonance bursts at ``f_defect``: a localized bearing defect (Randall & Antoni 2011)."""
    t = np.arange(n) / FS
    tau = (t * f_defect % 1.0) / f_defect
    return np.exp(-decay * tau) * np.sin(2 * np.pi * resonance_hz * tau)


def faulty(bearing: BearingGeometry, fault: str, shaft_hz: float, seed: int) -> np.ndarray:
    """A running machine (1× and 2× lines) with impacts at ``fault``'s kinematic frequency of ``bearing``."""
    m = defect_multiples(bearing)
    f = {"bpfo": m.bpfo_hz, "bpfi": m.bpfi_hz, "bsf": 2 * m.bsf_hz, "ftf": m.ftf_hz}[fault] * shaft_hz
    t = np.arange(N) / FS
    rng = np.random.default_rng(seed)
    x = 0.3 * np.sin(2 * np.pi * shaft_hz * t) + 0.1 * np.sin(4 * np.pi * shaft_hz * t)
    return x + 0.8 * impacts(f) + rng.normal(0, 0.15, N)


def test_synthetic_faults_of_many_bearings_in_one_call() -> None:
    # rows: five bearings (two envelope lengths and several threshold tables and last lines among them), a point
    # without a bearing, four speed ranges; speeds given, None/NaN (estimated), 0, below and above the range
    ranges = [(5.0, 100.0), (12.0, 37.0), (20.0, 60.0), (8.0, 25.0)]
    rows: list[tuple[BearingGeometry | None, tuple[float, float], str, float, float]] = [
        # bearing, speed range, fault, true shaft speed, speed given
        (B6205, ranges[0], "bpfo", 29.93, 29.93),
        (B6203, ranges[1], "bpfi", 24.7, NAN),
        (BEARINGS[2], ranges[2], "bsf", 30.0, 30.0),
        (BEARINGS[3], ranges[0], "bpfo", 24.7, NAN),
        (BEARINGS[4], ranges[3], "bpfi", 29.0, 29.0),  # above its range (8–25 Hz): given, so analysed at it
        (None, ranges[1], "bpfo", 24.7, 24.7),
        (B6205, ranges[2], "bpfi", 24.7, 0.0),  # standing shaft
        (B6203, ranges[2], "bpfo", 24.7, 3.0),  # below the range (20–60 Hz)
        (BEARINGS[2], ranges[3], "ftf", 20.0, NAN),
        (B6205, ranges[1], "bsf", 29.93, NAN),
        (BEARINGS[3], ranges[3], "bsf", 22.0, 22.0),
        (None, ranges[0], "bpfi", 29.93, NAN),
    ]
    plans = [make_plan(FS, N, envelope_band_hz=BAND, bearing=b, speed_range_hz=r) for b, r, *_ in rows]
    x = np.stack([faulty(b or B6205, fault, f, seed) for seed, (b, _, fault, f, _) in enumerate(rows)])
    speeds = [given for *_, given in rows]
    kernels = [kernel_for(p) for p in plans]
    # the batch really mixes what the rows must keep apart (else the comparison below proves little)
    assert len({k.transform_lengths.envelope for k in kernels if k.transform_lengths.envelope}) >= 2
    assert len({batch_key(p) for p in plans}) == 1 and len(set(plans)) == len(plans)
    out = assert_as_alone(x, plans, speeds)
    detected = [r.envelope_detected for r in out]
    assert sum(bool(d) for d in detected) >= 5, detected
    assert out[6].envelope == {} and out[7].envelope == {} and out[5].envelope == {}
    assert any(r.shaft_estimated and r.shaft_hz is not None for r in out)
    # in another order (a row without a bearing first: its plan has no envelope lines of its own)
    assert_as_alone(x[::-1], plans[::-1], speeds[::-1])
    # every speed unknown: each row estimates within its own range, with its own bearing's cage ratio
    assert_as_alone(x, plans, None)
    assert_as_alone(x, plans, [NAN] * len(plans))


@pytest.mark.parametrize("seed", range(8))
def test_random_mixes_of_bearings_ranges_and_speeds(seed: int) -> None:
    # a randomly drawn batch of rows from the cases above (two rows of one plan included)
    rng = np.random.default_rng(seed)
    c = 10
    ranges = [(5.0, 100.0), (12.0, 37.0), (20.0, 60.0), (8.0, 25.0), (15.0, 45.0)]
    choices = [*BEARINGS, None]
    plans, frames, speeds = [], [], []
    for i in range(c):
        b = choices[rng.integers(len(choices))]
        r = ranges[rng.integers(len(ranges))]
        plans.append(make_plan(FS, N, envelope_band_hz=BAND, bearing=b, speed_range_hz=r))
        f = float(rng.uniform(15.0, 40.0))
        frames.append(faulty(b or B6203, ["bpfo", "bpfi", "bsf", "ftf"][rng.integers(4)], f, seed * 100 + i))
        speeds.append([f, NAN, 0.0, 2.0, f][rng.integers(5)])
    plans[-1] = plans[0]
    assert_as_alone(np.stack(frames), plans, speeds)


def test_plans_without_an_envelope_band_mix_too() -> None:
    # no envelope band: the bearing still sets the speed estimate's cage ratio
    plans = [make_plan(FS, N, bearing=b, speed_range_hz=r)
             for b, r in [(B6205, (5.0, 100.0)), (B6203, (12.0, 37.0)), (None, (20.0, 60.0))]]
    x = np.stack([faulty(B6205, "bpfo", 24.7, s) for s in range(3)])
    for speeds in ([24.7, NAN, NAN], None):
        out = assert_as_alone(x, plans, speeds)
        assert all(r.envelope == {} for r in out)


CWRU = {"cwru_12k_de_outer_007_0hp.mat": "bpfo", "cwru_12k_de_inner_007_0hp.mat": "bpfi",
        "cwru_12k_de_ball_007_0hp.mat": "", "cwru_12k_de_outer_007_1hp.mat": "bpfo"}


def cwru_frames(cwru_dir: Path, name: str, n: int, count: int) -> tuple[np.ndarray, float, float]:
    """``count`` consecutive frames of the drive-end record, its sample rate and stored speed (datasets README)."""
    checks = json.loads((cwru_dir / "check_values.json").read_text())[name]
    mat = scipy.io.loadmat(cwru_dir / name)
    x = mat[checks["de_variable"]].reshape(-1).astype(np.float64)
    rpm = float(mat[checks["rpm_variable"]].reshape(-1)[0])
    return x[: count * n].reshape(count, n), float(checks["fs_hz"]), rpm / 60.0


def test_cwru_faults_analysed_with_mixed_plans(cwru_dir: Path) -> None:
    # the outer- and inner-race records (datasets README: BPFO and BPFI found by method E1) in one call with the
    # 6205 (the test rig's drive-end bearing), the 6203 and no bearing, four speed ranges, and speeds stored,
    # estimated, standing, below and above the plan's range
    n = 12000  # 1 s at 12 kHz
    band = (2000.0, 5000.0)  # method E1's band (datasets README)
    frames, plans, speeds = [], [], []
    labels = []
    for name, fault in CWRU.items():
        x, fs, shaft = cwru_frames(cwru_dir, name, n, 3)
        cases = [(B6205, (5.0, 100.0), shaft), (B6205, (20.0, 40.0), NAN), (B6203, (10.0, 25.0), shaft),
                 (None, (5.0, 100.0), shaft), (B6205, (10.0, 40.0), 0.0), (B6205, (20.0, 40.0), 3.0)]
        for i, (b, r, f) in enumerate(cases):
            frames.append(x[i % 3])
            plans.append(make_plan(fs, n, envelope_band_hz=band, bearing=b, speed_range_hz=r))
            speeds.append(f)
            labels.append(fault if b is B6205 and r == (5.0, 100.0) else None)
    x_all = np.stack(frames)
    out = assert_as_alone(x_all, plans, speeds)
    # the race faults are found with the test rig's bearing (datasets README), so the families are not vacuous
    for r, label in zip(out, labels, strict=True):
        if label:
            assert label in r.envelope_detected, r.envelope_detected
    assert_as_alone(x_all, plans, None)


def test_the_simulators_blower_bearing_beside_other_plans() -> None:
    # the demo's failing blower bearing (simulated outer-race impacts, 8192 samples at 12.8 kHz) in one call with
    # the same frames under other bearings and speed ranges
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario("demo"), seed=0)
    n = 8192
    x = sim.record("B-301-DE-H", 6)[: 3 * n].reshape(3, n)
    blower = BearingGeometry(8, 17.5, 72.0, 0.0)
    cases = [(blower, (5.0, 100.0)), (blower, (10.0, 40.0)), (BearingGeometry(9, 12.0, 60.0, 0.0), (5.0, 100.0)),
             (None, (10.0, 40.0))]
    plans = [make_plan(12800.0, n, envelope_band_hz=(2200.0, 4200.0), bearing=b, speed_range_hz=r)
             for b, r in cases for _ in range(3)]
    xs = np.concatenate([x] * len(cases))
    out = assert_as_alone(xs, plans, None)
    assert [r.envelope_detected for r in out[:3]] == [("bpfo",)] * 3  # the simulator's truth: an outer-race fault


def test_batch_key_equal_exactly_when_plans_mix() -> None:
    base = make_plan(FS, N, envelope_band_hz=BAND, bearing=B6205)
    same = [make_plan(FS, N, envelope_band_hz=BAND, bearing=B6203, speed_range_hz=(10.0, 50.0)),
            make_plan(FS, N, envelope_band_hz=BAND, bearing=None)]
    x = np.stack([faulty(B6205, "bpfo", 24.7, s) for s in range(2)])
    for p in same:
        assert batch_key(p) == batch_key(base)
        assert hash(batch_key(p)) == hash(batch_key(base))
        assert_as_alone(x, [base, p], [24.7, NAN])
    differ = {"n_samples": make_plan(FS, 2 * N, envelope_band_hz=BAND, bearing=B6205),
              "envelope_band_hz": make_plan(FS, N, envelope_band_hz=(3000.0, 9000.0), bearing=B6205),
              "false_alarm": make_plan(FS, N, envelope_band_hz=BAND, bearing=B6205, false_alarm=1e-4),
              "harmonics": make_plan(FS, N, envelope_band_hz=BAND, bearing=B6205, harmonics=4),
              "orders": make_plan(FS, N, envelope_band_hz=BAND, bearing=B6205, orders=(1.0, 2.0))}
    for field, p in differ.items():
        assert batch_key(p) != batch_key(base)
        if p.n_samples != N:
            continue  # (frames of another length cannot be stacked with these)
        with pytest.raises(PlanError, match=f"row 1 .* differs in {field}"):
            analyze_mixed(x, [base, p], [24.7, 24.7])


def test_threshold_entries_do_not_depend_on_the_table_length() -> None:
    # the premise of searching every row with the longest table (capped per row): entry M is the threshold of a
    # window of M lines (detection module), whatever the table's length
    short, long = window_thresholds(1e-3, 17), window_thresholds(1e-3, 59)
    assert np.array_equal(short, long[: short.size])


def test_one_plan_and_errors() -> None:
    plan = make_plan(FS, N, envelope_band_hz=BAND, bearing=B6205)
    x = np.stack([faulty(B6205, "bpfo", 24.7, s) for s in range(3)])
    # a list of plans to analyze_frames is a mixed call; one row alone equals the single-plan path
    assert analyze_frames(x[:1], [plan], [24.7]) == analyze_frames(x[0], plan, [24.7])
    assert analyze_mixed(x, [plan] * 3, [24.7, NAN, 0.0]) == alone(x, [plan] * 3, [24.7, NAN, 0.0])
    with pytest.raises(SignalError, match="2 plans given for 3 channels"):
        analyze_mixed(x, [plan, plan], None)
    with pytest.raises(SignalError, match="no plans"):
        analyze_mixed(x, [], None)


def cage_record(rpm: float, bearing: BearingGeometry, seed: int, velocity_mm_s: float) -> np.ndarray:
    """4 s of a fan with a damaged cage (FTF at ``velocity_mm_s``, 0.4 and 0.2 of it at 2× and 3×, over a residual
    0.5 mm/s 1×), from the project's simulator."""
    from edgevib.simulator.engine import Simulation
    from edgevib.simulator.scenario import parse_scenario

    doc = {"scenario": {"name": "cage-mix", "description": "cage defect", "duration_s": 5.0},
           "site": {"name": "test-bench", "description": "test bench", "topic_prefix": "tb/cage"},
           "machines": [{"id": "M-1", "description": "fan", "group": 2, "support": "rigid", "speed": {"rpm": rpm},
                         "faults": [{"type": "cage", "velocity_mm_s": velocity_mm_s, "stage": "developing"}]}],
           "points": [{"id": "M-1-P", "machine": "M-1", "axis": "horizontal", "sensor": "S1",
                       "sensor_type": "piezo", "fs_hz": FS, "block_samples": 8192,
                       "bearing": {"elements": bearing.elements, "ball_diameter_mm": bearing.ball_diameter,
                                   "pitch_diameter_mm": bearing.pitch_diameter,
                                   "contact_angle_deg": bearing.contact_angle_deg}}]}
    sc = parse_scenario(doc)
    return Simulation(sc, seed=seed, t0_ns=0).record(sc.points[0].point_id, 13)


def test_speed_estimates_with_each_rows_cage_ratio() -> None:
    # cage faults whose FTF series competes with the shaft (the speed estimate's cage rules: a cage line gives way
    # to its shaft, a dominant cage line over a weak shaft is withheld), estimated in one call with one bearing per
    # row — the faulty one, another, none — within one speed range: each row as with its own plan alone
    femto = BearingGeometry(13, 3.5, 25.6, 0.0)  # FEMTO bearing (datasets README)
    angular = BearingGeometry(7, 11.1, 38.5, 40.0)
    cases = [(450.0, femto, 4.0), (1100.0, angular, 4.0), (620.0, BearingGeometry(9, 7.94, 39.04, 0.0), 1.5)]
    frames, plans = [], []
    for rpm, bearing, v in cases:
        x = cage_record(rpm, bearing, 0, v)
        for b in (bearing, B6203, None):
            frames.append(x)
            plans.append(make_plan(FS, x.size, speed_range_hz=(5.0, 100.0), bearing=b, partial=True))
    x_all = np.stack(frames)
    out = assert_as_alone(x_all, plans, None)
    # the bearing decides some estimate here (else the cage ratios per row would be untested)
    speed = [(r.shaft_hz, r.shaft_quality) for r in out]
    assert any(speed[3 * i] != speed[3 * i + 2] for i in range(len(cases))), speed


@pytest.mark.parametrize(("speed_range", "orders", "f_estimated", "f_given"), [
    ((150.0, 400.0), (0.5, 1.0, 2.0, 3.0, 4.0, 5.0), 380.0, 160.0),  # orders above the estimate's harmonics
    ((150.0, 400.0), (0.5, 1.0, 2.0, 3.0), 395.0, 600.0),  # a given speed above the plan's range
])
def test_one_plans_rows_do_not_depend_on_their_batch(speed_range: tuple[float, float], orders: tuple[float, ...],
                                                     f_estimated: float, f_given: float) -> None:
    # the single-plan path too: a frame whose speed is estimated, batched with frames of given speeds, gets what
    # it gets alone — its orders up to the top of the range (the batch once computed lines only up to the given
    # speeds' orders) and its speed estimated on its own lines (the batch's wider spectrum once moved it)
    t = np.arange(N) / FS
    rng = np.random.default_rng(11)

    def machine(f: float) -> np.ndarray:  # 1× … 5× of a high-speed shaft
        x = sum(a * np.sin(2 * np.pi * h * f * t) for h, a in ((1, 0.3), (2, 0.1), (3, 0.05), (4, 0.04), (5, 0.03)))
        return np.asarray(x) + rng.normal(0, 0.02, N)

    plan = make_plan(FS, N, velocity_band_hz=(10.0, 1000.0), envelope_band_hz=BAND, bearing=B6205,
                     speed_range_hz=speed_range, orders=orders)
    x = np.stack([machine(f_estimated), machine(f_given), machine(0.9 * f_estimated)])
    speeds = [NAN, f_given, NAN]
    batch = analyze_frames(x, plan, speeds)
    assert batch == alone(x, [plan] * 3, speeds)
    assert set(batch[0].orders_mm_s) == {f"{o:g}x" for o in orders}  # every order resolved at 380–395 Hz
