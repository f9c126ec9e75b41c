"""Shaft-speed estimate against the simulator's analytic truth: many speeds, machine and bearing faults (the cage
fault included), never more than the order tolerance off when a value is reported."""

from __future__ import annotations

import tomllib
from importlib import resources

import numpy as np
import pytest

from edgevib.pipelines.analysis import analyze_frames, default_envelope_band, make_plan
from edgevib.pipelines.types import BearingGeometry
from edgevib.simulator.engine import Simulation
from edgevib.simulator.scenario import parse_scenario

ORDER_TOLERANCE = 0.03  # the plan's default order tolerance


def _records(scenario: str, rpm: float, seconds: float) -> list[tuple[str, list[str], float, np.ndarray,
                                                                       BearingGeometry | None]]:
    doc = tomllib.loads(resources.files("edgevib.simulator").joinpath("scenarios", f"{scenario}.toml").read_text())
    for m in doc["machines"]:
        m["speed"] = {"rpm": rpm}
        m.pop("speed_range_rpm", None)
        m.pop("reference_rpm", None)
    sc = parse_scenario(doc)
    sim = Simulation(sc, seed=3, t0_ns=0)
    out = []
    for p in sc.points:
        blocks = max(1, int(np.ceil(seconds * p.fs_hz / p.block_samples)))
        faults = [f.type for f in sc.machine(p.machine_id).faults if p.point_id in f.points]
        bearing = None if p.bearing is None else BearingGeometry(
            p.bearing.elements, p.bearing.ball_diameter_mm, p.bearing.pitch_diameter_mm, p.bearing.contact_angle_deg)
        out.append((p.point_id, faults, p.fs_hz, sim.record(p.point_id, blocks), bearing))
    return out


@pytest.mark.parametrize("rpm", [900.0, 1480.0, 2400.0, 3600.0])
def test_estimate_is_right_or_absent(rpm: float) -> None:
    # the analyze default range (300–6000 r/min, narrowed to what the record resolves); with a bearing the plan
    # knows its cage ratio (a cage fault's FTF series is then not taken for the shaft)
    reported = 0
    for scenario in ("bearings", "mechanical", "demo"):
        for point, faults, fs, x, bearing in _records(scenario, rpm, 1.28):
            speed_range = (max(5.0, 2.0 * fs / x.size), min(100.0, 0.99 * fs / 2 / 3.1))
            band = default_envelope_band(fs, None, shaft_hz_max=speed_range[1]) if bearing else None
            plan = make_plan(fs, x.size, speed_range_hz=speed_range, bearing=bearing if band else None,
                             envelope_band_hz=band)
            r = analyze_frames(x, plan)[0]
            if r.shaft_hz is not None:
                reported += 1
                assert r.shaft_hz == pytest.approx(rpm / 60.0, rel=ORDER_TOLERANCE), (scenario, point, faults)
                assert r.shaft_quality is not None and r.shaft_quality >= 0.5
    assert reported >= 10  # most of the 17 points do get a speed (observed 11–15; misalignment and looseness
    #                        are ambiguous over this wide range)


def test_cage_fault_is_not_taken_for_the_shaft() -> None:
    # the case: a cage fault (FTF 0.39 × shaft and its harmonics, stronger than 1×) at 2960 r/min.  With
    # the bearing known the FTF series is recognised; without it the two patterns are ambiguous (None).
    (_, _, fs, x, bearing), = [r for r in _records("bearings", 2960.0, 1.28) if "cage" in r[1]]
    assert bearing is not None
    band = default_envelope_band(fs, None, shaft_hz_max=100.0)
    with_bearing = analyze_frames(x, make_plan(fs, x.size, speed_range_hz=(5.0, 100.0), bearing=bearing,
                                               envelope_band_hz=band))[0]
    assert with_bearing.shaft_hz == pytest.approx(2960.0 / 60.0, rel=ORDER_TOLERANCE)
    without = analyze_frames(x, make_plan(fs, x.size, speed_range_hz=(5.0, 100.0)))[0]
    assert without.shaft_hz is None or without.shaft_hz == pytest.approx(2960.0 / 60.0, rel=ORDER_TOLERANCE)


