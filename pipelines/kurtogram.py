"""Automatic demodulation band: spectral kurtosis on the fast kurtogram's grid, gated by envelope periodicity.

Spectral kurtosis (FIELD_NOTES §3; Antoni, "Fast computation of the kurtogram for the detection of transient
faults", MSSP 21 (2007) 108–124): for the complex envelope ``c(t)`` of a band,
``K = ⟨|c|⁴⟩ / ⟨|c|²⟩² − 2`` — 0 for stationary Gaussian noise, −1 for a pure tone, large for a band where
repetitive impacts excite a resonance.  The fast kurtogram evaluates K on a 1/3-binary tree of (centre, width)
pairs: at level k the range 0–fs/2 is cut into 2^k bands, at the intermediate level k + log2(3) − 1 (written
k.6) into 3·2^(k−1).  Here each band is formed by the same ideal FFT band-pass and decimated inverse transform as the
envelope analysis (:func:`edgevib.pipelines.envelope.demodulate`) instead of the paper's quasi-analytic filter
bank: the grid is Antoni's, the filters are exact.

**The periodicity gate.**  Kurtosis rewards any impulsiveness: electrical spikes, random knocks or a switching
converter make a spiky band whatever the bearing does.  A band is therefore eligible only when its
squared-envelope spectrum shows periodicity: its strongest local maximum over the envelope frequencies of interest
is significant at ``gate_false_alarm / bands`` against Gaussian noise, with the line statistic of
:mod:`edgevib.pipelines.detection` (level from the lines beside each line, Bonferroni over the lines searched) —
so stationary noise passes the gate of *any* band with probability at most ``gate_false_alarm``.  Among eligible
bands the one with the largest K wins; when none is eligible there is no automatic choice (the caller keeps its
configured or default band).

Cost: one rfft of the record plus, per tree level, inverse transforms whose lengths add up to about the record's
(each band is decimated to its own width), the squared-envelope spectra and a rank filter over the envelope
lines: roughly ``levels × 3`` record-length transforms, paid once per selection, never per frame.

The false-alarm probability of the family verdicts holds for a band chosen on other data (the daemon selects on
earlier frames).  Choosing the band on the very record that is then judged (``edgevib analyze --band auto``) can add
at most the gate's ``gate_false_alarm`` to it (union bound: a noise record selects an eligible band with at most
that probability; otherwise the default band is used).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage

from edgevib.common.bands import ANTI_ALIAS_RATIO
from edgevib.pipelines import _fft
from edgevib.pipelines.bearings import defect_multiples
from edgevib.pipelines.detection import (
    GUARD_LINES,
    LEVEL_LINES,
    LEVEL_RANK,
    LEVEL_STEP,
    level_mean_factor,
    line_threshold,
)
from edgevib.pipelines.envelope import MIN_LINE, demodulate, min_decimated_length
from edgevib.pipelines.indicators import as_channels, finite_mean
from edgevib.pipelines.spectrum import band_lines, hann_lines
from edgevib.pipelines.types import BearingGeometry, PlanError

__all__ = ["AUTO_BAND_FLOOR_HZ", "BandChoice", "BandScore", "kurtogram_grid", "select_band", "select_band_for"]

FloatArray = npt.NDArray[np.float64]

GATE_FALSE_ALARM = 1e-3
"""Probability that stationary Gaussian noise passes the periodicity gate of any band of the grid."""
MAX_LEVEL = 8  # at most 2^8 bands at the finest level
AUTO_BAND_FLOOR_HZ = 500.0
"""An automatic band stays above this and 20 × the highest shaft speed (shaft harmonics and their modulation
stay out of it; common practice)."""


@dataclass(frozen=True, slots=True)
class BandScore:
    """One band of the kurtogram grid: its level (k or k.6), edges, spectral kurtosis and periodicity."""

    level: float
    band_hz: tuple[float, float]
    kurtosis: float
    periodicity_db: float  # strongest squared-envelope line over its local level (dB); -inf if none
    gate_db: float  # what the gate asks for (dB)

    @property
    def periodic(self) -> bool:
        """The band's envelope shows periodicity (it passes the gate)."""
        return self.periodicity_db >= self.gate_db


@dataclass(frozen=True, slots=True)
class BandChoice:
    """Result of :func:`select_band`: ``band_hz`` is None when no band of the grid passes the periodicity gate."""

    band_hz: tuple[float, float] | None
    kurtosis: float | None
    periodicity_db: float | None
    grid: tuple[BandScore, ...]


