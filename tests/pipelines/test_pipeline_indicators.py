"""Time-domain indicators and conditioning against closed forms and scipy.stats."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from edgevib.pipelines.conditioning import (
    STANDARD_GRAVITY_M_S2,
    counts_to_g,
    g_to_m_s2,
    m_s2_to_g,
    millivolts_to_g,
    remove_mean,
    to_g,
    volts_to_g,
)
from edgevib.pipelines.indicators import time_domain
from edgevib.pipelines.types import PlanError, SignalError

RNG = np.random.default_rng(20261201)


def sine(amplitude: float, f_hz: float, fs_hz: float, n: int, phase: float = 0.3) -> np.ndarray:
    return amplitude * np.sin(2 * np.pi * f_hz * np.arange(n) / fs_hz + phase)


def test_sine_identities() -> None:
    # analytic: a sine of amplitude A has r.m.s. A/√2, crest factor √2, Pearson kurtosis 1.5, skewness 0
    x = sine(2.5, 50.0, 25600.0, 25600, phase=math.pi / 2)  # 50 whole periods; samples fall on the peaks
    td = time_domain(x)
    np.testing.assert_allclose(td.rms_g, 2.5 / math.sqrt(2), rtol=1e-6)
    np.testing.assert_allclose(td.crest_factor, math.sqrt(2), rtol=1e-5)
    np.testing.assert_allclose(td.kurtosis, 1.5, rtol=1e-5)
    np.testing.assert_allclose(td.skewness, 0.0, atol=1e-6)
    np.testing.assert_allclose(td.peak_g, 2.5, rtol=1e-6)
    np.testing.assert_allclose(td.peak_to_peak_g, 5.0, rtol=1e-5)


@pytest.mark.parametrize("dist", ["normal", "exponential", "impulsive", "uniform"])
def test_against_scipy_stats(dist: str) -> None:
    # reference implementation: scipy.stats.kurtosis(fisher=False) and scipy.stats.skew (population moments)
    n = 16384
    x = {"normal": RNG.normal(0.2, 0.7, (3, n)), "exponential": RNG.exponential(0.3, (3, n)),
         "uniform": RNG.uniform(-1, 1, (3, n)),
         "impulsive": RNG.normal(0, 0.1, (3, n)) + (RNG.random((3, n)) < 0.002) * 3.0}[dist]
    td = time_domain(x)
    np.testing.assert_allclose(td.kurtosis, scipy.stats.kurtosis(x, axis=1, fisher=False), rtol=2e-5)
    np.testing.assert_allclose(td.skewness, scipy.stats.skew(x, axis=1), rtol=2e-4, atol=2e-6)
    np.testing.assert_allclose(td.rms_g, x.std(axis=1), rtol=1e-6)
    np.testing.assert_allclose(td.mean_g, x.mean(axis=1), rtol=1e-12)
    xc = x - x.mean(axis=1, keepdims=True)
    np.testing.assert_allclose(td.peak_g, np.abs(xc).max(axis=1), rtol=1e-6)
    np.testing.assert_allclose(td.crest_factor, np.abs(xc).max(axis=1) / xc.std(axis=1), rtol=2e-6)


def test_gaussian_kurtosis_is_three() -> None:
    # FIELD_NOTES §4: Gaussian noise has Pearson kurtosis 3; standard error √(24/N) ≈ 0.011 at N = 2**18
    td = time_domain(RNG.normal(size=2**18))
    assert abs(td.kurtosis[0] - 3.0) < 0.06


def test_gravity_offset_is_removed_first() -> None:
    # FIELD_NOTES §5/§6: a MEMS sensor sees 1 g of gravity; indicators are of the vibration, mean_g reports gravity
    x = sine(0.01, 80.0, 3200.0, 3200)
    with_g = time_domain(x + 1.0)
    without = time_domain(x)
    np.testing.assert_allclose(with_g.mean_g, 1.0, atol=1e-12)
    np.testing.assert_allclose(with_g.rms_g, without.rms_g, rtol=1e-6)
    np.testing.assert_allclose(with_g.kurtosis, without.kurtosis, rtol=1e-5)


def test_vectorized_over_channels_equals_one_by_one() -> None:
    x = RNG.normal(size=(5, 4096)) * np.arange(1, 6)[:, None]
    td = time_domain(x)
    for ch in range(5):
        one = time_domain(x[ch])
        assert td.rms_g[ch] == pytest.approx(one.rms_g[0], rel=1e-12)
        assert td.kurtosis[ch] == pytest.approx(one.kurtosis[0], rel=1e-12)


def test_block_by_block_equals_whole_record_for_a_periodic_signal() -> None:
    # maths: with zero-mean blocks, the whole record's mean square is the blocks' average mean square, its 4th
    # moment their average 4th moment, and its peak their largest peak (sines with whole periods per block).
    # The moments are accumulated in single precision (float32 frames, BLAS dot products): over the 32,768
    # samples of the whole record about 1e-6 relative, depending on the kernel the CPU's BLAS selects
    fs, n_block = 8192.0, 8192
    t = np.arange(4 * n_block) / fs
    x = 0.7 * np.sin(2 * np.pi * 64 * t) + 0.2 * np.sin(2 * np.pi * 192 * t + 1.0)
    whole = time_domain(x)
    blocks = time_domain(x.reshape(4, n_block))
    assert whole.rms_g[0] == pytest.approx(math.sqrt(np.mean(blocks.rms_g**2)), rel=1e-5)
    m4_blocks = blocks.kurtosis * blocks.rms_g**4
    assert whole.kurtosis[0] == pytest.approx(np.mean(m4_blocks) / np.mean(blocks.rms_g**2) ** 2, rel=1e-5)
    assert whole.peak_g[0] == pytest.approx(blocks.peak_g.max(), rel=1e-6)


def test_constant_frame_has_undefined_ratios() -> None:
    td = time_domain(np.full(100, 0.5))
    assert td.rms_g[0] == 0.0 and math.isnan(td.crest_factor[0]) and math.isnan(td.kurtosis[0])


@pytest.mark.parametrize("bad, match", [
    (np.array([0.0, np.nan, 1.0]), "1 of 3 samples are NaN"),
    (np.array([[0.0, 1.0], [np.inf, 2.0]]), "channel 1"),
    (np.zeros((2, 2, 2)), "shape"),
    (np.zeros(1), "at least 2"),
    (np.zeros((0, 10)), "no channels"),
    (np.array(["a", "b"]), "not numeric"),
])
def test_bad_samples_raise_signal_error(bad: np.ndarray, match: str) -> None:
    with pytest.raises(SignalError, match=match):
        time_domain(bad)


@settings(max_examples=50, deadline=None)
@given(scale=st.floats(1e-4, 1e4) | st.floats(-1e4, -1e-4), seed=st.integers(0, 2**32 - 1))
def test_scaling_linearity(scale: float, seed: int) -> None:
    # property: r.m.s./peak scale with |a|; crest factor and kurtosis do not change; skewness flips with sign(a)
    x = np.random.default_rng(seed).standard_t(5, size=(2, 2048))
    a, b = time_domain(x), time_domain(scale * x)
    np.testing.assert_allclose(b.rms_g, abs(scale) * a.rms_g, rtol=1e-5)
    np.testing.assert_allclose(b.peak_to_peak_g, abs(scale) * a.peak_to_peak_g, rtol=1e-5)
    np.testing.assert_allclose(b.crest_factor, a.crest_factor, rtol=1e-5)
    np.testing.assert_allclose(b.kurtosis, a.kurtosis, rtol=1e-4)
    np.testing.assert_allclose(b.skewness, math.copysign(1.0, scale) * a.skewness, rtol=1e-3, atol=1e-5)


# ------------------------------------------------------------------------------------------- conditioning


def test_standard_gravity() -> None:
    # 3rd CGPM (1901): g_n = 9.80665 m/s² exactly; scipy.constants.g is the same value
    assert STANDARD_GRAVITY_M_S2 == 9.80665 == scipy.constants.g
    assert g_to_m_s2(1.0) == pytest.approx(9.80665, rel=1e-15)
    assert to_g(np.array([9.80665]), "m/s2")[0] == pytest.approx(1.0, rel=1e-15)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=1, max_size=50))
def test_units_round_trip(values: list[float]) -> None:
    x = np.asarray(values)
    np.testing.assert_allclose(m_s2_to_g(g_to_m_s2(x)), x, rtol=1e-14, atol=1e-300)
    np.testing.assert_allclose(to_g(g_to_m_s2(x), "m/s2"), x, rtol=1e-14, atol=1e-300)
    np.testing.assert_array_equal(to_g(x, "g"), x)


def test_sensor_scaling() -> None:
    # common practice: a 100 mV/g IEPE accelerometer puts out 100 mV (bias removed) per g
    assert millivolts_to_g(250.0, 100.0) == pytest.approx(2.5)
    assert volts_to_g(np.array([0.25, -0.1]), 100.0).tolist() == pytest.approx([2.5, -1.0])
    assert counts_to_g(np.array([2048 + 1024]), 1024.0, offset_counts=2048).tolist() == [1.0]  # 1024 counts/g
    with pytest.raises(PlanError, match="sensitivity"):
        volts_to_g(1.0, 0.0)
    with pytest.raises(PlanError, match="counts_per_g"):
        counts_to_g(1.0, -5.0)
    with pytest.raises(PlanError, match="unit"):
        to_g(1.0, "mm/s")


def test_remove_mean() -> None:
    x = np.array([[1.0, 3.0], [10.0, 14.0]])
    xc, mean = remove_mean(x)
    assert mean.tolist() == [2.0, 12.0] and xc.tolist() == [[-1.0, 1.0], [-2.0, 2.0]]
    with pytest.raises(SignalError):
        remove_mean(np.zeros((3, 0)))
