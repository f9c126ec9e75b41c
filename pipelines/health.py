"""Sensor health checks on raw frames: is this a sensor (or cable) problem rather than a machine problem?

Each check is vectorized over a leading channel axis and looks for a signature a healthy accelerometer on a
running machine does not produce (FIELD_NOTES §6, common practice):

``bias``
    the frame mean outside what the sensor can show: an IEPE bias voltage outside its window (near the supply
    voltage: open cable or no sensor; near 0 V: a short), a MEMS mean beyond the gravity it can see
    (|mean| > 1 g + tolerance, or away from the configured gravity component), a DC offset on an AC-coupled
    piezo channel;
``flatline``
    a standard deviation under a floor no live sensor reaches, or most samples repeating the previous one
    (a stuck converter or a held last value);
``clipping``
    samples at the full scale of the sensor, or — without a known full scale — flat tops: runs of consecutive
    samples at the frame's extreme, which a band-limited signal never produces (unless the whole frame spans only
    a few quantization steps: a quiet signal on a coarse converter repeats its extremes by nature);
``dc-step``
    the frame's local mean jumping between segments by more than the vibration's own spread (an intermittent
    connector or a cable being moved);
``spikes``
    isolated single-sample excursions far above the robust spread with nothing comparable within ±8 samples —
    unlike bearing impacts, which ring a structural resonance over many samples;
``noise``
    the noise floor (median power spectral density in a band above the machine's content) above the sensor's
    specified noise density by a factor.

A standing machine is judged against what a standing machine shows (``running=False``): only the sensor's own
noise, which a coarse converter renders as a few repeating quantization steps.  So on such rows a flatline needs
the standard deviation under its floor (repeats alone are expected), and the noise-floor check, which assumes the
machine's content and the sensor's noise specification, is not applied.  A dead output, a bias out of its
window, clipping, DC steps and spikes are sensor faults whatever the machine does.

"No data for N frames" is a timer and belongs to the daemon.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.types import PlanError, SignalError

__all__ = ["FAULT_ORDER", "HealthSpec", "SensorFault", "SensorHealth", "check_health"]

SensorFault = Literal["bias", "flatline", "clipping", "dc-step", "spikes", "noise"]
FAULT_ORDER: tuple[SensorFault, ...] = ("bias", "flatline", "clipping", "dc-step", "spikes", "noise")
SPIKE_WINDOW = 8  # samples each side in which a ringing response would show
_AROUND = np.concatenate([np.arange(-SPIKE_WINDOW, 0), np.arange(1, SPIKE_WINDOW + 1)])  # a sample's window
_AROUND.flags.writeable = False
MIN_LEVELS = 16  # quantization steps a frame must span before flat tops at its extremes say "clipping"
_BLOCK_SAMPLES = 1 << 17  # the exact spike test works on blocks of rows of about this many samples (1 MB)
_MAD_TO_SIGMA = 1.4826  # σ / median absolute deviation for a Gaussian (common practice)


@dataclass(frozen=True, slots=True)
class HealthSpec:
    """Thresholds of the checks for one sensor; ``None`` switches a check off where noted.

    ``expected_mean_g`` is the mean the sensor should show (MEMS: the gravity component of its axis, e.g. 1.0
    on a vertical axis; piezo: 0); ``None`` means "any value a sensor of this type can show" (MEMS:
    |mean| ≤ 1 g + ``mean_tolerance_g``; piezo: |mean| ≤ ``mean_tolerance_g``).
    """

    sensor_type: Literal["piezo", "mems"] = "piezo"
    flatline_std_g: float = 1e-5
    repeat_fraction: float = 0.5
    full_scale_g: float | None = None
    clip_fraction: float = 0.002
    expected_mean_g: float | None = None
    mean_tolerance_g: float = 0.5
    bias_window_v: tuple[float, float] = (8.0, 12.0)
    segments: int = 4
    step_ratio: float = 1.5
    step_floor_g: float = 0.05
    spike_sigma: float = 10.0
    noise_density_ug_rthz: float | None = None
    noise_factor: float = 10.0
    noise_band_hz: tuple[float, float] | None = None

    def __post_init__(self) -> None:
        if self.segments < 2:
            raise PlanError(f"the DC-step check needs at least 2 segments, got {self.segments}")
        lo, hi = self.bias_window_v
        if not 0.0 <= lo < hi:
            raise PlanError(f"bias window {lo:g}–{hi:g} V must satisfy 0 ≤ low < high")
        for name in ("flatline_std_g", "clip_fraction", "mean_tolerance_g", "step_ratio", "spike_sigma",
                     "noise_factor"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v > 0):
                raise PlanError(f"{name} = {v!r} must be finite and > 0")


@dataclass(frozen=True, slots=True)
class SensorHealth:
    """The health of one channel's frame: the faults found (in :data:`FAULT_ORDER`) and the measured values."""

    faults: tuple[SensorFault, ...]
    detail: str
    mean_g: float
    std_g: float
    repeat_fraction: float
    clip_fraction: float
    step_g: float
    spike_count: int
    noise_density_ug_rthz: float | None
    bias_v: float | None

    @property
    def fault(self) -> SensorFault | None:
        """The most telling fault, or ``None`` when the frame looks healthy."""
        return self.faults[0] if self.faults else None

    @property
    def ok(self) -> bool:
        return not self.faults