def kurtogram_grid(fs_hz: float, allowed_hz: tuple[float, float], min_width_hz: float,
                   max_level: int = MAX_LEVEL) -> list[tuple[float, float, float]]:
    """Bands ``(level, low_hz, high_hz)`` of the 1/3-binary tree over 0–fs/2 that lie inside ``allowed_hz`` and are
    at least ``min_width_hz`` wide, coarsest first.

    Examples
    --------
    fs = 12 kHz, allowed 600–4687 Hz, width ≥ 1000 Hz: 2000–4000 (level 1.6), 1500–3000 and 3000–4500 (level 2),
    1000–2000, 2000–3000, 3000–4000 (level 2.6).
    """
    if not 0 < allowed_hz[0] < allowed_hz[1] <= fs_hz / 2:
        raise PlanError(f"band search range {allowed_hz[0]:g}–{allowed_hz[1]:g} Hz must lie inside 0–"
                        f"{fs_hz / 2:g} Hz")
    nyq = fs_hz / 2.0
    out: list[tuple[float, float, float]] = []
    for k in range(max_level + 1):
        for level, parts in ((float(k), 2**k), (k + math.log2(3) - 1, 3 * 2 ** (k - 1) if k >= 1 else 0)):
            if parts == 0:
                continue
            width = nyq / parts
            if width < min_width_hz:
                continue
            for i in range(parts):
                lo, hi = i * width, (i + 1) * width
                if lo >= allowed_hz[0] - 1e-9 and hi <= allowed_hz[1] + 1e-9:
                    out.append((round(level, 1), lo, hi))
    return out


