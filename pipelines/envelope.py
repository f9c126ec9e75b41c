"""Envelope analysis by band selection in the one-sided spectrum (a decimated complex analytic signal).

Method (Randall & Antoni, MSSP 25 (2011) 485–520; FIELD_NOTES §3): the lines of the frame's rfft inside the
demodulation band are shifted to baseband and inverse-transformed alone, at a length ``M`` just large enough for
the envelope frequencies searched.  That is an ideal band-pass filter, the analytic signal and an alias-free
decimation in one small transform; no full-length Hilbert transform is needed.  Scaling:

* the decimated complex signal ``z = (2M/N) · ifft(X[k_lo..k_hi], M)`` has ``|z|`` equal to the magnitude of the
  analytic signal of the band-passed frame (``|scipy.signal.hilbert(bandpass(x))|``) at M evenly spaced times;
* the **envelope spectrum** is the single-sided amplitude spectrum of ``|z|`` with a Hann window,
  ``A = 2 |rfft(w · |z|)| / Σw``, in g (the mean need not be removed: with a Hann window it reaches lines 0 and 1
  only).  It reads the *amplitude* (peak) of each envelope
  component — the same scaling as the check-value method E1 of the project's datasets README, so its values
  apply.  Its line spacing equals the frame's, fs/N.

Defect families: each fundamental (FTF, BPFO, BPFI and, for a rolling-element defect, **2 × BSF**) and its
harmonics are searched within ± the slip tolerance (at least ± 1 line) of h × the kinematic value.  A line's
signal-to-noise ratio is its amplitude over the median of the envelope spectrum in ± 20 % of its frequency (at
least ± 8 lines beyond the search window), excluding the search window itself, in dB (20 log10 of the ratio).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.pipelines import _fft
from edgevib.pipelines.indicators import as_channels, finite_mean
from edgevib.pipelines.spectrum import band_lines, hann_lines, masked_median, window_argmax
from edgevib.pipelines.types import PlanError

__all__ = [
    "HARMONIC_SNR_DB",
    "demodulate",
    "envelope_amplitude_spectrum",
    "envelope_spectrum",
    "search_families",
]

FloatArray = npt.NDArray[np.float64]
ComplexArray = npt.NDArray[np.complex128]

HARMONIC_SNR_DB = 10.0
"""A harmonic counts as found when it stands this far over the local floor (common practice: ~10 dB)."""
FLOOR_SPAN = 0.2  # the floor neighbourhood: ± 20 % of the line frequency
FLOOR_MIN_LINES = 8  # … and at least this many lines beyond the search window on each side
_TINY = 1e-300


def demodulate(spec: ComplexArray, k_lo: int, k_hi: int, m: int) -> npt.NDArray[np.float32]:
    """Unscaled envelope of the band ``k_lo..k_hi`` (rfft lines, inclusive), decimated to ``m`` samples.

    Parameters
    ----------
    spec : ndarray, shape (channels, N//2 + 1) — the frame's unwindowed rfft
    m : int ≥ k_hi − k_lo + 1 — output length (sample rate m·fs/N)

    Returns
    -------
    ndarray, shape (channels, m), float32: ``|ifft(spec[:, k_lo:k_hi+1], m)|``, computed in single precision
    (relative error ~1e-7, far below any envelope floor) because this is the pipeline's second-largest transform.
    Times ``2m/N`` it is the envelope ``|hilbert(bandpass(x))|`` in the unit of the frame (g);
    :func:`envelope_spectrum` applies that factor.
    """
    z = np.zeros((spec.shape[0], m), dtype=np.complex64)
    z[:, : k_hi - k_lo + 1] = spec[:, k_lo : k_hi + 1]  # shift to baseband (and to single precision)
    z = _fft.ifft(z, m, overwrite=True)
    env: npt.NDArray[np.float32] = np.abs(z)
    return env


def envelope_spectrum(env: npt.NDArray[np.floating[Any]], n_samples: int, stop: int) -> FloatArray:
    """Envelope amplitude spectrum, lines ``0 .. stop-1``, from :func:`demodulate`'s output.

    A periodic Hann window is applied in the frequency domain (three taps, exact), and the mean is not
    subtracted: with that window a constant only reaches lines 0 and 1, which are never searched.  Scaling:
    ``A = 2 |rfft(w · e)| / Σw`` for the envelope ``e = (2m/N) · env``, i.e. ``8/N · |rfft(w · env)|``.

    Returns
    -------
    ndarray, shape (channels, stop), in g (peak reading, like method E1)
    """
    spec = _fft.rfft(env)
    lines = hann_lines(spec, min(stop, env.shape[-1] // 2))
    amp: FloatArray = np.abs(lines).astype(np.float64) * (8.0 / n_samples)
    return amp


def fast_length(n: int) -> int:
    """Smallest 2^a·3^b ≥ n (lengths numpy's FFT handles fastest)."""
    best = 1 << max(0, (n - 1).bit_length())
    p3 = 1
    while p3 < best:
        p2 = p3
        while p2 < n:
            p2 *= 2
        best = min(best, p2)
        p3 *= 3
    return best


def min_decimated_length(band_lines_count: int, max_envelope_line: int) -> int:
    """Smallest useful M: the band fits, and the squared envelope stays alias-free up to ``max_envelope_line``
    (its lines are differences of band lines, so M ≥ band + max line suffices)."""
    need = max(band_lines_count + max_envelope_line + 1, 2 * max_envelope_line + 2, 16)
    return fast_length(need)


def envelope_amplitude_spectrum(x_g: npt.ArrayLike, fs_hz: float, band_hz: tuple[float, float],
                                max_frequency_hz: float | None = None) -> tuple[FloatArray, FloatArray]:
    """Envelope spectrum of whole records (see the module docstring for the method and scaling).

    Parameters
    ----------
    x_g : array_like, shape (channels, samples) or (samples,)
    band_hz : demodulation band (lo, hi), 0 < lo < hi < fs/2
    max_frequency_hz : highest envelope frequency needed (default: the band width)

    Returns
    -------
    freqs_hz : ndarray, shape (lines,)
    amplitude_g : ndarray, shape (channels, lines)
    """
    x = as_channels(x_g)
    n = x.shape[-1]
    if not 0 < band_hz[0] < band_hz[1] < fs_hz / 2:
        raise PlanError(f"envelope band {band_hz[0]:g}–{band_hz[1]:g} Hz must lie inside 0–{fs_hz / 2:g} Hz "
                        "(Nyquist)")
    finite_mean(x)
    k_lo, k_hi = band_lines(fs_hz, n, band_hz)
    df = fs_hz / n
    fmax = band_hz[1] - band_hz[0] if max_frequency_hz is None else max_frequency_hz
    top = math.ceil(fmax / df) + 1
    m = min_decimated_length(k_hi - k_lo + 1, top)
    env = demodulate(_fft.rfft(x), k_lo, k_hi, m)  # line 0 (the mean) is outside the band
    amp = envelope_spectrum(env, n, top + 1)
    freqs: FloatArray = np.arange(amp.shape[-1]) * df
    return freqs, amp


def search_families(amp: FloatArray, expected_hz: FloatArray, slip: float, harmonics: int,
                    df_hz: float) -> tuple[FloatArray, FloatArray, FloatArray, npt.NDArray[np.int64]]:
    """Search defect families (fundamental + harmonics) in envelope spectra.

    Parameters
    ----------
    amp : ndarray, shape (channels, lines) — envelope amplitude spectra
    expected_hz : ndarray, shape (channels, families) — kinematic fundamentals; NaN where unknown
    slip : relative search tolerance (± slip × h × expected, at least ± 1 line)
    harmonics : harmonics searched per family (1 = the fundamental only)

    Returns
    -------
    frequency_hz, amplitude_g, snr_db : ndarrays, shape (channels, families) — of the fundamental; NaN where the
        fundamental's window does not fit in the spectrum
    harmonics_found : int ndarray, shape (channels, families) — harmonics (fundamental included) at least
        ``HARMONIC_SNR_DB`` over their local floor
    """
    c, k = amp.shape
    h = np.arange(1, harmonics + 1, dtype=np.float64)
    known = np.isfinite(expected_hz)
    centre_bins = np.where(known, expected_hz, 0.0)[..., None] * h / df_hz  # (c, f, h)
    half = np.maximum(1.0, slip * centre_bins)
    lo = np.ceil(centre_bins - half).astype(np.intp)
    hi = np.floor(centre_bins + half).astype(np.intp)
    shape = lo.shape
    flat = (c, -1)
    peak = window_argmax(amp, lo.reshape(flat), hi.reshape(flat)).reshape(shape)
    span = np.maximum(FLOOR_SPAN * centre_bins, half + FLOOR_MIN_LINES + 1)
    f_lo = np.maximum(1, np.floor(centre_bins - span).astype(np.intp))
    f_hi = np.ceil(centre_bins + span).astype(np.intp)
    floor = masked_median(amp, f_lo.reshape(flat), f_hi.reshape(flat), (lo - 1).reshape(flat),
                          (hi + 1).reshape(flat)).reshape(shape)
    value = np.take_along_axis(amp, peak.reshape(flat), axis=1).reshape(shape)
    fits = known[..., None] & (lo >= 1) & (f_hi <= k - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = np.where(value > _TINY, 20.0 * np.log10(np.maximum(value, _TINY) / np.maximum(floor, _TINY)), 0.0)
    snr = np.where(fits, snr, np.nan)
    found = (fits & (snr >= HARMONIC_SNR_DB)).sum(axis=-1)
    nan = np.float64(np.nan)
    freq = np.where(fits[..., 0], peak[..., 0] * df_hz, nan)
    return freq, np.where(fits[..., 0], value[..., 0], nan), snr[..., 0], found
