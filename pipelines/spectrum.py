"""Spectra from one shared real FFT: Hann-windowed amplitude lines, velocity by frequency-domain integration,
order amplitudes and a shaft-speed estimate.

Scaling (documented once, used everywhere):

* The frame is transformed **once**, unwindowed (``X = rfft(x)``).  The periodic Hann window is applied in the
  frequency domain as the exact three-tap convolution ``Xw[k] = X[k]/2 − X[k−1]/4 − X[k+1]/4``, only over the lines
  that are needed, so the windowed and unwindowed spectra cost one transform.
* **Amplitude lines read r.m.s.**: a sine of amplitude A centred on line k reads ``A/√2`` there
  (``|Xw[k]| · 2/Σw / √2`` with Σw = N/2).
* **Band r.m.s. (velocity, broadband)** sums power over lines with the window's noise bandwidth:
  ``rms² = 2 Σ |Xw[k]|² / (N Σw²)`` with Σw² = 3N/8; by Parseval this equals the r.m.s. of the windowed-and-
  rescaled signal in the band, for sines on or between lines (within about 1 %) and for broadband noise.
* **Order amplitudes** are the same power sum over the three lines around the largest line within the order's
  tolerance, so a line between two bins still reads its r.m.s. within about 1 % (no scalloping loss).
* Velocity: every unwindowed line k ≥ 1 is divided by jω (ω = 2πf, times gₙ·1000 for mm/s), *then* the
  Hann taps are applied — the windowed spectrum of the velocity waveform itself, so a sine reads a/(2πf) exactly
  on or between lines (windowing the acceleration first would bias lines near the band edge by (Δf/f)²).  Only
  lines inside the band are summed, so DC, gravity and drift never blow up (FIELD_NOTES §5).
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from edgevib.pipelines import _fft
from edgevib.pipelines.conditioning import STANDARD_GRAVITY_M_S2
from edgevib.pipelines.indicators import as_channels, finite_mean
from edgevib.pipelines.types import PlanError

__all__ = [
    "amplitude_spectrum",
    "averaged_amplitude_spectrum",
    "hann_lines",
    "velocity_rms_mm_s",
]

FloatArray = npt.NDArray[np.float64]
ComplexArray = npt.NDArray[np.complex128]
IntArray = npt.NDArray[np.intp]

G_MM_S2 = STANDARD_GRAVITY_M_S2 * 1000.0  # 1 g in mm/s²
SPEED_MIN_PROMINENCE = 5.0  # an estimated speed's 1× line stands ≥ 14 dB over its local floor (common practice)
SPEED_MIN_SHARE = 0.25  # … and reaches at least a quarter (−12 dB) of the strongest velocity line in the range
SPEED_CANDIDATES = 16  # best-scoring candidates examined
SPEED_MIN_QUALITY = 0.5  # below this the estimate is ambiguous (see estimate_speed_hz)
SPEED_RELATED_TOLERANCE = 0.03  # candidates whose ratio is within ±3 % of 1, 2, 3, 4 (or inverse) are related
SPEED_CAGE_TOLERANCE = 0.03  # FTF within ± 3 % (bearing slip 1–2 %, Randall & Antoni 2011, plus the estimate's)
SPEED_CAGE_SHAFT_SHARE = 0.1  # a shaft line beneath a dominant cage series still reaches −20 dB of it (from memory)
SPEED_CAGE_LEAD = 0.005  # a shaft may read this far below winner / (k × FTF) (the interpolation's error)
SPEED_HARMONIC_SHARE = 0.5  # a clear line at 2× or 3× the estimate this strong (re its 1×) makes it ambiguous
SPEED_SUBHARMONIC_SHARE = 0.25  # ... and one at 1/2 or 1/3 of it this strong
SUBSYNCHRONOUS = (0.35, 0.49)  # ratios of a sub-synchronous line (cage, oil whirl) to the shaft speed
SPEED_RELATED_PROMINENCE = 2.0  # ... standing this far (6 dB) over its floor


def hann_lines(spec: npt.NDArray[Any], stop: int, *, scale: float = 1.0) -> npt.NDArray[Any]:
    """Lines ``0 .. stop-1`` of the periodic-Hann-windowed spectrum, from the unwindowed rfft ``spec``.

    Parameters
    ----------
    spec : ndarray, shape (..., N//2 + 1), complex
        ``numpy.fft.rfft`` of the unwindowed frames (along the last axis).
    stop : int
        number of lines wanted, 2 ≤ stop ≤ N//2.
    scale : float
        a factor applied to the result.  The lines are formed as X[k−1] + X[k+1] − 2 X[k] (−4 × the Hann lines)
        and multiplied by −``scale``/4: ``scale=-4`` returns that sum itself, without the multiplying pass (for a
        caller that folds the factor into one of its own).  Scaling by a power of two commutes with rounding, so
        the default gives the same values as ½ X[k] − ¼ (X[k−1] + X[k+1]).

    Returns
    -------
    ndarray, shape (..., stop), complex — equal to ``scale × rfft(x * w)[..., :stop]`` with
    ``w[n] = 0.5 − 0.5 cos(2πn/N)``.
    """
    ext = spec[..., : stop + 1]
    out = np.empty((*spec.shape[:-1], stop), dtype=spec.dtype)
    np.add(ext[..., : stop - 1], ext[..., 2 : stop + 1], out=out[..., 1:])  # X[k-1] + X[k+1]
    out[..., 0] = ext[..., 1].real * 2.0  # X[-1] + X[1] = 2 Re X[1] for a real frame
    np.subtract(out, ext[..., :stop] * 2.0, out=out)
    if scale != -4.0:
        out *= -0.25 * scale
    return out


def _power_to_ms_factor(n_samples: int) -> float:
    """Factor turning one-sided Σ|Xw|² (periodic Hann) into mean square: 2/(N·Σw²), Σw² = 3N/8."""
    return 16.0 / (3.0 * n_samples * n_samples)


def amplitude_spectrum(x_g: npt.ArrayLike, fs_hz: float, *,
                       scaling: Literal["rms", "peak"] = "rms") -> tuple[FloatArray, FloatArray]:
    """Hann-windowed single-sided amplitude spectrum of acceleration frames.

    Parameters
    ----------
    x_g : array_like, shape (channels, samples) or (samples,)
    fs_hz : float
    scaling : ``"rms"`` (default; a sine on a line reads its r.m.s.) or ``"peak"`` (reads its amplitude).

    Returns
    -------
    freqs_hz : ndarray, shape (samples//2 + 1,)
    amplitude_g : ndarray, shape (channels, samples//2 + 1); the mean is removed first.
    """
    x = as_channels(x_g)
    _check_fs(fs_hz)
    xc = x - finite_mean(x)[:, None]
    n = x.shape[-1]
    w = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)
    amp: FloatArray = np.abs(_fft.rfft(xc * w)) * (2.0 / w.sum())
    amp[:, 0] /= 2.0
    if n % 2 == 0:
        amp[:, -1] /= 2.0
    if scaling == "rms":
        amp /= math.sqrt(2.0)
    elif scaling != "peak":
        raise PlanError(f"scaling {scaling!r} is not 'rms' or 'peak'")
    freqs: FloatArray = np.fft.rfftfreq(n, 1.0 / fs_hz).astype(np.float64)
    return freqs, amp


def averaged_amplitude_spectrum(x_g: npt.ArrayLike, fs_hz: float, segment_samples: int, *,
                                overlap: float = 0.5,
                                scaling: Literal["rms", "peak"] = "rms") -> tuple[FloatArray, FloatArray]:
    """Power-averaged (Welch-style) amplitude spectrum over Hann segments of ``segment_samples``.

    Each segment's amplitude spectrum (as :func:`amplitude_spectrum`) is squared, the squares averaged over the
    segments, and the square root returned: steady lines keep their r.m.s. reading while noise fluctuations shrink.

    Returns
    -------
    freqs_hz : ndarray, shape (segment_samples//2 + 1,)
    amplitude_g : ndarray, shape (channels, segment_samples//2 + 1)
    """
    x = as_channels(x_g)
    n = x.shape[-1]
    if not 2 <= segment_samples <= n:
        raise PlanError(f"segment of {segment_samples} samples must be between 2 and the record's {n} samples")
    if not 0.0 <= overlap < 1.0:
        raise PlanError(f"overlap {overlap!r} must be in 0 ≤ overlap < 1")
    step = max(1, round(segment_samples * (1.0 - overlap)))
    starts = range(0, n - segment_samples + 1, step)
    segs = np.stack([x[:, s : s + segment_samples] for s in starts], axis=1)  # (channels, segments, samples)
    c, m, _ = segs.shape
    freqs, amp = amplitude_spectrum(segs.reshape(c * m, segment_samples), fs_hz, scaling=scaling)
    power = (amp.reshape(c, m, -1) ** 2).mean(axis=1)
    return freqs, np.sqrt(power)


def _check_fs(fs_hz: float) -> None:
    if not math.isfinite(fs_hz) or fs_hz <= 0:
        raise PlanError(f"sample rate {fs_hz!r} Hz must be finite and > 0")


def band_lines(fs_hz: float, n_samples: int, band_hz: tuple[float, float]) -> tuple[int, int]:
    """First and last (inclusive) rfft line inside ``band_hz``; lines start at 1 (DC excluded)."""
    df = fs_hz / n_samples
    lo = max(1, math.ceil(band_hz[0] / df - 1e-9))
    hi = min(n_samples // 2, math.floor(band_hz[1] / df + 1e-9))
    return lo, hi


def velocity_rms_mm_s(x_g: npt.ArrayLike, fs_hz: float,
                      band_hz: tuple[float, float] = (10.0, 1000.0)) -> FloatArray:
    """Broadband velocity r.m.s. in mm/s over ``band_hz`` by frequency-domain integration (Hann window).

    A 1 g peak sine at 50 Hz gives 31.22 mm/s peak = 22.07 mm/s r.m.s. (FIELD_NOTES §5).

    Returns
    -------
    ndarray, shape (channels,)
    """
    x = as_channels(x_g)
    _check_fs(fs_hz)
    n = x.shape[-1]
    lo, hi = band_lines(fs_hz, n, band_hz)
    if hi < lo or hi >= n // 2:
        raise PlanError(f"velocity band {band_hz[0]:g}–{band_hz[1]:g} Hz holds no lines below Nyquist "
                        f"{fs_hz / 2:g} Hz at resolution {fs_hz / n:g} Hz")
    finite_mean(x)
    spec = _fft.rfft(x)
    vel = hann_lines(spec[:, : hi + 2] * integration_coefficients(fs_hz, n, hi + 2), hi + 1)
    vel_pow = vel.real[:, lo:] ** 2 + vel.imag[:, lo:] ** 2
    rms: FloatArray = np.sqrt(vel_pow.sum(axis=-1) * _power_to_ms_factor(n))
    return rms


def integration_coefficients(fs_hz: float, n_samples: int, stop: int) -> ComplexArray:
    """``gₙ·1000 / (jω)`` for rfft lines ``0 .. stop-1`` (0 at DC): g → mm/s by frequency-domain integration."""
    k = np.arange(stop, dtype=np.float64)
    coef = np.zeros(stop, dtype=np.complex128)
    coef[1:] = G_MM_S2 / (2j * np.pi * k[1:] * fs_hz / n_samples)
    return coef


# ----------------------------------------------------------------------------------- search helpers


def _gather(spec: FloatArray, idx: IntArray) -> FloatArray:
    """``spec[row, idx[row, ...]]`` for every row (``idx`` shape (channels, ...)): one ``take`` on the flattened
    array, several times cheaper than indexing with two broadcast index arrays.  Indices outside ``0 … k−1`` read
    some other value of ``spec`` (callers mask them)."""
    c, k = spec.shape
    if c > 1:
        idx = idx + np.arange(0, c * k, k).reshape((c,) + (1,) * (idx.ndim - 1))
    out: FloatArray = spec.ravel().take(idx, mode="clip")
    return out


_NEIGHBOURS = np.arange(-1, 2)
_MIDDLE = np.array([1, 0])  # (count − 1) // 2 and count // 2: the middle of a sorted window
_MIDDLE_WHOLE = np.array([-3, -2])  # span − 3 and span − 2: the middle of a whole floor window (2 × (span − 2))
for _a in (_NEIGHBOURS, _MIDDLE, _MIDDLE_WHOLE):
    _a.flags.writeable = False


def _windows(k: int, lo: IntArray, hi: IntArray) -> tuple[IntArray, npt.NDArray[np.bool_]]:
    """Line indices ``lo..hi`` per window, padded to the widest one (the padding may run past the last line), and
    the mask of the real ones."""
    lo = np.minimum(np.maximum(lo, 0), k - 1)
    hi = np.minimum(np.maximum(hi, lo), k - 1)
    width = int((hi - lo).max()) + 1 if lo.size else 1
    idx = lo[..., None] + window_offsets(0, width)
    valid = idx <= hi[..., None]
    return idx, valid


@lru_cache(maxsize=256)
def window_offsets(start: int, stop: int) -> IntArray:
    """``arange(start, stop)``, read-only and kept per pair: a search window's line offsets (built per call
    otherwise)."""
    out = np.arange(start, stop)
    out.flags.writeable = False
    return out


def window_argmax(spec: FloatArray, lo: IntArray, hi: IntArray) -> IntArray:
    """Index of the largest value of ``spec`` within ``lo..hi`` (inclusive, per row).

    Parameters
    ----------
    spec : ndarray, shape (channels, lines)
    lo, hi : int ndarrays, shape (channels, L); clipped to the valid line range, ``hi ≥ lo`` assumed.

    Returns
    -------
    int ndarray, shape (channels, L)
    """
    idx, valid = _windows(spec.shape[1], lo, hi)
    vals = np.where(valid, _gather(spec, idx), -np.inf)
    out: IntArray = idx[..., 0] + vals.argmax(axis=-1)  # (a window's lines are consecutive, never clipped)
    return out


def power3(power: FloatArray, idx: IntArray) -> FloatArray:
    """Sum of ``power`` over lines ``idx−1 .. idx+1`` (per row; ``power`` shape (channels, lines))."""
    k = power.shape[1]
    j = idx[..., None] + np.arange(-1, 2)
    inside = (j >= 0) & (j < k)
    vals = np.where(inside, _gather(power, np.minimum(np.maximum(j, 0), k - 1)), 0.0)
    out: FloatArray = vals.sum(axis=-1)
    return out


def order_amplitudes_mm_s(vel_pow: FloatArray, shaft_hz: FloatArray, orders: tuple[float, ...],
                          tolerance: float, df_hz: float, n_samples: int,
                          lines: IntArray | None = None) -> FloatArray:
    """Velocity r.m.s. (mm/s) of each order line; NaN where the speed is unknown or the line out of range.

    Parameters
    ----------
    vel_pow : ndarray, shape (channels, lines) — |velocity line|² (Hann lines, mm/s units before scaling)
    shaft_hz : ndarray, shape (channels,) — NaN for unknown
    orders : the orders (multiples of shaft speed)
    tolerance : relative search tolerance around each order (at least ±1 line)
    lines : int ndarray, shape (channels,) — each row's own number of lines (rows of different plans; default:
        all of ``vel_pow``'s)

    Returns
    -------
    ndarray, shape (channels, len(orders))
    """
    k: int | IntArray = vel_pow.shape[1] if lines is None else lines[:, None]
    known = np.isfinite(shaft_hz)
    f = np.where(known, shaft_hz, 0.0)
    centre_bins = f[:, None] * np.asarray(orders)[None, :] / df_hz  # (channels, orders)
    half = np.maximum(1.0, tolerance * centre_bins)
    lo = np.ceil(centre_bins - half).astype(np.intp)
    hi = np.floor(centre_bins + half).astype(np.intp)
    in_range = known[:, None] & (lo >= 1) & (hi <= k - 2)
    peak = window_argmax(vel_pow, lo, hi)
    amp = np.sqrt(power3(vel_pow, peak) * _power_to_ms_factor(n_samples))
    return np.where(in_range, amp, np.nan)


def estimate_speed_hz(vel_pow: FloatArray, acc_pow: FloatArray, speed_range_hz: tuple[float, float],
                      df_hz: float, harmonics: int = 3, *, cage_ratio: float | FloatArray | None = None,
                      tolerance: float = 0.03) -> tuple[FloatArray, FloatArray]:
    """Shaft-speed estimate per channel with its quality; NaN where no clear or no unambiguous 1× line exists.

    A harmonic sum over the velocity spectrum (where the shaft lines dominate): every candidate f0 in
    ``speed_range_hz`` (steps of a third of a line) scores the sum of the largest amplitudes within ±1 line of
    f0, 2f0 … (``harmonics``), minus the same at the half-way points 0.5f0, 1.5f0 … (which rejects the octave
    errors 2f0 and f0/2 when harmonics are present).  The ``SPEED_CANDIDATES`` best distinct candidates (local
    maxima of the score) are checked: a candidate's 1× line, refined on the acceleration spectrum with the Hann
    two-line interpolation δ = ±(2α − 1)/(α + 1) (α the larger neighbour over the peak; exact for one tone), must
    stand at least ``SPEED_MIN_PROMINENCE`` times (14 dB) over the median acceleration amplitude within ±25 % of
    its frequency and reach ``SPEED_MIN_SHARE`` (−12 dB) of the strongest velocity line in the speed range
    (common practice: 1× dominates the velocity spectrum of a running machine).  The best-scoring valid
    candidate wins — except that, with ``cage_ratio`` (the bearing's FTF as a multiple of shaft speed) given, a
    winner that is the cage line or one of its harmonics (k × FTF ± 3 %, k = 1 … ``CAGE_HARMONICS``: a cage
    fault's series) of another valid candidate gives way to that candidate, unless that candidate is itself on the
    winner's cage series (then each reading explains a line of the other, and the score decides) or k × FTF puts
    it on a whole order of the winner (the harmonic tests below judge those).

    **Quality** ``q = 1 − s_r / s_w`` (0–1): ``s_w`` the winner's score, ``s_r`` the best score of a valid rival
    that is not harmonically related to it (a frequency ratio not within ± 3 % of 1, 2, 3, 4 or their inverses;
    with ``cage_ratio``, not related to the winner's cage line either), 0 when there is none — so q = 1 means no
    other line pattern explains the spectrum, q → 0 that two unrelated patterns explain it equally well.  q is 0
    when the winner lies at 0.35–0.49 × another valid candidate (it may be that machine's sub-synchronous line:
    a cage fault's FTF, oil whirl — without ``cage_ratio`` nothing tells them apart), and also when, inside the
    speed range, a clear line at 2 or 3 × the winner reaches half its 1× line (the winner may be a sub-harmonic
    of that speed: looseness, rub) or one at 1/2 or 1/3 of it (6 dB over its floor suffices there) a quarter (the
    winner may be the 2× or 3× of a misaligned machine at that speed): the spectrum alone cannot tell these
    apart, a narrower speed range can.  With ``cage_ratio``, q is also 0 when clear lines (local maxima
    ``SPEED_MIN_PROMINENCE`` over their floor, not the winner's own cage lines) stand at both 1/3 and 2/3 of the
    winner below the speed range while winner / (3 × FTF) lies inside it: the winner may be the 3 × FTF of a cage
    fault whose shaft line is too weak to be a candidate; and when a clear line reaching ``SPEED_CAGE_SHAFT_SHARE``
    of the winner's velocity stands where a shaft would run whose k-th cage line the winner is (winner / (k × FTF),
    up to 3 % above for the cage's slip; :func:`_cage_parent_found`): the winner may be that shaft's cage line.
    Below ``SPEED_MIN_QUALITY`` the estimate is NaN (ambiguous): a confident wrong speed would move every order and
    defect frequency with it.

    Parameters
    ----------
    vel_pow, acc_pow : ndarrays, shape (channels, lines) — Hann-windowed velocity and acceleration line powers;
        lines must reach ``harmonics · speed_range_hz[1]`` plus 2 lines.
    cage_ratio : None, a float, or an ndarray of shape (channels,) — one per row (rows of different bearings; NaN:
        none), each row's result then that of the row with its own ratio.

    Returns
    -------
    shaft_hz, quality : ndarrays, shape (channels,) — NaN where no speed is determined (quality is still given
        where a winner was found but judged ambiguous, NaN where no candidate was valid)
    """
    amp = np.sqrt(vel_pow)
    c, k = amp.shape
    amp3 = amp.copy()
    inner = amp3[:, 1:-1]  # the largest of each line and its two neighbours, formed in place
    np.maximum(amp[:, :-2], inner, out=inner)
    np.maximum(inner, amp[:, 2:], out=inner)
    cand, lines, inside = _speed_candidates(speed_range_hz[0], speed_range_hz[1], df_hz, k, harmonics)
    g = amp3.take(lines, axis=1)  # (channels, 2 × harmonics, candidates): lines at h and h − ½ × candidates
    score = g[:, 0].copy()
    score -= g[:, 1]
    for h in range(1, harmonics):  # (summed in this order, harmonic by harmonic)
        score += g[:, 2 * h]
        score -= g[:, 2 * h + 1]
    # the best few distinct candidates (local maxima of the score), best first
    local = np.ones(score.shape, dtype=bool)
    local[:, 1:] &= score[:, 1:] >= score[:, :-1]
    local[:, :-1] &= score[:, :-1] >= score[:, 1:]
    order = np.where(local, -score, np.inf).argsort(axis=-1)[:, :SPEED_CANDIDATES]  # (channels, K)
    cand_score = _gather(np.where(local, score, -np.inf), order)
    b = np.rint(cand[order]).astype(np.intp)
    acc = np.sqrt(acc_pow)
    peak, f_peak, f_est, mid, _ = _refined_lines(acc, b, df_hz, inside=inside)
    valid = (mid > 0) & (cand_score > 0)
    # ... and a 1× line is among the strongest velocity lines of the speed range (common practice: 1× dominates
    # the velocity spectrum of a running machine), which rejects patterns of other lines that happen to fit
    lo_line = max(1, math.floor(speed_range_hz[0] / df_hz))
    hi_line = min(k, math.ceil(speed_range_hz[1] / df_hz) + 1)
    strongest = amp[:, lo_line:hi_line].max(axis=-1)
    line_1x = amp3.ravel().take(f_peak)  # (amp3 has the shape of acc)
    valid &= line_1x >= SPEED_MIN_SHARE * strongest[:, None]
    valid &= (f_est >= speed_range_hz[0] * 0.999) & (f_est <= speed_range_hz[1] * 1.001)
    # (the prominence over the floor last, and only where the rest holds: the floor costs most)
    if valid.any():
        rest = valid.copy()
        floor = _floor_around(acc.ravel(), k, peak[rest], f_peak[rest])
        valid[rest] = mid[rest] >= SPEED_MIN_PROMINENCE * floor
    rows = np.arange(c)
    first = valid.argmax(axis=-1)
    f_w = f_est[rows, first]
    # a ratio per row: the row's values broadcast where the scalar's do (``cage`` beside ``f_w[:, None]``,
    # ``cage_flat`` beside ``f_w``), parents per row (c, P), and the rows that have any (the others are masked)
    cage: float | FloatArray | None = None
    cage_flat: float | FloatArray | None = None
    has_parents: npt.NDArray[np.bool_] | None = None
    if cage_ratio is not None and np.ndim(cage_ratio):
        cage_flat = np.asarray(cage_ratio, dtype=np.float64)
        cage = cage_flat[:, None]
        parents, has_parents = _cage_parents_rows(cage_flat)
        parents_lead = parents.T[:, :, None]  # (P, c, 1)
    elif cage_ratio is not None:
        cage = cage_flat = float(cage_ratio)
        parents = _cage_parents(cage)
        parents_lead = parents[:, None, None]
    if cage is not None and parents.size:
        # a winner on the cage line of another valid candidate, or on one of its first harmonics, is that
        # candidate's FTF series, not a shaft speed: the winner gives way to it (the best such candidate)
        tol = SPEED_CAGE_TOLERANCE
        # (the small axes — parents, cage orders, related ratios — lead, here and below: a reduction over a
        # leading axis costs a fraction of one over a short last axis)
        cage_of = valid & (np.abs(f_w[None, :, None] / (f_est * parents_lead) - 1.0) <= tol).any(axis=0)
        # (not to a candidate on the winner's own cage series: each reading explains a line of the other)
        cage_of &= ~(np.abs(f_est / (f_w[:, None] * cage * _CAGE_ORDERS_LEADING) - 1.0)
                     <= tol).any(axis=0)
        if has_parents is not None:
            cage_of &= has_parents[:, None]
        has_shaft = cage_of.any(axis=-1)
        first = np.where(has_shaft, cage_of.argmax(axis=-1), first)
        f_w = f_est[rows, first]
    s_w = cand_score[rows, first]
    a_w = line_1x[rows, first]
    # candidates related to the winner (and, with cage_ratio, to the winner's cage line and its harmonics)
    if cage_flat is None:
        f0 = f_w[None, :]
    elif has_parents is None:
        f0 = _one_and(float(cage_flat))[:, None] * f_w  # (2, channels)
    else:
        f0 = np.stack([f_w, cage_flat * f_w])  # (1 × f_w is f_w; a NaN ratio relates nothing)
    ratio = f_est / f0[:, :, None]  # (1 or 2, channels, K)
    near = (np.abs(ratio - _RELATED_LEADING) <= _RELATED_TOL_LEADING) | \
        (np.abs(1.0 / ratio - _RELATED_LEADING) <= _RELATED_TOL_LEADING)  # (4, 1 or 2, channels, K)
    explained = near.reshape(-1, c, near.shape[-1]).any(axis=0)
    rival = np.where(valid & ~explained, cand_score, 0.0).max(axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        quality = np.minimum(np.maximum(1.0 - rival / s_w, 0.0), 1.0)  # (np.clip costs ten times as much)
        # a winner at 0.35–0.49 × another valid candidate may be that machine's sub-synchronous line — a cage
        # fault's FTF (about 0.4 ×) or oil whirl (0.42–0.48 ×) — rather than its shaft (common practice)
        sub = valid & (f_w[:, None] / f_est >= SUBSYNCHRONOUS[0]) & (f_w[:, None] / f_est <= SUBSYNCHRONOUS[1])
    quality[sub.any(axis=-1)] = 0.0  # (in place: cheaper than np.where, here and below)
    # the line searches after the winner, in one: its readings 1×, 2×, 3×, 1/2× and 1/3× (see below), and with
    # cage_ratio the lines of the two cage checks — at 1/3 and 2/3 of the winner, and the largest line of each
    # window where a shaft would run whose cage series holds the winner (one window search and one median over
    # (channels, 5 + 2 + parents) windows)
    parent_line = cage is not None and parents.size > 0
    f_q = f_w[:, None] * (_READINGS if cage is None else _READINGS_THIRDS)
    if parent_line:
        p_s, f_s = _cage_parent_lines(acc, f_w, parents, df_hz)
        f_q = np.concatenate([f_q, p_s * df_hz], axis=1)
    k_q = np.minimum(np.maximum(np.rint(f_q / df_hz).astype(np.intp), 2), k - 3)
    p_q, fp_q, f_q_ref, a_q, beside_q = _refined_lines(acc, k_q, df_hz, inside=k >= 5)
    floor_q = _floor_around(acc.ravel(), k, p_q, fp_q)
    # harmonically related readings: a clear line at 2 or 3 × the winner at least half as strong as the winner's
    # 1× line — the winner may be a sub-harmonic (looseness, rub) of that speed — or at 1/2 or 1/3 of it at least
    # a quarter as strong — the winner may be the 2× or 3× of a misaligned machine at that speed.  Inside the
    # speed range the spectrum alone cannot tell them apart (a narrower range can).  The winner's 1× line and its
    # harmonics 2× and 3× refine it below.
    n_r = _READINGS.size
    f_r = f_q[:, :n_r]  # (channels, 5): 1×, 2×, 3×, 1/2×, 1/3× the winner
    f_ref, a_ref, floor_ref = f_q_ref[:, :n_r], a_q[:, :n_r], floor_q[:, :n_r]
    f_m = f_r[:, 1:]
    clear_m = (a_ref[:, 1:] >= _READING_PROMINENCE * floor_ref[:, 1:]) & \
        (amp3.ravel().take(fp_q[:, 1:n_r]) >= _READING_SHARE * a_w[:, None])
    in_range = (f_m >= speed_range_hz[0]) & (f_m <= speed_range_hz[1])
    quality[(clear_m & in_range).any(axis=-1)] = 0.0
    if cage is not None and cage_flat is not None:
        # ... and, below the range, lines at 1/3 and 2/3 of it as clear as a 1× line, where the winner / (3 × FTF)
        # lies in the range: the winner may be the 3 × FTF of a cage fault whose shaft line is too weak to be a
        # candidate (no machine series puts lines at both)
        shaft_of = f_w / (3.0 * cage_flat)
        maybe = ((f_w / 3.0 < speed_range_hz[0]) & (shaft_of >= speed_range_hz[0] * (1.0 - SPEED_CAGE_TOLERANCE))
                 & (shaft_of <= speed_range_hz[1] * (1.0 + SPEED_CAGE_TOLERANCE)))
        if maybe.any():  # (the verdict only where the winner's place allows it: most calls skip it)
            t = slice(n_r, n_r + _THIRDS.size)
            f_t, a_t, floor_t = f_q_ref[:, t], a_q[:, t], floor_q[:, t]
            own = (np.abs(f_t / (f_w[:, None] * cage * _CAGE_ORDERS_LEADING) - 1.0)
                   <= SPEED_CAGE_TOLERANCE).any(axis=0)  # (not the winner's own cage lines, nor their skirts)
            peak_t = a_t >= beside_q[:, t]
            thirds = (a_t > 0) & peak_t & (a_t >= SPEED_MIN_PROMINENCE * floor_t) & ~own
            quality[thirds.all(axis=-1) & maybe] = 0.0
    if parent_line and cage is not None:
        # a clear line where a shaft would run whose cage series holds the winner, that is no valid candidate (its
        # 1× line weaker than a strong cage series): the winner may be that shaft's cage line
        half_clear = a_ref[:, 3] >= SPEED_RELATED_PROMINENCE * floor_ref[:, 3]  # (a looseness series' ½× line)
        s = slice(n_r + _THIRDS.size, None)
        parent = _cage_parent_found(acc, f_w, a_ref[:, 0], cage, parents, speed_range_hz, df_hz, half_clear,
                                    p_s, f_s, f_q_ref[:, s], a_q[:, s], floor_q[:, s])
        if has_parents is not None:
            parent &= has_parents
        quality[parent] = 0.0
    any_valid = valid[rows, first]
    quality[~any_valid] = np.nan
    ok = any_valid & (quality >= SPEED_MIN_QUALITY)  # (NaN compares False, silently)
    h = min(harmonics, 3)
    refined, precise = _harmonic_refinement(f_w, f_ref[:, :h], a_ref[:, :h], floor_ref[:, :h], df_hz, tolerance)
    refined[~(ok & precise)] = np.nan
    return refined, quality


_RELATED = np.array([1.0, 2.0, 3.0, 4.0])  # frequency ratios of harmonically related candidates
_READINGS = np.array([1.0, 2.0, 3.0, 0.5, 1.0 / 3.0])  # the winner's 1× and harmonics, then its sub-harmonics
# (for the readings after the 1×: a clear line needs this prominence over its floor and this share of the 1×)
_READING_PROMINENCE = np.array([SPEED_MIN_PROMINENCE, SPEED_MIN_PROMINENCE, SPEED_RELATED_PROMINENCE,
                                SPEED_RELATED_PROMINENCE])
_READING_SHARE = np.array([SPEED_HARMONIC_SHARE, SPEED_HARMONIC_SHARE, SPEED_SUBHARMONIC_SHARE,
                           SPEED_SUBHARMONIC_SHARE])
for _a in (_READINGS, _READING_PROMINENCE, _READING_SHARE):
    _a.flags.writeable = False
_RELATED_TOL = SPEED_RELATED_TOLERANCE * _RELATED
_RELATED.flags.writeable = False
_RELATED_TOL.flags.writeable = False
_RELATED_LEADING = _RELATED[:, None, None, None]  # (the ratios on a leading axis)
_RELATED_TOL_LEADING = _RELATED_TOL[:, None, None, None]


CAGE_HARMONICS = 3  # a cage fault's FTF series: the FTF line and its harmonics 2× and 3× (Randall & Antoni 2011)


@lru_cache(maxsize=64)
def _one_and(ratio: float) -> FloatArray:
    """``[1, ratio]``, read-only and kept: a winner and its cage line at once."""
    out = np.array([1.0, ratio])
    out.flags.writeable = False
    return out


@lru_cache(maxsize=64)
def _cage_parents(cage_ratio: float) -> FloatArray:
    """The ratios k × ``cage_ratio`` (k = 1 … ``CAGE_HARMONICS``) by which a winner may be the k-th cage line of a
    shaft at winner / (k × ``cage_ratio``), leaving out a k that puts that shaft on a whole order of the winner (the
    harmonic tests judge those); a plan's constants: kept."""
    out = np.array([k * cage_ratio for k in range(1, CAGE_HARMONICS + 1)
                    if abs(1.0 / (k * cage_ratio * max(1, round(1.0 / (k * cage_ratio)))) - 1.0)
                    > SPEED_CAGE_TOLERANCE], dtype=np.float64)
    out.flags.writeable = False
    return out


def _cage_parents_rows(cage_ratio: FloatArray) -> tuple[FloatArray, npt.NDArray[np.bool_]]:
    """:func:`_cage_parents` per row (NaN: no ratio), shape (channels, P) with P the most any row has, a row's
    missing ones repeating its first (a repeated parent changes no verdict); and the rows that have any (the
    others read a placeholder, 1, and are to be masked)."""
    rows = [_cage_parents(r) if math.isfinite(r) else _NO_PARENTS for r in cage_ratio.tolist()]
    width = max(p.size for p in rows)
    out = np.ones((len(rows), width))
    for i, p in enumerate(rows):
        if p.size:
            out[i] = p[np.minimum(np.arange(width), p.size - 1)]
    has: npt.NDArray[np.bool_] = np.array([p.size > 0 for p in rows], dtype=bool)
    return out, has


_NO_PARENTS = np.zeros(0)
_NO_PARENTS.flags.writeable = False


def _cage_parent_lines(acc: FloatArray, f_w: FloatArray, parents: FloatArray,
                       df_hz: float) -> tuple[IntArray, FloatArray]:
    """The largest line where a shaft would run whose k-th cage line is the winner ``f_w`` (shape (channels,)):
    at ``f_w / parents`` (:func:`_cage_parents`) or above it by the cage's slip, from ``SPEED_CAGE_LEAD`` below to
    ``SPEED_CAGE_TOLERANCE`` above (at least one line each side); and that shaft's frequency ``f_w / parents``, both
    of shape (channels, parents).  The line's refined reading (:func:`_refined_lines` at it) is judged by
    :func:`_cage_parent_found`."""
    k = acc.shape[1]
    f_p: FloatArray = np.where(np.isfinite(f_w), f_w, 0.0)[:, None] / parents  # (channels, parents)
    b = f_p / df_hz
    nearest = np.rint(b)
    lo = np.minimum(np.floor(b * (1.0 - SPEED_CAGE_LEAD)), nearest - 1).astype(np.intp)
    hi = np.maximum(np.ceil(b * (1.0 + SPEED_CAGE_TOLERANCE)), nearest + 1).astype(np.intp)
    out: IntArray = np.minimum(np.maximum(window_argmax(acc, np.maximum(lo, 2), np.minimum(hi, k - 3)), 1), k - 2)
    return out, f_p


def _cage_parent_found(acc: FloatArray, f_w: FloatArray, a_w: FloatArray, cage_ratio: float | FloatArray,
                       parents: FloatArray,
                       speed_range_hz: tuple[float, float], df_hz: float, half_clear: npt.NDArray[np.bool_],
                       p: IntArray, f_p: FloatArray, f_pr: FloatArray, a_p: FloatArray,
                       floor_p: FloatArray) -> npt.NDArray[np.bool_]:
    """Whether a clear line stands where a shaft would run whose k-th cage line is the winner ``f_w`` (shape
    (channels,), its acceleration line ``a_w``).

    The shaft lies at ``f_w / parents`` (:func:`_cage_parents`) or above it by the cage's slip (the cage lags its
    kinematic speed by 1–2 %, Randall & Antoni 2011): the largest line from 0.5 % below to ``SPEED_CAGE_TOLERANCE``
    above (at least one line each side) counts when it is a local maximum ``SPEED_MIN_PROMINENCE`` over its floor,
    reaches ``SPEED_CAGE_SHAFT_SHARE`` of the winner's velocity, lies in the speed range (± the tolerance: a shaft
    at its edge), and is neither one of the winner's own cage lines (j × FTF, j = 1 … ``CAGE_HARMONICS``), nor the
    winner's line, nor — where the winner's ½× line is clear (``half_clear``: a looseness series) — at a half order
    of the winner.  Shape (channels,).

    ``p`` (that line) and ``f_p`` (the shaft) come from :func:`_cage_parent_lines`; ``f_pr``, ``a_p``, ``floor_p``
    are the line's refined frequency, amplitude and floor (:func:`_refined_lines` and :func:`_floor_around` at
    ``p``); all of shape (channels, parents).
    """
    tol = SPEED_CAGE_TOLERANCE
    f_w0 = np.where(np.isfinite(f_w), f_w, 0.0)[:, None]
    near = (f_pr >= f_p * (1.0 - SPEED_CAGE_LEAD) - df_hz) & (f_pr <= f_p * (1.0 + tol) + df_hz)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = a_p / f_pr >= SPEED_CAGE_SHAFT_SHARE * (a_w / f_w0[:, 0])[:, None]  # velocity ∝ acceleration / f
        own = (np.abs(f_pr / (f_w0 * cage_ratio * _CAGE_ORDERS_LEADING) - 1.0) <= tol).any(axis=0)
        own |= np.abs(f_pr - f_w0) <= df_hz
        half = 2.0 * f_pr / f_w0
        own |= half_clear[:, None] & (np.abs(half / np.maximum(np.rint(half), 1.0) - 1.0) <= tol)
    found = (a_p > 0) & near & share & (a_p >= SPEED_MIN_PROMINENCE * floor_p) & ~own \
        & (f_pr >= speed_range_hz[0] * (1.0 - tol)) & (f_pr <= speed_range_hz[1] * (1.0 + tol))
    # a local maximum: where p ≤ k − 3 the refined line is the largest of p and its two neighbours (its search
    # window), so it is one whenever it is a number (NaN fails a_p > 0); only at the last lines is it checked
    if int(p.max()) >= acc.shape[1] - 2:
        found &= a_p >= np.maximum(_gather(acc, p - 1), _gather(acc, p + 1))
    out: npt.NDArray[np.bool_] = np.asarray(found.any(axis=-1))
    return out


_CAGE_ORDERS = np.arange(1, CAGE_HARMONICS + 1, dtype=np.float64)
_CAGE_ORDERS_LEADING = _CAGE_ORDERS[:, None, None]  # (the orders on a leading axis)
_THIRDS = np.array([1.0 / 3.0, 2.0 / 3.0])
_READINGS_THIRDS = np.concatenate([_READINGS, _THIRDS])  # the readings, then the cage check's thirds
for _a in (_CAGE_ORDERS, _CAGE_ORDERS_LEADING, _THIRDS, _READINGS_THIRDS):
    _a.flags.writeable = False


@lru_cache(maxsize=64)
def _speed_candidates(lo_hz: float, hi_hz: float, df_hz: float, k: int,
                      harmonics: int) -> tuple[FloatArray, IntArray, bool]:
    """The candidate speeds of :func:`estimate_speed_hz` in lines (steps of a third of a line); per harmonic
    h = 1 … ``harmonics``, the lines of h × each candidate and of (h − ½) × it, shape (2 × harmonics, candidates)
    in that order; and whether every candidate's nearest line lies in 2 … k − 3 (its ± 1 line search window inside
    the ``k`` lines).  A plan's constants: kept."""
    cand = np.arange(lo_hz / df_hz, hi_hz / df_hz + 1e-9, 1.0 / 3.0)
    lines = np.stack([np.minimum(np.rint(m * cand).astype(np.intp), k - 1)
                      for h in range(1, harmonics + 1) for m in (h, h - 0.5)])
    for a in (cand, lines):
        a.flags.writeable = False
    nearest = np.rint(cand)
    inside = bool(cand.size) and float(nearest.min()) >= 2 and float(nearest.max()) <= k - 3
    return cand, lines, inside


def _refined_lines(acc: FloatArray, b: IntArray, df_hz: float, *, inside: bool
                   ) -> tuple[IntArray, IntArray, FloatArray, FloatArray, FloatArray]:
    """The largest line within ±1 line of each line ``b`` (shape (channels, L); ``inside``: every b lies in
    2 … k − 3, else the windows are clipped to the lines there are), refined.

    Returns, each of shape (channels, L): its index p (kept to 1 … k − 2), p's index in the flattened ``acc``, its
    Hann-interpolated frequency, its amplitude and the larger of its two neighbours.  The median amplitude around it
    is :func:`_floor_around`.
    """
    c, k = acc.shape
    flat = acc.ravel()
    if inside:  # (as usual: one gather of each window's three lines and the first largest, as window_argmax)
        three = flat.take((b if c == 1 else b + _row_starts(c, k))[..., None] + _NEIGHBOURS)
        p = b + (three.argmax(axis=-1) - 1)
    else:
        p = np.minimum(np.maximum(window_argmax(acc, b - 1, b + 1), 1), k - 2)
    fp = p if c == 1 else p + _row_starts(c, k)
    three = flat.take(fp[..., None] + _NEIGHBOURS)
    left, mid, right = three[..., 0], three[..., 1], three[..., 2]
    side = np.where(right >= left, 1.0, -1.0)
    beside = np.maximum(left, right)
    with np.errstate(divide="ignore", invalid="ignore"):
        alpha = beside / mid
        delta = side * (2.0 * alpha - 1.0) / (alpha + 1.0)
    delta = np.where(np.isfinite(delta), np.minimum(np.maximum(delta, -0.5), 0.5), 0.0)
    return p, fp, (p + delta) * df_hz, mid, beside


@lru_cache(maxsize=16)
def _row_starts(c: int, k: int) -> IntArray:
    """Index of each row's first line in a flattened (``c``, ``k``) array, shape (c, 1); read-only, kept."""
    out = np.arange(0, c * k, k).reshape(c, 1)
    out.flags.writeable = False
    return out


@lru_cache(maxsize=64)
def _ring(span: int) -> tuple[IntArray, IntArray]:
    """Offsets ``−span … −3, 3 … span`` and their magnitudes: a floor window without its line's ± 2 lines
    (read-only, kept)."""
    off = np.concatenate([np.arange(-span, -2), np.arange(3, span + 1)])
    dist = np.abs(off)
    for a in (off, dist):
        a.flags.writeable = False
    return off, dist


def _floor_around(flat: FloatArray, k: int, p: IntArray, fp: IntArray) -> FloatArray:
    """Median amplitude within ± 25 % (at least ± 8 lines) of each line ``p`` (any shape, 1 ≤ p ≤ k − 2) without
    its ± 2 lines, over the lines there are; NaN where none is left.  ``flat`` is the flattened (channels, ``k``)
    spectrum and ``fp`` the lines' indices in it (shape of p)."""
    span = np.maximum(np.rint(0.25 * p).astype(np.intp), 8)
    off, dist = _ring(int(span.max()))
    valid = dist <= span[..., None]
    edge = int((p - span).min()) < 0 or int((p + span).max()) > k - 1  # (a window reaches past an end)
    if edge:
        idx = p[..., None] + off
        valid &= (idx >= 0) & (idx < k)
    vals = np.where(valid, flat.take(fp[..., None] + off, mode="clip"), np.inf)
    vals.sort(axis=-1)
    # the two middle values (one when the count is odd), by their index in the flattened sorted windows
    starts = np.arange(0, vals.size, off.size).reshape((*span.shape, 1))
    if not edge:  # (2 × (span − 2) lines, an even count: the middle two at span − 3 and span − 2)
        pair = vals.ravel().take(span[..., None] + (_MIDDLE_WHOLE + starts))
        out: FloatArray = 0.5 * (pair[..., 0] + pair[..., 1])
        return out
    count = valid.sum(axis=-1)
    # (with nothing left they read some other value, and the result is NaN)
    pair = vals.ravel().take((count[..., None] - _MIDDLE) // 2 + starts, mode="clip")
    med = 0.5 * (pair[..., 0] + pair[..., 1])
    out = np.where(count > 0, med, np.nan)
    return out


def _harmonic_refinement(f_hz: FloatArray, f_all: FloatArray, a_all: FloatArray, floor_all: FloatArray,
                         df_hz: float, tolerance: float) -> tuple[FloatArray, npt.NDArray[np.bool_]]:
    """Refine estimates ``f_hz`` (finite, shape (channels,)) with their clear harmonics, and say whether each is
    precise; ``f_all``, ``a_all``, ``floor_all`` (channels, H) are :func:`_refined_lines` at 1× … H× ``f_hz``.

    A harmonic h reads the speed to 1/h of its interpolation error, where the 1× line alone can be pulled by up to
    half a line by a neighbouring line; the readings are averaged with inverse-variance weights (h × the line's
    level over its floor, squared).  A harmonic counts when it stands ``SPEED_MIN_PROMINENCE`` over its floor
    within a line of h × the 1× estimate.  An estimate is precise when its clear harmonics agree with its 1×
    reading within half the tolerance, or — with no clear harmonic to check it against — when half a line is
    within the tolerance.
    """
    out = np.where(np.isfinite(f_hz), f_hz, 0.0)
    # 2, 3 … in the amplitudes' type (float32 amplitudes times h stay float32, as with a Python float)
    hs = np.arange(2, f_all.shape[1] + 1, dtype=a_all.dtype)
    f_h, a_h, floor_h = f_all[:, 1:], a_all[:, 1:], floor_all[:, 1:]  # (the harmonics at once)
    o = out[:, None]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # a constant record: no line, no floor
        # inverse-variance weights: the interpolation error of harmonic h, read as a speed, is ∝ 1 / (h × its SNR)
        weight = (a_all[:, 0] / np.maximum(floor_all[:, 0], 1e-300)) ** 2
        total = weight * out
        clear = (a_h > 0) & (a_h >= SPEED_MIN_PROMINENCE * floor_h) & (np.abs(f_h - hs * o) <= df_hz) & (o > 0)
        agree_all = (~clear | (np.abs(f_h / hs - o) <= 0.5 * tolerance * o)).all(axis=-1)
        checked = clear.any(axis=-1)
        w_h = np.where(clear, (hs * a_h / np.maximum(floor_h, 1e-300)) ** 2, 0.0)
        t_h = w_h * f_h / hs
        for j in range(hs.size):  # (summed in this order, harmonic by harmonic)
            total = total + t_h[:, j]
            weight = weight + w_h[:, j]
        best = np.where(weight > 0, total / weight, out)
    fine = 0.5 * df_hz <= tolerance * out
    precise = np.where(checked, agree_all, fine)
    result: FloatArray = np.where(np.isfinite(f_hz), best, np.nan)
    return result, precise
