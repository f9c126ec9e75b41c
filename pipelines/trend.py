"""Trend and projection of one indicator's severity history: pure numerics, time as a parameter.

:func:`assess` takes the running-machine history of one point and indicator — times ``t_s`` (s, any epoch) and
values (for example the medians of hourly roll-ups) — and answers the planner's questions:

* **trend**: the Theil–Sen slope (the median of pairwise slopes; Sen 1968, Theil 1950) of the values since the
  growth began, per day, with its confidence interval — a slope that isolated outliers and brief transients do
  not swing;
* **step change** (:func:`step_change`): the present level against the learned baseline, judged by the ISO
  20816-3 rule that a change larger than 0.25 × the B/C boundary is significant even inside a zone (the caller
  passes that threshold; without one, 25 % of the baseline mean);
* **growth**: whether the values rise significantly and, if they do, a linear, an exponential or a power-law
  (towards a failure time) growth curve, chosen by evidence (Akaike weights of the fits, Akaike 1974);
* **projection**: for each limit above the present level, the time until the fitted curve reaches it, with an
  interval of stated coverage (default 80 %), or "not rising".

How (details in :func:`assess`): values are taken on a logarithmic scale when all are positive (vibration
scatter grows with the level, so a multiplicative error model fits it); points that stand far out from their
neighbours (a Hampel identifier: Hampel 1974, Pearson 2002) are set aside; the onset of growth is located by a
broken-stick (flat, then rising) fit chosen against "flat" and "straight" by the Bayesian information criterion
(Schwarz 1978); on the values since the onset the linear model (weighted least squares, weights 1/level²), the
exponential model (least squares on the logarithm) and the power law are fitted and compared.  The power law,
value = S₀·(1 − θ/θ_b)^(−1/γ), grows without bound as the time θ approaches θ_b: a growth that accelerates faster
than exponential towards failure, as bearings near the end of life often show.  It is the symptom life curve of
the energy-processor model of machine condition (Cempel 1991, "Vibroacoustical Condition Monitoring", from memory)
and, with γ = α − 1, the materials-failure law dΩ/dt ∝ Ω^α of failure forecasting (Voight 1988, Nature 332); with
γ = 1 the inverse of the value falls linearly to zero at failure (the inverse-velocity method, Fukuzono 1985).
The shape γ is chosen from 0.5, 1 and 2 with the curve; the three shapes share one law's prior weight in the
comparison (Burnham & Anderson 2002, model priors), so a family of curves does not outvote a single law by its
number.  All laws are a straight line in time on a transformed scale — the value, its logarithm, −value^(−γ)
(Box–Cox exponents 1, 0, −γ; Box & Cox 1964) — so each has the same two-parameter fit, test and crossing
interval; the growth is significant when the
chosen model's slope exceeds zero at the one-sided level ``rise_alpha`` (Student's t, the residual variance
inflated for lag-1 autocorrelation of the residuals); the interval of the crossing time is Fieller's interval for
the ratio (limit − intercept)/slope (Fieller 1954), which under the model has the stated coverage exactly.  While
the evidence for the chosen law is not decisive (Akaike weight below 0.99), the interval allows for the others: the
quantiles of the weight-averaged crossing-time distributions (Burnham & Anderson 2002); the estimate stays the
chosen law's.

A projection is never made from too little history (:attr:`TrendResult.need` says how much is needed); the caller
hands in running-machine values only.  Projections beyond ``horizon_factor`` × the span of the fitted values (or
``horizon_s``) are withheld: an extrapolation far beyond its data says little (ISO 13381-1 frames a prognosis as
a time to a defined limit with its confidence).

Nothing here reads clocks, files or configuration.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import optimize, stats

from edgevib.pipelines.types import PipelineError

__all__ = [
    "SECONDS_PER_DAY",
    "GrowthFit",
    "Projection",
    "StepChange",
    "TrendError",
    "TrendResult",
    "TrendSpec",
    "assess",
    "crossing_interval",
    "curve_from_line",
    "hampel_inliers",
    "phm2012_score",
    "step_change",
    "theil_sen",
]

SECONDS_PER_DAY = 86400.0
FloatArray = npt.NDArray[np.float64]
Model = Literal["linear", "exponential", "power"]
POWER_SHAPES = (0.5, 1.0, 2.0)  # γ of the power law: value ∝ (θ_b − θ)^(−1/γ)
ProjectionStatus = Literal["rising", "not-rising", "reached", "beyond-horizon"]
TrendStatus = Literal["ok", "insufficient-history"]

_MAX_ONSET_CANDIDATES = 48
_MAX_THEIL_SEN_POINTS = 600
_DECISIVE_WEIGHT = 0.99  # below this Akaike weight the other growth law shares the projection (model averaging)


class TrendError(PipelineError):
    """Invalid trend input (mismatched arrays, bad settings)."""


@dataclass(frozen=True, slots=True)
class TrendSpec:
    """Settings of :func:`assess`.

    ``coverage``: probability that a projection's interval holds the true crossing time (0.5–0.99).
    ``rise_alpha``: one-sided significance level of "rising" (a stationary series is called rising with about this
    probability per evaluation).  ``min_points`` / ``min_span_s``: the least history, in values and in time, for
    any trend.  ``outlier_sigma``: distance from the running median, in robust standard deviations, beyond which a
    value is set aside; ``hampel_half``: half-width of that running median, in values.  ``horizon_factor`` /
    ``horizon_s``: no projection further ahead than this multiple of the fitted span or this time (``None``: no
    absolute cap).  ``onset``: look for the start of growth inside the window (else fit the whole window).
    """

    coverage: float = 0.8
    rise_alpha: float = 0.01
    min_points: int = 12
    min_span_s: float = 0.0
    outlier_sigma: float = 4.0
    hampel_half: int = 5
    horizon_factor: float = 4.0
    horizon_s: float | None = None
    onset: bool = True

    def __post_init__(self) -> None:
        if not 0.5 <= self.coverage <= 0.99:
            raise TrendError(f"coverage {self.coverage!r} must be within 0.5..0.99")
        if not 0.0 < self.rise_alpha < 0.5:
            raise TrendError(f"rise_alpha {self.rise_alpha!r} must be within (0, 0.5)")
        if isinstance(self.min_points, bool) or not isinstance(self.min_points, int) or self.min_points < 6:
            raise TrendError(f"min_points {self.min_points!r} must be an integer ≥ 6")
        if not (math.isfinite(self.min_span_s) and self.min_span_s >= 0):
            raise TrendError(f"min_span_s {self.min_span_s!r} must be finite and ≥ 0")
        if not (math.isfinite(self.outlier_sigma) and self.outlier_sigma > 1):
            raise TrendError(f"outlier_sigma {self.outlier_sigma!r} must be > 1")
        if isinstance(self.hampel_half, bool) or not isinstance(self.hampel_half, int) or self.hampel_half < 1:
            raise TrendError(f"hampel_half {self.hampel_half!r} must be an integer ≥ 1")
        if not (math.isfinite(self.horizon_factor) and self.horizon_factor > 0):
            raise TrendError(f"horizon_factor {self.horizon_factor!r} must be > 0")
        if self.horizon_s is not None and not (math.isfinite(self.horizon_s) and self.horizon_s > 0):
            raise TrendError(f"horizon_s {self.horizon_s!r} must be > 0")


@dataclass(frozen=True, slots=True)
class GrowthFit:
    """The chosen growth curve on the values since ``onset_s``.

    ``model`` ``"linear"``: value = ``intercept + slope·(t − t_ref_s)``; ``"exponential"``: value =
    exp(``intercept + slope·(t − t_ref_s)``) (``slope`` per second on the logarithm; doubling time ln 2 / slope);
    ``"power"``: value = (−(``intercept + slope·(t − t_ref_s)``))^(−1/``shape``) (a negative intercept: the value
    to the power −γ falls by ``slope`` per second; the curve grows without bound at ``singularity_s``).
    ``weight``: Akaike weight of the chosen model against the others (1 when only one could be fitted).
    ``t_stat``: slope over its standard error; ``sigma``: residual standard deviation on the fitted scale;
    ``autocorrelation``: lag-1 autocorrelation of the residuals (variance inflated by (1 + r)/(1 − r) when > 0).
    """

    model: Model
    t_ref_s: float
    intercept: float
    slope: float
    cov: tuple[float, float, float]  # var(intercept), cov, var(slope), before scaling by sigma²
    sigma: float
    dof: float
    weight: float
    t_stat: float
    autocorrelation: float
    n: int
    onset_s: float
    shape: float = 0.0  # γ of the power law (0 for the other laws)

    @property
    def transform(self) -> str:
        """The scale on which the curve is a straight line in time: ``"identity"``, ``"log"`` or ``"power"``
        (−value^(−shape))."""
        return _TRANSFORMS[self.model]

    @property
    def singularity_s(self) -> float | None:
        """Time at which a power-law curve grows without bound (None for the other laws or without growth)."""
        if self.model != "power" or self.slope <= 0:
            return None
        return self.t_ref_s - self.intercept / self.slope

    def value_at(self, t_s: float) -> float:
        """The fitted curve's value at ``t_s`` (inf at and beyond a power-law curve's singularity)."""
        return _untransform(self.model, self.intercept + self.slope * (t_s - self.t_ref_s), self.shape)

    def slope_per_day_at(self, t_s: float) -> float:
        """Rate of change of the fitted curve at ``t_s``, value units per day."""
        if self.model == "exponential":
            return self.slope * self.value_at(t_s) * SECONDS_PER_DAY
        if self.model == "power":  # dv/dt = slope·v^(1+γ)/γ
            v = self.value_at(t_s)
            return self.slope * v ** (1 + self.shape) / self.shape * SECONDS_PER_DAY if math.isfinite(v) else math.inf
        return self.slope * SECONDS_PER_DAY


_TRANSFORMS: dict[str, str] = {"linear": "identity", "exponential": "log", "power": "power"}


def curve_from_line(model: str, z: npt.ArrayLike, shape: float = 1.0) -> npt.NDArray[np.float64]:
    """A growth law's values from its straight-line scale ``z`` (shape of ``z``): ``linear`` z, ``exponential``
    exp(z), ``power`` (−z)^(−1/shape) (inf at and beyond its failure time, z ≥ 0)."""
    za = np.asarray(z, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if model == "exponential":
            return np.asarray(np.exp(np.minimum(za, 700.0)), dtype=np.float64)
        if model == "power":
            return np.asarray(np.where(za < 0, np.abs(za) ** (-1.0 / shape), np.inf), dtype=np.float64)
    return za


def _untransform(model: str, z: float, shape: float) -> float:
    if model == "exponential":
        return math.exp(min(z, 700.0))
    if model == "power":
        return float((-z) ** (-1.0 / shape)) if z < 0 else math.inf
    return z


def _transform(model: str, value: float, shape: float) -> float | None:
    """The value on the model's straight-line scale (None where the scale has no image of it)."""
    if model == "linear":
        return value
    if value <= 0:
        return None
    return math.log(value) if model == "exponential" else -(value ** -shape)