def _noise_density(xc: npt.NDArray[np.float64], fs_hz: float,
                   band_hz: tuple[float, float]) -> npt.NDArray[np.float64]:
    """Median one-sided PSD in the band → amplitude density in µg/√Hz, shape ``(channels,)``.

    A Hann-windowed periodogram line of noise is exponentially distributed, so its median is ln 2 times its mean.
    """
    n = xc.shape[1]
    w = np.hanning(n)
    spec = np.fft.rfft(xc * w, axis=1)
    psd = 2.0 * (spec.real**2 + spec.imag**2) / (fs_hz * float(np.sum(w * w)))
    f = np.fft.rfftfreq(n, 1.0 / fs_hz)
    mask = (f >= band_hz[0]) & (f <= band_hz[1])
    if int(mask.sum()) < 8:
        raise PlanError(f"noise band {band_hz[0]:g}–{band_hz[1]:g} Hz holds fewer than 8 spectral lines at "
                        f"{n} samples and {fs_hz:g} Hz")
    med = np.median(psd[:, mask], axis=1) / math.log(2.0)
    return np.asarray(np.sqrt(med) * 1e6, dtype=np.float64)


def _spike_counts(x: npt.NDArray[np.float64], spike_sigma: float, scratch: npt.NDArray[np.bool_] | None = None
                  ) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.float64]]:
    """Isolated spikes of rows ``x`` (rows, samples) and their robust spread σ_r = 1.4826 × MAD, shape (rows,).

    A spike is a sample farther than ``spike_sigma`` × σ_r from the median with nothing of at least a third of its
    size within ±:data:`SPIKE_WINDOW` samples: a bearing impact rings a resonance (opposite half-cycles of
    similar size a few samples away); an electrical spike does not.  Samples within :data:`SPIKE_WINDOW` of
    either frame edge are not judged (the window is incomplete there).
    """
    c, n = x.shape
    if scratch is None:
        scratch = np.empty((c, n), dtype=np.bool_)
    # blocks of rows of about 1 MB of deviations, one buffer for all: batch-sized float64 temporaries beside the
    # batch itself are handed back to the system by the allocator after each call and faulted in again (page
    # faults cost microseconds each on a virtual machine)
    rows = max(1, min(c, _BLOCK_SAMPLES // n))
    buf = np.empty((rows, n), dtype=np.float64)
    spikes = np.zeros(c, dtype=np.int64)
    sigma_r = np.empty(c, dtype=np.float64)
    for i in range(0, c, rows):
        j = min(c, i + rows)
        spikes[i:j], sigma_r[i:j] = _spike_block(x[i:j], spike_sigma, scratch[: j - i], buf[: j - i])
    return spikes, sigma_r


def _spike_block(x: npt.NDArray[np.float64], spike_sigma: float, scratch: npt.NDArray[np.bool_],
                 xc_abs: npt.NDArray[np.float64]) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.float64]]:
    """:func:`_spike_counts` of a block of rows; ``scratch`` and ``xc_abs`` are buffers of ``x``'s shape."""
    c, n = x.shape
    med = _medians(x, scratch)
    np.subtract(x, med, out=xc_abs)
    np.abs(xc_abs, out=xc_abs)
    sigma_r = _MAD_TO_SIGMA * _medians(xc_abs, scratch)
    big = np.greater(xc_abs, spike_sigma * np.where(sigma_r > 0, sigma_r, np.inf), out=scratch)
    spikes = np.zeros(c, dtype=np.int64)
    # a candidate within the window of either frame edge is not judged: its ringing may lie beyond the edge
    # (an impact struck in the last samples), and overlapping frames see it in their interior
    big[:, :SPIKE_WINDOW] = False
    big[:, max(n - SPIKE_WINDOW, 0):] = False
    ci, ii = _nonzero(big)
    if ci.size:
        # a candidate whose next neighbour already reaches a third of it is not isolated (the ringing of an
        # impact: most candidates); only the others are compared with their whole window
        third = xc_abs[ci, ii] / 3.0
        nbr = np.maximum(xc_abs[ci, np.maximum(ii - 1, 0)], xc_abs[ci, np.minimum(ii + 1, n - 1)])
        keep = nbr < third
        ci, ii, third = ci[keep], ii[keep], third[keep]
        idx = np.minimum(np.maximum(ii[:, None] + _AROUND[None, :], 0), n - 1)
        around = xc_abs[ci[:, None], idx].max(axis=1, initial=0.0)
        isolated = around < third
        spikes = np.bincount(ci[isolated], minlength=c).astype(np.int64)
    return spikes, sigma_r[:, 0]


