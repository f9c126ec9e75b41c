"""Time-domain indicators of acceleration frames: r.m.s., peak, peak-to-peak, crest factor, kurtosis, skewness.

All statistics are taken after removing each channel's mean (a MEMS sensor sees 1 g of gravity); the mean is
reported as ``mean_g``.  Kurtosis is Pearson's, E[(x−μ)⁴]/σ⁴ (Gaussian noise 3, a sine 1.5); skewness is
E[(x−μ)³]/σ³; both use the population (1/N) moments like ``scipy.stats.kurtosis(fisher=False, bias=True)``.  The mean is
removed in float64; the moments are summed from single-precision centred samples (relative error ~1e-6).
Crest factor is true peak |x−μ|max over r.m.s. (a sine √2).  For a constant frame the ratios are NaN.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.types import SignalError

__all__ = ["TimeDomain", "as_channels", "as_frames", "centred_moments", "finite_mean", "time_domain"]

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class TimeDomain:
    """Time-domain indicators, one value per channel (each array has shape (channels,))."""

    mean_g: FloatArray
    rms_g: FloatArray
    peak_g: FloatArray
    peak_to_peak_g: FloatArray
    crest_factor: FloatArray
    kurtosis: FloatArray
    skewness: FloatArray


def as_channels(x_g: npt.ArrayLike, min_samples: int = 2) -> FloatArray:
    """``x_g`` as a float64 ``(channels, samples)`` array (a 1-D array is one channel); shape checked."""
    try:
        x = np.asarray(x_g, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise SignalError(f"samples are not numeric: {exc}") from exc
    out: FloatArray = _check_shape(x, min_samples)
    return out


def as_frames(x_g: npt.ArrayLike, min_samples: int = 2) -> npt.NDArray[np.floating[Any]]:
    """Like :func:`as_channels`, except that a float32 array stays float32 (no widening copy: the daemon's frames
    are float32, and the analysis transforms in single precision anyway)."""
    if isinstance(x_g, np.ndarray) and x_g.dtype == np.float32:
        out: npt.NDArray[np.floating[Any]] = _check_shape(x_g, min_samples)
        return out
    return as_channels(x_g, min_samples)


def _check_shape(x: npt.NDArray[Any], min_samples: int) -> npt.NDArray[Any]:
    if x.ndim == 1:
        x = x[None, :]
    if x.ndim != 2:
        raise SignalError(f"samples must have shape (channels, samples) or (samples,), got {x.shape}")
    if x.shape[0] == 0:
        raise SignalError("no channels to analyse")
    if x.shape[1] < min_samples:
        raise SignalError(f"{x.shape[1]} samples per channel, need at least {min_samples}")
    return x


def _raise_non_finite(x: npt.NDArray[np.floating[Any]]) -> None:
    bad = ~np.isfinite(x)
    per_channel = bad.sum(axis=-1)
    ch = int(np.flatnonzero(per_channel)[0]) if per_channel.any() else 0
    raise SignalError(f"channel {ch}: {int(per_channel[ch])} of {x.shape[-1]} samples are NaN or infinite")


def finite_mean(x: npt.NDArray[np.floating[Any]]) -> FloatArray:
    """Per-channel means of ``x`` (channels, samples); raises :class:`SignalError` on NaN/Inf (which reach the
    mean, so the check costs no extra pass)."""
    mean: FloatArray = x.mean(axis=-1, dtype=np.float64)
    if not np.isfinite(mean).all():
        _raise_non_finite(x)
        raise SignalError("samples overflow float64")  # finite but their sum overflows
    return mean


BLOCK_SAMPLES = 1 << 17  # rows are processed in blocks of about this many samples (512 kB of float32: in cache)


def centred_moments(x: npt.NDArray[np.floating[Any]], mean: FloatArray,
                    shift: npt.NDArray[np.floating[Any]] | None = None) -> TimeDomain:
    """Indicators of frames ``x`` (channels, samples) about their means ``mean`` (channels,).

    ``shift`` (channels,), when given, is what centres ``x`` instead of ``mean``: for frames already offset by a
    value near their level (``x − x[:, :1]`` in float32, ``shift = mean − x[:, 0]`` in float32), so the centring
    is one single-precision pass (a float64 ``mean`` would make it a float64 pass over the frames).

    The centred samples are formed block by block in single precision on purpose: each block of rows stays in
    the processor's cache through its passes (max, min, x², and the row dot products giving Σx², Σx³, Σx⁴), and
    the dot products' blocked accumulation keeps the sums' relative error near 1e-7 (2e-7 at 131,072 samples).
    Without ``shift`` the mean is removed in float64, so a 1 g gravity offset costs no precision.
    """
    c, n = x.shape
    rows = max(1, min(c, BLOCK_SAMPLES // n))
    xc = np.empty((rows, n), dtype=np.float32)
    x2 = np.empty((rows, n), dtype=np.float32)
    dots = np.empty((rows, 3), dtype=np.float32)
    centre = mean if shift is None else shift
    acc = np.empty((5, c), dtype=np.float64)
    for i in range(0, c, rows):  # blocks of rows, not a loop over channels
        j = min(c, i + rows)
        a, b = xc[: j - i], x2[: j - i]
        np.subtract(x[i:j], centre[i:j, None], out=a, casting="same_kind")
        acc[0, i:j] = a.max(axis=-1)
        acc[1, i:j] = a.min(axis=-1)
        np.square(a, out=b)
        # Σx² = x·x, Σx³ = x²·x, Σx⁴ = x²·x²: row dot products (BLAS), no product or sum passes of their own
        np.matmul(a[:, None, :], a[:, :, None], out=dots[: j - i, 0:1, None])
        np.matmul(b[:, None, :], a[:, :, None], out=dots[: j - i, 1:2, None])
        np.matmul(b[:, None, :], b[:, :, None], out=dots[: j - i, 2:3, None])
        acc[2:, i:j] = dots[: j - i].T
    hi, lo = acc[0], acc[1]
    m2, m3, m4 = acc[2] / n, acc[3] / n, acc[4] / n
    rms = np.sqrt(m2)
    peak = np.maximum(hi, -lo) + 0.0  # (+0.0 turns -0.0 into 0.0)
    nonzero = m2 > 0
    safe_m2 = np.where(nonzero, m2, 1.0)
    nan = np.float64(np.nan)
    return TimeDomain(
        mean_g=mean,
        rms_g=rms,
        peak_g=peak,
        peak_to_peak_g=hi - lo,
        crest_factor=np.where(nonzero, peak / np.sqrt(safe_m2), nan),
        kurtosis=np.where(nonzero, m4 / (safe_m2 * safe_m2), nan),
        skewness=np.where(nonzero, m3 / (safe_m2 * np.sqrt(safe_m2)), nan),
    )


def time_domain(x_g: npt.ArrayLike) -> TimeDomain:
    """Time-domain indicators of acceleration frames.

    Parameters
    ----------
    x_g : array_like, shape (channels, samples) or (samples,)
        Acceleration in g.

    Returns
    -------
    TimeDomain
        per-channel arrays of shape (channels,).

    Raises
    ------
    SignalError
        wrong shape, fewer than 2 samples, NaN or infinite samples.

    Examples
    --------
    A sine of amplitude A has r.m.s. A/√2, crest factor √2 and kurtosis 1.5.
    """
    x = as_channels(x_g)
    return centred_moments(x, finite_mean(x))
