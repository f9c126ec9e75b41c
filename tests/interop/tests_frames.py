"""A frame result of a pure sine with closed-form indicators (shared by the OPC UA interoperability tests)."""

from __future__ import annotations

import math

import numpy as np
from framekit import frame_indicators

from edgevib.daemon.interfaces import FrameResult

T_END_NS = 1_796_112_000_123_400_000  # 2026-12-01 08:00:00.1234 UTC


def sine_result(point: str, machine: str, *, shaft_hz: float | None, zone: str | None) -> FrameResult:
    """1 g-amplitude 50 Hz sine: r.m.s. 1/√2 g, crest factor √2, kurtosis 1.5 (closed form, common practice);
    velocity amplitude 9.80665/(2π·50) m/s."""
    fs_hz, n = 25600.0, 16384
    x = np.sin(2 * np.pi * 50.0 * np.arange(n) / fs_hz)
    v_amp_mm_s = 9.80665e3 / (2 * np.pi * 50.0)
    ind = frame_indicators(
        acceleration_rms_g=1 / math.sqrt(2), acceleration_peak_g=1.0, acceleration_peak_to_peak_g=2.0,
        crest_factor=math.sqrt(2), kurtosis=1.5, skewness=0.0, mean_g=0.0,
        velocity_rms_mm_s=v_amp_mm_s / math.sqrt(2), velocity_peak_mm_s=v_amp_mm_s,
        displacement_pp_um=2 * v_amp_mm_s / (2 * np.pi * 50.0) * 1e3, shaft_hz=shaft_hz,
        shaft_estimated=False)
    return FrameResult(point_id=point, machine_id=machine, t_end_ns=T_END_NS, received_ns=T_END_NS, fs_hz=fs_hz,
                       indicators=ind, iso_zone=zone, samples=x)
