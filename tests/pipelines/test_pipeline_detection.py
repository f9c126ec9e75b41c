"""The line statistic's false-alarm law: the closed form against elementary cases and against simulation of
exponential (χ²₂) and averaged (χ²₂ₖ) periodogram lines; thresholds invert it."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from edgevib.pipelines.detection import (
    LEVEL_LINES,
    LEVEL_RANK,
    _exceedance_numeric,
    level_mean_factor,
    line_exceedance,
    line_threshold,
    window_thresholds,
)
from edgevib.pipelines.types import PlanError


def test_one_level_line_is_the_ratio_of_two_exponentials() -> None:
    # elementary: X, Y independent Exp(1) → Pr{Y > c X} = 1/(1 + c)
    for c in (0.5, 1.0, 9.0, 99.0):
        assert line_exceedance(c, level_lines=1, rank=1) == pytest.approx(1.0 / (1.0 + c), rel=1e-12)


def test_the_minimum_of_l_level_lines() -> None:
    # elementary: the minimum of L Exp(1) is Exp(L), so Pr{Y > c·min} = L / (L + c)
    for n in (2, 5, 32):
        for c in (1.0, 10.0):
            assert line_exceedance(c, level_lines=n, rank=1) == pytest.approx(n / (n + c), rel=1e-12)


def test_mean_of_an_order_statistic() -> None:
    # David & Nagaraja (from memory): E[X(j)] of L Exp(1) = Σ_{i=L−j+1}^{L} 1/i; checked by simulation too
    assert level_mean_factor(1, 1) == 1.0
    assert level_mean_factor(32, 16) == pytest.approx(sum(1 / i for i in range(17, 33)))
    rng = np.random.default_rng(1)
    sample = np.sort(rng.exponential(size=(200_000, 32)), axis=1)[:, 15]
    assert sample.mean() == pytest.approx(level_mean_factor(32, 16), rel=0.005)


@pytest.mark.parametrize("segments", [1, 4])
def test_exceedance_against_simulation(segments: int) -> None:
    # lines of averaged periodograms of Gaussian noise: Gamma(K)/K (χ²₂ₖ / 2K; Bendat & Piersol, from memory).
    # The simulated exceedance of the level-normalized ratio matches the formula within binomial error.
    rng = np.random.default_rng(7 + segments)
    trials = 400_000
    level = np.sort(rng.gamma(segments, 1.0 / segments, size=(trials, LEVEL_LINES)), axis=1)[:, LEVEL_RANK - 1]
    line = rng.gamma(segments, 1.0 / segments, size=trials)
    for p in (0.1, 0.01, 1e-3):
        thr = line_threshold(p, segments=segments)  # in units of the estimated mean level
        observed = np.mean(line > thr * level / level_mean_factor(segments=segments))
        lo, hi = scipy.stats.binom.interval(1 - 1e-6, trials, p)
        assert lo / trials <= observed <= hi / trials, (p, observed)


def test_numerical_and_closed_forms_agree_for_one_segment() -> None:
    # the K-segment integral evaluated at K = 1 equals the closed form (Beta function) to integration accuracy
    for c in (1.0, 12.0, 40.0):
        assert _exceedance_numeric(c, LEVEL_LINES, LEVEL_RANK, 1) == pytest.approx(line_exceedance(c), rel=1e-6)
    assert line_exceedance(20.0, segments=2) < line_exceedance(20.0)  # averaging narrows the noise


def test_window_thresholds_grow_with_the_window() -> None:
    thr = window_thresholds(1e-3, 50)
    assert math.isinf(thr[0])
    assert np.all(np.diff(thr[1:]) > 0)
    # entry M makes M × (per-line probability) = α
    c = thr[20] / level_mean_factor()
    assert 20 * line_exceedance(c) == pytest.approx(1e-3, rel=1e-6)


@pytest.mark.parametrize("bad", [0.0, 1.0, -0.1, 2.0])
def test_bad_probabilities(bad: float) -> None:
    with pytest.raises(PlanError, match="false-alarm probability"):
        line_threshold(bad)
