"""Automatic demodulation band: spectral kurtosis against its closed forms (Gaussian noise 0, a tone −1), the
fast kurtogram's grid (Antoni, MSSP 21 (2007) 108–124), and the periodicity gate against a louder non-periodic
impulsive band."""

from __future__ import annotations

import math

import numpy as np
import pytest

from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.bearings import defect_multiples
from edgevib.pipelines.kurtogram import GATE_FALSE_ALARM, kurtogram_grid, select_band
from edgevib.pipelines.types import BearingGeometry, PlanError

FS = 25600.0
B6205 = BearingGeometry(9, 0.3126, 1.537, 0.0)  # CWRU drive-end bearing (datasets README)


def bursts(times: np.ndarray, n: int, resonance_hz: float, decay: float, amplitude: np.ndarray) -> np.ndarray:
    """Decaying resonance bursts (impacts exciting a structural resonance, Randall & Antoni 2011)."""
    t = np.arange(n) / FS
    x = np.zeros(n)
    ring = math.ceil(8.0 / decay * FS)
    for t0, a in zip(times, amplitude, strict=True):
        i0 = max(0, math.ceil(t0 * FS))
        i1 = min(n, i0 + ring)
        if i1 > i0:
            tau = t[i0:i1] - t0
            x[i0:i1] += a * np.exp(-decay * tau) * np.sin(2 * np.pi * resonance_hz * tau)
    return x


def bearing_and_noise_band(seed: int, seconds: float = 1.0) -> tuple[np.ndarray, float]:
    """Outer-race impacts at BPFO ringing a 3.5 kHz resonance, under a louder band of random (Poisson) impacts
    ringing at 9 kHz — electrical or process knocks with no period — and white noise."""
    rng = np.random.default_rng(seed)
    n = int(FS * seconds)
    shaft = 24.7
    bpfo = defect_multiples(B6205).bpfo_hz * shaft
    count = int(seconds * bpfo) + 2
    periodic = (np.arange(count) + 0.01 * rng.standard_normal(count)) / bpfo
    x = bursts(periodic, n, 3500.0, 700.0, np.full(count, 0.6))
    random_times = np.sort(rng.uniform(0, seconds, int(40 * seconds)))
    noise_band = bursts(random_times, n, 9000.0, 1500.0, rng.uniform(3.0, 5.0, random_times.size))
    assert noise_band.std() > 2 * x.std()  # the non-periodic band is the louder one
    return x + noise_band + rng.normal(0, 0.3, n), shaft


def test_spectral_kurtosis_closed_forms() -> None:
    # FIELD_NOTES §3: K = ⟨|c|⁴⟩/⟨|c|²⟩² − 2 is 0 for stationary Gaussian noise and −1 for a pure tone
    rng = np.random.default_rng(1)
    n = 1 << 17
    noise = rng.standard_normal(n)
    choice = select_band(noise, FS, allowed_hz=(2000.0, 10000.0), min_width_hz=1000.0, envelope_hz=(10.0, 800.0))
    assert choice.band_hz is None  # stationary noise: no band shows periodicity
    assert all(abs(s.kurtosis) < 0.1 for s in choice.grid)
    tone = np.sin(2 * np.pi * 4321.0 * np.arange(n) / FS)
    grid = select_band(tone + 1e-6 * noise, FS, allowed_hz=(2000.0, 10000.0), min_width_hz=1000.0,
                       envelope_hz=(10.0, 800.0)).grid
    holding = [s for s in grid if s.band_hz[0] < 4321.0 < s.band_hz[1]]
    assert holding and all(s.kurtosis == pytest.approx(-1.0, abs=0.01) for s in holding)


def test_grid_is_the_one_third_binary_tree() -> None:
    # Antoni 2007: level k has 2^k bands of (fs/2)/2^k, level k.6 has 3·2^(k−1) bands of (fs/2)/(3·2^(k−1))
    grid = kurtogram_grid(12000.0, (600.0, 4687.5), 1000.0)
    assert [(lv, lo, hi) for lv, lo, hi in grid] == [
        (1.6, 2000.0, 4000.0), (2.0, 1500.0, 3000.0), (2.0, 3000.0, 4500.0),
        (2.6, 1000.0, 2000.0), (2.6, 2000.0, 3000.0), (2.6, 3000.0, 4000.0),
    ]
    assert kurtogram_grid(12000.0, (600.0, 4687.5), 5000.0) == []