def _periodicity(ses: FloatArray, k_lo: int, k_hi: int) -> FloatArray:
    """Largest level-normalised local maximum (T) of each row of ``ses`` within lines ``k_lo..k_hi``."""
    per_side = LEVEL_LINES // 2
    offsets = GUARD_LINES + 1 + LEVEL_STEP * np.arange(per_side)
    size = 2 * int(offsets[-1]) + 1
    footprint = np.zeros(size, dtype=bool)
    footprint[size // 2 + offsets] = True
    footprint[size // 2 - offsets] = True
    level = ndimage.rank_filter(ses, rank=LEVEL_RANK - 1, footprint=footprint[None, :], mode="mirror")
    level = level / level_mean_factor(LEVEL_LINES, LEVEL_RANK)
    seg = slice(k_lo, k_hi + 1)
    v = ses[:, seg]
    local = (v > ses[:, k_lo - 1 : k_hi]) & (v >= ses[:, k_lo + 1 : k_hi + 2])
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(local, v / np.maximum(level[:, seg], 1e-300), 0.0)
    out: FloatArray = t.max(axis=-1) if t.shape[-1] else np.zeros(ses.shape[0])
    return out


def select_band(x_g: npt.ArrayLike, fs_hz: float, *, allowed_hz: tuple[float, float], min_width_hz: float,
                envelope_hz: tuple[float, float], gate_false_alarm: float = GATE_FALSE_ALARM,
                max_level: int = MAX_LEVEL) -> BandChoice:
    """Choose a demodulation band for one record by spectral kurtosis among bands whose envelope is periodic.

    Parameters
    ----------
    x_g : array_like, shape (samples,) or (1, samples) — the record (g); several records of one point can be
        joined end to end
    allowed_hz : the range candidate bands must lie in (e.g. above 20 × the shaft speed and below fs/2.56 or the
        sensor's upper limit)
    min_width_hz : narrowest band considered (at least the highest envelope frequency searched)
    envelope_hz : envelope frequencies where periodicity is looked for (e.g. FTF at the lowest speed to the highest
        defect harmonic at the highest)
    gate_false_alarm : probability that stationary Gaussian noise passes the gate of any band

    Returns
    -------
    BandChoice — the band with the largest spectral kurtosis among those that pass the gate, and the whole grid
    """
    x = as_channels(x_g)
    if x.shape[0] != 1:
        raise PlanError(f"select_band takes one record, got {x.shape[0]} channels")
    if not 0 < gate_false_alarm < 1:
        raise PlanError(f"gate false-alarm probability {gate_false_alarm!r} must be in 0 < p < 1")
    n = x.shape[-1]
    df = fs_hz / n
    if not 0 < envelope_hz[0] < envelope_hz[1]:
        raise PlanError(f"envelope range {envelope_hz[0]:g}–{envelope_hz[1]:g} Hz must satisfy 0 < low < high")
    if min_width_hz < envelope_hz[1]:
        raise PlanError(f"narrowest band {min_width_hz:g} Hz must be at least the highest envelope frequency "
                        f"{envelope_hz[1]:g} Hz")
    grid = kurtogram_grid(fs_hz, allowed_hz, min_width_hz, max_level)
    if not grid:
        return BandChoice(None, None, None, ())
    finite_mean(x)
    spec = _fft.rfft(x - x.mean(axis=-1, keepdims=True))
    e_lo = max(MIN_LINE, math.floor(envelope_hz[0] / df))
    e_hi = math.ceil(envelope_hz[1] / df)
    top = e_hi + 2
    searched = max(1, e_hi - e_lo + 1)
    gate_t = line_threshold(gate_false_alarm / len(grid) / searched)
    gate_db = 10.0 * math.log10(gate_t)
    scores: list[BandScore] = []
    for level, lo, hi in grid:
        k_lo, k_hi = band_lines(fs_hz, n, (lo, hi))
        k_hi = min(k_hi, n // 2 - 1)
        if k_hi - k_lo + 1 < 8:
            continue
        m = min_decimated_length(k_hi - k_lo + 1, top + LEVEL_STEP * LEVEL_LINES + GUARD_LINES + 2)
        z = demodulate(spec, k_lo, k_hi, m)
        p = (z.real.astype(np.float64) ** 2 + z.imag.astype(np.float64) ** 2)
        # the complex envelope's samples: band lines fill k_hi − k_lo + 1 of m; |c|⁴ and |c|² averaged over m
        # samples (an oversampled ideal band: the ratio is that of the band's continuous envelope)
        p2 = float(np.mean(p * p))
        p1 = float(np.mean(p))
        sk = p2 / (p1 * p1) - 2.0 if p1 > 0 else float("nan")
        ses_spec = _fft.rfft(p)
        stop = min(ses_spec.shape[-1] - 1, top + LEVEL_STEP * LEVEL_LINES + GUARD_LINES + 2)
        lines = hann_lines(ses_spec, stop)
        ses = lines.real**2 + lines.imag**2
        t = float(_periodicity(ses, e_lo, min(e_hi, stop - 2))[0])
        scores.append(BandScore(level=level, band_hz=(lo, hi), kurtosis=sk,
                                periodicity_db=10.0 * math.log10(t) if t > 0 else -math.inf, gate_db=gate_db))
    eligible = [s for s in scores if s.periodic and math.isfinite(s.kurtosis)]
    if not eligible:
        return BandChoice(None, None, None, tuple(scores))
    best = max(eligible, key=lambda s: (s.kurtosis, -s.level))
    return BandChoice(best.band_hz, best.kurtosis, best.periodicity_db, tuple(scores))


def select_band_for(x_g: npt.ArrayLike, fs_hz: float, speed_range_hz: tuple[float, float],
                    bearing: BearingGeometry | None = None, *, harmonics: int = 3, upper_hz: float | None = None,
                    gate_false_alarm: float = GATE_FALSE_ALARM) -> tuple[BandChoice, str | None]:
    """:func:`select_band` with the search ranges of a machine: the band lies above ``max(500 Hz, 20 × the
    highest shaft speed)`` and below ``fs/2.56`` (and ``upper_hz``, the sensor's usable limit); it is at least
    1.2 × the highest envelope frequency searched wide; periodicity is looked for from 0.9 × FTF at the lowest
    speed (0.4 × shaft without a bearing) to ``harmonics`` × the highest defect frequency at the highest speed
    (10 × shaft without a bearing), + 2 % slip.

    Parameters
    ----------
    x_g : array_like, shape (samples,) — one record (g)
    speed_range_hz : the shaft speeds the record may have (a known speed: a narrow range around it)

    Returns
    -------
    (BandChoice, reason) — ``reason`` is None when a band was chosen, else one line saying why not
    """
    x = np.asarray(x_g, dtype=np.float64).reshape(-1)
    if bearing is not None:
        m = defect_multiples(bearing)
        top = harmonics * max(m.bpfi_hz, m.bpfo_hz, 2 * m.bsf_hz) * speed_range_hz[1] * 1.02
        low = 0.9 * m.ftf_hz * speed_range_hz[0]
    else:
        top, low = 10.0 * speed_range_hz[1], 0.4 * speed_range_hz[0]
    hi = fs_hz / ANTI_ALIAS_RATIO if upper_hz is None else min(fs_hz / ANTI_ALIAS_RATIO, upper_hz)
    lo = max(AUTO_BAND_FLOOR_HZ, 20.0 * speed_range_hz[1])
    if hi <= lo:
        return BandChoice(None, None, None, ()), f"no room for a band between {lo:g} Hz and {hi:g} Hz"
    if x.size < 64:
        return BandChoice(None, None, None, ()), f"record of {x.size} samples is too short"
    width = max(1.2 * top, 4.0 * fs_hz / x.size)
    choice = select_band(x, fs_hz, allowed_hz=(lo, hi), min_width_hz=width,
                         envelope_hz=(max(low, 3.0 * fs_hz / x.size), top), gate_false_alarm=gate_false_alarm)
    if choice.band_hz is not None:
        return choice, None
    if choice.grid:
        return choice, "no band of the kurtogram showed a periodic envelope"
    return choice, f"no kurtogram band fits {lo:g}–{hi:g} Hz at least {width:.0f} Hz wide"