def _medians(a: npt.NDArray[np.float64], scratch: npt.NDArray[np.bool_]) -> npt.NDArray[np.float64]:
    """``np.median(a, axis=1, keepdims=True)``, the same values (the middle sample, or the mean of the middle two),
    without ordering whole rows (``scratch``: a boolean array of ``a``'s shape, overwritten).

    A bracket [lo, hi] is taken from a fixed subsample of 256 samples of each row (its order statistics 3 standard
    deviations of the sample median's rank either side of the middle); comparison passes count the samples below
    it and mark those inside, and where the middle ranks fall inside, only the samples inside (about a fifth of
    the row) are partitioned, at the middle ranks less the count below.  A row whose bracket misses them (an
    unlucky subsample) is partitioned whole.  Either way the order statistics are exact.  On the project's machine,
    for 16,384 samples: about 150 µs a row, against 580 for a sort (numpy's sort of long float64 rows is slow
    there) and 200 for a whole-row partition, which also allocates a copy of the batch.
    """
    rows, n = a.shape
    h = n // 2
    ranks = [h] if n % 2 else [h - 1, h]
    out = np.empty((rows, 1), dtype=np.float64)
    sub_idx = _subsample(n, 256)
    m = sub_idx.size
    j = math.ceil(1.5 * math.sqrt(m)) + 2  # 3 × the spread of the sample median's rank, √m / 2
    whole: npt.NDArray[np.intp] = np.arange(rows)
    if m == 256 and n >= 4 * m:
        sub = np.sort(a[:, sub_idx], axis=1)
        lo, hi = sub[:, m // 2 - j : m // 2 - j + 1], sub[:, m // 2 + j : m // 2 + j + 1]
        below = _count(np.less(a, lo, out=scratch))
        np.less_equal(a, hi, out=scratch)
        scratch &= a >= lo
        inside = _count(scratch)
        fits = (below <= ranks[0]) & (below + inside > ranks[-1])
        whole = np.flatnonzero(~fits)
        vals = a[scratch]  # the rows' samples inside their brackets, row after row
        end = np.cumsum(inside).tolist()
        for i in np.flatnonzero(fits).tolist():
            k = [r - int(below[i]) for r in ranks]
            part = np.partition(vals[end[i] - int(inside[i]) : end[i]], k)
            out[i, 0] = part[k[0]] if n % 2 else (part[k[0]] + part[k[1]]) / 2.0
    for i in whole.tolist():
        part = np.partition(a[i], ranks)
        out[i, 0] = part[h] if n % 2 else (part[h - 1] + part[h]) / 2.0
    return out


def _count(mask: npt.NDArray[np.bool_]) -> npt.NDArray[np.int64]:
    """True entries per row: byte sums in uint16 over at most 65,535 columns at a time (several times faster than
    ``count_nonzero(axis=1)`` or a byte sum in int64, whose casting loop is slow)."""
    b = mask.view(np.uint8)
    n = b.shape[1]
    if n <= 0xFFFF:
        return np.asarray(b.sum(axis=1, dtype=np.uint16), dtype=np.int64)
    out = np.zeros(b.shape[0], dtype=np.int64)
    for s in range(0, n, 0xFFFF):
        out += b[:, s : s + 0xFFFF].sum(axis=1, dtype=np.uint16)
    return out


def _nonzero(mask: npt.NDArray[np.bool_]) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """``np.nonzero`` of a C-contiguous (rows, samples) mask, through the flat indices (several times faster on a
    sparse mask: the two-dimensional form walks every element)."""
    rows, cols = np.divmod(np.flatnonzero(mask), mask.shape[1])
    return rows, cols


@lru_cache(maxsize=16)
def _subsample(n: int, size: int = 1024) -> npt.NDArray[np.int64]:
    """A fixed, non-periodic subsample of up to ``size`` of n sample indices (a Weyl sequence; kept per frame
    length)."""
    sub = np.unique((np.arange(min(n, size)) * 0.6180339887498949 * n).astype(np.int64) % n)
    sub.flags.writeable = False
    return sub


def _nearest_distance(sub: npt.NDArray[np.float64], centre: npt.NDArray[np.float64], k: int
                      ) -> npt.NDArray[np.float64]:
    """Per row of the sorted ``sub`` (rows, m): the order statistic of rank ``k`` (from 0) of ``|sub − centre|``,
    shape (rows,), without sorting the distances.

    The k + 1 samples nearest the centre are k + 1 neighbours in sorted order, and within such a window the
    farthest is at one of its ends; so the statistic is the least, over the windows, of the larger end distance
    (the same computed values as a sort of the distances)."""
    m = sub.shape[1]
    d = np.abs(sub - centre[:, None])
    return np.asarray(np.maximum(d[:, : m - k], d[:, k:]).min(axis=1), dtype=np.float64)


def _outward(v: npt.NDArray[np.float64], dtype: np.dtype[Any], up: bool) -> npt.NDArray[Any]:
    """``v`` in ``dtype``, rounded up (``up``) or down where ``dtype`` cannot hold it: a comparison of samples of
    that type against the result counts at least (below an upper edge) or at most what it would against ``v``."""
    r = v.astype(dtype)
    if r.dtype == v.dtype:
        return r
    wrong = r < v if up else r > v
    return np.where(wrong, np.nextafter(r, np.inf if up else -np.inf), r)


def _spike_screen(x: npt.NDArray[np.floating[Any]], spike_sigma: float, hi: npt.NDArray[np.float64],
                  lo: npt.NDArray[np.float64], scratch: npt.NDArray[np.bool_]) -> npt.NDArray[np.bool_]:
    """Rows proven to hold no isolated spike, by counting passes and a sparse test instead of two exact medians.

    ``x`` are the rows in their own precision (float32 or float64; the samples the arithmetic needs are taken in
    float64, exactly), ``hi`` and ``lo`` their extremes.  The order statistics of a fixed, non-periodic subsample of
    1024 samples give guesses: a bracket [m_lo, m_hi] of the median (3 standard deviations of the sample median's
    rank either side of the middle) and a lower bound t of the MAD (the deviation from the subsample's median
    reached by 3 standard deviations fewer than half its samples, less the bracket's half-width).  Three counts
    prove them: fewer than n/2 samples below m_lo and fewer than n/2 above m_hi put the median (the middle sample or
    the mean of the middle two) inside the bracket; fewer than n/2 samples within (m_lo − t, m_hi + t) prove MAD ≥ t
    (with a relative slack of 1e-9 for rounding), so the spike threshold is at least T_lo = ``spike_sigma`` × 1.4826
    × t, rounded as the exact test rounds.  A row with no sample farther than T_lo from the bracket has no spike
    candidate.  Otherwise every sample that may be a candidate (outside (m_hi − T_lo, m_lo + T_lo), away from the
    frame edges; a few per impact on impulsive rows) must be proven not isolated: its deviation from any median in
    the bracket is at most A = max(|x − m_lo|, |x − m_hi|), a neighbour's at least its distance from the bracket, so
    a neighbour within ±:data:`SPIKE_WINDOW` at least A / 3 from the bracket settles it (the ringing of an impact).
    The floating-point differences are monotone in the median, so these bounds hold for the rounded values the exact
    test compares.  A row with a possible isolated spike, or whose guesses fail, goes to the exact test.
    """
    c, n = x.shape
    sub_idx = _subsample(n)
    m = sub_idx.size
    # a gather through flat indices: ``x[:, sub_idx]`` comes out in column order and sorts several times slower
    # sorted in the rows' own precision (float32 sorts about twice as fast), then taken exactly into float64
    sub = np.take(x.reshape(-1), np.arange(0, c * n, n)[:, None] + sub_idx[None, :])
    sub.sort(axis=1)
    sub = _f64(sub)
    j = math.ceil(1.5 * math.sqrt(m)) + 2  # 3 × the spread of the sample median's rank, √m / 2
    mid = m // 2
    m_lo, centre, m_hi = sub[:, max(mid - j, 0)], sub[:, mid], sub[:, min(mid + j, m - 1)]
    t = _nearest_distance(sub, centre, max(mid - j, 0)) - np.maximum(centre - m_lo, m_hi - centre)
    slack = 1e-9 * (np.abs(m_lo) + np.abs(m_hi) + np.abs(t))
    dt = x.dtype
    below = _count(np.less(x, m_lo.astype(dt)[:, None], out=scratch))  # m_lo, m_hi: samples, exact in dt
    above = _count(np.greater(x, m_hi.astype(dt)[:, None], out=scratch))
    near = _count(np.less(x, _outward(m_hi + t + slack, dt, up=True)[:, None], out=scratch)) - \
        _count(np.less_equal(x, _outward(m_lo - t - slack, dt, up=False)[:, None], out=scratch))
    proven = (2 * below < n) & (2 * above < n) & (2 * near < n) & (t > 0)
    t_lo = spike_sigma * (_MAD_TO_SIGMA * t)  # the exact test's threshold, rounded alike (monotone in t)
    slack = 1e-9 * (np.abs(m_lo) + np.abs(m_hi) + np.abs(t_lo))
    up, dn = m_lo + t_lo - slack, m_hi - t_lo + slack  # a candidate lies above up or below dn
    cleared: npt.NDArray[np.bool_] = np.asarray(proven & (hi <= up) & (lo >= dn), dtype=np.bool_)
    test = np.flatnonzero(proven & ~cleared)
    if not test.size:
        return cleared
    if 2 * test.size >= c:  # most rows: one pass over all, the others with thresholds no sample passes
        rows: npt.NDArray[np.intp] = np.arange(c)
        up = np.where(proven & ~cleared, up, np.inf)
        dn = np.where(proven & ~cleared, dn, -np.inf)
        xs = x
    else:
        rows, up, dn, xs = test, up[test], dn[test], x[test]
    maybe = np.greater(xs, _outward(up, dt, up=False)[:, None], out=scratch[: rows.size])
    maybe |= np.less(xs, _outward(dn, dt, up=True)[:, None])
    maybe[:, :SPIKE_WINDOW] = False  # candidates near the frame edges are not judged
    maybe[:, max(n - SPIKE_WINDOW, 0):] = False
    ri, ii = _nonzero(maybe)
    ci = rows[ri]
    lo_b, hi_b = m_lo[ci], m_hi[ci]
    xk = _f64(x[ci, ii])
    third = np.maximum(np.abs(xk - lo_b), np.abs(xk - hi_b)) / 3.0
    # the next neighbours first: they settle most candidates (an impact's ringing), the whole window the rest
    before, after = x[ci, ii - 1], x[ci, ii + 1]
    nb, nb_lo = _f64(np.maximum(before, after)), _f64(np.minimum(before, after))
    open_ = np.flatnonzero(np.maximum(nb - hi_b, lo_b - nb_lo) < third)
    ci, ii, lo_b, hi_b, third = ci[open_], ii[open_], lo_b[open_], hi_b[open_], third[open_]
    xj = _f64(x[ci[:, None], ii[:, None] + _AROUND[None, :]])
    reach = np.maximum(xj - hi_b[:, None], lo_b[:, None] - xj).max(axis=1, initial=0.0)
    doubt = np.zeros(c, dtype=np.bool_)
    doubt[ci[reach < third]] = True
    cleared[test] = ~doubt[test]
    return cleared


def check_health(frames: npt.ArrayLike, fs_hz: float, spec: HealthSpec | None = None,
                 bias_v: npt.ArrayLike | None = None, *, rms_g: npt.ArrayLike | None = None,
                 screen: bool = True, running: npt.ArrayLike | None = None) -> tuple[SensorHealth, ...]:
    """Check the health of a batch of frames of one sensor type.

    Parameters
    ----------
    frames : array_like, shape (channels, samples) or (samples,)
        Raw acceleration in g (means kept: the mean is one of the checks).
    fs_hz : float
        Sample rate.
    spec : HealthSpec, optional
        Thresholds (defaults: a piezo sensor with no noise specification).
    bias_v : array_like, shape (channels,), optional
        IEPE bias voltage of each channel when the acquisition reports it (NaN: not reported).
    rms_g : array_like, shape (channels,), optional
        The frames' r.m.s. about their means when already known (``FrameIndicators.acceleration_rms_g``): saves
        the standard-deviation and within-segment passes.  The mean and the extremes come from the segment-mean
        and max/min passes the checks need anyway.
    screen : bool
        Prove most rows spike-free by counting (see :func:`_spike_screen`) and run the exact median-based spike
        test only on the others; ``False`` runs it on every row (same verdicts, slower: the reference).
    running : array_like of bool, shape (channels,), optional
        Whether each channel's machine runs (default: all).  ``False`` judges the row against a standing
        machine: flatline only by the standard-deviation floor, no noise-floor check (module docstring).

    Returns
    -------
    tuple of SensorHealth, one per channel.

    Raises
    ------
    SignalError
        Non-finite samples, fewer than 16 samples per channel, or a mismatched ``bias_v`` / ``rms_g`` /
        ``running``.
    PlanError
        A noise band that cannot be resolved.

    Notes
    -----
    Cost: about ten vectorized passes over the batch (segment means, max, min, repeats, two comparisons for flat
    tops, four for the spike screen; two more and a sparse test on impulsive rows) for a healthy row; flat tops
    and spikes are worked out exactly only on the rows whose cheap statistics leave them possible.  The noise
    check adds one FFT per row when a noise density is specified.
    """
    spec = spec or HealthSpec()
    xn, bias, turning = _checked_inputs(frames, fs_hz, spec, bias_v, running)
    c, n = xn.shape
    std_given: npt.NDArray[np.float64] | None = None
    if rms_g is not None:
        std_given = np.asarray(rms_g, dtype=np.float64).reshape(-1)
        if std_given.shape != (c,) or not np.all(np.isfinite(std_given)):
            raise SignalError(f"rms_g must hold {c} finite values, got {np.asarray(rms_g).shape}")

    # Segment means (pass 1): the DC-step check, the frame mean and — since NaN and ±Inf reach a sum — the
    # finiteness check; in float64, a block of rows at a time (no float64 copy of the whole batch).
    seg = n // spec.segments
    body = seg * spec.segments
    seg_mean, tail_sum, std_sums, within_sums = _row_sums(xn, spec.segments, std_given is None)
    if not (np.all(np.isfinite(seg_mean)) and np.all(np.isfinite(tail_sum))):
        raise SignalError("health check got non-finite samples")
    mean = (seg_mean.sum(axis=1) * seg + tail_sum) / n
    std = std_given if std_given is not None else np.asarray(std_sums, dtype=np.float64)

    # Extremes (passes 2, 3) and repeats (pass 4).
    # (comparisons and extremes in the frames' own precision: the same values, half the memory for float32)
    hi, lo = xn.max(axis=1).astype(np.float64), xn.min(axis=1).astype(np.float64)
    scratch = np.empty((c, n), dtype=np.bool_)
    repeat_n = _count(np.equal(xn[:, 1:], xn[:, :-1], out=scratch[:, 1:]))
    pinned_n = _flat_tops(xn, hi, lo, repeat_n, scratch)
    clip = _clip_fraction(xn, hi, lo, pinned_n, spec)
    repeat = repeat_n / (n - 1)

    # DC step: spread of segment means against the within-segment spread (total variance = within + between
    # for equal segments covering the frame; computed directly otherwise).
    if body == n:
        between2 = np.mean((seg_mean - mean[:, None]) ** 2, axis=1)
        within = np.sqrt(np.maximum(std * std - between2, 0.0))
    else:
        within = np.sqrt(np.asarray(within_sums, dtype=np.float64))
    step = seg_mean.max(axis=1) - seg_mean.min(axis=1)
    step_limit = np.maximum(spec.step_floor_g, spec.step_ratio * within)

    # Spikes: the exact median test only where the counting screen cannot rule them out.
    spikes = np.zeros(c, dtype=np.int64)
    sigma_r = np.full(c, np.nan)
    exact = np.arange(c) if not screen else np.flatnonzero(~_spike_screen(xn, spec.spike_sigma, hi, lo, scratch))
    if exact.size:
        rows = xn if exact.size == c else xn[exact]
        spikes[exact], sigma_r[exact] = _spike_counts(_f64(rows), spec.spike_sigma, scratch[: exact.size])

    noise: npt.NDArray[np.float64] | None = None
    if spec.noise_density_ug_rthz is not None and turning.any():
        band = spec.noise_band_hz or (0.35 * fs_hz, 0.45 * fs_hz)
        if band[1] > fs_hz / 2:
            raise PlanError(f"noise band high edge {band[1]:g} Hz is above Nyquist {fs_hz / 2:g} Hz")
        noise = _noise_density(_f64(xn) - mean[:, None], fs_hz, band)

    out: list[SensorHealth] = []
    for i in range(c):
        m = float(mean[i])
        b = None if bias is None or not math.isfinite(bias[i]) else float(bias[i])
        nd = None if noise is None or not turning[i] else float(noise[i])
        found = _bias_findings(m, b, spec)
        found += _signal_findings(spec, std=float(std[i]), repeat=float(repeat[i]), turning=bool(turning[i]),
                                  clip=float(clip[i]), step=float(step[i]), step_limit=float(step_limit[i]),
                                  spikes=int(spikes[i]), sigma_r=float(sigma_r[i]), nd=nd)
        if any(f == "flatline" for f, _ in found):
            # A flat signal makes the other statistics meaningless (no spread, every sample "pinned").
            found = [(f, d) for f, d in found if f in ("bias", "flatline")]
        found.sort(key=lambda fd: FAULT_ORDER.index(fd[0]))
        out.append(SensorHealth(
            faults=tuple(f for f, _ in found), detail="; ".join(d for _, d in found), mean_g=m, std_g=float(std[i]),
            repeat_fraction=float(repeat[i]), clip_fraction=float(clip[i]), step_g=float(step[i]),
            spike_count=int(spikes[i]), noise_density_ug_rthz=nd, bias_v=b))
    return tuple(out)


def _f64(a: npt.NDArray[np.floating[Any]]) -> npt.NDArray[np.float64]:
    """``a`` in float64 (itself when it is already; float32 → float64 is exact)."""
    return np.asarray(a, dtype=np.float64)


def _row_sums(xn: npt.NDArray[np.floating[Any]], segments: int, std: bool
              ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64], npt.NDArray[np.float64] | None,
                         npt.NDArray[np.float64] | None]:
    """Per row of ``xn`` (rows, n), in float64: the means of ``segments`` equal segments (rows, segments), the sum
    of the samples after the last whole segment (rows,), with ``std`` the standard deviation (rows,), and — when
    the segments leave a tail — the mean square deviation of the segments' samples from their segment means
    (rows,), else ``None``.

    Rows in float32 are converted a block of rows (about 1 MB) at a time into one buffer; each row's values are
    those of the whole batch converted at once (the reductions run along each row alike), without a float64 copy
    of the batch beside it (8 MB for 64 frames of 16,384 samples, handed back to the system after each call and
    faulted in again).
    """
    c, n = xn.shape
    seg = n // segments
    body = seg * segments
    seg_mean = np.empty((c, segments), dtype=np.float64)
    tail_sum = np.empty(c, dtype=np.float64)
    std_out = np.empty(c, dtype=np.float64) if std else None
    within = np.empty(c, dtype=np.float64) if body != n else None
    rows = c if xn.dtype == np.float64 else max(1, min(c, _BLOCK_SAMPLES // n))
    buf = None if rows == c and xn.dtype == np.float64 else np.empty((rows, n), dtype=np.float64)
    for i in range(0, c, rows):
        j = min(c, i + rows)
        if buf is None:
            x = _f64(xn)
        else:
            x = buf[: j - i]
            x[...] = xn[i:j]
        sm = x[:, :body].reshape(j - i, segments, seg).mean(axis=2)
        seg_mean[i:j] = sm
        tail_sum[i:j] = x[:, body:].sum(axis=1)
        if std_out is not None:
            std_out[i:j] = x.std(axis=1)
        if within is not None:
            xs = x[:, :body].reshape(j - i, segments, seg)
            within[i:j] = np.mean((xs - sm[:, :, None]) ** 2, axis=(1, 2))
    return seg_mean, tail_sum, std_out, within


def _checked_inputs(frames: npt.ArrayLike, fs_hz: float, spec: HealthSpec, bias_v: npt.ArrayLike | None,
                    running: npt.ArrayLike | None) -> tuple[npt.NDArray[np.floating[Any]],
                                                            npt.NDArray[np.float64] | None, npt.NDArray[np.bool_]]:
    """The frames as (channels, samples) in float32 or float64 (as given; other types in float64), the bias
    voltages and the running flags, shapes checked."""
    x = np.asarray(frames)
    if x.dtype not in (np.float32, np.float64):
        x = x.astype(np.float64)
    if x.ndim == 1:
        x = x[None, :]
    if x.ndim != 2 or x.shape[1] < max(16, 4 * spec.segments):
        raise SignalError(f"health check needs frames shaped (channels, samples ≥ 16 and ≥ 4 per segment), "
                          f"got {x.shape}")
    if not (math.isfinite(fs_hz) and fs_hz > 0):
        raise SignalError(f"sample rate {fs_hz!r} Hz must be finite and > 0")
    c = x.shape[0]
    bias = None
    if bias_v is not None:
        bias = np.asarray(bias_v, dtype=np.float64).reshape(-1)
        if bias.shape != (c,):
            raise SignalError(f"bias_v has {bias.size} values for {c} channels")
    turning = np.ones(c, dtype=np.bool_)
    if running is not None:
        turning = np.asarray(running, dtype=np.bool_).reshape(-1)
        if turning.shape != (c,):
            raise SignalError(f"running has {turning.size} values for {c} channels")
    return x, bias, turning


def _flat_tops(xn: npt.NDArray[np.floating[Any]], hi: npt.NDArray[np.float64], lo: npt.NDArray[np.float64],
               repeat_n: npt.NDArray[np.int64], scratch: npt.NDArray[np.bool_]) -> npt.NDArray[np.int64]:
    """Pinned pairs per row (consecutive samples at the frame's extreme); removes them from ``repeat_n``.

    ``xn`` are the rows in their own precision.  A row with fewer than two samples near either extreme (passes 5,
    6, in ``xn``'s precision against limits rounded so that they count the same samples) has no pinned pair; the
    others are counted, in float64.
    """
    c = xn.shape[0]
    tol = 1e-6 * (hi - lo) + 1e-12
    near_hi = _count(np.greater_equal(xn, _outward(hi - tol, xn.dtype, up=True)[:, None], out=scratch))
    near_lo = _count(np.less_equal(xn, _outward(lo + tol, xn.dtype, up=False)[:, None], out=scratch))
    pinned_n = np.zeros(c, dtype=np.int64)
    top_rows = np.flatnonzero((near_hi >= 2) | (near_lo >= 2))
    if top_rows.size:
        xs_ = _f64(xn[top_rows])
        at_hi, at_lo = xs_ >= (hi - tol)[top_rows, None], xs_ <= (lo + tol)[top_rows, None]
        pinned = (at_hi[:, 1:] & at_hi[:, :-1]) | (at_lo[:, 1:] & at_lo[:, :-1])
        # A frame spanning only a few quantization steps (the smallest non-zero change between samples) repeats
        # its extremes by nature: its flat tops are no evidence of clipping.
        steps = np.abs(np.diff(xs_, axis=1))
        q = np.min(np.where(steps > 0, steps, np.inf), axis=1)
        coarse = (hi[top_rows] - lo[top_rows]) < MIN_LEVELS * q
        pinned[coarse] = False
        pinned_n[top_rows] = _count(pinned)
        repeat_n[top_rows] -= _count(pinned & (xs_[:, 1:] == xs_[:, :-1]))  # pinned tops are clipping, not stuck
    return pinned_n


def _clip_fraction(xn: npt.NDArray[np.floating[Any]], hi: npt.NDArray[np.float64], lo: npt.NDArray[np.float64],
                   pinned_n: npt.NDArray[np.int64], spec: HealthSpec) -> npt.NDArray[np.float64]:
    """Fraction of samples clipped per row (``xn``: the rows in their own precision): at full scale when it is
    known, else pinned flat."""
    x = xn
    if spec.full_scale_g is not None:
        clip = np.zeros(x.shape[0])
        at_fs = np.flatnonzero(np.maximum(hi, -lo) >= 0.995 * spec.full_scale_g)
        if at_fs.size:
            clip[at_fs] = np.mean(np.abs(_f64(x[at_fs])) >= 0.995 * spec.full_scale_g, axis=1)
        return clip
    return np.asarray(pinned_n / (x.shape[1] - 1), dtype=np.float64)


def _bias_findings(m: float, b: float | None, spec: HealthSpec) -> list[tuple[SensorFault, str]]:
    """The bias check of one row: IEPE bias window when reported, else the mean the sensor can show."""
    if b is not None and not spec.bias_window_v[0] <= b <= spec.bias_window_v[1]:
        why = "open cable or no sensor" if b > spec.bias_window_v[1] else "short circuit"
        return [("bias", f"IEPE bias {b:.2f} V outside {spec.bias_window_v[0]:g}–"
                         f"{spec.bias_window_v[1]:g} V ({why})")]
    if spec.expected_mean_g is not None:
        if abs(m - spec.expected_mean_g) > spec.mean_tolerance_g:
            return [("bias", f"mean {m:.3f} g is more than {spec.mean_tolerance_g:g} g from the expected "
                             f"{spec.expected_mean_g:g} g")]
        return []
    allowed = spec.mean_tolerance_g + (1.0 if spec.sensor_type == "mems" else 0.0)
    if abs(m) > allowed:
        return [("bias", f"mean {m:.3f} g is beyond the ±{allowed:g} g a {spec.sensor_type} sensor "
                         f"can show")]
    return []


def _signal_findings(spec: HealthSpec, *, std: float, repeat: float, turning: bool, clip: float, step: float,
                     step_limit: float, spikes: int, sigma_r: float,
                     nd: float | None) -> list[tuple[SensorFault, str]]:
    """The flatline, clipping, DC-step, spike and noise checks of one row."""
    found: list[tuple[SensorFault, str]] = []
    if std < spec.flatline_std_g or (turning and repeat > spec.repeat_fraction):
        found.append(("flatline", f"standard deviation {std:.3g} g (floor {spec.flatline_std_g:g} g), "
                                  f"{100 * repeat:.1f} % of samples repeat the previous one"))
    if clip > spec.clip_fraction:
        where = f"at full scale {spec.full_scale_g:g} g" if spec.full_scale_g is not None else "pinned flat"
        found.append(("clipping", f"{100 * clip:.2f} % of samples {where} (limit "
                                  f"{100 * spec.clip_fraction:g} %)"))
    if step > step_limit:
        found.append(("dc-step", f"segment means differ by {step:.3g} g (limit {step_limit:.3g} g)"))
    if spikes > 0:
        found.append(("spikes", f"{spikes} isolated spike(s) above {spec.spike_sigma:g} × the robust "
                                f"spread {sigma_r:.3g} g"))
    if nd is not None and spec.noise_density_ug_rthz is not None and \
            nd > spec.noise_factor * spec.noise_density_ug_rthz:
        found.append(("noise", f"noise floor {nd:.0f} µg/√Hz above {spec.noise_factor:g} × the specified "
                               f"{spec.noise_density_ug_rthz:g} µg/√Hz"))
    return found