@dataclass(frozen=True, slots=True)
class Projection:
    """Projected time from ``now_s`` until the fitted curve reaches ``limit``.

    ``status``: ``"rising"`` (``eta_s`` with the interval ``eta_low_s``..``eta_high_s`` of the stated coverage),
    ``"reached"`` (the present level is at or above the limit: ``eta_s`` = 0), ``"not-rising"`` (growth not
    significant: no times) or ``"beyond-horizon"`` (rising, but the crossing lies beyond the horizon: no times).
    """

    label: str
    limit: float
    status: ProjectionStatus
    eta_s: float | None = None
    eta_low_s: float | None = None
    eta_high_s: float | None = None


@dataclass(frozen=True, slots=True)
class StepChange:
    """The present level against the learned baseline (see :func:`step_change`)."""

    baseline: float
    level: float
    change: float
    threshold: float
    significant: bool


@dataclass(frozen=True, slots=True)
class TrendResult:
    """Everything :func:`assess` found for one series.

    ``status`` ``"insufficient-history"``: ``need`` says how much history is needed and nothing else is set
    beyond the counts.  ``level``: the present level — the fitted curve at ``now_s`` when rising, else the median
    of the values since the last change of level (see :func:`_stationary_level`) — the one estimate every limit's
    "reached" is judged on.  ``slope_per_day`` (with ``slope_low_per_day``..``slope_high_per_day`` at ``coverage``):
    Theil–Sen slope of the values since the onset, value units per day.  ``rising``: growth significant.
    ``outliers``: values set aside.  ``coverage``: the coverage of every interval.
    """

    status: TrendStatus
    n: int
    span_s: float
    coverage: float
    need: str | None = None
    level: float | None = None
    slope_per_day: float | None = None
    slope_low_per_day: float | None = None
    slope_high_per_day: float | None = None
    rising: bool = False
    onset_s: float | None = None
    outliers: int = 0
    fit: GrowthFit | None = None
    step: StepChange | None = None
    projections: tuple[Projection, ...] = field(default=())


