"""Typed wrappers over ``scipy.fft`` (single-threaded), the transforms the pipeline uses.

scipy's pocketfft batches rows with SIMD, which makes the many-channel complex transforms of the envelope stage
about twice as fast as ``numpy.fft``; for the real forward transform of float64 frames both are alike.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
import scipy.fft as _sfft

__all__ = ["ifft", "irfft", "rfft"]


def rfft(x: npt.NDArray[Any]) -> npt.NDArray[Any]:
    """Real forward transform along the last axis (float64 → complex128, float32 → complex64)."""
    out: npt.NDArray[Any] = _sfft.rfft(x, axis=-1)
    return out


def irfft(y: npt.NDArray[Any], n: int) -> npt.NDArray[np.float64]:
    """Inverse real transform of ``n`` points along the last axis (numpy's 1/n normalization)."""
    out: npt.NDArray[np.float64] = _sfft.irfft(y, n=n, axis=-1)
    return out


def ifft(y: npt.NDArray[Any], n: int, *, overwrite: bool = False) -> npt.NDArray[Any]:
    """Inverse complex transform of ``n`` points (zero-padded) along the last axis (1/n normalization);
    ``overwrite`` lets the transform reuse ``y``'s memory."""
    out: npt.NDArray[Any] = _sfft.ifft(y, n=n, axis=-1, overwrite_x=overwrite)
    return out
