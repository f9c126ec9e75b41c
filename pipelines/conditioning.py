"""Sensor conditioning: scaling raw sensor output to g, unit conversion and mean removal.

Everything is vectorized over a leading channel axis; the sample axis is the last one.
"""

from __future__ import annotations

import math
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.types import PlanError, SignalError

__all__ = [
    "STANDARD_GRAVITY_M_S2",
    "Unit",
    "counts_to_g",
    "g_to_m_s2",
    "m_s2_to_g",
    "millivolts_to_g",
    "remove_mean",
    "to_g",
    "volts_to_g",
]

STANDARD_GRAVITY_M_S2 = 9.80665
"""Standard gravity g_n in m/s² (exact by definition: 3rd CGPM, 1901; also ``scipy.constants.g``)."""

Unit = Literal["g", "m/s2"]

FloatArray = npt.NDArray[np.float64]


def _positive(name: str, value: float) -> float:
    if not math.isfinite(value) or value <= 0:
        raise PlanError(f"{name} {value!r} must be finite and > 0")
    return float(value)


def g_to_m_s2(accel_g: npt.ArrayLike) -> FloatArray:
    """Acceleration in g → m/s² (× 9.80665)."""
    return np.asarray(accel_g, dtype=np.float64) * STANDARD_GRAVITY_M_S2


def m_s2_to_g(accel_m_s2: npt.ArrayLike) -> FloatArray:
    """Acceleration in m/s² → g (÷ 9.80665)."""
    return np.asarray(accel_m_s2, dtype=np.float64) / STANDARD_GRAVITY_M_S2


def to_g(samples: npt.ArrayLike, unit: str) -> FloatArray:
    """Samples in ``unit`` (``"g"`` or ``"m/s2"``) → g, as float64."""
    if unit == "g":
        return np.asarray(samples, dtype=np.float64)
    if unit == "m/s2":
        return m_s2_to_g(samples)
    raise PlanError(f"unit {unit!r} is not one of g, m/s2")


def millivolts_to_g(signal_mv: npt.ArrayLike, sensitivity_mv_per_g: float) -> FloatArray:
    """Sensor output in mV (bias already removed) → g, for a sensitivity in mV/g (typically 100 mV/g)."""
    sens = _positive("sensitivity_mv_per_g", sensitivity_mv_per_g)
    return np.asarray(signal_mv, dtype=np.float64) / sens


def volts_to_g(signal_v: npt.ArrayLike, sensitivity_mv_per_g: float) -> FloatArray:
    """Sensor output in V (bias already removed) → g, for a sensitivity in mV/g."""
    sens = _positive("sensitivity_mv_per_g", sensitivity_mv_per_g)
    return np.asarray(signal_v, dtype=np.float64) * (1000.0 / sens)


def counts_to_g(counts: npt.ArrayLike, counts_per_g: float, offset_counts: float = 0.0) -> FloatArray:
    """Digital sensor counts → g: ``(counts - offset_counts) / counts_per_g``."""
    cpg = _positive("counts_per_g", counts_per_g)
    if not math.isfinite(offset_counts):
        raise PlanError(f"offset_counts {offset_counts!r} must be finite")
    return (np.asarray(counts, dtype=np.float64) - offset_counts) / cpg


def remove_mean(x: npt.NDArray[Any]) -> tuple[FloatArray, FloatArray]:
    """Remove the mean along the last (sample) axis.

    Parameters
    ----------
    x : array, shape (..., samples)

    Returns
    -------
    centred : ndarray, shape (..., samples), float64
    mean : ndarray, shape (...), float64 — the removed mean (a MEMS sensor sees gravity here).
    """
    arr = np.asarray(x, dtype=np.float64)
    if arr.ndim == 0 or arr.shape[-1] == 0:
        raise SignalError(f"need at least one sample along the last axis, got shape {arr.shape}")
    mean = arr.mean(axis=-1)
    return arr - mean[..., None], mean