# --------------------------------------------------------------------------------------------- building blocks


def _as_series(t_s: npt.ArrayLike, values: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
    t = np.asarray(t_s, dtype=np.float64).reshape(-1)
    y = np.asarray(values, dtype=np.float64).reshape(-1)
    if t.shape != y.shape:
        raise TrendError(f"{t.size} times but {y.size} values")
    ok = np.isfinite(t) & np.isfinite(y)
    t, y = t[ok], y[ok]
    order = np.argsort(t, kind="stable")
    return t[order], y[order]


def hampel_inliers(z: npt.ArrayLike, half: int = 3, k: float = 4.0) -> npt.NDArray[np.bool_]:
    """Mask of values that are not outliers by a Hampel identifier.

    A value is an outlier when it lies more than ``k`` robust standard deviations from the median of its
    neighbours within ``half`` places on either side (itself excluded; truncated at the ends).  The robust
    standard deviation is 1.4826 × the median absolute deviation of all values from those medians (one scale for
    the whole series, so a steady rise is not mistaken for scatter).  ``z``: shape (n,).
    """
    x = np.asarray(z, dtype=np.float64).reshape(-1)
    n = x.size
    if n < 3:
        return np.ones(n, dtype=bool)
    w = 2 * half + 1
    padded = np.concatenate([np.full(half, np.nan), x, np.full(half, np.nan)])
    windows = np.lib.stride_tricks.sliding_window_view(padded, w).copy()
    windows[:, half] = np.nan  # the neighbours only: a value in its own window pulls the median towards itself
    med = np.nanmedian(windows, axis=1)
    dev = np.abs(x - med)
    scale = 1.4826 * float(np.median(dev))
    if scale <= 0:
        scale = 1.4826 * float(np.mean(dev)) if np.any(dev > 0) else 0.0
    if scale <= 0:
        return np.ones(n, dtype=bool)
    return np.asarray(dev <= k * scale)


def theil_sen(t_s: npt.ArrayLike, values: npt.ArrayLike, coverage: float = 0.8) -> tuple[float, float, float]:
    """Theil–Sen slope of ``values`` over ``t_s`` (value units per second) and its confidence interval.

    Returns ``(slope, low, high)``; the interval is Sen's (1968), from the distribution of Kendall's statistic,
    at ``coverage`` (``scipy.stats.theilslopes``).  Series longer than 600 values are first reduced to 600
    medians of consecutive groups (the pairwise slopes grow with the square of the length).
    """
    t, y = _as_series(t_s, values)
    if t.size < 2 or t[-1] <= t[0]:
        raise TrendError("a slope needs at least two values at different times")
    if t.size > _MAX_THEIL_SEN_POINTS:
        groups = np.array_split(np.arange(t.size), _MAX_THEIL_SEN_POINTS)
        t = np.array([np.median(t[g]) for g in groups])
        y = np.array([np.median(y[g]) for g in groups])
    res = stats.theilslopes(y, t, alpha=coverage)
    return float(res.slope), float(res.low_slope), float(res.high_slope)


def step_change(recent: npt.ArrayLike, baseline_mean: float, baseline_std: float, baseline_n: int,
                threshold: float | None = None, z: float = 3.0) -> StepChange:
    """The present level (median of ``recent``) against a learned baseline.

    ``threshold``: the change that is significant by magnitude — for broadband velocity 0.25 × the ISO 20816-3
    B/C boundary (ISO 20816-3 / ISO 10816-3 alarm guidance; FIELD_NOTES §1); ``None`` takes 25 % of the baseline
    mean.  The change must also stand out from the scatter: more than ``z`` standard errors of the difference
    (baseline spread over ``baseline_n`` values, recent spread as 1.4826 × MAD over the recent values).
    """
    r = np.asarray(recent, dtype=np.float64).reshape(-1)
    r = r[np.isfinite(r)]
    if r.size == 0:
        raise TrendError("step change needs at least one recent value")
    if not (math.isfinite(baseline_mean) and math.isfinite(baseline_std) and baseline_std >= 0 and baseline_n >= 1):
        raise TrendError(f"baseline mean {baseline_mean!r}, std {baseline_std!r}, n {baseline_n!r} is not usable")
    thr = 0.25 * abs(baseline_mean) if threshold is None else float(threshold)
    if not (math.isfinite(thr) and thr > 0):
        raise TrendError(f"step threshold {threshold!r} must be > 0")
    level = float(np.median(r))
    change = level - baseline_mean
    mad = 1.4826 * float(np.median(np.abs(r - level))) if r.size > 1 else 0.0
    se = math.sqrt(baseline_std**2 / baseline_n + mad**2 / r.size)
    significant = abs(change) > thr and abs(change) > z * se
    return StepChange(baseline=baseline_mean, level=level, change=change, threshold=thr, significant=significant)


def _lag1(r: FloatArray) -> float:
    if r.size < 4:
        return 0.0
    d = r - r.mean()
    den = float(d @ d)
    return float(d[1:] @ d[:-1]) / den if den > 0 else 0.0


def crossing_interval(fit: GrowthFit, limit: float, coverage: float) -> tuple[float, float, float] | None:
    """Time (s, on the series' clock) when the fitted curve reaches ``limit``, with Fieller's interval.

    The interval is the set of times t at which "the mean curve equals the limit" is not rejected at level
    1 − ``coverage`` (Student's t with the fit's degrees of freedom): for a model linear in its two parameters
    this is Fieller's (1954) confidence interval of the ratio (limit − intercept)/slope.  Returns
    ``(t_hat, t_low, t_high)`` or ``None`` when the slope is not significant at that level (the set is unbounded).
    """
    target = _transform(fit.model, limit, fit.shape)
    if target is None:
        return None
    q = float(stats.t.ppf(0.5 + coverage / 2, fit.dof))
    s2 = fit.sigma**2 * q * q
    v00, v01, v11 = fit.cov
    d = fit.intercept - target
    qa = fit.slope**2 - s2 * v11
    if qa <= 0 or fit.slope <= 0:
        return None
    qb = fit.slope * d - s2 * v01
    qc = d * d - s2 * v00
    disc = qb * qb - qa * qc
    if disc < 0:  # pragma: no cover - cannot happen when qa > 0 (the Gram matrix is positive definite)
        return None
    root = math.sqrt(disc)
    x_hat = -d / fit.slope
    x1, x2 = (-qb - root) / qa, (-qb + root) / qa
    return fit.t_ref_s + x_hat, fit.t_ref_s + x1, fit.t_ref_s + x2


# --------------------------------------------------------------------------------------------- fitting


def _design(x: FloatArray, tau: FloatArray) -> FloatArray:
    """Hinge regressors h = max(0, x − τ) for each candidate onset: shape (k, n)."""
    return np.maximum(x[None, :] - tau[:, None], 0.0)


def _wls_rows(h: FloatArray, z: FloatArray, w: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Weighted least squares z ≈ a + b·h row by row (h, w: (k, n); z: (n,) or (k, n)): a, b, det."""
    zz = np.broadcast_to(z, h.shape)
    sw, sh, shh = w.sum(axis=1), np.sum(w * h, axis=1), np.sum(w * h * h, axis=1)
    sz, shz = np.sum(w * zz, axis=1), np.sum(w * h * zz, axis=1)
    det = sw * shh - sh * sh
    safe = np.where(det > 0, det, 1.0)
    b = np.where(det > 0, (sw * shz - sh * sz) / safe, 0.0)
    return (sz - b * sh) / sw, b, det


def _growth_loglik(model: Model, h: FloatArray, y: FloatArray, positive: bool, shape: float = 0.0
                   ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Broken-stick fits of one model for k onset candidates (h: (k, n) hinge regressors).

    Returns the log-likelihood of the values y under each fit, the level a at the onset, the slope b and the
    weights (k, n) of the final weighted regression.  Positive values: all models put a normal error on ln y
    (scatter proportional to the level), so their likelihoods compare directly; otherwise only the linear model,
    with a normal error on y.  The power law (``shape`` γ) returns the level and slope on its scale −y^(−γ).
    """
    k, n = h.shape
    if model == "power":
        # u = y^(−γ) = c − d·h with a multiplicative error is the linear model of u (its logarithm −γ·ln y has a
        # normal error); on the scale −u the level is −c and the slope d.  ln p(y) = ln p(u) + ln γ − (γ+1)·ln y.
        ll, a, b, w = _growth_loglik("linear", h, y**-shape, True)
        return ll + n * math.log(shape) - (shape + 1.0) * float(np.sum(np.log(y))), -a, -b, w
    if model == "exponential":
        z = np.log(y)
        w = np.ones((k, n))
        a, b, det = _wls_rows(h, z, w)
        rss = np.sum((z[None, :] - a[:, None] - b[:, None] * h) ** 2, axis=1)
        ll = -0.5 * n * (np.log(2 * math.pi * np.maximum(rss, 1e-300) / n) + 1) - float(np.sum(z))
        return np.where(det > 0, ll, -np.inf), a, b, w
    if not positive:
        w = np.ones((k, n))
        a, b, det = _wls_rows(h, y, w)
        rss = np.sum((y[None, :] - a[:, None] - b[:, None] * h) ** 2, axis=1)
        ll = -0.5 * n * (np.log(2 * math.pi * np.maximum(rss, 1e-300) / n) + 1)
        return np.where(det > 0, ll, -np.inf), a, b, w
    # y = μ·e^ε with μ = a + b·h: least squares on the logarithm (the median curve, like the exponential model)
    # by Gauss-Newton steps, each a weighted regression of μ·(1 + ln(y/μ)) on (1, h) with weights 1/μ²; starting
    # from μ = y (the first step is then the weighted regression of y with weights 1/y²) they converge in a few
    z = np.log(y)
    floor = 1e-6 * float(np.max(y))
    mu = np.broadcast_to(y, (k, n)).copy()
    a = b = det = np.zeros(k)
    for _ in range(8):
        w = 1.0 / mu**2
        a, b, det = _wls_rows(h, mu * (1.0 + z[None, :] - np.log(mu)), w)
        mu = np.maximum(a[:, None] + b[:, None] * h, floor)
    bad = np.any(a[:, None] + b[:, None] * h <= 0, axis=1) | (det <= 0)
    s2 = np.mean((z[None, :] - np.log(mu)) ** 2, axis=1)
    ll = -0.5 * n * (np.log(2 * math.pi * np.maximum(s2, 1e-300)) + 1) - float(np.sum(z))
    return np.where(bad, -np.inf, ll), a, b, 1.0 / mu**2


def _flat_loglik(y: FloatArray, positive: bool) -> float:
    n = y.size
    z = np.log(y) if positive else y
    rss = float(np.sum((z - z.mean()) ** 2))
    return -0.5 * n * (math.log(2 * math.pi * max(rss, 1e-300) / n) + 1) - (float(np.sum(z)) if positive else 0.0)


def _best_split(z: FloatArray, min_after: int) -> tuple[float, int, int, float] | None:
    """The split of ``z`` into two flat stretches of least residual sum of squares, the change after any value but
    the first two and with at least ``min_after`` values behind it: (that sum, values before the change, splits
    tried, mean after − mean before); None when the series is too short for one."""
    n = z.size
    j = np.arange(2, n - min_after + 1)  # values before the change
    if j.size == 0:
        return None
    c1, c2 = np.cumsum(z), np.cumsum(z * z)
    s1, s2 = c1[j - 1], c2[j - 1]
    r1, r2 = c1[-1] - s1, c2[-1] - s2
    rss = (s2 - s1 * s1 / j) + (r2 - r1 * r1 / (n - j))
    k = int(np.argmin(rss))
    jk = int(j[k])
    return float(rss[k]), jk, int(j.size), float(r1[k] / (n - jk) - s1[k] / jk)


def _step_loglik(y: FloatArray, positive: bool, min_after: int) -> float:
    """Best log-likelihood of "flat, a jump, flat again" (two levels, :func:`_best_split`), on the scale of the
    growth fits; -inf when the series is too short for one."""
    n = y.size
    z = np.log(y) if positive else y
    split = _best_split(z, min_after)
    if split is None:
        return -math.inf
    best = split[0]
    return -0.5 * n * (math.log(2 * math.pi * max(best, 1e-300) / n) + 1) - (float(np.sum(z)) if positive else 0.0)


def _stationary_level(y: FloatArray, positive: bool, min_after: int, onset: bool, alpha: float) -> float:
    """The present level of a series without significant growth: the median of its values since the last change
    of level, else of all of them.

    Every value of a stationary stretch estimates the same level, so a long median decides "at or above a limit"
    steadily where the median of the latest few values flips with the scatter of a level near the limit.  A change
    of level counts when the best split into two flat stretches (:func:`_best_split`, on the scale of the growth
    fits) has a two-sample t statistic beyond the two-sided level ``alpha`` divided by the number of splits tried
    (Bonferroni's bound for the scan: the best of many splits of a stationary series stands out by chance far
    more often than one split chosen in advance)."""
    n = y.size
    split = _best_split(np.log(y) if positive else y, min_after) if onset else None
    if split is None:
        return float(np.median(y))
    rss, jk, tried, diff = split
    se = math.sqrt(max(rss / (n - 2), 1e-300) * (1.0 / jk + 1.0 / (n - jk)))
    t_crit = float(stats.t.ppf(1.0 - alpha / (2.0 * tried), n - 2))
    return float(np.median(y[jk:])) if abs(diff) > t_crit * se else float(np.median(y))


def _candidates(x: FloatArray, min_after: int, onset: bool) -> FloatArray:
    n = x.size
    last = n - min_after
    if not onset or last < 1:
        return np.array([x[0]])
    idx = np.unique(np.linspace(0, last, min(_MAX_ONSET_CANDIDATES, last + 1)).round().astype(np.int64))
    return np.asarray(x[idx], dtype=np.float64)


Law = tuple[Model, float]  # a growth model and its shape (the power law's γ; 0 for the others)


def _laws(positive: bool) -> list[tuple[Law, float]]:
    """The growth laws compared, each with its prior weight: the linear and exponential laws one each, the power
    law's shapes one together (Burnham & Anderson 2002: model priors in Akaike weights)."""
    if not positive:
        return [(("linear", 0.0), 1.0)]
    laws: list[tuple[Law, float]] = [(("linear", 0.0), 1.0), (("exponential", 0.0), 1.0)]
    return laws + [(("power", g), 1.0 / len(POWER_SHAPES)) for g in POWER_SHAPES]


def _best_onset(law: Law, x: FloatArray, y: FloatArray, positive: bool, taus: FloatArray) -> tuple[float, float]:
    """The onset τ of ``law`` with the highest likelihood among ``taus`` (refined between its neighbours) and that
    log-likelihood (-inf when no candidate gives a rising fit)."""
    m, g = law
    ll, _, b, _ = _growth_loglik(m, _design(x, taus), y, positive, g)
    ll = np.where(b > 0, ll, -np.inf)
    j = int(np.argmax(ll))
    tau, best = float(taus[j]), float(ll[j])
    if taus.size > 1 and math.isfinite(best):  # refine between the neighbouring candidates
        lo, hi = float(taus[max(j - 1, 0)]), float(taus[min(j + 1, taus.size - 1)])
        fine = np.linspace(lo, hi, 17)
        ll2, _, b2, _ = _growth_loglik(m, _design(x, fine), y, positive, g)
        ll2 = np.where(b2 > 0, ll2, -np.inf)
        j2 = int(np.argmax(ll2))
        if float(ll2[j2]) > best:
            tau, best = float(fine[j2]), float(ll2[j2])
    return tau, best


def _select(x: FloatArray, y: FloatArray, positive: bool, min_after: int, onset: bool
            ) -> tuple[Law, float, float, dict[Law, tuple[float, float]]] | None:
    """Best growth law and onset by likelihood, or ``None`` when "flat" or "a step between two flat levels" wins
    by BIC (a level that jumped and stays is a step change, not growth: nothing to project).

    Returns (law, onset τ on the x axis, Akaike weight against the other laws, and for each other law its onset
    and Akaike weight).  The laws have the same number of parameters, so their Akaike weights are their
    likelihoods times their prior weights, normalised; the choice and the test against "flat" and "step" use the
    same prior-weighted likelihood."""
    n = x.size
    taus = _candidates(x, min_after, onset)
    best: dict[Law, tuple[float, float]] = {}
    for law, prior in _laws(positive):
        tau, ll = _best_onset(law, x, y, positive, taus)
        if math.isfinite(ll):
            best[law] = (tau, ll + math.log(prior))
    if not best:
        return None
    chosen = max(best, key=lambda m: best[m][1])
    tau, ll_best = best[chosen]
    k_growth = 3 if tau <= x[0] else 4
    bic_growth = -2 * ll_best + k_growth * math.log(n)
    bic_flat = -2 * _flat_loglik(y, positive) + 2 * math.log(n)
    bic_step = -2 * _step_loglik(y, positive, min_after) + 4 * math.log(n) if onset else math.inf
    if bic_growth >= min(bic_flat, bic_step):
        return None
    rel = {m: math.exp(v[1] - ll_best) for m, v in best.items()}
    total = sum(rel.values())
    return chosen, tau, 1.0 / total, {m: (v[0], rel[m] / total) for m, v in best.items() if m != chosen}


def _fit(law: Law, x: FloatArray, y: FloatArray, tau: float, positive: bool, t_ref: float, weight: float
         ) -> GrowthFit:
    """The broken-stick fit of ``model`` with onset ``tau`` as a linear model in (level at τ, slope)."""
    model, shape = law
    h = _design(x, np.array([tau]))
    _, a, b, w = _growth_loglik(model, h, y, positive, shape)
    # mean a + b·max(0, x − τ) (of ln y for the exponential model): for x ≥ τ this is (a − bτ) + b·x
    hh, ww = h[0], w[0]
    sw, sh, shh = float(ww.sum()), float(ww @ hh), float(ww @ (hh * hh))
    det = sw * shh - sh * sh
    mean = a[0] + b[0] * hh
    if model == "exponential":
        resid = np.log(y) - mean
    elif model == "power":  # ln y − ln((−mean)^(−1/γ)): the error on ln y, as for the other laws
        resid = np.log(y) + np.log(np.maximum(-mean, 1e-300)) / shape
    elif positive:
        resid = np.log(y) - np.log(np.maximum(mean, 1e-300))  # ≈ (y − μ)/μ: the weighted residual
    else:
        resid = y - mean
    n = x.size
    dof = n - (2.0 if tau <= x[0] else 3.0)
    sigma2 = float(resid @ resid) / dof
    rho = _lag1(resid)
    if rho > 0:
        rho = min(rho, 0.9)
        sigma2 *= (1 + rho) / (1 - rho)
    a_c, b_c = float(a[0]), float(b[0])
    a0 = a_c - b_c * tau
    if tau <= x[0]:
        v00, v01, v11 = shh / det, -sh / det, sw / det
        # intercept at x = 0 is a − bτ: Var and Cov follow from the row (1, −τ)
        c00, c01, c11 = v00 - 2 * tau * v01 + tau * tau * v11, v01 - tau * v11, v11
    else:
        # the onset is estimated too: Jacobian of a + b·max(0, x − τ) in (a, b, τ), then (a − bτ, b) from it
        jac = np.stack([np.ones(n), hh, -b_c * (x > tau)], axis=1)
        info = jac.T @ (jac * ww[:, None])
        try:
            cov3 = np.linalg.inv(info)
        except np.linalg.LinAlgError:
            cov3 = np.linalg.pinv(info)
        g = np.array([[1.0, -tau, -b_c], [0.0, 1.0, 0.0]])
        c2 = g @ cov3 @ g.T
        c00, c01, c11 = float(c2[0, 0]), float(c2[0, 1]), float(c2[1, 1])
    v11 = c11
    se_b = math.sqrt(max(sigma2 * v11, 1e-300))
    return GrowthFit(model=model, t_ref_s=t_ref, intercept=a0, slope=b_c, cov=(c00, c01, c11),
                     sigma=math.sqrt(sigma2), dof=dof, weight=weight, t_stat=b_c / se_b,
                     autocorrelation=rho, n=n, onset_s=t_ref + tau, shape=shape)


def _without_growth(limits: Sequence[tuple[str, float]], level: float) -> tuple[Projection, ...]:
    """Projections of a series without significant growth: each limit reached at ``level`` or not rising."""
    return tuple(Projection(label, lim, "reached", 0.0) if level >= lim else Projection(label, lim, "not-rising")
                 for label, lim in limits)


def assess(t_s: npt.ArrayLike, values: npt.ArrayLike, now_s: float, limits: Sequence[tuple[str, float]] = (),
           spec: TrendSpec | None = None, *, baseline: tuple[float, float, int] | None = None,
           step_threshold: float | None = None) -> TrendResult:
    """Trend, growth and projections of one series of running-machine values.

    Parameters
    ----------
    t_s, values : shape (n,); times in s (any epoch; sorted here) and the indicator's values.  Non-finite pairs
        are dropped.
    now_s : the time the projections count from (normally the latest value's time or later).
    limits : ``(label, value)`` pairs, e.g. ``[("alert", 4.5), ("danger", 7.1)]``; each gets a :class:`Projection`.
    spec : settings (:class:`TrendSpec`).
    baseline : ``(mean, std, n)`` of the learned baseline, for :func:`step_change` on the latest values.
    step_threshold : the significant change (0.25 × B/C for velocity r.m.s.); see :func:`step_change`.

    Returns
    -------
    TrendResult
    """
    spec = spec or TrendSpec()
    if not math.isfinite(now_s):
        raise TrendError(f"now_s {now_s!r} must be finite")
    for label, lim in limits:
        if not math.isfinite(lim):
            raise TrendError(f"limit {label!r} value {lim!r} must be finite")
    t, y = _as_series(t_s, values)
    n = int(t.size)
    span = float(t[-1] - t[0]) if n else 0.0
    if n < spec.min_points or span < spec.min_span_s or span <= 0:
        need = (f"needs at least {spec.min_points} running values over {_duration(spec.min_span_s)}; "
                f"has {n} over {_duration(span)}")
        return TrendResult(status="insufficient-history", n=n, span_s=span, coverage=spec.coverage, need=need)

    positive = bool(np.all(y > 0))
    zall = np.log(y) if positive else y
    keep = hampel_inliers(zall, spec.hampel_half, spec.outlier_sigma)
    outliers = int(n - keep.sum())
    tk, yk = t[keep], y[keep]
    step = None
    if baseline is not None:  # the latest values against the baseline (a change, not a level against a limit)
        tail = max(3, min(tk.size, max(5, tk.size // 10)))
        step = step_change(yk[-tail:], baseline[0], baseline[1], baseline[2], step_threshold)

    t_ref = float(tk[-1])
    x = tk - t_ref
    min_after = max(spec.min_points // 2, 4)
    sel = _select(x, yk, positive, min_after, spec.onset) if tk.size >= spec.min_points else None
    onset_x = None if sel is None else sel[1]
    seg = x >= (onset_x if onset_x is not None else x[0])
    ts_slope = theil_sen(tk[seg], yk[seg], spec.coverage) if seg.sum() >= 2 else (0.0, 0.0, 0.0)
    base = TrendResult(status="ok", n=n, span_s=span, coverage=spec.coverage,
                       slope_per_day=ts_slope[0] * SECONDS_PER_DAY, slope_low_per_day=ts_slope[1] * SECONDS_PER_DAY,
                       slope_high_per_day=ts_slope[2] * SECONDS_PER_DAY, outliers=outliers, step=step,
                       onset_s=None if onset_x is None else t_ref + onset_x)

    if sel is None:
        level = _stationary_level(yk, positive, min_after, spec.onset, spec.rise_alpha)
        return replace(base, level=level, projections=_without_growth(limits, level))
    fit = _fit(sel[0], x, yk, sel[1], positive, t_ref, sel[2])
    rivals = []  # the other growth laws, kept while the evidence for the chosen one is not decisive
    if sel[2] < _DECISIVE_WEIGHT:
        rivals = [_fit(m2, x, yk, tau2, positive, t_ref, w2) for m2, (tau2, w2) in sel[3].items()
                  if w2 >= (1.0 - _DECISIVE_WEIGHT) / 4]
    xs = x[seg]
    t_crit = float(stats.t.ppf(1 - spec.rise_alpha, fit.dof))
    rising = fit.slope > 0 and fit.t_stat > t_crit
    if not rising:  # no significant growth since the onset: the values since then share one level
        level = _stationary_level(yk[seg], positive, min_after, spec.onset, spec.rise_alpha)
        return replace(base, level=level, fit=fit, projections=_without_growth(limits, level))

    level = fit.value_at(now_s)
    fitted_span = float(xs[-1] - xs[0])
    horizon = spec.horizon_factor * fitted_span
    if spec.horizon_s is not None:
        horizon = min(horizon, spec.horizon_s)
    projections = []
    for label, lim in limits:
        if level >= lim:  # the one level estimate of the document decides (as it does without growth)
            projections.append(Projection(label, lim, "reached", 0.0, 0.0, 0.0))
            continue
        ci = crossing_interval(fit, lim, spec.coverage)
        if ci is None:
            projections.append(Projection(label, lim, "not-rising"))
            continue
        t_hat, t_lo, t_hi = ci
        laws = [(ci, fit.weight)] + [(c, r.weight) for r in rivals
                                     if (c := crossing_interval(r, lim, spec.coverage)) is not None]
        if len(laws) > 1:  # the interval allows for the choice of law; the estimate is the chosen law's
            _, t_lo, t_hi = _averaged(laws, spec.coverage)
            t_lo, t_hi = min(t_lo, t_hat), max(t_hi, t_hat)
        eta = max(t_hat - now_s, 0.0)
        if eta > horizon:
            projections.append(Projection(label, lim, "beyond-horizon"))
            continue
        projections.append(Projection(label, lim, "rising", eta, max(t_lo - now_s, 0.0), max(t_hi - now_s, 0.0)))
    return replace(base, level=level, rising=True, fit=fit, projections=tuple(projections))


def _averaged(cis: Sequence[tuple[tuple[float, float, float], float]], coverage: float
              ) -> tuple[float, float, float]:
    """Median and central ``coverage`` interval of the crossing time averaged over growth laws.

    ``cis``: each law's ``((t_hat, t_low, t_high), weight)``.  Each law's crossing time is taken as a split normal
    with its estimate as median and its Fieller interval's ends as the (1 ∓ coverage)/2 quantiles; the mixture
    (weights normalised, the Akaike weights: Burnham & Anderson 2002, model averaging) is inverted numerically."""
    z = float(stats.norm.ppf(0.5 + coverage / 2))
    total = sum(w for _, w in cis)
    laws = [(a[0], max(a[0] - a[1], 1e-9) / z, max(a[2] - a[0], 1e-9) / z, w / total) for a, w in cis]

    def cdf(t: float) -> float:
        return sum(wt * float(stats.norm.cdf((t - m) / (lo if t < m else hi))) for m, lo, hi, wt in laws)

    lo_t = min(a[1] for a, _ in cis) - 10 * max(x[1] for x in laws)
    hi_t = max(a[2] for a, _ in cis) + 10 * max(x[2] for x in laws)
    q = [optimize.brentq(lambda t, p=p: cdf(t) - p, lo_t, hi_t, xtol=1e-9 * (hi_t - lo_t))
         for p in (0.5, 0.5 - coverage / 2, 0.5 + coverage / 2)]
    return float(q[0]), float(q[1]), float(q[2])


def phm2012_score(actual_s: float, estimate_s: float) -> float:
    """The IEEE PHM 2012 prognostic challenge's score of one remaining-life estimate (0..1, 1 exact).

    Percent error Er = 100·(actual − estimate)/actual; score exp(−ln 0.5·Er/5) for Er ≤ 0 (a late estimate: halved
    at 5 % late) and exp(+ln 0.5·Er/20) for Er > 0 (an early one: halved at 20 % early).  ``actual_s`` > 0.
    """
    if not (math.isfinite(actual_s) and actual_s > 0 and math.isfinite(estimate_s)):
        raise TrendError(f"score needs a finite actual remaining life > 0 and a finite estimate, got "
                         f"{actual_s!r}, {estimate_s!r}")
    er = 100.0 * (actual_s - estimate_s) / actual_s
    return math.exp(-math.log(0.5) * er / 5.0) if er <= 0 else math.exp(math.log(0.5) * er / 20.0)


def _duration(s: float) -> str:
    if s >= 2 * SECONDS_PER_DAY:
        return f"{s / SECONDS_PER_DAY:.1f} days"
    if s >= 7200:
        return f"{s / 3600:.1f} h"
    if s >= 120:
        return f"{s / 60:.1f} min"
    return f"{s:.0f} s"