def test_automatic_band_finds_the_bearing_resonance_under_a_louder_noise_band() -> None:
    # the acceptance: the spiky 9 kHz band has by far the larger kurtosis, but its envelope has no
    # period; the 3.5 kHz resonance of the bearing's impacts is chosen
    for seed in range(3):
        x, shaft = bearing_and_noise_band(seed)
        choice = select_band(x, FS, allowed_hz=(1000.0, 10000.0), min_width_hz=800.0, envelope_hz=(5.0, 700.0))
        spikiest = max(choice.grid, key=lambda s: s.kurtosis)
        assert spikiest.band_hz[0] <= 9000.0 <= spikiest.band_hz[1] and not spikiest.periodic
        assert choice.band_hz is not None and choice.band_hz[0] <= 3500.0 <= choice.band_hz[1], choice.band_hz
        # and the chosen band detects the outer-race fault
        plan = make_plan(FS, x.size, envelope_band_hz=choice.band_hz, bearing=B6205)
        assert analyze_frames(x, plan, shaft)[0].envelope_detected == ("bpfo",)


def test_simulated_impacts_choose_their_leading_edge_and_keep_the_verdict() -> None:
    # the simulator's outer-race impacts (bearings scenario B-401-DE-H: resonance 4 kHz, 5 % damping, an onset
    # lasting a fraction of a resonance period) in a record with little broadband noise: the most impulsive
    # periodic band is the impacts' short leading edge above the resonance, not the slowly decaying ring at it —
    # spectral kurtosis is largest where the band's impulse response is shortest and the noise lowest (Antoni,
    # MSSP 20 (2006) 282–307, from memory; MSSP 21 (2007) 108–124).  Both bands carry the periodicity: the
    # verdict is the same.
    from edgevib.pipelines.kurtogram import select_band_for
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario("bearings"), seed=0)
    n, shaft = 98304, 2960.0 / 60.0
    x = sim.record("B-401-DE-H", n // 8192)[:n]
    b = BearingGeometry(9, 7.94, 39.04, 0.0)
    choice, why = select_band_for(x, 25600.0, (0.99 * shaft, 1.01 * shaft), b)
    assert why is None and choice.band_hz is not None and choice.periodicity_db is not None
    at_resonance = [s for s in choice.grid if s.band_hz[0] <= 4000.0 <= s.band_hz[1] and s.periodic]
    assert at_resonance, "the resonance's own bands show the periodicity too"
    assert max(s.periodicity_db for s in at_resonance) >= choice.periodicity_db - 3.0
    assert all(s.kurtosis < (choice.kurtosis or 0.0) for s in at_resonance)
    for band in (choice.band_hz, max(at_resonance, key=lambda s: s.kurtosis).band_hz):
        r = analyze_frames(x, make_plan(25600.0, n, envelope_band_hz=band, bearing=b), [shaft])[0]
        assert r.envelope_detected == ("bpfo",), band


def test_gate_false_alarm_in_noise() -> None:
    # the gate's stated probability: stationary Gaussian noise passes it in some band with probability at most
    # GATE_FALSE_ALARM (1e-3); none of 40 seeded records does (binomial: P(X ≥ 1) ≤ 4 %)
    for seed in range(40):
        x = np.random.default_rng(100 + seed).standard_normal(8192)
        choice = select_band(x, FS, allowed_hz=(1000.0, 10000.0), min_width_hz=800.0, envelope_hz=(5.0, 700.0))
        assert choice.band_hz is None
    assert GATE_FALSE_ALARM == 1e-3


@pytest.mark.parametrize("kwargs, match", [
    ({"allowed_hz": (0.0, 5000.0)}, "band search range"),
    ({"envelope_hz": (0.0, 500.0)}, "envelope range"),
    ({"min_width_hz": 100.0}, "narrowest band"),
    ({"gate_false_alarm": 0.0}, "gate false-alarm"),
])
def test_bad_arguments(kwargs: dict[str, object], match: str) -> None:
    args: dict[str, object] = {"allowed_hz": (1000.0, 10000.0), "min_width_hz": 800.0, "envelope_hz": (5.0, 700.0)}
    args.update(kwargs)
    with pytest.raises(PlanError, match=match):
        select_band(np.zeros(4096) + np.arange(4096) % 7, FS, **args)  # type: ignore[arg-type]
