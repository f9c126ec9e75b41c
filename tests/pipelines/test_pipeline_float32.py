"""Float32 frames (as the daemon assembles them) give the indicators of the same values in float64.

Reference: the pipeline's own float64 path on the identical sample values (every float32 is exactly a float64),
which the numerical reference tests check against standards and scipy; the float32 path only skips the widening
copy, so the two may differ by single-precision rounding (relative ~1e-6), nothing more.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.types import BearingGeometry, SignalError

FS_HZ = 25_600.0


def _frames(n: int, channels: int) -> np.ndarray:
    rng = np.random.default_rng(11)
    t = np.arange(n) / FS_HZ
    x = 1.0 + 0.3 * np.sin(2 * np.pi * 24.7 * t + rng.uniform(0, 6, (channels, 1)))  # 1 g of gravity (MEMS-like)
    x += 0.2 * np.exp(-((t * 88.5) % 1.0) * 40.0) * np.sin(2 * np.pi * 7000.0 * t)
    return x + rng.normal(0.0, 0.05, (channels, n))


def test_float32_frames_match_the_float64_path() -> None:
    plan = make_plan(FS_HZ, 16384, envelope_band_hz=(2500.0, 10000.0),
                     bearing=BearingGeometry(9, 7.94, 39.04), speed_range_hz=(15.0, 60.0))
    x32 = _frames(16384, 4).astype(np.float32)
    for shaft in (None, 24.7):  # estimated and given speed
        got = analyze_frames(x32, plan, shaft_hz=shaft)
        ref = analyze_frames(x32.astype(np.float64), plan, shaft_hz=shaft)
        for g, r in zip(got, ref, strict=True):
            for name in ("acceleration_rms_g", "acceleration_peak_g", "crest_factor", "kurtosis", "skewness",
                         "mean_g", "velocity_rms_mm_s", "velocity_peak_mm_s", "displacement_pp_um", "shaft_hz"):
                _close(getattr(g, name), getattr(r, name), 1e-5, name)
            assert g.orders_mm_s.keys() == r.orders_mm_s.keys()
            for key, value in r.orders_mm_s.items():
                _close(g.orders_mm_s[key], value, 1e-4, key)
            assert g.envelope.keys() == r.envelope.keys()
            for fam, e in r.envelope.items():
                assert g.envelope[fam].frequency_hz == e.frequency_hz
                _close(g.envelope[fam].amplitude_g, e.amplitude_g, 1e-4, fam)
        if shaft is not None:
            assert all(r.envelope for r in ref)  # the given speed lets the envelope stage run


def _close(got: float | None, ref: float | None, rel: float, what: str) -> None:
    if ref is None:
        assert got is None, what
    else:
        assert got == pytest.approx(ref, rel=rel), what


def test_float32_non_finite_samples_are_named() -> None:
    plan = make_plan(FS_HZ, 4096, velocity_band_hz=(20.0, 1000.0), speed_range_hz=(15.0, 60.0))  # 2 lines/edge
    x = _frames(4096, 3).astype(np.float32)
    x[1, 100:103] = np.nan
    with pytest.raises(SignalError, match=r"channel 1: 3 of 4096"):
        analyze_frames(x, plan)
    assert math.isfinite(analyze_frames(x[[0, 2]], plan)[0].velocity_rms_mm_s)
