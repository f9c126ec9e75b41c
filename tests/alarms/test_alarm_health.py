"""Sensor health checks (edgevib.pipelines.health) on closed-form signals.

Signatures are common practice (FIELD_NOTES §6): a MEMS sensor sees at most 1 g of gravity, an IEPE bias outside
8–12 V means an open or shorted cable, a band-limited signal never has consecutive samples pinned at its extreme,
bearing impacts ring a resonance over several samples.  The white-noise density check uses the closed form of a
one-sided PSD: white noise of standard deviation s sampled at fs has density s·√(2/fs).
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from edgevib.pipelines.health import HealthSpec, check_health
from edgevib.pipelines.types import SignalError

FS = 25600.0
N = 16384
T = np.arange(N) / FS


def healthy(seed: int = 1, mean: float = 0.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return mean + 0.5 * np.sin(2 * np.pi * 24.7 * T) + 0.2 * np.sin(2 * np.pi * 49.4 * T + 1.0) + \
        0.01 * rng.standard_normal(N)


def bearing_impacts(seed: int = 2, resonance_hz: float = 3000.0) -> np.ndarray:
    """Outer-race-like impacts: a resonance decaying in 2 ms, struck 107 times a second, on noise."""
    rng = np.random.default_rng(seed)
    x = 0.02 * rng.standard_normal(N)
    for t0 in np.arange(0.001, N / FS, 1 / 107.4):
        tau = T - t0
        on = tau >= 0
        x[on] += 2.0 * np.exp(-tau[on] / 0.002) * np.sin(2 * np.pi * resonance_hz * tau[on])
    return x


def test_healthy_signals_have_no_fault() -> None:
    # A resonance at fs/4 puts the samples next to each peak near zero: the ringing still shows a few samples on.
    frames = np.stack([healthy(1), healthy(2) + 0.3 * np.sin(2 * np.pi * 200 * T), bearing_impacts(),
                       bearing_impacts(resonance_hz=FS / 4)])
    res = check_health(frames, FS)
    assert [r.faults for r in res] == [(), (), (), ()]
    # Kurtosis of the impact signal is far above Gaussian 3, yet these are not spikes (they ring).
    x = frames[2] - frames[2].mean()
    assert np.mean(x**4) / np.mean(x**2) ** 2 > 6
    mems = check_health(healthy(3, mean=1.0), FS, HealthSpec(sensor_type="mems"))
    assert mems[0].ok and mems[0].mean_g == pytest.approx(1.0, abs=0.01)


def test_flatline_constant_and_stuck() -> None:
    stuck = healthy(4)
    stuck[3000:] = stuck[3000]
    res = check_health(np.stack([np.zeros(N), np.full(N, 0.98), stuck]), FS, HealthSpec(sensor_type="mems"))
    assert [r.fault for r in res] == ["flatline", "flatline", "flatline"]
    assert res[2].repeat_fraction > 0.8


def test_clipping_flat_tops_and_full_scale() -> None:
    x = np.clip(3.0 * np.sin(2 * np.pi * 24.7 * T), -2.0, 2.0)
    assert check_health(x, FS)[0].fault == "clipping"
    assert check_health(x, FS, HealthSpec(full_scale_g=2.0))[0].fault == "clipping"
    # The same sine unclipped, sampled so that its peak falls on a sample each period, is not clipped.
    y = np.sin(2 * np.pi * 200.0 * T)
    assert check_health(y, FS)[0].ok


def test_bias_out_of_range_and_cable_faults() -> None:
    mems = HealthSpec(sensor_type="mems")
    assert check_health(healthy(5, mean=2.6), FS, mems)[0].fault == "bias"
    vertical = HealthSpec(sensor_type="mems", expected_mean_g=1.0, mean_tolerance_g=0.2)
    assert check_health(healthy(5, mean=0.0), FS, vertical)[0].fault == "bias"
    assert check_health(healthy(5, mean=0.95), FS, vertical)[0].ok
    assert check_health(healthy(5, mean=0.8), FS)[0].fault == "bias"  # DC on an AC-coupled piezo channel
    res = check_health(np.stack([healthy(6)] * 3), FS, bias_v=[23.8, 0.4, 10.1])
    assert [r.fault for r in res] == ["bias", "bias", None]
    assert "open cable" in res[0].detail and "short" in res[1].detail


def test_dc_step() -> None:
    x = healthy(7)
    x[N // 2:] += 0.8
    res = check_health(x, FS, HealthSpec(sensor_type="mems"))[0]
    assert res.fault == "dc-step"
    assert_allclose(res.step_g, 0.8, atol=0.05)  # the step height, within the sine's residual


def test_isolated_spikes_counted() -> None:
    x = healthy(8)
    x[[1000, 7000, 12000]] += [6.0, -7.0, 8.0]
    res = check_health(x, FS)[0]
    assert res.fault == "spikes" and res.spike_count == 3


def test_noise_floor_against_closed_form_density() -> None:
    rng = np.random.default_rng(9)
    s = 1e-3 * np.sqrt(FS / 2)  # white noise of 1000 µg/√Hz one-sided: s·√(2/fs) = 1e-3 g/√Hz
    x = s * rng.standard_normal(N)
    res = check_health(x, FS, HealthSpec(noise_density_ug_rthz=50.0))[0]
    assert_allclose(res.noise_density_ug_rthz, 1000.0, rtol=0.1)
    assert res.faults == ("noise",)
    assert check_health(x, FS, HealthSpec(noise_density_ug_rthz=200.0))[0].ok


def test_bad_input_named() -> None:
    with pytest.raises(SignalError, match="non-finite"):
        check_health(np.array([0.0, np.nan] * 20), FS)
    with pytest.raises(SignalError, match="shaped"):
        check_health(np.zeros(4), FS)
    with pytest.raises(SignalError, match="2 values for 1 channels"):
        check_health(healthy(), FS, bias_v=[10.0, 10.0])


def test_counting_screen_gives_the_exact_verdicts() -> None:
    # The spike screen proves rows spike-free by counting; on every kind of row it must agree with the exact
    # median test (screen=False), and the r.m.s. taken from the indicators must not change a verdict.
    rng = np.random.default_rng(10)
    rows = [healthy(11), bearing_impacts(12), bearing_impacts(13, resonance_hz=FS / 4), 0.3 * rng.standard_normal(N),
            np.sign(np.sin(2 * np.pi * 30 * T)) + 0.001 * rng.standard_normal(N)]
    spiky = healthy(14)
    spiky[[500, 9000]] += [5.0, -6.0]
    borderline = healthy(15)
    borderline[4000] += 9.5 * 1.4826 * np.median(np.abs(borderline - np.median(borderline)))  # just under 10 σ_r
    # 15.3 periods of a sine in the frame: the median sits 0.2 r.m.s. off the mean, the screen must still hold
    off_centre = 0.25 * np.sin(2 * np.pi * 24.0 * T + 1.0) + 0.05 * rng.standard_normal(N)
    rows += [spiky, borderline, 0.02 * rng.standard_normal(N) + (rng.random(N) < 0.001) * 1.5, off_centre]
    x = np.stack(rows)
    exact = check_health(x, FS, screen=False)
    fast = check_health(x, FS, rms_g=x.std(axis=1))
    assert [h.faults for h in fast] == [h.faults for h in exact]
    assert [h.spike_count for h in fast] == [h.spike_count for h in exact]
    assert exact[5].spike_count == 2 and exact[6].spike_count == 0
    assert_allclose([h.step_g for h in fast], [h.step_g for h in exact], rtol=1e-12)


def _quantized(x: np.ndarray, range_g: float = 50.0, bits: int = 16) -> np.ndarray:
    lsb = 2 * range_g / 2**bits  # an ideal converter's step over ±range (common practice)
    return np.round(x / lsb) * lsb


def test_a_standing_machine_is_judged_against_standing_expectations() -> None:
    # A piezo on a standing machine shows only its own noise (0.4 mg r.m.s. here); through a 16-bit ±50 g converter
    # (1.5 mg steps) that is a few repeating steps.  On a running machine that would be a stuck sensor; on a
    # standing one it is the expected signal.  A dead output (constant) is a fault either way.
    rng = np.random.default_rng(5)
    quiet = _quantized(0.0004 * rng.standard_normal(N))
    assert len(np.unique(quiet)) < 8 and np.std(quiet) > HealthSpec().flatline_std_g
    frames = np.stack([quiet, np.zeros(N)])
    running = check_health(frames, FS, running=[True, True])
    standing = check_health(frames, FS, running=[False, False])
    assert running[0].fault == "flatline"  # the check that the relaxation has to relax
    assert standing[0].ok, standing[0].detail
    assert running[1].fault == standing[1].fault == "flatline"


def test_real_faults_are_reported_on_a_standing_machine() -> None:
    rng = np.random.default_rng(6)
    quiet = 0.0004 * rng.standard_normal(N)
    shifted = quiet + 3.0  # a connector failing on a DC-coupled channel
    railed = quiet.copy()
    railed[4000:4800] = 45.0  # an open cable pinning the output at the rail (flat tops)
    big = np.clip(3.0 * np.sin(2 * np.pi * 24.7 * T), -2.0, 2.0)  # amplifier overload: clipped
    spiky = quiet.copy()
    spiky[[1000, 7000, 12000]] = 0.5  # isolated electrical spikes
    res = check_health(np.stack([shifted, railed, big, spiky]), FS, running=[False] * 4)
    assert res[0].fault == "bias"
    assert res[1].faults and res[1].fault in ("bias", "clipping", "dc-step")
    assert res[2].fault == "clipping"
    assert res[3].fault == "spikes"


def test_few_quantization_steps_are_no_clipping() -> None:
    # a frame spanning only a few converter steps repeats its extremes: no flat-top clipping, running or not
    # (±1 step 5 % of the time each: consecutive samples at an extreme 0.25 % + 0.25 % of the time, above the
    # 0.2 % flat-top limit)
    rng = np.random.default_rng(7)
    lsb = 100.0 / 2**16
    coarse = lsb * rng.choice([-1.0, 0.0, 1.0], size=N, p=[0.05, 0.9, 0.05])
    res = check_health(coarse, FS, running=[False])
    assert res[0].clip_fraction == 0.0 and res[0].ok, res[0].detail
    pairs = np.mean((coarse[1:] == coarse[:-1]) & (np.abs(coarse[1:]) > 0))
    assert pairs > HealthSpec().clip_fraction  # what the flat-top count alone would have called clipping
    # while a clipped vibration spanning many steps is still clipping
    clipped = _quantized(np.clip(0.5 * np.sin(2 * np.pi * 24.7 * T), -0.3, 0.3))
    assert check_health(clipped, FS)[0].fault == "clipping"


def test_noise_floor_is_not_judged_while_standing() -> None:
    rng = np.random.default_rng(8)
    noisy = 0.01 * rng.standard_normal(N)  # density 0.01·√(2/fs) = 88 µg/√Hz against a 5 µg/√Hz specification
    spec = HealthSpec(noise_density_ug_rthz=5.0)
    assert check_health(noisy, FS, spec, running=[True])[0].fault == "noise"
    standing = check_health(noisy, FS, spec, running=[False])[0]
    assert standing.ok and standing.noise_density_ug_rthz is None


def test_running_flags_must_match_the_channels() -> None:
    with pytest.raises(SignalError, match="running has 1 values for 2 channels"):
        check_health(np.zeros((2, N)), FS, running=[True])


def test_a_frame_taken_as_the_machine_stops_is_judged_as_standing() -> None:
    # A 16-bit ±50 g acquisition (step 100 g / 2^16 ≈ 1.5 mg) on a machine that has just tripped: the signal is a
    # few converter steps of noise, most samples repeat the previous one.  The machine tracker still says
    # "running" (its judgement lags by a frame or the speed trend); the frame's own level (0.01 mm/s, under the
    # 0.2 mm/s run level) says it stands: not a flatline.  The same frame on a machine at a running level is one.
    import numpy as np

    from edgevib.daemon.sensor_health import batch_health, judged_running
    from edgevib.pipelines.health import HealthSpec

    step = 100.0 / 2**16
    rng = np.random.default_rng(4)
    x = np.round(0.4 * step * rng.standard_normal(8192) / step) * step
    rms = float(x.std())
    assert rms > HealthSpec().flatline_std_g and np.mean(x[1:] == x[:-1]) > HealthSpec().repeat_fraction
    standing, = batch_health(x[None, :], 12800.0, [HealthSpec()], [rms], [judged_running(True, 0.01, 0.2)], ["p"])
    turning, = batch_health(x[None, :], 12800.0, [HealthSpec()], [rms], [judged_running(True, 3.0, 0.2)], ["p"])
    assert standing is not None and standing.ok
    assert turning is not None and turning.fault == "flatline"
    assert judged_running(False, 3.0, 0.2) is False and judged_running(True, None, 0.2) is True


def test_an_impact_cut_by_the_frame_edge_is_not_a_spike() -> None:
    # An impact whose ringing lies beyond the frame's end (or began before its start) shows only its first (last)
    # half-cycles in the frame; overlapping frames see it whole, so it must never count as an isolated spike.
    # Impacts ring a resonance over several samples (FIELD_NOTES §6, common practice).
    rows = []
    for resonance_hz in (3000.0, 4100.0, 5300.0, FS / 4):
        for k in np.arange(0.0, 12.0, 0.25):  # onset k samples before the frame's end, and k samples into the frame
            for t_first in (N - k) / FS, k / FS - 0.0093:
                rng = np.random.default_rng(int(k * 4))
                x = 0.02 * rng.standard_normal(N)
                for t0 in np.arange(t_first, -0.02, -1 / 107.4):
                    tau = T - t0
                    on = tau >= 0
                    x[on] += 2.0 * np.exp(-tau[on] / 0.002) * np.sin(2 * np.pi * resonance_hz * tau[on])
                rows.append(x)
    res = check_health(np.stack(rows), FS, screen=False)
    assert [r.spike_count for r in res] == [0] * len(rows)
    # A genuine spike near (but not at) the edge is still counted.
    x = healthy(16)
    x[[40, N - 40]] += [6.0, -7.0]
    assert check_health(x, FS)[0].spike_count == 2
