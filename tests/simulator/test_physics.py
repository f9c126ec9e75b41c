"""Each signal model shows its physics, checked with independent numpy/scipy computations on generated samples."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal
from sigtools import (
    G0,
    line_power_g2,
    line_velocity_mm_s,
    machine,
    peak_near,
    point,
    scenario_doc,
    squared_envelope_spectrum,
)

from edgevib.simulator.engine import Simulation, load_scenario
from edgevib.simulator.scenario import parse_scenario

BEARING = {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04, "contact_angle_deg": 0.0}


def _sim(machines, points, seed=0):
    return Simulation(parse_scenario(scenario_doc(machines, points)), seed=seed, t0_ns=0)


def _kinematic(bearing):
    # FIELD_NOTES §2 (kinematic formulas), computed here independently of the simulator
    cos_phi = math.cos(math.radians(bearing["contact_angle_deg"]))
    k = bearing["ball_diameter_mm"] / bearing["pitch_diameter_mm"] * cos_phi
    n = bearing["elements"]
    return {"ftf": 0.5 * (1 - k), "bpfo": 0.5 * n * (1 - k), "bpfi": 0.5 * n * (1 + k),
            "bsf": bearing["pitch_diameter_mm"] / (2 * bearing["ball_diameter_mm"]) * (1 - k * k)}


# ----------------------------------------------------------------------------------------- shaft-frequency faults


@pytest.fixture(scope="module")
def mechanical():
    sim = Simulation(load_scenario("mechanical"), seed=4, t0_ns=0)
    fs = 5120.0
    return sim, {p.point_id: sim.record(p.point_id, 50) for p in sim.points}, fs   # 20 s each


def test_imbalance_1x_as_specified(mechanical):
    _, rec, fs = mechanical
    fr = 1480 / 60
    # scenario: imbalance 4.0 mm/s r.m.s. at 1× on a gain-1 axis; radial (horizontal) gain 1.0, axial 0.3
    h = line_velocity_mm_s(rec["P-501-DE-H"], fs, fr)
    a = line_velocity_mm_s(rec["P-501-DE-A"], fs, fr)
    assert h == pytest.approx(4.0, rel=0.02)
    assert a == pytest.approx(0.3 * 4.0, rel=0.03)
    # nothing else at 2× or 3× (no residual in this scenario): imbalance is a pure 1× (common practice)
    assert line_velocity_mm_s(rec["P-501-DE-H"], fs, 2 * fr) < 0.02 * h


def test_misalignment_2x_with_1x_3x_axial_emphasis(mechanical):
    _, rec, fs = mechanical
    fr = 1480 / 60
    # 3.0 mm/s at 2× on the gain-1 (axial) axis, 1× at 0.5 and 3× at 0.3 of it; horizontal 0.6, vertical 0.5
    ax = [line_velocity_mm_s(rec["P-502-DE-A"], fs, k * fr) for k in (1, 2, 3)]
    np.testing.assert_allclose(ax, [1.5, 3.0, 0.9], rtol=0.03)
    h2 = line_velocity_mm_s(rec["P-502-DE-H"], fs, 2 * fr)
    v2 = line_velocity_mm_s(rec["P-502-DE-V"], fs, 2 * fr)
    assert h2 == pytest.approx(0.6 * 3.0, rel=0.03)
    assert v2 == pytest.approx(0.5 * 3.0, rel=0.03)
    assert ax[1] > max(ax[0], ax[2]) and ax[1] > h2 > v2


def test_looseness_harmonics_subharmonics_truncation(mechanical):
    _, rec, fs = mechanical
    x = rec["P-503-DE-V"]
    fr = 1480 / 60
    v1 = line_velocity_mm_s(x, fs, fr, 0.5)
    assert v1 == pytest.approx(2.0, rel=0.03)             # specified 1× velocity on the gain-1 vertical axis
    # in acceleration (the harmonics of an impacting, truncated response fall slowly; common practice)
    floor = math.sqrt(line_power_g2(x, fs, 1.25 * fr, 0.5))          # between the lines
    harmonics = [math.sqrt(line_power_g2(x, fs, k * fr, 0.5)) for k in range(2, 11)]
    halves = [math.sqrt(line_power_g2(x, fs, (k + 0.5) * fr, 0.5)) for k in range(0, 4)]
    assert all(h > 10 * floor for h in harmonics)        # "many harmonics", up to 10×
    assert all(h > 10 * floor for h in halves)           # 0.5×, 1.5×, 2.5×, 3.5× sub-harmonics


def test_looseness_truncation_makes_the_waveform_lopsided():
    # without process noise the truncated waveform shows directly: positive excursions cut at 0.6 of the peak
    clean = {}
    for trunc in (0.6, 1.0):
        m = machine("P-1", faults=[{"type": "looseness", "velocity_mm_s": 2.0, "truncation": trunc}])
        clean[trunc] = _sim([m], [point("P-1-V", "P-1", axis="vertical")], seed=4).record("P-1-V", 10)
    x = clean[0.6]
    assert x.max() < 0.8 * abs(x.min())
    y = clean[1.0]                                     # untruncated: far less lopsided
    assert y.max() / abs(y.min()) > x.max() / abs(x.min()) + 0.1


# ----------------------------------------------------------------------------------------- bearings


def _bearing_record(ftype, seconds=8.0, fs=25600.0, rpm=2960.0, seed=1, **params):
    m = machine("B-1", speed={"rpm": rpm}, faults=[{"type": ftype, **params}])
    p = point("B-1-DE-H", "B-1", fs_hz=fs, block_samples=8192, bearing=BEARING,
              resonance_hz=4000.0 if fs > 10000 else 1000.0)
    sim = _sim([m], [p], seed)
    n = int(seconds * fs / 8192)
    return sim, sim.record("B-1-DE-H", n), fs, rpm / 60


def test_outer_race_impact_rate_is_bpfo_with_slip():
    _, x, fs, fr = _bearing_record("outer_race", impact_g=3.0, slip=0.012, jitter=0.015)
    bpfo = _kinematic(BEARING)["bpfo"] * fr
    f, s = squared_envelope_spectrum(x, fs, (3000.0, 5000.0))
    f_peak, _ = peak_near(f, s, bpfo, 0.05)
    # slip makes the observed rate 1–2 % below kinematic (Randall & Antoni 2011); here 1.2 % as configured
    assert f_peak == pytest.approx(bpfo * (1 - 0.012), rel=0.002)
    assert 0.98 * bpfo <= f_peak < bpfo
    # impacts excite the structural resonance: the spectrum of the raw signal peaks near 4 kHz
    fw, pw = signal.welch(x, fs, nperseg=4096)
    assert abs(fw[np.argmax(pw)] - 4000.0) < 250.0


def test_outer_race_impact_intervals_jitter():
    _, x, fs, fr = _bearing_record("outer_race", impact_g=5.0, slip=0.01, jitter=0.015, amplitude_spread=0.0)
    lam = _kinematic(BEARING)["bpfo"] * fr * 0.99
    # impact onsets by thresholding the band-passed envelope; a refractory period of half an interval
    sos = signal.butter(4, (3000.0, 5000.0), btype="bandpass", fs=fs, output="sos")
    env = np.abs(signal.hilbert(signal.sosfiltfilt(sos, x)))
    above = np.flatnonzero((env[1:] > 0.3 * env.max()) & (env[:-1] <= 0.3 * env.max()))
    onsets = [above[0]]
    for i in above[1:]:
        if i - onsets[-1] > 0.5 * fs / lam:
            onsets.append(i)
    intervals = np.diff(onsets) / fs
    assert np.mean(intervals) == pytest.approx(1 / lam, rel=0.005)
    # independent position jitter σ gives interval spread √2·σ (difference of two draws); σ = 1.5 % of 1/λ
    assert np.std(intervals) * lam == pytest.approx(math.sqrt(2) * 0.015, rel=0.3)


def test_inner_race_bpfi_with_1x_sidebands():
    _, x, fs, fr = _bearing_record("inner_race", impact_g=3.0, slip=0.01, modulation=0.8)
    bpfi = _kinematic(BEARING)["bpfi"] * fr * 0.99
    f, s = squared_envelope_spectrum(x, fs, (3000.0, 5000.0))
    fp, line = peak_near(f, s, bpfi, 0.01)
    assert fp == pytest.approx(bpfi, rel=0.002)
    floor = np.median(s[(f > 50) & (f < 1000)])
    lo = peak_near(f, s, bpfi - fr, 0.01)[1]
    hi = peak_near(f, s, bpfi + fr, 0.01)[1]
    one_x = peak_near(f, s, fr, 0.02)[1]
    # load-zone modulation at 1× (FIELD_NOTES §3: BPFI with ±1× sidebands)
    assert min(lo, hi, one_x) > 10 * floor and line > 10 * floor


def test_rolling_element_2bsf_with_ftf_sidebands():
    _, x, fs, fr = _bearing_record("rolling_element", seconds=12.0, impact_g=3.0, slip=0.01, modulation=0.6)
    kin = _kinematic(BEARING)
    two_bsf = 2 * kin["bsf"] * fr * 0.99
    ftf = kin["ftf"] * fr * 0.99
    f, s = squared_envelope_spectrum(x, fs, (3000.0, 5000.0))
    fp, line = peak_near(f, s, two_bsf, 0.01)
    assert fp == pytest.approx(two_bsf, rel=0.002)
    floor = np.median(s[(f > 50) & (f < 1000)])
    side = [peak_near(f, s, two_bsf + d, 0.003)[1] for d in (-ftf, ftf)]
    assert min(side) > 10 * floor and line > 10 * floor
    fc, cage = peak_near(f, s, ftf, 0.03)                 # the modulation itself, at FTF
    assert fc == pytest.approx(ftf, rel=0.01) and cage > 10 * floor


def test_cage_ftf_tone():
    _, x, fs, fr = _bearing_record("cage", seconds=20.0, fs=5120.0, velocity_mm_s=1.5, slip=0.01)
    ftf = _kinematic(BEARING)["ftf"] * fr * 0.99
    assert line_velocity_mm_s(x, fs, ftf, 0.3) == pytest.approx(1.5, rel=0.03)
    assert line_velocity_mm_s(x, fs, 2 * ftf, 0.3) == pytest.approx(0.4 * 1.5, rel=0.05)


def test_gear_mesh_with_sidebands():
    m = machine("G-1", speed={"rpm": 1470.0}, faults=[{"type": "gear_mesh", "teeth": 23, "acceleration_g": 0.5,
                                                       "sideband_ratio": 0.3, "sidebands": 2}])
    sim = _sim([m], [point("G-1-V", "G-1", fs_hz=5120.0, axis="vertical")])
    x = sim.record("G-1-V", 40)
    fs, fr = 5120.0, 1470 / 60
    mesh = math.sqrt(line_power_g2(x, fs, 23 * fr, 0.5))
    sb1 = [math.sqrt(line_power_g2(x, fs, (23 + d) * fr, 0.5)) for d in (-1, 1)]
    sb2 = [math.sqrt(line_power_g2(x, fs, (23 + d) * fr, 0.5)) for d in (-2, 2)]
    assert mesh == pytest.approx(0.5, rel=0.03)            # mesh line r.m.s. as specified (g)
    np.testing.assert_allclose(sb1, 0.3 * 0.5, rtol=0.04)  # first sidebands at ±1×, 0.3 of the mesh
    np.testing.assert_allclose(sb2, 0.09 * 0.5, rtol=0.05)


# ----------------------------------------------------------------------------------------- sensors


def test_mems_noise_floor_bandwidth_dc_and_quantization():
    m = machine("F-1")
    p = point("F-1-V", "F-1", axis="vertical", sensor_type="mems", fs_hz=6400.0, block_samples=2048,
              sensor_model={"noise_ug_rthz": 150.0, "range_g": 4.0, "adc_bits": 16, "corner_hz": 2000.0})
    sim = _sim([m], [p])
    x = sim.record("F-1-V", 100)                                # 32 s
    # gravity on the vertical axis: a MEMS sensor sees 1 g DC (FIELD_NOTES §6)
    assert np.mean(x) == pytest.approx(1.0, abs=1e-3)
    f, pxx = signal.welch(x - x.mean(), 6400.0, nperseg=4096)
    density = np.sqrt(np.median(pxx[(f > 100) & (f < 1000)]))   # g/√Hz
    assert density * 1e6 == pytest.approx(150.0, rel=0.05)
    # Butterworth band limit: −3 dB (half power) at the corner, −24 dB/oct beyond it (4th order)
    at_corner = np.median(pxx[np.abs(f - 2000.0) < 30]) / np.median(pxx[(f > 100) & (f < 1000)])
    assert at_corner == pytest.approx(0.5, rel=0.15)
    assert np.median(pxx[np.abs(f - 2800.0) < 30]) < 0.15 * np.median(pxx[(f > 100) & (f < 1000)])
    # ADC: every sample is a whole number of LSB = 2 × range / 2^bits
    lsb = 2 * 4.0 / 2**16
    counts = x / lsb
    np.testing.assert_allclose(counts, np.round(counts), atol=1e-6)
    steps = np.diff(np.unique(x))
    assert steps.min() == pytest.approx(lsb, rel=1e-6)


def test_mems_range_limit_clips():
    m = machine("F-1", faults=[{"type": "imbalance", "velocity_mm_s": 80.0}])
    p = point("F-1-H", "F-1", sensor_type="mems", fs_hz=3200.0, block_samples=1024,
              sensor_model={"range_g": 1.0, "corner_hz": 1000.0})
    x = _sim([m], [p]).record("F-1-H", 10)
    assert x.max() == pytest.approx(1.0, abs=1e-4) and x.min() == pytest.approx(-1.0, abs=1e-4)
    assert np.count_nonzero(np.abs(x) >= 1.0 - 1e-4) > 100


def test_piezo_no_dc_low_noise_and_mounted_resonance():
    m = machine("M-1")
    p = point("M-1-H", "M-1", fs_hz=25600.0, block_samples=8192,
              sensor_model={"noise_ug_rthz": 5.0, "mounted_resonance_hz": 25000.0, "mounted_q": 15.0})
    x = _sim([m], [p]).record("M-1-H", 40)
    f, pxx = signal.welch(x, 25600.0, nperseg=8192)
    low = np.sqrt(np.median(pxx[(f > 20) & (f < 2000)])) * 1e6
    assert low == pytest.approx(5.0, rel=0.06)
    # second-order mounted resonance at 25 kHz, Q 15: |H|² at 10 kHz = 1/(1 − 0.16)² ≈ 1.417 (common practice)
    at10k = np.median(pxx[np.abs(f - 10000) < 100]) / np.median(pxx[(f > 20) & (f < 2000)])
    assert at10k == pytest.approx(1 / (1 - 0.16) ** 2, rel=0.08)
    assert abs(np.mean(x)) < 1e-5                          # no DC response


def test_process_noise_scales_with_speed_and_stops():
    m = machine("F-2", speed={"schedule": [[0.0, 1000.0], [4.0, 1000.0], [4.5, 0.0]]}, residual_mm_s=2.0,
                process_noise_ug_rthz=200.0)
    p = point("F-2-H", "F-2", sensor_model={"noise_ug_rthz": 5.0})
    sim = _sim([m], [p])
    running = sim.record("F-2-H", 5, 0)        # 0–2 s
    stopped = sim.record("F-2-H", 5, 20)       # 8–10 s
    assert sim.speed_hz("F-2", 9.0) == 0.0
    # standing still only the sensor's own noise is left: 5 µg/√Hz over 2.56 kHz ≈ 0.25 mg r.m.s.
    assert np.std(stopped) == pytest.approx(5e-6 * math.sqrt(2560.0), rel=0.1)
    assert np.std(running) > 20 * np.std(stopped)


# ----------------------------------------------------------------------------------------- sensor faults


@pytest.fixture(scope="module")
def faulty():
    sim = Simulation(load_scenario("sensor-faults"), seed=2, t0_ns=0)
    rec = {p.point_id: sim.record(p.point_id, 60) for p in sim.points}      # 19.2 s; faults from 5 s
    return sim, rec


def _after(x, t_s, fs=12800.0):
    return x[math.ceil(t_s * fs):]


def test_flatline_has_zero_variance(faulty):
    _, rec = faulty
    x = rec["M-301-DE-H"]
    assert np.var(_after(x, 5.0)) == 0.0
    assert np.var(x[: int(4.9 * 12800)]) > 0


def test_clipping_at_level(faulty):
    _, rec = faulty
    x = _after(rec["M-301-DE-V"], 5.0)
    ref = _after(rec["M-301-REF-H"], 5.0)
    assert np.max(np.abs(x)) == pytest.approx(0.04, abs=1e-6)
    assert np.count_nonzero(np.abs(x) >= 0.04 - 1e-6) > 0.01 * x.size   # flat tops, not a few samples
    assert np.max(np.abs(ref)) > 0.06                                    # the unclipped signal goes beyond


def test_bias_shift(faulty):
    _, rec = faulty
    x = rec["M-301-DE-A"]
    assert np.mean(x[: (5 * 12800)]) == pytest.approx(0.0, abs=1e-3)
    assert np.mean(_after(x, 5.0)) == pytest.approx(3.0, abs=1e-3)


def test_cable_fault_rail_episodes(faulty):
    _, rec = faulty
    x = _after(rec["M-301-NDE-H"], 5.0)
    at_rail = np.mean(np.abs(x - 45.0) < 1e-4)        # the rail value, to the ADC step
    # episode starts at 1 /s lasting 50 ms: expected coverage 1 − exp(−1 × 0.05) ≈ 4.9 %
    assert 0.015 < at_rail < 0.10


def test_spikes_rate_and_amplitude(faulty):
    _, rec = faulty
    x = _after(rec["M-301-NDE-V"], 5.0)
    spikes = np.count_nonzero(np.abs(x) > 10.0)
    expected = 3.0 * x.size / 12800.0
    assert abs(spikes - expected) < 4 * math.sqrt(expected)             # Poisson count within 4σ
    assert np.max(np.abs(x)) == pytest.approx(20.0, abs=0.2)


def test_dropped_blocks_skip_sequence_numbers():
    sim = Simulation(load_scenario("sensor-faults"), seed=2, t0_ns=0)
    total = int(30.0 * 12800 // 4096)
    blocks = [b for b in (sim.block("M-301-NDE-A", k) for k in range(total)) if b is not None]
    seqs = np.array([b.seq for b in blocks])
    before = int(5.0 * 12800 // 4096) + 1
    assert np.all(np.diff(seqs) >= 1) and seqs[0] == 0
    assert set(range(before)) <= set(seqs.tolist())                      # none dropped before 5 s
    lost = total - seqs.size
    n_after = total - before
    assert abs(lost - 0.2 * n_after) < 4 * math.sqrt(n_after * 0.2 * 0.8)   # binomial within 4σ
    for b in blocks:                                                     # time stamps follow the sequence number
        assert b.t0_ns == round(b.seq * 4096 * 1e9 / 12800)
    # streamed: the same blocks are missing, their sequence numbers skipped
    streamed = [b.seq for b in sim.blocks_until(8.0) if b.sensor_id == "QL-M301-NDE-A"]
    assert streamed == [s for s in seqs.tolist() if (s + 1) * 4096 <= 8.0 * 12800]


def test_g_units_sanity():
    # 1 g peak at 50 Hz is 22.07 mm/s r.m.s. (FIELD_NOTES §5), through the same conversion the tests use
    assert 1.0 * G0 / (2 * math.pi * 50) / math.sqrt(2) * 1e3 == pytest.approx(22.07, abs=0.01)