def _cage_record(rpm: float, bearing: BearingGeometry, seed: int, seconds: float = 4.0,
                 velocity_mm_s: float = 1.5) -> tuple[float, np.ndarray]:
    # one fan with a damaged cage (FTF at ``velocity_mm_s`` with 0.4 and 0.2 of it at 2× and 3×, over the
    # residual 0.5 mm/s 1×), simulated
    doc = {"scenario": {"name": "cage-sweep", "description": "cage defect", "duration_s": seconds + 1.0},
           "site": {"name": "test-bench", "description": "test bench", "topic_prefix": "tb/cage"},
           "machines": [{"id": "M-1", "description": "fan", "group": 2, "support": "rigid", "speed": {"rpm": rpm},
                         "faults": [{"type": "cage", "velocity_mm_s": velocity_mm_s, "stage": "developing"}]}],
           "points": [{"id": "M-1-P", "machine": "M-1", "axis": "horizontal", "sensor": "S1",
                       "sensor_type": "piezo", "fs_hz": 25600.0, "block_samples": 8192,
                       "bearing": {"elements": bearing.elements, "ball_diameter_mm": bearing.ball_diameter,
                                   "pitch_diameter_mm": bearing.pitch_diameter,
                                   "contact_angle_deg": bearing.contact_angle_deg}}]}
    sc = parse_scenario(doc)
    p = sc.points[0]
    return p.fs_hz, Simulation(sc, seed=seed, t0_ns=0).record(p.point_id, int(np.ceil(seconds * p.fs_hz / 8192)))


@pytest.mark.parametrize("bearing", [BearingGeometry(9, 7.94, 39.04, 0.0), BearingGeometry(13, 3.5, 25.6, 0.0),
                                     BearingGeometry(16, 12.0, 70.0, 15.0)])
def test_a_cage_series_is_never_read_as_the_shaft(bearing: BearingGeometry) -> None:
    # a cage fault's FTF series (FTF, 2 × FTF, 3 × FTF) over a weaker 1×, at low speeds where 3 × FTF (about
    # 1.2 × shaft) lies inside the 300–6000 r/min range (analyze's default) while FTF itself may lie below it: the
    # estimate is right within the order tolerance or withheld (e.g. 6205 geometry at 380 r/min once read 450 r/min,
    # 3 × FTF, with quality 1.0).  FTF from geometry: ½(1 − d/D cos φ) (datasets README, formulas).
    for rpm in (380.0, 450.0, 620.0, 1100.0):
        for seed in (0, 1):
            fs, x = _cage_record(rpm, bearing, seed)
            plan = make_plan(fs, x.size, speed_range_hz=(5.0, 100.0), bearing=bearing, orders=(0.5, 1.0, 2.0, 3.0),
                             partial=True)
            r = analyze_frames(x, plan)[0]
            if r.shaft_hz is not None:
                assert r.shaft_hz == pytest.approx(rpm / 60.0, rel=ORDER_TOLERANCE), (rpm, seed)
                assert r.shaft_quality is not None and r.shaft_quality >= 0.5


@pytest.mark.parametrize("seed", [0, 1])
def test_the_third_cage_line_gives_way_to_its_shaft(seed: int) -> None:
    # 13 balls of 3.5 mm on a 25.6 mm pitch (the FEMTO bearing, datasets README) at 450 r/min: FTF 0.427 × shaft
    # (½(1 − d/D), slip 1 %), so 3 × FTF = 1.28 × shaft = 577 r/min, and the shaft is a valid candidate too.  The
    # 3 × FTF line won (577 r/min, quality 0.74–0.76); it is that shaft's cage series and gives way to it.
    bearing = BearingGeometry(13, 3.5, 25.6, 0.0)
    fs, x = _cage_record(450.0, bearing, seed, velocity_mm_s=4.0)
    plan = make_plan(fs, x.size, speed_range_hz=(5.0, 100.0), bearing=bearing, orders=(0.5, 1.0, 2.0, 3.0),
                     partial=True)
    r = analyze_frames(x, plan)[0]
    assert r.shaft_hz == pytest.approx(450.0 / 60.0, rel=ORDER_TOLERANCE)
    assert r.shaft_quality is not None and r.shaft_quality >= 0.5


@pytest.mark.parametrize("rpm", [1100.0, 1480.0])
def test_a_dominant_cage_line_over_a_weak_shaft_is_not_the_speed(rpm: float) -> None:
    # a strong cage fault (FTF 4 mm/s over a 0.5 mm/s 1×): the shaft line is too weak (−18 dB) to be a candidate,
    # and the FTF line won with quality 0.85–1.0 (424 r/min at 1100 r/min).  A clear line at winner / FTF ratio (or
    # up to 3 % above it: the cage lags, Randall & Antoni 2011) makes the winner ambiguous: no speed rather than a
    # wrong one.  Geometry: 7 balls of 11.1 mm on a 38.5 mm pitch, 40° (an angular-contact size).
    bearing = BearingGeometry(7, 11.1, 38.5, 40.0)
    for seed in (0, 1):
        fs, x = _cage_record(rpm, bearing, seed, velocity_mm_s=4.0)
        plan = make_plan(fs, x.size, speed_range_hz=(5.0, 100.0), bearing=bearing, orders=(0.5, 1.0, 2.0, 3.0),
                         partial=True)
        r = analyze_frames(x, plan)[0]
        assert r.shaft_hz is None or r.shaft_hz == pytest.approx(rpm / 60.0, rel=ORDER_TOLERANCE)
