"""Line detection in a periodogram with a stated false-alarm probability under stationary Gaussian noise.

The statistic (derived here, verified by simulation in the tests)
-----------------------------------------------------------------
Let ``P[k]`` be the periodogram (``|Xw[k]|²``, Hann window) of a stationary process whose correlation time is much
shorter than the record — for example the squared envelope ``|z|²`` of band-passed Gaussian noise.  Away from line 0
the transform ``Xw[k]`` is, by the central limit theorem, a circular complex Gaussian variable, so ``P[k]`` is
exponentially distributed about its local mean ``S(f_k)`` (chi-square with 2 degrees of freedom, halved):
``Pr{P[k] > t·S} = exp(−t)``.  Averaging ``K`` independent segments gives ``Gamma(K)/K`` (chi-square with 2K
degrees of freedom over 2K).

``S`` is unknown: it is estimated from ``L`` *level lines* beside the line — every other line (with a Hann window
adjacent lines are correlated, |ρ|² = 4/9; two lines apart |ρ|² = 1/36, taken as independent), ``L/2`` on each
side, outside the search window and a guard of :data:`GUARD_LINES` lines, so a strong line never raises its own
level — by their ``j``-th smallest value ``X₍ⱼ₎`` (the median for ``j = L/2``: robust to a few other lines among
them).  For one segment the level lines are independent ``Exp(1)`` variables in units of ``S``, and the test line
``Y`` exceeds ``c`` times the order statistic with probability

    Pr{Y > c·X₍ⱼ₎} = E[exp(−c·X₍ⱼ₎)] = L! / ((j−1)! (L−j)!) · B(j, L−j+1+c)
                   = Γ(L+1) Γ(L−j+1+c) / (Γ(L−j+1) Γ(L+1+c))

(the density of ``X₍ⱼ₎`` is ``L!/((j−1)!(L−j)!) (1−e^{−u})^{j−1} e^{−u(L−j+1)}``; substitute ``v = e^{−u}``).
For ``K`` segments the same expectation is taken of the Gamma tail numerically (:func:`line_exceedance`).

A line is reported in units of the estimated mean level, ``T = P[k] / (X₍ⱼ₎ / E[X₍ⱼ₎])`` with
``E[X₍ⱼ₎] = Σ_{i=L−j+1}^{L} 1/i`` (``snr_db = 10·log10 T``), so the threshold on ``T`` is ``c·E[X₍ⱼ₎]``.

A search window of ``M`` lines (a defect line anywhere within the bearing's slip tolerance) is ``M`` chances:
the threshold for a window is set so that ``M · Pr{Y > c·X₍ⱼ₎} = α`` (Bonferroni: the probability that any of the
``M`` lines exceeds it is at most α whatever their correlation).  Requiring in addition a local maximum, a minimum
modulation depth or the absence of a better explanation can only lower the false-alarm probability further.

References: the exponential law of periodogram ordinates and the chi-square law of averaged ones, e.g. Bendat &
Piersol, "Random Data", 4th ed., Wiley 2010, §8.5 (from memory); the distribution of order statistics, David &
Nagaraja, "Order Statistics", 3rd ed., Wiley 2003, §2.1 (from memory); FIELD_NOTES §3 (detection statistics).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from functools import lru_cache

import numpy as np
import numpy.typing as npt
from scipy import integrate, optimize, special

from edgevib.pipelines.types import PlanError

__all__ = [
    "GUARD_LINES",
    "LEVEL_LINES",
    "LEVEL_RANK",
    "LEVEL_STEP",
    "level_mean_factor",
    "line_exceedance",
    "line_threshold",
    "window_thresholds",
]

FloatArray = npt.NDArray[np.float64]

LEVEL_LINES = 32
"""Level lines per tested line (half below, half above the search window where the spectrum allows)."""
LEVEL_RANK = 16
"""The level is the ``LEVEL_RANK``-th smallest of the ``LEVEL_LINES`` level lines (their lower median)."""
LEVEL_STEP = 2
"""Level lines are every other line (Hann-windowed neighbours are correlated)."""
GUARD_LINES = 2
"""Lines left out between a search window and its level lines (a Hann-windowed tone spans ±2 lines)."""


def _check_level(level_lines: int, rank: int, segments: int) -> None:
    if not 1 <= rank <= level_lines:
        raise PlanError(f"level rank {rank} must be between 1 and the {level_lines} level lines")
    if segments < 1:
        raise PlanError(f"averaged segments {segments} must be ≥ 1")


def line_exceedance(c: float, level_lines: int = LEVEL_LINES, rank: int = LEVEL_RANK, segments: int = 1) -> float:
    """Probability that a noise line exceeds ``c`` times the ``rank``-th smallest of ``level_lines`` level lines.

    Lines are periodogram ordinates of stationary Gaussian noise averaged over ``segments`` independent segments
    (each ``Gamma(K)/K``, i.e. χ²₂ₖ/2K, about a common mean), the test line independent of the level lines.

    Parameters
    ----------
    c : ratio threshold on ``line / X₍rank₎`` (≥ 0)

    Returns
    -------
    float in [0, 1]; closed form for one segment (see the module docstring), numerical integration otherwise.
    """
    _check_level(level_lines, rank, segments)
    if c <= 0:
        return 1.0
    n, j = level_lines, rank
    if segments == 1:
        log_p = special.gammaln(n + 1) + special.gammaln(n - j + 1 + c) - special.gammaln(n - j + 1) \
            - special.gammaln(n + 1 + c)
        return float(math.exp(log_p))
    return _exceedance_numeric(c, n, j, segments)


def _order_statistic_density(n: int, j: int, segments: int) -> Callable[[float], float]:
    """The density of the ``j``-th order statistic of ``n`` Gamma(k = ``segments``, scale 1/k) variables (a noise
    line's power in units of its mean, averaged over ``segments`` segments)."""
    k = float(segments)
    log_norm = special.gammaln(n + 1) - special.gammaln(j) - special.gammaln(n - j + 1)

    def density(u: float) -> float:
        cdf = special.gammainc(k, k * u)
        if cdf <= 0.0 or cdf >= 1.0:
            return 0.0
        log_pdf = math.log(k) + (k - 1) * math.log(k * u) - k * u - special.gammaln(k)
        return math.exp(log_norm + (j - 1) * math.log(cdf) + (n - j) * math.log1p(-cdf) + log_pdf)

    return density


def _exceedance_numeric(c: float, n: int, j: int, segments: int) -> float:
    """:func:`line_exceedance` by numerical integration over the order statistic's density (any ``segments``)."""
    k = float(segments)
    density = _order_statistic_density(n, j, segments)

    def integrand(u: float) -> float:  # the density times the test line's tail
        return float(special.gammaincc(k, k * c * u) * density(u))

    value, _ = integrate.quad(integrand, 0.0, np.inf, limit=200, epsabs=1e-15, epsrel=1e-9)
    return float(min(max(value, 0.0), 1.0))


def level_mean_factor(level_lines: int = LEVEL_LINES, rank: int = LEVEL_RANK, segments: int = 1) -> float:
    """``E[X₍rank₎]`` of ``level_lines`` noise lines in units of their mean: divides the order statistic into an
    unbiased level (``Σ_{i=L−j+1}^{L} 1/i`` for one segment; by numerical integration for several)."""
    _check_level(level_lines, rank, segments)
    n, j = level_lines, rank
    if segments == 1:
        return float(sum(1.0 / i for i in range(n - j + 1, n + 1)))
    density = _order_statistic_density(n, j, segments)
    value, _ = integrate.quad(lambda u: u * density(u), 0.0, np.inf, limit=200)
    return float(value)


@lru_cache(maxsize=256)
def line_threshold(probability: float, level_lines: int = LEVEL_LINES, rank: int = LEVEL_RANK,
                   segments: int = 1) -> float:
    """Threshold on ``T`` (a line over its estimated mean level) exceeded by noise with ``probability``.

    Returns ``c·E[X₍rank₎]`` where ``line_exceedance(c) = probability``.
    """
    if not 0.0 < probability < 1.0:
        raise PlanError(f"false-alarm probability {probability!r} must be in 0 < p < 1")
    _check_level(level_lines, rank, segments)

    def excess(c: float) -> float:
        return math.log(line_exceedance(c, level_lines, rank, segments)) - math.log(probability)

    hi = 1.0
    while excess(hi) > 0.0:
        hi *= 2.0
        if hi > 1e12:
            raise PlanError(f"false-alarm probability {probability:g} is too small for {level_lines} level lines")
    c = optimize.brentq(excess, 0.0, hi, xtol=1e-10, rtol=1e-12)
    return float(c * level_mean_factor(level_lines, rank, segments))


def window_thresholds(false_alarm: float, max_lines: int, level_lines: int = LEVEL_LINES, rank: int = LEVEL_RANK,
                      segments: int = 1) -> FloatArray:
    """Thresholds on ``T`` for search windows of ``M = 0 .. max_lines`` lines (entry 0 is unused, +inf): each
    makes the window's false-alarm probability at most ``false_alarm`` (per-line probability ``false_alarm / M``).

    Returns
    -------
    ndarray, shape (max_lines + 1,)
    """
    if not 0.0 < false_alarm < 1.0:
        raise PlanError(f"false-alarm probability {false_alarm!r} must be in 0 < p < 1")
    out = np.full(max_lines + 1, np.inf)
    for m in range(1, max_lines + 1):
        out[m] = line_threshold(false_alarm / m, level_lines, rank, segments)
    out.flags.writeable = False
    return out
