"""Spectrum scaling, velocity by frequency-domain integration, orders and the speed estimate, against closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.conditioning import STANDARD_GRAVITY_M_S2
from edgevib.pipelines.spectrum import amplitude_spectrum, averaged_amplitude_spectrum, hann_lines, velocity_rms_mm_s
from edgevib.pipelines.types import PlanError

G_MM_S2 = STANDARD_GRAVITY_M_S2 * 1000.0
FS, N = 25600.0, 16384
T = np.arange(N) / FS
RNG = np.random.default_rng(7)


def velocity_rms_of_sine(a_peak_g: float, f_hz: float) -> float:
    # FIELD_NOTES §5 / handbook: v = a/(2πf), and r.m.s. = peak/√2
    return a_peak_g * G_MM_S2 / (2 * math.pi * f_hz) / math.sqrt(2)


def test_hann_lines_equal_a_windowed_transform() -> None:
    # reference: numpy's rfft of the explicitly windowed frame (periodic Hann 0.5 − 0.5 cos 2πn/N)
    x = RNG.normal(size=(3, 1000))
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(1000) / 1000)
    expected = np.fft.rfft(x * w, axis=-1)[:, :300]
    np.testing.assert_allclose(hann_lines(np.fft.rfft(x, axis=-1), 300), expected, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("scaling, factor", [("rms", 1 / math.sqrt(2)), ("peak", 1.0)])
def test_amplitude_spectrum_reads_a_sine_on_its_line(scaling: str, factor: float) -> None:
    # documented scaling: a sine of amplitude A on line k reads A/√2 ("rms") or A ("peak") there
    f = 100 * FS / N  # exactly on line 100
    freqs, amp = amplitude_spectrum(0.8 * np.sin(2 * np.pi * f * T) + 0.3, FS, scaling=scaling)  # type: ignore[arg-type]
    assert freqs[100] == pytest.approx(f)
    assert amp[0, 100] == pytest.approx(0.8 * factor, rel=1e-9)
    assert amp[0, 0] == pytest.approx(0.0, abs=1e-12)  # the mean is removed


def test_averaged_spectrum_keeps_lines_and_smooths_noise() -> None:
    f = 64 * FS / 4096
    x = 0.5 * np.sin(2 * np.pi * f * T) + RNG.normal(0, 0.05, N)
    freqs, avg = averaged_amplitude_spectrum(x, FS, 4096, overlap=0.5)
    assert freqs[64] == pytest.approx(f)
    _, single = amplitude_spectrum(x[:4096], FS)
    assert avg[0, 64] == pytest.approx(0.5 / math.sqrt(2), rel=0.02)
    noise = slice(1000, 2000)
    # 7 half-overlapping Hann segments: the floor's spread shrinks (Welch, about √(7/1.9) ≈ 2 ×)
    assert np.std(avg[0, noise]) < 0.7 * np.std(single[0, noise])
    with pytest.raises(PlanError):
        averaged_amplitude_spectrum(x, FS, N + 1)


def test_one_g_at_50_hz_is_22_07_mm_s() -> None:
    # FIELD_NOTES §5: 1 g peak at 50 Hz → 31.22 mm/s peak = 22.07 mm/s r.m.s.
    x = np.sin(2 * np.pi * 50.0 * T)
    assert velocity_rms_mm_s(x, FS)[0] == pytest.approx(22.07, abs=0.005)
    r = analyze_frames(x, make_plan(FS, N), shaft_hz=[50.0])[0]
    assert r.velocity_rms_mm_s == pytest.approx(22.07, abs=0.005)
    assert r.velocity_peak_mm_s == pytest.approx(31.22, rel=2e-3)
    # displacement amplitude a/(2πf)² → peak-to-peak 2 × 9806.65/(2π·50)² mm = 198.7 µm
    assert r.displacement_pp_um == pytest.approx(2 * G_MM_S2 / (2 * math.pi * 50) ** 2 * 1000, rel=2e-3)


@settings(max_examples=40, deadline=None)
@given(f_hz=st.floats(15.0, 900.0), a_g=st.floats(0.01, 20.0), phase=st.floats(0, 2 * math.pi))
def test_velocity_of_any_sine_in_band(f_hz: float, a_g: float, phase: float) -> None:
    # handbook: velocity r.m.s. of a sine = a/(2πf)/√2, on or between lines (0.2 %: the three Hann taps of a tone
    # 15 Hz up from 10 Hz stay inside the band)
    x = a_g * np.sin(2 * np.pi * f_hz * T + phase)
    assert velocity_rms_mm_s(x, FS)[0] == pytest.approx(velocity_rms_of_sine(a_g, f_hz), rel=0.002)


def test_band_limited_sum_of_sines() -> None:
    # Parseval: the band r.m.s. of sines on distinct lines is the root-sum-square of their r.m.s. values
    lines = [20, 64, 300, 600]
    amps = [0.2, 0.5, 1.0, 0.7]
    x = sum(a * np.sin(2 * np.pi * k * FS / N * T + k) for k, a in zip(lines, amps, strict=True))
    expected = math.sqrt(sum(velocity_rms_of_sine(a, k * FS / N) ** 2 for k, a in zip(lines, amps, strict=True)))
    assert velocity_rms_mm_s(x, FS)[0] == pytest.approx(expected, rel=1e-6)


def test_lines_outside_the_band_are_zero() -> None:
    # FIELD_NOTES §5: zero the lines below the band's lower edge (and above its top): gravity, drift and
    # out-of-band tones contribute nothing
    inside = 0.3 * np.sin(2 * np.pi * 100 * FS / N * T)
    outside = 1.0 + 2.0 * np.sin(2 * np.pi * 3000.0 * T) + 0.5 * np.sin(2 * np.pi * 1500 * FS / N * T)
    assert velocity_rms_mm_s(inside + outside, FS)[0] == pytest.approx(velocity_rms_mm_s(inside, FS)[0], rel=1e-6)
    # the ISO 2 Hz band for slow machines (ISO 20816-1/-3) picks up a 4 Hz line the 10 Hz band leaves out
    slow = np.sin(2 * np.pi * 4.6875 * np.arange(4 * N) / FS)  # on a line of the longer record
    assert velocity_rms_mm_s(slow, FS, (2.0, 1000.0))[0] == pytest.approx(velocity_rms_of_sine(1, 4.6875), rel=1e-6)
    assert velocity_rms_mm_s(slow, FS, (10.0, 1000.0))[0] < 1e-6


def test_velocity_band_validation() -> None:
    with pytest.raises(PlanError, match="Nyquist"):
        velocity_rms_mm_s(np.zeros(1000), 1000.0, (10.0, 600.0))


def test_orders_read_velocity_rms_between_lines() -> None:
    # 1× and 2× of a 24.7 Hz shaft (not on a line: 15.8 and 31.6 lines): orders read each line's velocity r.m.s.
    # within 1.5 % (the three-line power sum recovers ≥ 98 % of a Hann main lobe's energy)
    f0 = 24.7
    x = 0.4 * np.sin(2 * np.pi * f0 * T) + 0.1 * np.sin(2 * np.pi * 2 * f0 * T + 1) + 0.05 * RNG.normal(size=N)
    r = analyze_frames(x, make_plan(FS, N), shaft_hz=[f0])[0]
    assert set(r.orders_mm_s) == {"0.5x", "1x", "2x", "3x"}
    assert r.orders_mm_s["1x"] == pytest.approx(velocity_rms_of_sine(0.4, f0), rel=0.015)
    assert r.orders_mm_s["2x"] == pytest.approx(velocity_rms_of_sine(0.1, 2 * f0), rel=0.015)
    assert r.orders_mm_s["3x"] < 0.05 * r.orders_mm_s["2x"]
    assert r.shaft_hz == f0 and not r.shaft_estimated


def test_orders_search_within_their_tolerance() -> None:
    # a 1× line 2 % off the given speed is found with the default ±3 % tolerance; one 6 % off is not (the window
    # is the tolerance plus the one line on each side that the power sum takes in)
    n = 4 * N  # 0.39 Hz lines: 2 % of 40 Hz is 2 lines
    t = np.arange(n) / FS
    plan = make_plan(FS, n)
    near = analyze_frames(0.4 * np.sin(2 * np.pi * 40.8 * t), plan, shaft_hz=[40.0])[0]
    assert near.orders_mm_s["1x"] == pytest.approx(velocity_rms_of_sine(0.4, 40.8), rel=0.015)
    far = analyze_frames(0.4 * np.sin(2 * np.pi * 42.4 * t), plan, shaft_hz=[40.0])[0]
    assert far.orders_mm_s["1x"] < 0.1 * near.orders_mm_s["1x"]


@pytest.mark.parametrize("f0", [12.3, 24.7, 29.93, 49.2, 87.0])
def test_speed_estimate_from_harmonics(f0: float) -> None:
    # synthetic machine: 1×, 2×, 3× lines in noise; the estimate lands within half a line (0.78 Hz) and, refined,
    # within 0.3 %
    x = (0.3 * np.sin(2 * np.pi * f0 * T) + 0.15 * np.sin(4 * np.pi * f0 * T + 1) + 0.08 * np.sin(6 * np.pi * f0 * T)
         + RNG.normal(0, 0.2, N))
    r = analyze_frames(x, make_plan(FS, N))[0]
    assert r.shaft_estimated and r.shaft_hz is not None
    assert r.shaft_hz == pytest.approx(f0, rel=0.003)
    assert r.orders_mm_s["1x"] == pytest.approx(velocity_rms_of_sine(0.3, f0), rel=0.05)


def test_speed_estimate_prefers_the_fundamental_over_its_harmonics() -> None:
    # a strong 2× (misalignment) must not pull the estimate to 2 f0: the half-way points penalize it.  Over a range
    # holding both 30 and 60 Hz the same lines are also a 60 Hz machine with a 0.5× sub-harmonic (looseness): the
    # spectrum cannot tell, so the estimate declines (quality 0); a range that excludes 60 Hz settles it.
    f0 = 30.0
    x = 0.2 * np.sin(2 * np.pi * f0 * T) + 0.5 * np.sin(4 * np.pi * f0 * T) + 0.1 * np.sin(6 * np.pi * f0 * T)
    x = x + RNG.normal(0, 0.05, N)
    wide = analyze_frames(x, make_plan(FS, N))[0]
    assert wide.shaft_hz is None and wide.shaft_quality == 0.0 and wide.orders_mm_s == {}
    narrow = analyze_frames(x, make_plan(FS, N, speed_range_hz=(20.0, 50.0)))[0]
    assert narrow.shaft_hz == pytest.approx(f0, rel=0.003) and narrow.shaft_quality is not None
    assert narrow.shaft_quality > 0.9  # no unrelated rival (observed 0.99)


def test_no_speed_from_noise() -> None:
    # broadband noise has no 1× line: speed unknown, orders and envelope families empty
    r = analyze_frames(RNG.normal(size=N), make_plan(FS, N))[0]
    assert r.shaft_hz is None and not r.shaft_estimated and r.orders_mm_s == {} and r.envelope == {}


def test_given_and_estimated_speeds_per_channel() -> None:
    f0 = 24.7
    x = 0.3 * np.sin(2 * np.pi * f0 * T) + 0.1 * np.sin(4 * np.pi * f0 * T)
    frames = np.stack([x, x, RNG.normal(size=N)])
    r = analyze_frames(frames, make_plan(FS, N), shaft_hz=[25.0, np.nan, np.nan])
    assert r[0].shaft_hz == 25.0 and not r[0].shaft_estimated
    assert r[1].shaft_hz == pytest.approx(f0, rel=0.003) and r[1].shaft_estimated
    assert r[2].shaft_hz is None


@settings(max_examples=40, deadline=None)
@given(f_hz=st.floats(20.0, 990.0), phase=st.floats(0, 2 * math.pi), offset=st.floats(-1.0, 1.0))
def test_velocity_peak_of_any_sine(f_hz: float, phase: float, offset: float) -> None:
    # handbook: a sine of amplitude a has velocity amplitude a/(2πf), whatever its frequency relative to the lines
    # (waveform from the windowed band lines, divided by the window over the frame's central half)
    r = analyze_frames(np.sin(2 * np.pi * f_hz * T + phase) + offset, make_plan(FS, N), shaft_hz=[f_hz])[0]
    assert r.velocity_peak_mm_s == pytest.approx(G_MM_S2 / (2 * math.pi * f_hz), rel=5e-3)


@pytest.mark.parametrize("f_hz", [15.7, 24.7, 49.2, 97.1])
def test_displacement_of_the_running_speed_among_other_lines(f_hz: float) -> None:
    # handbook: displacement amplitude a/(2πf)²; a 1× line with a strong 3 kHz resonance (outside the band) and a
    # 733 Hz line (inside, adding 2·0.3 g/(2π·733 Hz)² = 0.28 µm) reads its peak-to-peak within 1.5 % + that
    x = 0.1 * np.sin(2 * np.pi * f_hz * T + 0.4) + np.sin(2 * np.pi * 3000.3 * T) + 0.3 * np.sin(2 * np.pi * 733.3 * T)
    r = analyze_frames(x, make_plan(FS, N), shaft_hz=[f_hz])[0]
    expected = 2 * 0.1 * G_MM_S2 / (2 * math.pi * f_hz) ** 2 * 1000
    extra = 2 * 0.3 * G_MM_S2 / (2 * math.pi * 733.3) ** 2 * 1000
    assert expected * 0.985 < r.displacement_pp_um < (expected + extra) * 1.015


def test_slow_machine_displacement_with_the_2_hz_band() -> None:
    # ISO 20816-1/-3: 2–1000 Hz for machines below 600 r/min; a 4.1 Hz (246 r/min) 1× line of 0.01 g
    n = 4 * N
    t = np.arange(n) / FS
    r = analyze_frames(0.01 * np.sin(2 * np.pi * 4.1 * t), make_plan(FS, n, velocity_band_hz=(2.0, 1000.0),
                                                                     speed_range_hz=(2.0, 10.0)), shaft_hz=[4.1])[0]
    assert r.displacement_pp_um == pytest.approx(2 * 0.01 * G_MM_S2 / (2 * math.pi * 4.1) ** 2 * 1000, rel=0.01)
    assert r.velocity_rms_mm_s == pytest.approx(velocity_rms_of_sine(0.01, 4.1), rel=0.01)
