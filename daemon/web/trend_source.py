"""The trend panel's data from the daemon's severity history and trend layer (:mod:`edgevib.daemon.trendwatch`).

Reads one series back through the trend layer's read-only views (``TrendWatch.history`` opens the history
database read-only; called in a worker thread) and adds the latest projection document it evaluated for it: the
fitted growth curve sampled up to the furthest projected limit crossing (at most :data:`PROJECTION_HORIZON_DAYS`
ahead) with its confidence band, the limits with their projected dates and the advice.  ``None`` when there is
no history for the series (the caller falls back to the recent values it holds).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.daemon.history import HistoryError

__all__ = ["PROJECTION_HORIZON_DAYS", "PROJECTION_POINTS", "confidence_band", "history_trend", "projection_curve"]

PROJECTION_HORIZON_DAYS = 365.0
PROJECTION_POINTS = 60
DAY_S = 86400.0
FloatArray = npt.NDArray[np.float64]


def confidence_band(fit: dict[str, Any], t_s: npt.ArrayLike, coverage: float | None,
                    ) -> tuple[FloatArray, FloatArray] | None:
    """Pointwise confidence band ``(low, high)`` of a trend document's fitted mean curve at times ``t_s``, in the
    indicator's unit: ``z ± q·σ·√(v00 + 2x·v01 + x²·v11)`` on the fitted scale (x = t − t_ref; q Student's t at
    ``coverage`` with the fit's degrees of freedom; taken back to the value scale for the exponential and power
    laws: exp(z), (−z)^(−1/shape)).  This is the
    statistic whose crossings of a limit are Fieller's interval (:func:`edgevib.pipelines.trend.crossing_interval`),
    so the band meets each limit at its ``eta_low``/``eta_high`` while the evidence for the chosen growth law is
    decisive (``model_weight`` ≥ 0.99); otherwise the crossing intervals also allow for the other law and are
    wider than the band's crossings.  None when the fit carries no covariance."""
    cov, sigma, dof = fit.get("cov"), fit.get("sigma"), fit.get("dof")
    if not cov or len(cov) != 3 or sigma is None or not dof or coverage is None or not 0 < coverage < 1:
        return None
    from scipy import stats

    q = float(stats.t.ppf(0.5 + coverage / 2.0, dof))
    v00, v01, v11 = (float(c) for c in cov)
    x = np.asarray(t_s, dtype=np.float64) - fit["t_ref_s"]
    se = float(sigma) * np.sqrt(np.maximum(v00 + 2.0 * x * v01 + x * x * v11, 0.0))
    z = fit["intercept"] + fit["slope"] * x
    return _scale(fit, z - q * se), _scale(fit, z + q * se)


def _scale(fit: dict[str, Any], z: FloatArray) -> FloatArray:
    from edgevib.daemon.trendchart import curve_values

    return np.asarray(curve_values(fit, np.asarray(z, dtype=np.float64)), dtype=np.float64)


def projection_curve(doc: dict[str, Any]) -> dict[str, Any] | None:
    """The fitted curve of a trend document from its onset (or now) to the furthest projected crossing (or 30
    days), with its confidence band (``low``/``high``, at the document's ``coverage``), or None without a rising
    fit.  ``linear``: ``a + b·(t − t_ref)``; ``exponential``: ``exp(a + b·(t − t_ref))``; ``power``:
    ``(−(a + b·(t − t_ref)))^(−1/shape)`` (unbounded from the fitted failure time on: no values there)."""
    fit = doc.get("fit")
    now = doc.get("t_s")
    if not fit or not doc.get("rising") or now is None:
        return None
    etas = [lim.get("eta_high_s") or lim.get("eta_s") for lim in doc.get("limits", [])]
    etas = [e for e in etas if e is not None and math.isfinite(e) and e > 0]
    horizon = min(max(etas, default=30 * DAY_S) * 1.1, PROJECTION_HORIZON_DAYS * DAY_S)
    onset = fit.get("onset_s")
    start = onset if onset is not None and math.isfinite(onset) and onset < now else now
    t = np.linspace(start, now + horizon, PROJECTION_POINTS)
    band = confidence_band(fit, t, doc.get("coverage"))
    return {"model": fit["model"], "t_s": t.tolist(),
            "values": _scale(fit, fit["intercept"] + fit["slope"] * (t - fit["t_ref_s"])),
            "low": None if band is None else band[0], "high": None if band is None else band[1],
            "coverage": doc.get("coverage") if band is not None else None, "model_weight": doc.get("model_weight"),
            "now_s": now,
            "limits": doc.get("limits", []), "advice": doc.get("advice"), "advice_text": doc.get("advice_text"),
            "status": doc.get("status"), "need": doc.get("need")}


def history_trend(read: Callable[[], Any], latest: dict[str, Any] | None) -> dict[str, Any] | None:
    """``{t_s, values, resolution, projection, trend}`` of one series, or None without one.

    ``read`` returns the series (the trend layer's read-only ``history(point, indicator, …)`` view; it raises
    :class:`~edgevib.daemon.history.HistoryError` when there is none); ``latest`` is its latest trend document."""
    try:
        series = read()
    except (HistoryError, OSError, ValueError):
        return None
    t = np.asarray(series.stamp_s, dtype=np.float64)  # a bucket stands for the mean time of its values
    if t.size == 0:
        return None
    trend = None
    if latest is not None:
        trend = {k: latest.get(k) for k in ("status", "need", "level", "slope_per_day", "rising", "model",
                                            "advice", "advice_text", "machine_state", "limits", "onset")}
    return {"t_s": t.tolist(), "values": np.asarray(series.value, dtype=np.float64),
            "resolution": series.level, "projection": None if latest is None else projection_curve(latest),
            "trend": trend}
