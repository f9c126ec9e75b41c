"""Envelope analysis by band selection in the one-sided spectrum, and bearing defect-family detection in the
squared-envelope spectrum.

Demodulation (Randall & Antoni, MSSP 25 (2011) 485–520; FIELD_NOTES §3): the lines of the frame's rfft inside the
demodulation band are shifted to baseband and inverse-transformed alone, at a length ``M`` just large enough for
the envelope frequencies searched.  That is an ideal band-pass filter, the analytic signal and an alias-free
decimation in one small transform.  Its result ``z`` (complex, M samples) gives

* the **squared envelope** ``s = |z|²`` — band-limited to the band's width, so its decimated spectrum is free of
  aliasing — whose Hann-windowed periodogram, the **squared-envelope spectrum** (SES), is where lines are
  *detected* (the better detector of periodic impacts, Randall & Antoni 2011; checked in the tests);
* the **envelope** ``|z|``, whose single-sided amplitude spectrum ``A = 2 |rfft(w · |z|)| / Σw`` (Hann) is the
  *amplitude* reported for a found line, in g: the same scaling as the check-value method E1 of the project's
  datasets README, so its values apply.

Both spectra have the frame's line spacing fs/N.

Defect families (FTF, BPFO, BPFI and, for a rolling-element defect, **2 × BSF**), per frame and channel:

1. *Shaft lines.*  The shaft harmonics 1× … :data:`SHAFT_HARMONICS`× are searched first (± :data:`SHAFT_TOLERANCE`);
   a significant local maximum there is a shaft line.  Where the shaft series stands on its own — one of its
   significant lines is not a harmonic of the family's candidate line (:func:`shaft_series_established`) — its
   lines are never taken for that family's lines (a bearing whose defect frequency lies near a whole order, e.g.
   BPFO ≈ 3.05× of a 6203, would otherwise "find" the 3× line of a looseness series 1×, 2×, 3× …).  Where every
   shaft line found is a harmonic of the candidate — slip has put a defect line on a whole order, e.g. BPFO at
   3.03× slipping 1 % onto 3×, and its harmonics on 6×, 9×, 12× — the shaft explains nothing the defect series
   does not, and the lines stay the family's — provided at least one harmonic of the family is counted too (a lone
   line on a whole order is as much a single shaft-synchronous modulation: ambiguous with the shaft).  (A
   shaft-synchronous source with as many impacts per revolution, and nothing else on the shaft series, would
   still read the same: the line pattern alone cannot tell them apart.)
2. *Fundamental.*  Within ± the slip tolerance (at least ± 1 line) of the kinematic value, the largest SES line
   that is a **true local maximum** (above its lower neighbour, not below its upper one) and not a barred shaft
   line.  A window whose largest value sits on its edge — the skirt of a line outside it — has no local maximum
   and finds nothing (frequency, amplitude and SNR are then None).
3. *Harmonics* 2 … H, each searched around h × the found line (± ⌈h/2⌉ + 1 lines; around h × the kinematic value
   ± h × slip when the fundamental has no local maximum), each counting only where it is itself a significant
   local maximum.
4. *Sidebands* of the fundamental at ± 1 and ± 2 times the modulation frequency: shaft speed for BPFI (the inner
   ring turns through the load zone), FTF for 2 × BSF (the element travels with the cage) — Randall & Antoni
   2011 — and shaft speed for BPFO (not expected physically; examined so that a line at BPFO + 1× is recognised
   as such).
5. *Verdict.*  A family is **detected** when its fundamental is significant — its SES level over the local level
   exceeds the window's threshold for the plan's false-alarm probability (:mod:`edgevib.pipelines.detection`) —
   and the squared envelope's **modulation depth** there, ``2|SES(f)| / mean(s)`` (twice the amplitude-modulation
   index of the envelope for a small modulation), reaches the plan's minimum even after the line's own noise is
   subtracted at twice its r.m.s. (``depth · (1 − 2/√T)``): a line that is statistically real but carries a
   negligible share of the band's power (a long record makes the faintest periodicity significant; a short one
   lets noise lift a faint line) is reported with its numbers but not called a defect.
6. *Resolution.*  A fundamental closer than one line to a line of the pattern of another family present in the
   frame (harmonics, sidebands), or to a shaft harmonic found in the frame while the shaft series stands on its
   own (step 1), cannot be told from it: its verdict is withheld (ambiguous with that family).  For the CWRU
   6205 bearing BPFO lies 0.17 × shaft from BPFI − 2×, so telling them apart needs lines finer than about 5 Hz at
   1800 r/min (frames of 0.2 s or more).
7. *Coincidences.*  A detected family whose fundamental sits (± 1 line) on a line of another family's pattern —
   a local maximum in one of its harmonic or sideband windows, that family's own fundamental being significant
   (3 × BPFO lies near 2 × BPFI, 2 × BSF near BPFO + 1×, BPFO near BPFI − 2× at coarse resolution) — is compared
   with that family by the significant lines each has that the other does not: the one with more evidence keeps
   its verdict, the other is reported as ambiguous (not detected), naming the family that explains its line.
   Ties leave the challenger ambiguous.
8. *Modulation.*  A family that is another family's modulation frequency — FTF, the sideband spacing of 2 × BSF
   (the element travels with the cage through the load zone; a ball fault's envelope spectrum shows FTF and
   2 × BSF ± FTF, Randall & Antoni 2011) — whose detected fundamental lies (± 1 line) at the spacing of a counted
   ± 1 × sideband of that family (its fundamental significant), and every counted harmonic h of which lies at h / j
   times the spacing of a counted ± j × sideband, j ≤ h, is that family's modulation: one defect, so it is reported
   as ambiguous with that family, not detected twice.  (The load-zone modulation is not a pure sine: its harmonic h
   shows in the baseband of the squared envelope — the modulation times the envelope's mean — more strongly than
   in the ± h × sidebands — the modulation times the weaker 2 × BSF component — so a ± 1 × sideband spacing
   explains 2 × FTF even where the ± 2 × sidebands stay below their thresholds.)  A line the other pattern does not
   explain (e.g. 3 × FTF, beyond the ± 2 × sidebands examined) is evidence of its own, and the verdict stands.

``snr_db`` is 10·log10 of the line's SES level over the estimated local mean level (the statistic ``T`` of
:mod:`edgevib.pipelines.detection`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.pipelines import _fft
from edgevib.pipelines.detection import GUARD_LINES, LEVEL_LINES, LEVEL_RANK, LEVEL_STEP, level_mean_factor
from edgevib.pipelines.indicators import as_channels, finite_mean
from edgevib.pipelines.spectrum import band_lines, hann_lines, window_offsets
from edgevib.pipelines.types import PlanError

__all__ = [
    "DEPTH_NOISE_RMS",
    "MIN_LINE",
    "SHAFT_HARMONICS",
    "SHAFT_TOLERANCE",
    "FamilySearch",
    "RowLimits",
    "demodulate",
    "envelope_amplitude_spectrum",
    "envelope_spectra",
    "fast_length",
    "level_headroom",
    "min_decimated_length",
    "pattern_gaps",
    "search_families",
    "shaft_series_established",
    "squared_envelope_spectrum",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]
BoolArray = npt.NDArray[np.bool_]

SHAFT_HARMONICS = 12
"""Shaft harmonics searched in the squared-envelope spectrum before the bearing families."""
SHAFT_TOLERANCE = 0.005
"""Relative window of a shaft harmonic (± 0.5 %, at least ± 1 line): shaft lines are synchronous, bearing lines
slip by 1–2 % (Randall & Antoni 2011)."""
MIN_LINE = 3
SIDEBAND_ORDERS = np.array([-2.0, -1.0, 1.0, 2.0])
"""Sidebands examined around a fundamental, in multiples of its modulation frequency (the inner-race series of
± k × shaft is often strongest at ± 2×: datasets README, CWRU 105/106)."""
"""Lowest line a search window may start at (line 0 is the mean; a local maximum needs its lower neighbour)."""
DEPTH_NOISE_RMS = 2.0
"""The noise in a tested line is taken at this many times its r.m.s. when its depth is compared with the minimum
(a circular Gaussian exceeds twice its r.m.s. magnitude with probability e⁻⁴ ≈ 2 %)."""
_LEVEL_FACTOR = level_mean_factor(LEVEL_LINES, LEVEL_RANK)
_LEVEL_PER_SIDE = LEVEL_LINES // 2
_LEVEL_ABOVE_RANK = np.arange(LEVEL_LINES)  # rank of each column above it (taken while rank < the count needed)
_LEVEL_OFFSET = np.concatenate([-(GUARD_LINES + 1 + LEVEL_STEP * np.arange(_LEVEL_PER_SIDE)),
                                GUARD_LINES + 1 + LEVEL_STEP * _LEVEL_ABOVE_RANK])



def _level_left_out() -> BoolArray:
    """Level lines left out, per first line of a window (rows; the last row serves every later first line):
    those below line 2 (line 0 is the mean, line 1 its window leakage), each replaced by one more line above."""
    first = np.arange(MIN_LINE + GUARD_LINES + 1 + LEVEL_STEP * _LEVEL_PER_SIDE + 1)[:, None]
    below_ok = first + _LEVEL_OFFSET[:_LEVEL_PER_SIDE] >= 2
    missing = _LEVEL_PER_SIDE - below_ok.sum(axis=-1)
    above_ok = (_LEVEL_PER_SIDE + missing)[:, None] > _LEVEL_ABOVE_RANK
    out: BoolArray = ~np.concatenate([below_ok, above_ok], axis=-1)
    return out


_LEVEL_LEFT_OUT = _level_left_out()
for _a in (_LEVEL_ABOVE_RANK, _LEVEL_OFFSET, _LEVEL_LEFT_OUT):
    _a.flags.writeable = False
_TINY = 1e-300
_MAGNITUDE_BLOCK = 1 << 16  # envelope magnitudes are formed in blocks of rows of about this many samples (256 kB)
_SHAFT_ORDERS = np.arange(1, SHAFT_HARMONICS + 1, dtype=np.float64)
_SHAFT_ORDERS.flags.writeable = False
_NEIGHBOURS = np.arange(-1, 2)
_NEIGHBOURS.flags.writeable = False
_SIDEBAND_SPAN = np.abs(SIDEBAND_ORDERS)
_SIDEBAND_SPAN.flags.writeable = False


def level_headroom() -> int:
    """Lines needed above a search window for its level lines (when none can be taken below it)."""
    return GUARD_LINES + LEVEL_STEP * (LEVEL_LINES - 1) + 2


_HEADROOM = level_headroom()


def demodulate(spec: npt.NDArray[np.complexfloating[Any, Any]], k_lo: int, k_hi: int,
               m: int) -> npt.NDArray[np.complex64]:
    """Complex envelope of the band ``k_lo..k_hi`` (rfft lines, inclusive), decimated to ``m`` samples, unscaled.

    Parameters
    ----------
    spec : ndarray, shape (channels, N//2 + 1) — the frame's unwindowed rfft
    m : int ≥ k_hi − k_lo + 1 — output length (sample rate m·fs/N)

    Returns
    -------
    ndarray, shape (channels, m), complex64: ``ifft(spec[:, k_lo:k_hi+1], m)``, computed in single precision
    (relative error ~1e-7, far below any envelope floor).  Times ``2m/N`` its magnitude is the envelope
    ``|hilbert(bandpass(x))|`` in the unit of the frame (g); :func:`envelope_spectra` applies that factor.
    """
    width = k_hi - k_lo + 1
    z = np.empty((spec.shape[0], m), dtype=np.complex64)
    z[:, :width] = spec[:, k_lo : k_hi + 1]  # shift to baseband (and to single precision)
    z[:, width:] = 0.0
    out: npt.NDArray[np.complex64] = _fft.ifft(z, m, overwrite=True)
    return out


def envelope_spectra(z: npt.NDArray[np.complexfloating[Any, Any]], n_samples: int, stop: int, *,
                     overwrite: bool = False) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Envelope amplitude spectrum and squared-envelope periodogram, lines ``0 .. stop-1``, from :func:`demodulate`.

    A periodic Hann window is applied in the frequency domain (three taps, exact); the means are not subtracted
    (with that window a constant only reaches lines 0 and 1, which are never searched).

    Returns
    -------
    amplitude_g : ndarray, shape (channels, stop) — ``2 |rfft(w · e)| / Σw`` for the envelope ``e = (2m/N)|z|``,
        in g (peak reading, like method E1)
    ses : ndarray, shape (channels, stop) — ``|rfft(w · |z|²)|²``, unscaled (only ratios of its lines are used)
    ses_mean_line : ndarray, shape (channels,) — ``Σ |z|²`` (line 0 of the unwindowed transform): the modulation
        depth of line k is ``4 √ses[k] / ses_mean_line`` (a Hann line of amplitude a reads a·m/4)

    ``overwrite`` lets the function use ``z``'s memory (a C-contiguous ``z`` is then destroyed): a many-channel
    batch needs no second array of its size.
    """
    c, m = z.shape
    real = z.real.dtype
    # per channel [|z|, |z|²], in z's own memory when allowed (each block of rows is read before it is written)
    own = overwrite and z.flags.c_contiguous
    both = z.view(real).reshape(c, 2, m) if own else np.empty((c, 2, m), dtype=real)
    rows = max(1, _MAGNITUDE_BLOCK // m)
    e = np.empty((min(rows, c), m), dtype=real)
    for i in range(0, c, rows):
        j = min(c, i + rows)
        ej = e[: j - i]
        np.abs(z[i:j], out=ej)  # (hypot: one contiguous pass, several times faster than re² + im² on strided halves)
        np.square(ej, out=both[i:j, 1])
        both[i:j, 0] = ej
    spec = _fft.rfft(both)
    del both, e
    mean_line = spec[:, 1, 0].real.astype(np.float64)
    # the Hann lines of both rows times −4, G = X[k−1] + X[k+1] − 2 X[k] (no multiplying pass); the factor goes into
    # the scale factors below (powers of two: the same values as scaling the lines first)
    s = min(stop, m // 2)
    g = hann_lines(spec, s, scale=-4.0)
    amp: FloatArray = np.multiply(np.abs(g[:, 0]), 2.0 / n_samples, dtype=np.float64)  # 8/N × |G|/4
    # |G|²/16 from the components in double precision (exact squares of single-precision values)
    parts = np.multiply(g[:, 1].view(real).reshape(c, s, 2), 0.25, dtype=np.float64)
    np.square(parts, out=parts)
    ses: FloatArray = np.add(parts[..., 0], parts[..., 1])
    return amp, ses, mean_line


def fast_length(n: int) -> int:
    """Smallest 2^a or 3·2^a ≥ n: the lengths scipy's FFT handles fastest (more factors of 3 cost more than the
    few extra points a power of two or 3 × one adds — 5832 = 2³·3⁶ takes about twice as long as 6144 = 2¹¹·3)."""
    p2 = 1 << max(0, (n - 1).bit_length())
    p3 = 3 * (1 << max(0, (-(-n // 3) - 1).bit_length()))
    return min(p2, p3)


def min_decimated_length(band_lines_count: int, max_envelope_line: int) -> int:
    """Smallest useful M: the band fits, and the squared envelope stays alias-free up to ``max_envelope_line``
    (its lines are differences of band lines, so M ≥ band + max line suffices)."""
    need = max(band_lines_count + max_envelope_line + 1, 2 * max_envelope_line + 2, 16)
    return fast_length(need)


def _spectra_of_records(x_g: npt.ArrayLike, fs_hz: float, band_hz: tuple[float, float],
                        max_frequency_hz: float | None) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
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
    z = demodulate(_fft.rfft(x), k_lo, k_hi, m)  # line 0 (the mean) is outside the band
    amp, ses, mean_line = envelope_spectra(z, n, top + 1, overwrite=True)
    freqs: FloatArray = np.arange(amp.shape[-1]) * df
    return freqs, amp, ses, mean_line


def envelope_amplitude_spectrum(x_g: npt.ArrayLike, fs_hz: float, band_hz: tuple[float, float],
                                max_frequency_hz: float | None = None) -> tuple[FloatArray, FloatArray]:
    """Envelope amplitude spectrum of whole records (method E1's scaling; see the module docstring).

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
    freqs, amp, _, _ = _spectra_of_records(x_g, fs_hz, band_hz, max_frequency_hz)
    return freqs, amp


def squared_envelope_spectrum(x_g: npt.ArrayLike, fs_hz: float, band_hz: tuple[float, float],
                              max_frequency_hz: float | None = None) -> tuple[FloatArray, FloatArray]:
    """Squared-envelope spectrum of whole records as modulation depth per line (dimensionless).

    Line k reads ``2 |Σ w·s·e^{−2πikn/M}| / Σw / mean(s)`` for the squared envelope s (Hann window w): a
    squared envelope ``S₀(1 + m cos 2πft)`` reads m at f.  An amplitude-modulated carrier
    ``A(1 + μ cos 2πft) sin 2πf_c t`` reads ``2μ / (1 + μ²/2)`` at f and ``(μ²/2) / (1 + μ²/2)`` at 2f.

    Returns
    -------
    freqs_hz : ndarray, shape (lines,)
    depth : ndarray, shape (channels, lines)
    """
    freqs, _, ses, mean_line = _spectra_of_records(x_g, fs_hz, band_hz, max_frequency_hz)
    with np.errstate(divide="ignore", invalid="ignore"):
        depth: FloatArray = 4.0 * np.sqrt(ses) / mean_line[:, None]
    return freqs, np.where(np.isfinite(depth), depth, 0.0)


# ----------------------------------------------------------------------------------------------- line search


def _gather(a: npt.NDArray[Any], idx: IntArray) -> npt.NDArray[Any]:
    """``a[row, idx[row, ...]]`` for every row (``idx`` already in range; ``a`` C-contiguous, shape (rows, k)).

    One ``take`` on the flattened array: several times cheaper than indexing with two broadcast index arrays."""
    c, k = a.shape
    if c > 1:
        idx = idx + np.arange(0, c * k, k).reshape((c,) + (1,) * (idx.ndim - 1))
    out: npt.NDArray[Any] = a.ravel().take(idx)
    return out


@dataclass(frozen=True, slots=True)
class LineSearch:
    """Result of searching windows of a spectrum, one value per window (arrays of shape (channels, windows))."""

    index: IntArray  # line of the largest admissible local maximum; -1 where none
    statistic: FloatArray  # its level over the estimated local mean level (T); NaN where none
    threshold: FloatArray  # the window's threshold on T; NaN where the window does not fit
    fits: BoolArray  # the window and its level lines lie inside the spectrum
    lo: IntArray  # window's first line
    hi: IntArray  # window's last line

    @property
    def found(self) -> BoolArray:
        """A significant local maximum: the line counts."""
        out: BoolArray = (self.index >= 0) & (self.statistic >= self.threshold)  # (NaN compares False, silently)
        return out


@dataclass(frozen=True, slots=True)
class RowLimits:
    """Per-row limits of a search whose rows come from different plans (``analysis.analyze_mixed``): each row's
    spectrum is searched as if it had only ``lines`` lines and a threshold table of ``threshold_cap + 2`` entries
    (the longest table is passed; its entries do not depend on its length).  Both int arrays of shape
    (channels, 1)."""

    lines: IntArray
    threshold_cap: IntArray


def search_lines(ses: FloatArray, centre_lines: FloatArray, half_lines: FloatArray, thresholds: FloatArray,
                 excluded: BoolArray | None = None, min_half: float = 1.0,
                 exclude_in: BoolArray | None = None, limits: RowLimits | None = None) -> LineSearch:
    """Largest local maximum of ``ses`` in each window ``centre ± half`` and its detection statistic.

    Parameters
    ----------
    ses : ndarray, shape (channels, lines) — a periodogram (squared-envelope spectrum)
    centre_lines, half_lines : ndarrays, shape (channels, windows) — window centres and half-widths in lines
        (NaN centre: no window)
    thresholds : ndarray, shape (max_lines + 1,) — threshold on T for a window of M lines
        (:func:`edgevib.pipelines.detection.window_thresholds`); wider windows use the last entry
    excluded : bool ndarray, shape (channels, lines) — lines that may not be taken as the maximum
    min_half : smallest half-width in lines (1: the two lines around a centre between lines; 0.5: the nearest)
    exclude_in : bool ndarray, shape (channels, windows) — the windows ``excluded`` applies to (default: all)
    limits : per-row spectrum lengths and threshold tables (default: the whole spectrum and table for every row)

    Returns
    -------
    LineSearch
    """
    scan = _Scan(np.ascontiguousarray(ses), centre_lines, half_lines, thresholds, min_half, limits)
    return scan.search(scan.admissible(excluded, exclude_in))


class _Scan:
    """The windows of :func:`search_lines` gathered once: their lines, local maxima and levels.  :meth:`search`
    picks each window's largest admissible local maximum — the same scan serves searches that differ only in the
    lines they bar."""

    __slots__ = ("fits", "flat", "hi", "level", "lo", "local", "ses", "thr", "values")

    def __init__(self, ses: FloatArray, centre_lines: FloatArray, half_lines: FloatArray, thresholds: FloatArray,
                 min_half: float | FloatArray, limits: RowLimits | None = None) -> None:
        c, k = ses.shape
        # (a row's own spectrum length: lines beyond it, computed for longer rows of the batch, are never read by
        # a window that fits it)
        last: int | IntArray = k - 1 - _HEADROOM if limits is None else limits.lines - (1 + _HEADROOM)
        self.ses = ses
        # (an unknown centre or half-width — NaN — makes its bounds NaN, which fit nowhere)
        half = np.maximum(half_lines, min_half)
        lo_f = centre_lines - half
        lo_f -= 1e-9
        np.ceil(lo_f, out=lo_f)
        hi_f = centre_lines + half
        hi_f += 1e-9
        np.floor(hi_f, out=hi_f)
        fits = (lo_f >= MIN_LINE) & (hi_f <= last)
        lo_c = np.where(fits, lo_f, MIN_LINE).astype(np.intp)
        hi_c = np.where(fits, hi_f, MIN_LINE).astype(np.intp)
        span = hi_c - lo_c  # (lines in the window − 1)
        width = int(span.max()) + 1 if span.size else 1
        rows = np.arange(0, c * k, k).reshape(c, 1, 1) if c > 1 else None
        # each window's lines with one neighbour either side, in one gather (a window's own lines lie at or below
        # k − 2: the padding beyond a narrower window's last line is never taken, whatever it reads); flat indices
        # into ses (row offsets added), so the same indices serve every gather of a (channels, lines) array
        idx = lo_c[..., None] + window_offsets(-1, width + 1)  # one neighbour either side
        valid = idx[..., 1:-1] <= hi_c[..., None]
        if rows is not None:
            idx += rows
        flat = ses.ravel()
        g = flat.take(idx, mode="clip")
        v = g[..., 1:-1]
        self.local = valid & (v > g[..., :-2]) & (v >= g[..., 2:])
        self.flat = idx[..., 1:-1]
        self.values = v
        # level lines: every other line beyond the guard, half below and half above (all above where the spectrum
        # starts too close); gathered at once: columns 0 … LEVEL_LINES/2 − 1 below the window, the rest above it
        lines = np.empty((*lo_c.shape, _LEVEL_OFFSET.size), dtype=np.intp)
        np.add(lo_c[..., None], _LEVEL_OFFSET[:_LEVEL_PER_SIDE], out=lines[..., :_LEVEL_PER_SIDE])
        np.add(hi_c[..., None], _LEVEL_OFFSET[_LEVEL_PER_SIDE:], out=lines[..., _LEVEL_PER_SIDE:])
        # (which are left out depends on the window's first line only; a fitting window's lines above it lie
        # inside the spectrum, and what the left-out ones read is never used)
        left_out = _LEVEL_LEFT_OUT[np.minimum(lo_c, _LEVEL_LEFT_OUT.shape[0] - 1)]
        if rows is not None:
            lines += rows
        vals = flat.take(lines, mode="clip")
        np.putmask(vals, left_out, np.inf)
        vals.partition(LEVEL_RANK - 1, axis=-1)
        level = vals[..., LEVEL_RANK - 1] / _LEVEL_FACTOR
        self.level = np.maximum(level, _TINY, out=level)  # (the divisor of the statistic)
        cap = thresholds.size - 2 if limits is None else limits.threshold_cap
        np.minimum(span, cap, out=span)  # lines in the window, less one: the table's index − 1
        self.thr = np.where(fits, thresholds[span + 1], np.nan)
        self.fits, self.lo, self.hi = fits, lo_c, hi_c

    def admissible(self, excluded: BoolArray | None, exclude_in: BoolArray | None = None) -> BoolArray:
        """The windows' local maxima less the lines ``excluded`` (shape (channels, lines)) bars, in the windows
        ``exclude_in`` (shape (channels, windows); default all)."""
        if excluded is None:
            return self.local
        barred = excluded.ravel().take(self.flat, mode="clip")  # (padding beyond a window: never taken)
        if exclude_in is not None:
            barred &= exclude_in[..., None]
        out: BoolArray = self.local & ~barred
        return out

    def search(self, local: BoolArray) -> LineSearch:
        """Each window's largest line among ``local`` (shape (channels, windows, width)) and its statistic."""
        admitted = np.where(local, self.values, -np.inf)
        best = admitted.argmax(axis=-1)
        has = local.any(axis=-1) & self.fits
        peak = self.lo + best
        value = admitted.max(axis=-1)  # (the line at ``peak`` where ``has``)
        with np.errstate(divide="ignore", invalid="ignore"):
            stat = np.where(has, value / self.level, np.nan)
        return LineSearch(index=np.where(has, peak, -1), statistic=stat, threshold=self.thr, fits=self.fits,
                          lo=self.lo, hi=self.hi)


@dataclass(frozen=True, slots=True)
class FamilySearch:
    """Defect-family search of squared-envelope spectra (see the module docstring).

    Line slots per family (axis 2, ``slots = harmonics + 4``): 0 the fundamental, 1 … H−1 harmonics 2 … H,
    then the sidebands at :data:`SIDEBAND_ORDERS` (−2, −1, +1, +2) × the modulation frequency.  Shapes:
    (channels, families, slots) or (channels, families).
    """

    lines: LineSearch  # reshaped views: index/statistic/... of shape (channels, families * slots)
    slots: int
    expected_lines: FloatArray  # (channels, families, slots) window centres in lines (NaN: not searched)
    amplitude_g: FloatArray  # (channels, families) envelope amplitude at the fundamental; NaN where none
    depth: FloatArray  # (channels, families) squared-envelope modulation depth at the fundamental; NaN where none
    significant: BoolArray  # (channels, families) fundamental is a significant local maximum
    detected: BoolArray  # (channels, families) the verdict
    ambiguous_with: IntArray  # (channels, families) family index (or ``families`` for the shaft) explaining the
    #                           fundamental's line; -1 where not ambiguous
    shaft: LineSearch  # (channels, SHAFT_HARMONICS) the shaft harmonics
    shaft_established: BoolArray  # (channels, families) the shaft series has lines the family's candidate series
    #                               does not explain: shaft lines are barred from the family's windows

    def part(self, name: str) -> npt.NDArray[Any]:
        """A field of :attr:`lines` shaped (channels, families, slots)."""
        a: npt.NDArray[Any] = getattr(self.lines, name)
        return a.reshape(a.shape[0], -1, self.slots)


def pattern_gaps(multiples: FloatArray, modulation: FloatArray, harmonics: int) -> tuple[FloatArray, IntArray]:
    """How close each family's fundamental comes to the lines of every other family's pattern and to the shaft
    harmonics.

    Parameters
    ----------
    multiples : ndarray, shape (families,) — fundamentals as multiples of shaft speed
    modulation : ndarray, shape (families,) — sideband spacings as multiples of shaft speed (NaN: none)

    Returns
    -------
    gap : ndarray, shape (families, families + 1) — ``gap[a, b]``: the smallest distance, in multiples of shaft
        speed, from family a's fundamental to family b's harmonics 1 … ``harmonics`` or its sidebands
        (:data:`SIDEBAND_ORDERS`); column ``families`` is the distance to the nearest shaft harmonic
        1 … :data:`SHAFT_HARMONICS`; the diagonal is +inf
    shaft_order : int ndarray, shape (families,) — that nearest shaft harmonic
    """
    nf = multiples.size
    h = np.arange(1, harmonics + 1, dtype=np.float64)
    gap = np.full((nf, nf + 1), np.inf)
    for b in range(nf):
        sb = multiples[b] + np.nan_to_num(modulation[b], nan=np.inf) * SIDEBAND_ORDERS
        lines = np.concatenate([multiples[b] * h, sb])
        for a in range(nf):
            if a != b:
                gap[a, b] = float(np.min(np.abs(lines - multiples[a])))
    shaft_order = np.clip(np.rint(multiples), 1, SHAFT_HARMONICS).astype(np.intp)
    gap[:, nf] = np.abs(multiples - shaft_order)
    gap.flags.writeable = False
    return gap, shaft_order


def search_families(amp_g: FloatArray, ses: FloatArray, ses_mean_line: FloatArray, expected_hz: FloatArray,
                    modulation_hz: FloatArray, shaft_hz: FloatArray, slip: float, harmonics: int, df_hz: float,
                    thresholds: FloatArray, min_depth: float,
                    gaps: tuple[FloatArray, IntArray] | None = None, limits: RowLimits | None = None) -> FamilySearch:
    """Search and judge defect families in envelope spectra (method in the module docstring).

    Parameters
    ----------
    amp_g, ses, ses_mean_line : from :func:`envelope_spectra`; shapes (channels, lines), (channels, lines),
        (channels,)
    expected_hz : ndarray, shape (channels, families) — kinematic fundamentals; NaN where unknown
    modulation_hz : ndarray, shape (channels, families) — sideband spacing per family; NaN for none
    shaft_hz : ndarray, shape (channels,) — shaft speed; NaN where unknown
    slip : relative search tolerance of the fundamentals (± slip × expected, at least ± 1 line)
    harmonics : harmonics per family, fundamental included (≥ 1)
    thresholds : from :func:`edgevib.pipelines.detection.window_thresholds`
    min_depth : minimum squared-envelope modulation depth of a detected fundamental
    gaps : from :func:`pattern_gaps`; a fundamental closer than one line to a line of another family's pattern
        (that family's fundamental being significant in the frame) or to a shaft harmonic found in the frame cannot
        be told from it at this resolution: its verdict is withheld (ambiguous with that family); per row (shapes
        (channels, families, families + 1) and (channels, families)) where the rows' bearings differ
    limits : per-row spectrum lengths and threshold tables (:class:`RowLimits`; rows of different plans)

    Returns
    -------
    FamilySearch
    """
    c, k = ses.shape
    nf = expected_hz.shape[1]
    sh = SHAFT_HARMONICS
    # 1. shaft harmonics: significant local maxima at whole orders are shaft lines, never bearing lines.  The shaft
    # harmonics' windows and the fundamentals' (step 2) in one scan: its lines and levels serve both searches of
    # the fundamentals, with and without the shaft lines
    ses = np.ascontiguousarray(ses)
    first_centre = np.concatenate([shaft_hz[:, None] * _SHAFT_ORDERS, expected_hz], axis=-1) / df_hz
    f_centre = first_centre[:, sh:]
    first_half = first_centre * _first_tolerance(slip, nf)  # (± 0.5 % for the shaft, ± slip for the families)
    f_half = first_half[:, sh:]
    first = _Scan(ses, first_centre, first_half, thresholds, _first_min_half(nf), limits)
    both = first.search(first.local)
    shaft = _columns(both, slice(0, sh))
    s_found = shaft.found
    # 2. fundamentals: the window's largest local maximum, and the largest one that is not a shaft line; the
    # shaft lines are barred only where the shaft series stands on its own (lines the candidate's series does
    # not explain) — without shaft lines found, nothing is barred and the candidates are the fundamentals
    candidate = both.index[:, sh:]
    established = (shaft_series_established(shaft, candidate) if s_found.any()
                   else np.zeros((c, nf), dtype=bool))
    excluded: BoolArray | None = None
    if established.any():
        excluded = np.zeros((c, k), dtype=bool)
        rows, cols = np.nonzero(s_found)
        excluded[rows, shaft.index[rows, cols]] = True
        bar_first = np.zeros((c, sh + nf), dtype=bool)
        bar_first[:, sh:] = established
        candidate = first.search(first.admissible(excluded, bar_first)).index[:, sh:]
    has = candidate >= 0
    k1i = np.where(has, candidate, 0)
    k1 = k1i.astype(np.float64)
    # 3. harmonics (around h × the found line, else h × the expected one) and sidebands (around the found line),
    # searched with the fundamentals' windows again (the same windows, bars and levels, so the same lines): one
    # search holds every slot
    h, h_near = _harmonic_orders(harmonics)
    h_centre = np.where(has[..., None], k1[..., None] * h, f_centre[..., None] * h)
    h_half = np.where(has[..., None], h_near, np.maximum(1.0, f_half[..., None] * h))
    mod = modulation_hz / df_hz
    sb_ok = has & np.isfinite(mod)
    mod0 = np.where(sb_ok, mod, 0.0)
    sb_centre = np.where(sb_ok[..., None], k1[..., None] + mod0[..., None] * SIDEBAND_ORDERS, np.nan)
    sb_half = 1.0 + np.ceil(slip * mod0[..., None] * _SIDEBAND_SPAN)
    centres = np.concatenate([f_centre[..., None], h_centre, sb_centre], axis=-1)  # (c, f, slots)
    halves = np.concatenate([np.maximum(1.0, f_half)[..., None], h_half, sb_half], axis=-1)
    slots = centres.shape[-1]
    bar = None if excluded is None else np.repeat(established, slots, axis=-1)
    lines = search_lines(ses, centres.reshape(c, -1), halves.reshape(c, -1), thresholds, excluded, exclude_in=bar,
                         limits=limits)
    found = lines.found.reshape(c, nf, slots)
    index = lines.index.reshape(c, nf, slots)
    # 4. verdict: a significant fundamental with enough modulation depth
    significant = found[..., 0]
    # (a missing fundamental reads line 0 and its neighbours, −1 included — some line of the flattened array —
    # and is then discarded)
    amp = np.where(has, _gather(amp_g, k1i[..., None] + _NEIGHBOURS).max(axis=-1), np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        depth = np.where(has, 4.0 * np.sqrt(_gather(ses, k1i)) / ses_mean_line[:, None], np.nan)
        # the depth the line's signal part surely has: its noise part (a complex Gaussian of power ``level``,
        # ``ses / T``) subtracted at DEPTH_NOISE_RMS times its r.m.s.
        statistic = lines.statistic.reshape(c, nf, slots)[..., 0]
        sure = depth * (1.0 - DEPTH_NOISE_RMS / np.sqrt(np.where(has, statistic, np.inf)))
        detected = significant & (sure >= min_depth)
    if detected.any():  # (steps 5–8 only withhold verdicts: nothing to do where nothing is detected)
        ambiguous, ambiguous_with = _withheld(index, found, significant, detected, expected_hz, modulation_hz,
                                              harmonics, shaft, established, shaft_hz, df_hz, k1i, gaps)
        detected = detected & ~ambiguous
    else:
        ambiguous_with = np.full((c, nf), -1, dtype=np.intp)
    return FamilySearch(lines=lines, slots=slots, expected_lines=centres, amplitude_g=amp, depth=depth,
                        significant=significant, detected=detected, ambiguous_with=ambiguous_with,
                        shaft=shaft, shaft_established=established)


def _withheld(index: IntArray, found: BoolArray, significant: BoolArray, detected: BoolArray,
              expected_hz: FloatArray, modulation_hz: FloatArray, harmonics: int, shaft: LineSearch,
              established: BoolArray, shaft_hz: FloatArray, df_hz: float, k1i: IntArray,
              gaps: tuple[FloatArray, IntArray] | None) -> tuple[BoolArray, IntArray]:
    """Steps 5–8 of the module docstring: which detected fundamentals are ambiguous, and with which family (or
    ``families`` for the shaft; -1: not ambiguous); shapes (channels, families).  Arguments as in
    :func:`search_families` (``index``, ``found``: (channels, families, slots); ``k1i``: the fundamentals' lines,
    0 where none)."""
    c, nf, slots = index.shape
    has = index[..., 0] >= 0
    # 5. coincidences: a detected fundamental on a line of another family's pattern (a local maximum in one of
    # its windows, significant or not) whose own fundamental is significant — only pairs (detected A, significant
    # B ≠ A) can be beaten
    ambiguous = np.zeros((c, nf), dtype=bool)
    ambiguous_with = np.full((c, nf), -1, dtype=np.intp)
    pairs = detected[:, :, None] & significant[:, None, :] & _not_eye(nf)
    if pairs.any():
        local = index >= 0
        i32 = index.astype(np.int32)  # (line numbers: half the memory traffic of the pairwise differences)
        near = np.abs(i32[:, :, None, :, None] - i32[:, None, :, None, :]) <= 1  # (c, A, B, qA, qB)
        on_other = (near[:, :, :, 0, :] & local[:, None, :, :]).any(axis=-1) & local[:, :, None, 0]
        shared = near & found[:, :, None, :, None] & local[:, None, :, None, :]  # A's counted lines on B's lines
        unique_a = (found[:, :, None, :] & ~shared.any(axis=-1)).sum(axis=-1)  # (c, A, B): A's lines B lacks
        unique_b = np.swapaxes(unique_a, 1, 2)  # B's lines A lacks
        beaten = pairs & on_other & (unique_b >= unique_a)
        ambiguous = beaten.any(axis=-1)
        ambiguous_with = np.where(ambiguous, beaten.argmax(axis=-1), -1)
    # 6. modulation: a family whose fundamental is another family's sideband spacing (FTF for 2 × BSF) and whose
    # counted lines are all that family's found sidebands' spacings is its modulation, not a defect of its own
    carried = _modulation_explains(index, found, significant, expected_hz, modulation_hz, slots - harmonics)
    modulated = detected[:, :, None] & carried & ~ambiguous[:, :, None]
    is_modulation = modulated.any(axis=-1)
    ambiguous_with = np.where(is_modulation, modulated.argmax(axis=-1), ambiguous_with)
    ambiguous |= is_modulation
    s_found = shaft.found
    if gaps is not None:
        gap, shaft_order = gaps
        if gap.ndim == 2:  # (one bearing for every row)
            gap = gap[None, :, :]
            shaft_near = s_found[:, shaft_order - 1] & established  # (c, A)
        else:
            shaft_near = np.take_along_axis(s_found, shaft_order - 1, axis=1) & established
        present = np.concatenate([np.broadcast_to(significant[:, None, :], (c, nf, nf)),
                                  shaft_near[:, :, None]], axis=-1)  # (c, A, B + shaft)
        with np.errstate(invalid="ignore"):  # (an unknown speed: NaN compares False)
            close = (gap * shaft_hz[:, None, None] / df_hz < 1.0) & present
        unresolved = detected & close.any(axis=-1) & ~ambiguous
        ambiguous_with = np.where(unresolved, close.argmax(axis=-1), ambiguous_with)
        ambiguous |= unresolved
    # a fundamental on a shaft line the shaft series does not claim (step 1) is the family's only with a harmonic
    # of its own counted: a lone line on a whole order is as much a single shaft-synchronous modulation
    s_idx = np.where(s_found, shaft.index, -10)  # (c, orders)
    on_shaft = has & ~established & (np.abs(k1i[..., None] - s_idx[:, None, :]) <= 1).any(axis=-1)
    lone = detected & on_shaft & (found[..., 1:harmonics].sum(axis=-1) == 0) & ~ambiguous
    ambiguous_with = np.where(lone, nf, ambiguous_with)
    ambiguous |= lone
    return ambiguous, ambiguous_with


def _modulation_explains(index: IntArray, found: BoolArray, significant: BoolArray, expected_hz: FloatArray,
                         modulation_hz: FloatArray, n_sidebands: int) -> BoolArray:
    """Whether family A's lines are family B's modulation (step 8 of the module docstring).

    Parameters
    ----------
    index, found : shape (channels, families, slots) — the family search's lines (slots: fundamental, harmonics
        2 … H, then the sidebands at :data:`SIDEBAND_ORDERS`)
    significant : shape (channels, families) — fundamentals that are significant local maxima
    expected_hz, modulation_hz : shape (channels, families)
    n_sidebands : number of sideband slots (the last ones)

    Returns
    -------
    bool ndarray, shape (channels, A, B): B's modulation frequency is A's kinematic frequency (FTF for 2 × BSF), B's
    fundamental is significant, A's fundamental is counted and lies (± 1 line) at the spacing of a counted sideband
    of B of order ± 1, and every counted line of A is explained so: a harmonic h up to the highest sideband order
    examined at h / j times the spacing of a counted sideband of order ± j ≤ h (± h / j lines) — the modulation's own
    harmonic, stronger in the baseband than in the sidebands —, a higher harmonic or a sideband of A never: A has no
    evidence B lacks.
    """
    c, nf, slots = index.shape
    harmonics = slots - n_sidebands
    with np.errstate(invalid="ignore"):
        carried = (np.isfinite(modulation_hz)[:, None, :]
                   & (np.abs(modulation_hz[:, None, :] - expected_hz[:, :, None])
                      <= 1e-9 * np.abs(expected_hz[:, :, None])))  # (c, A, B)
    carried &= _not_eye(nf) & significant[:, None, :] & found[:, :, None, 0]
    if not carried.any():
        return carried
    k_b = index[:, :, 0]
    explained = np.zeros((c, nf, nf, harmonics), dtype=bool)
    h_slot, sb_slot, scale, h_with, starts = _sideband_pairs(harmonics)
    if h_slot.size:
        # every pair (harmonic h of A, sideband ± j of B, j ≤ h) at once: slot 0 is the fundamental, slot h − 1
        # harmonic h, which lies at h / j times that sideband's spacing (± h / j lines: the spacing's ± 1 scaled)
        spacing = np.where(found[:, :, sb_slot] & (k_b >= 0)[..., None],
                           np.abs(index[:, :, sb_slot] - k_b[..., None]), -10)  # (c, B, pairs)
        hit = found[:, :, None, h_slot] & (np.abs(spacing[:, None] * scale - index[:, :, None, h_slot]) <= scale)
        explained[..., h_with] = np.logical_or.reduceat(hit, starts, axis=-1)  # (c, A, B, harmonics with pairs)
    own = (found[:, :, None, :harmonics] & ~explained).any(axis=-1) | found[:, :, None, harmonics:].any(axis=-1)
    out: BoolArray = np.asarray(carried & explained[..., 0] & ~own)
    return out


def _pairs(harmonics: int) -> list[tuple[int, int, float]]:
    """(harmonic slot, sideband slot, h / j) of harmonic h and each sideband of order ± j, j ≤ h, for the h up to
    the highest sideband order examined (step 8 of the module docstring)."""
    top = int(_SIDEBAND_SPAN.max())
    return [(h - 1, harmonics + j, h / abs(order)) for h in range(1, min(harmonics, top) + 1)
            for j, order in enumerate(SIDEBAND_ORDERS) if abs(order) <= h]


@lru_cache(maxsize=16)
def _sideband_pairs(harmonics: int) -> tuple[IntArray, IntArray, FloatArray, IntArray, IntArray]:
    """The (harmonic, sideband) slot pairs of :func:`_modulation_explains` — harmonic h (h up to the highest
    sideband order examined) with the sidebands of order ± j, j ≤ h — grouped by harmonic: each pair's harmonic slot,
    sideband slot and h / j (where harmonic h lies, in spacings of its sideband ± j), the harmonics (slot numbers)
    that have pairs and where each one's pairs start."""
    pairs = _pairs(harmonics)
    h_slot = np.array([p[0] for p in pairs], dtype=np.intp)
    sb_slot = np.array([p[1] for p in pairs], dtype=np.intp)
    scale = np.array([p[2] for p in pairs], dtype=np.float64)
    h_with, starts = np.unique(h_slot, return_index=True)
    out = (h_slot, sb_slot, scale, h_with.astype(np.intp), starts.astype(np.intp))
    for a in out:
        a.flags.writeable = False
    return out


def shaft_series_established(shaft: LineSearch, candidate: IntArray) -> BoolArray:
    """Whether the shaft series has evidence of its own beside each family's candidate fundamental.

    Parameters
    ----------
    shaft : the search of the shaft harmonics, shape (channels, SHAFT_HARMONICS)
    candidate : int ndarray, shape (channels, families) — each family's candidate fundamental line (-1: none)

    Returns
    -------
    bool ndarray, shape (channels, families): some significant shaft line is not a harmonic of the candidate
    (line h × candidate within ± ⌈h/2⌉ + 1 lines, ± 1 for h = 1 — the harmonic windows of the family search).
    A series of shaft lines that are all harmonics of the candidate (a bearing line that slip has put on a whole
    order, and its harmonics) is explained by the candidate as well as by the shaft, and does not claim it.
    """
    idx = shaft.index[:, None, :].astype(np.float64)  # (c, 1, orders)
    cand = candidate[..., None].astype(np.float64)  # (c, f, 1)
    has = cand >= 1
    h = np.rint(idx / np.where(has, cand, 1.0))
    tol = np.where(h <= 1, 1.0, np.ceil(h / 2.0) + 1.0)
    explained = has & (h >= 1) & (np.abs(idx - h * cand) <= tol)
    out: BoolArray = np.asarray((shaft.found[:, None, :] & ~explained).any(axis=-1))
    return out


@lru_cache(maxsize=16)
def _harmonic_orders(harmonics: int) -> tuple[FloatArray, FloatArray]:
    """2 … ``harmonics`` (the harmonic slots' multiples of a fundamental), and each one's half-width in lines
    around h × a found fundamental (⌈h/2⌉ + 1)."""
    h = np.arange(2, harmonics + 1, dtype=np.float64)
    near = np.ceil(h / 2.0) + 1.0
    for a in (h, near):
        a.flags.writeable = False
    return h, near


@lru_cache(maxsize=16)
def _not_eye(families: int) -> BoolArray:
    """``~eye``, shape (1, families, families): pairs of two different families."""
    out = ~np.eye(families, dtype=bool)[None, :, :]
    out.flags.writeable = False
    return out


def _columns(a: LineSearch, cols: slice) -> LineSearch:
    """The windows ``cols`` of a search (views)."""
    return LineSearch(index=a.index[:, cols], statistic=a.statistic[:, cols], threshold=a.threshold[:, cols],
                      fits=a.fits[:, cols], lo=a.lo[:, cols], hi=a.hi[:, cols])


@lru_cache(maxsize=16)
def _first_min_half(families: int) -> FloatArray:
    """Smallest half-widths of the shaft harmonics' windows (½ line: the nearest line) and of the families'
    fundamentals (1 line: the two lines around a centre between lines), in one search's window order."""
    out = np.concatenate([np.full(SHAFT_HARMONICS, 0.5), np.full(families, 1.0)])
    out.flags.writeable = False
    return out


@lru_cache(maxsize=16)
def _first_tolerance(slip: float, families: int) -> FloatArray:
    """Relative half-widths of the shaft harmonics' windows (:data:`SHAFT_TOLERANCE`) and of the families'
    fundamentals (``slip``), in one search's window order."""
    out = np.concatenate([np.full(SHAFT_HARMONICS, SHAFT_TOLERANCE), np.full(families, slip)])
    out.flags.writeable = False
    return out
