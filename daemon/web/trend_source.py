"""The trend panel's data from the daemon's severity history and trend layer (:mod:`edgevib.daemon.trendwatch`).

Reads one series back through the trend layer's read-only views (``TrendWatch.history`` opens the history
database read-only; called in a worker thread) and adds the latest projection document it evaluated for it: the
fitted growth curve sampled up to the furthest projected limit crossing (at most :data:`PROJECTION_HORIZON_DAYS`
ahead), the limits with their projected dates and the advice.  ``None`` when there is no history for the series (the
caller falls back to the recent values it holds).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from edgevib.daemon.history import HistoryError

__all__ = ["PROJECTION_HORIZON_DAYS", "PROJECTION_POINTS", "history_trend", "projection_curve"]

PROJECTION_HORIZON_DAYS = 365.0
PROJECTION_POINTS = 60
DAY_S = 86400.0


def projection_curve(doc: dict[str, Any]) -> dict[str, Any] | None:
    """The fitted curve of a trend document from now to the furthest projected crossing (or 30 days), or None
    without a rising fit.  ``linear``: ``a + b·(t − t_ref)``; ``exponential``: ``exp(a + b·(t − t_ref))``."""
    fit = doc.get("fit")
    now = doc.get("t_s")
    if not fit or not doc.get("rising") or now is None:
        return None
    etas = [lim.get("eta_high_s") or lim.get("eta_s") for lim in doc.get("limits", [])]
    etas = [e for e in etas if e is not None and math.isfinite(e) and e > 0]
    horizon = min(max(etas, default=30 * DAY_S) * 1.1, PROJECTION_HORIZON_DAYS * DAY_S)
    t = now + np.linspace(0.0, horizon, PROJECTION_POINTS)
    z = fit["intercept"] + fit["slope"] * (t - fit["t_ref_s"])
    with np.errstate(over="ignore"):
        y = np.exp(np.minimum(z, 700.0)) if fit["model"] == "exponential" else z
    return {"model": fit["model"], "t_s": t.tolist(), "values": y,
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
    t = np.asarray(series.t_s, dtype=np.float64) + series.bucket_s / 2.0  # a bucket stands for its middle
    if t.size == 0:
        return None
    trend = None
    if latest is not None:
        trend = {k: latest.get(k) for k in ("status", "need", "level", "slope_per_day", "rising", "model",
                                            "advice", "advice_text", "machine_state", "limits", "onset")}
    return {"t_s": t.tolist(), "values": np.asarray(series.value, dtype=np.float64),
            "resolution": series.level, "projection": None if latest is None else projection_curve(latest),
            "trend": trend}
