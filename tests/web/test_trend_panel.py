"""The trend panel's limit lines and projection band, read through the trend layer's read-only views: every ISO
20816-3 zone boundary, the user's absolute limit, and a confidence band that meets each limit where the trend
layer's projected crossing interval ends."""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from framekit import frame_indicators

from edgevib.daemon.config import parse_config
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.trendwatch import create_trend_watch
from edgevib.daemon.web.trend_source import confidence_band, history_trend, projection_curve

D = 86400.0
T0 = 1_780_000_000.0
POINT, MACHINE = "K-410-DE-H", "K-410"
USER_LIMIT = 3.5


def _config(state_dir: Path) -> Any:
    """Compressor K-410 (ISO 20816-3 group 2, rigid) with one point and a user limit on its velocity r.m.s."""
    doc: dict[str, Any] = {
        "site": {"name": "fern-basin", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": 4096, "overlap": 0.0},
        "sources": [{"name": "sim", "type": "simulated", "scenario": "demo"}],
        "machines": [{"id": MACHINE, "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": POINT, "machine": MACHINE, "axis": "horizontal", "source": "sim", "sensor": "FB-K410-DE-H",
                    "fs_hz": 5120.0, "block_samples": 4096}],
        "alarms": {"enabled": False},
        "trend": {"evaluate_s": 3600.0, "min_span_h": 24.0,
                  "limits": [{"point": POINT, "indicator": "velocity_rms_mm_s", "value": USER_LIMIT}]},
    }
    return parse_config(doc, state_dir)


def _frame(t_s: float, v_mm_s: float) -> FrameResult:
    n, fs = 4096, 5120.0
    x = 0.2 * np.sin(2 * np.pi * 24.75 * np.arange(n) / fs)
    ind = frame_indicators(acceleration_rms_g=0.1, acceleration_peak_g=0.3, acceleration_peak_to_peak_g=0.6,
                           crest_factor=3.0, kurtosis=3.0, skewness=0.0, mean_g=0.0, velocity_rms_mm_s=v_mm_s,
                           velocity_peak_mm_s=1.414 * v_mm_s, displacement_pp_um=10.0, shaft_hz=24.75,
                           shaft_estimated=False, orders_mm_s={"1x": 0.9 * v_mm_s})
    return FrameResult(point_id=POINT, machine_id=MACHINE, t_end_ns=round(t_s * 1e9), received_ns=round(t_s * 1e9),
                       fs_hz=fs, indicators=ind, iso_zone=None, samples=x.astype(np.float32), axis="horizontal")


async def test_limit_lines_and_a_projection_band_that_meets_the_crossing_interval(tmp_path: Path) -> None:
    cfg = _config(tmp_path / "state")
    watch = create_trend_watch(cfg, None)
    assert watch is not None
    await watch.start()
    try:
        # invented demo law: 1.0 mm/s, rising 0.06 mm/s per day from day 5, with 4 % log-normal scatter
        rng = np.random.default_rng(7)
        days = np.arange(0, 30 * 24) / 24.0
        values = np.where(days < 5, 1.0, 1.0 + 0.06 * (days - 5)) * np.exp(0.04 * rng.standard_normal(days.size))
        await watch.on_frames([_frame(T0 + d * D, float(v)) for d, v in zip(days, values, strict=True)])
        assert await asyncio.to_thread(watch.evaluate_all) >= 1

        # every limit line: ISO 20816-3 group 2 rigid boundaries 1.4 / 2.8 / 4.5 mm/s (ISO 10816-3:2009 Annex A tables,
        # FIELD_NOTES) and the user's absolute limit; no alarm layer here, so no alert/danger set points
        lines = {(ln["kind"], ln["label"]): ln["value"] for ln in watch.limit_lines(POINT, "velocity_rms_mm_s")}
        assert lines == {("iso", "A/B"): 1.4, ("iso", "B/C"): 2.8, ("iso", "C/D"): 4.5, ("user", "limit"): USER_LIMIT}
        assert watch.limit_lines("no-such-point", "velocity_rms_mm_s") == []

        doc = watch.projection(POINT, "velocity_rms_mm_s")
        assert doc is not None and doc["status"] == "ok" and doc["rising"]
        curve = projection_curve(doc)
        assert curve is not None and curve["low"] is not None and curve["high"] is not None
        lo, mid, hi = (np.asarray(curve[k], dtype=float) for k in ("low", "values", "high"))
        assert np.all(lo <= mid) and np.all(mid <= hi) and np.any(hi - lo > 0)
        # the band meets each limit at the ends of the trend layer's crossing interval (both are Fieller's
        # construction at the document's coverage: Fieller 1954; pipelines/trend.py crossing_interval) — while the
        # evidence for the chosen law is decisive, as for this straight rise (otherwise the interval is a mixture)
        assert doc["model"] == "linear" and doc["model_weight"] >= 0.99 and curve["model_weight"] >= 0.99
        now = doc["t_s"]
        checked = 0
        for lim in doc["limits"]:
            if lim["status"] != "rising" or lim["eta_low_s"] is None or lim["eta_high_s"] is None:
                continue
            band = confidence_band(doc["fit"], [now + lim["eta_low_s"], now + lim["eta_s"], now + lim["eta_high_s"]],
                                   doc["coverage"])
            assert band is not None
            low, high = band
            assert high[0] == pytest.approx(lim["value"], rel=1e-6)  # the upper edge reaches it first
            assert low[2] == pytest.approx(lim["value"], rel=1e-6)  # the lower edge last
            assert low[1] < lim["value"] < high[1]
            checked += 1
        assert checked >= 1, doc["limits"]
        # the user limit is one of the projected limits
        assert any(lim["label"] == "limit" and lim["value"] == USER_LIMIT for lim in doc["limits"])
    finally:
        await watch.stop()


def test_no_band_without_the_fits_covariance() -> None:
    fit = {"model": "linear", "t_ref_s": 0.0, "intercept": 1.0, "slope": 1e-6}
    assert confidence_band(fit, [0.0, 10.0], 0.8) is None
    assert confidence_band({**fit, "cov": [1.0, 0.0, 1e-12], "sigma": 0.1, "dof": 20.0}, [0.0], None) is None


def test_the_chart_places_a_bucket_at_the_mean_time_of_its_values() -> None:
    # A roll-up bucket's statistics stand for the mean time of the values it holds — its middle only when they fill
    # it evenly (common practice for binned time series; the trend's projection is fitted at the same times), so
    # the chart draws the points where the fit puts them: a machine that ran only the first hour of each day.
    from edgevib.daemon.history import HistorySeries

    starts = T0 + D * np.arange(3)
    means = starts + 1800.0
    values = np.array([1.0, 1.1, 1.2])
    doc = history_trend(lambda: HistorySeries(POINT, "velocity_rms_mm_s", "day", starts, values, t_mean_s=means),
                        None)
    assert doc is not None and doc["t_s"] == means.tolist() and doc["resolution"] == "day"
    # rows written before the history knew their mean time: the bucket's middle (half a day after its start)
    old = history_trend(lambda: HistorySeries(POINT, "velocity_rms_mm_s", "day", starts, values), None)
    assert old is not None and old["t_s"] == (starts + D / 2).tolist()
