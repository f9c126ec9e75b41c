"""The per-frame pipeline: one plan per measurement-point configuration, one rfft per frame shared by everything.

``make_plan`` validates a configuration (with the numbers in every message); :class:`AnalysisKernel` precomputes
what the frames of that plan share (line ranges, integration weights, transform lengths, windows);
``analyze_frames`` turns a ``(channels, samples)`` array into one :class:`FrameIndicators` per channel.

Per frame and channel: mean removal; time-domain indicators (:mod:`edgevib.pipelines.indicators`); one unwindowed
rfft, from which the Hann-windowed lines are formed by a three-tap convolution (:mod:`edgevib.pipelines.spectrum`)
for velocity r.m.s., order amplitudes and the speed estimate; a small inverse transform of the velocity band's
windowed lines for peak velocity and displacement peak-to-peak (true peaks of the band-limited waveforms, taken
over the frame's central half where the window is divided out again: a sine's peak within 0.5 % above 2 × the
band's low edge); and, when a bearing and a demodulation band are configured and a speed is known, the envelope
spectrum from the band's lines only (:mod:`edgevib.pipelines.envelope`).

Precision, deliberately: frames in float64; the shared spectrum, the time-domain moments and the envelope stage
in float32 (relative error ~1e-7, far below any sensor's noise; 24 bits of mantissa exceed a 24-bit ADC's
range), which halves their memory traffic.  Each frame's first sample is subtracted before the single-precision
transform, so a large DC offset (a MEMS sensor's 1 g of gravity) does not raise the rounding floor.

The kernel holds read-only arrays only, so one kernel (or ``analyze_frames``) can run in several threads at once;
per-call scratch buffers are local.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from functools import lru_cache
from typing import Any, NamedTuple

import numpy as np
import numpy.typing as npt

from edgevib.common.bands import LINES_BELOW_EDGE, envelope_band, min_frame_samples
from edgevib.pipelines import _fft
from edgevib.pipelines.bearings import defect_multiples, validate_geometry
from edgevib.pipelines.detection import window_thresholds
from edgevib.pipelines.envelope import (
    MIN_LINE,
    SHAFT_HARMONICS,
    SHAFT_TOLERANCE,
    SIDEBAND_ORDERS,
    FamilySearch,
    RowLimits,
    demodulate,
    envelope_spectra,
    fast_length,
    level_headroom,
    min_decimated_length,
    pattern_gaps,
    search_families,
)
from edgevib.pipelines.indicators import as_channels, as_frames, centred_moments, finite_mean
from edgevib.pipelines.spectrum import (
    G_MM_S2,
    band_lines,
    estimate_speed_hz,
    hann_lines,
    integration_coefficients,
    order_amplitudes_mm_s,
)
from edgevib.pipelines.types import (
    AnalysisPlan,
    BearingGeometry,
    FamilyResult,
    FrameIndicators,
    PlanError,
    PlanNote,
    SignalError,
)

__all__ = [
    "FAMILIES",
    "AnalysisKernel",
    "TransformLengths",
    "analyze_frames",
    "analyze_mixed",
    "batch_key",
    "default_envelope_band",
    "kernel_for",
    "make_plan",
    "order_key",
    "plan_notes",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

FAMILIES: tuple[str, ...] = ("ftf", "bpfo", "bpfi", "bsf")
"""Envelope family keys.  ``"bsf"`` is searched at **2 × BSF** (a rolling-element defect hits both races), and its
``expected_hz``/``frequency_hz`` are the 2 × BSF line."""
SPEED_HARMONICS = 3  # harmonics used by the speed estimate
MIN_SAMPLES = 64
PEAK_OVERSAMPLING = 3.0  # waveforms sampled at ≥ 3 × the band's upper edge; peaks refined (see _refined_peaks)


def order_key(order: float) -> str:
    """Key of an order in ``FrameIndicators.orders_mm_s``: ``0.5 → "0.5x"``, ``1.0 → "1x"``."""
    return f"{order:g}x"


def _finite(name: str, value: object, field: str | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise PlanError(f"{name} {value!r} must be a finite number", field=field)
    return float(value)


def _band(name: str, band: object, nyquist_hz: float, field: str) -> tuple[float, float]:
    if not isinstance(band, tuple | list) or len(band) != 2:
        raise PlanError(f"{name} {band!r} must be a (low, high) pair in Hz", field=field)
    lo, hi = _finite(f"{name} low edge", band[0], field), _finite(f"{name} high edge", band[1], field)
    if lo <= 0:
        raise PlanError(f"{name} low edge {lo:g} Hz must be > 0", field=field)
    if hi <= lo:
        raise PlanError(f"{name} high edge {hi:g} Hz must be above its low edge {lo:g} Hz", field=field)
    if hi >= nyquist_hz:
        raise PlanError(f"{name} high edge {hi:g} Hz is at or above Nyquist {nyquist_hz:g} Hz "
                        f"(half of fs_hz {2.0 * nyquist_hz:g})", field=field)
    return lo, hi


def _validate(plan: AnalysisPlan) -> AnalysisPlan:
    """Check every field of ``plan`` and return a normalized copy (floats, tuples); see :func:`_check_plan`.

    Memoized (a pure function of a frozen plan), so a configuration's plan is validated once however often it is
    asked for; a plan built by hand with unhashable fields (lists) is checked without the memo."""
    try:
        hash(plan)
    except TypeError:
        return _check_plan.__wrapped__(plan)
    return _check_plan(plan)


@lru_cache(maxsize=2048)  # (as kernel_for: every plan of a daemon's 1,000 points stays; batch_key asks per batch)
def _check_plan(plan: AnalysisPlan) -> AnalysisPlan:
    """The checks of :func:`_validate`.

    Frame resolution: the line spacing ``fs/n`` must be at most half the velocity band's low edge (that edge then
    lies two lines above DC, clear of the Hann window's leakage of the mean and of what lies below the band) and at
    most half the lowest shaft speed (two revolutions per record).  A ``partial`` plan accepts any record of at
    least 64 samples instead: what its resolution cannot carry is left out of the results (see
    :func:`plan_notes`).
    """
    fs = _finite("sample rate", plan.fs_hz, "fs_hz")
    if fs <= 0:
        raise PlanError(f"sample rate {fs:g} Hz must be > 0", field="fs_hz")
    n = plan.n_samples
    if isinstance(n, bool) or not isinstance(n, int) or n < MIN_SAMPLES:
        raise PlanError(f"record of {n!r} samples is too short: need at least {MIN_SAMPLES}", field="n_samples")
    nyq = fs / 2.0
    df = fs / n
    partial = bool(plan.partial)
    vel = _band("velocity band", plan.velocity_band_hz, nyq, "velocity_band_hz")
    speed = _band("speed range", plan.speed_range_hz, nyq, "speed_range_hz")
    for what, edge in (("the velocity band's low edge", vel[0]), ("the lowest shaft speed", speed[0])):
        need = min_frame_samples(fs, edge, edge)
        if n < need and not partial:
            raise PlanError(f"record of {n} samples at {fs:g} Hz is too short: it resolves {df:.4g} Hz, too coarse "
                            f"for {what} {edge:g} Hz ({LINES_BELOW_EDGE:g} lines needed); need at least {need} "
                            "samples", field="n_samples")
    orders = tuple(_finite("order", o, "orders") for o in plan.orders)
    if not orders or min(orders) <= 0:
        raise PlanError(f"orders {plan.orders!r} must be a non-empty list of positive multiples of shaft speed",
                        field="orders")
    tol = _finite("order tolerance", plan.order_tolerance, "order_tolerance")
    if not 0 < tol <= 0.25:
        raise PlanError(f"order tolerance {tol:g} must be in 0 < tolerance ≤ 0.25", field="order_tolerance")
    top = max(orders) * speed[1] * (1 + tol)
    if top >= nyq:
        raise PlanError(f"speed range high end {speed[1]:g} Hz × order {max(orders):g} reaches {top:g} Hz, at or "
                        f"above Nyquist {nyq:g} Hz", field="orders")
    slip = _finite("slip tolerance", plan.slip_tolerance, "slip_tolerance")
    if not 0 <= slip <= 0.1:
        raise PlanError(f"slip tolerance {slip:g} must be in 0 ≤ slip ≤ 0.1", field="slip_tolerance")
    harmonics = plan.harmonics
    if isinstance(harmonics, bool) or not isinstance(harmonics, int) or not 1 <= harmonics <= 10:
        raise PlanError(f"harmonics {harmonics!r} must be an integer from 1 to 10", field="harmonics")
    alpha, depth = _checked_detection(plan)
    if plan.bearing is not None:
        validate_geometry(plan.bearing)
    env = _checked_envelope_band(plan, fs, n, speed[1], slip)
    return AnalysisPlan(fs_hz=fs, n_samples=n, velocity_band_hz=vel, envelope_band_hz=env, bearing=plan.bearing,
                        orders=orders, order_tolerance=tol, speed_range_hz=speed, slip_tolerance=slip,
                        harmonics=harmonics, false_alarm=alpha, min_depth=depth, partial=partial)


def _checked_detection(plan: AnalysisPlan) -> tuple[float, float]:
    """The detection statistic's false-alarm probability and minimum modulation depth, checked."""
    alpha = _finite("false-alarm probability", plan.false_alarm, "false_alarm")
    if not 1e-12 <= alpha <= 0.1:
        raise PlanError(f"false-alarm probability {alpha:g} must be in 1e-12 ≤ p ≤ 0.1", field="false_alarm")
    depth = _finite("minimum modulation depth", plan.min_depth, "min_depth")
    if not 0 <= depth <= 2:
        raise PlanError(f"minimum modulation depth {depth:g} must be in 0 ≤ depth ≤ 2", field="min_depth")
    return alpha, depth


def _checked_envelope_band(plan: AnalysisPlan, fs: float, n: int, top_speed_hz: float,
                           slip: float) -> tuple[float, float] | None:
    """The demodulation band, checked against the resolution and the highest defect frequency searched."""
    if plan.envelope_band_hz is None:
        return None
    df = fs / n
    env = _band("envelope band", plan.envelope_band_hz, fs / 2.0, "envelope_band_hz")
    lines = band_lines(fs, n, env)
    if lines[1] - lines[0] + 1 < 8:
        raise PlanError(f"envelope band {env[0]:g}–{env[1]:g} Hz holds fewer than 8 lines at resolution "
                        f"{df:.4g} Hz: widen it or lengthen the record", field="envelope_band_hz")
    if plan.bearing is not None:
        m = defect_multiples(plan.bearing)
        highest = max(m.bpfi_hz, 2 * m.bsf_hz, m.bpfo_hz) * top_speed_hz * (1 + slip)
        if env[1] - env[0] < highest:
            raise PlanError(f"envelope band {env[0]:g}–{env[1]:g} Hz is narrower than the highest defect "
                            f"frequency searched ({highest:.4g} Hz at {top_speed_hz:g} Hz shaft speed)",
                            field="envelope_band_hz")
    return env


def _duration(n_samples: float, fs_hz: float) -> str:
    s = n_samples / fs_hz
    return f"{s:.3g} s"


def make_plan(fs_hz: float, n_samples: int, *, velocity_band_hz: tuple[float, float] = (10.0, 1000.0),
              envelope_band_hz: tuple[float, float] | None = None, bearing: BearingGeometry | None = None,
              orders: Sequence[float] = (0.5, 1.0, 2.0, 3.0), order_tolerance: float = 0.03,
              speed_range_hz: tuple[float, float] = (5.0, 100.0), slip_tolerance: float = 0.02,
              harmonics: int = 3, false_alarm: float = 1e-3, min_depth: float = 0.3,
              partial: bool = False) -> AnalysisPlan:
    """Build and validate the plan for frames of ``n_samples`` at ``fs_hz``.

    Parameters
    ----------
    velocity_band_hz : ISO 20816 band for velocity r.m.s. (2–1000 Hz for machines at 120–600 r/min)
    envelope_band_hz : demodulation band, or None for no envelope indicators (see :func:`default_envelope_band`)
    bearing : geometry for the defect families (needs ``envelope_band_hz`` too)
    orders : multiples of shaft speed reported in ``orders_mm_s``
    order_tolerance : relative search window around each order (at least ± 1 line)
    speed_range_hz : range of the shaft-speed estimate when no speed is given
    slip_tolerance : relative search window of the defect families (bearing slip, ± 2 % by default)
    harmonics : harmonics searched per defect family (fundamental included)
    false_alarm : probability that a defect family is called detected in one frame of stationary Gaussian noise
    min_depth : squared-envelope modulation depth a detected family's line needs
    partial : accept any record of at least 64 samples (offline snapshots): what its resolution cannot carry —
        velocity, the speed estimate, some orders or families — is left out of the results, and
        :func:`plan_notes` says which and why.  Without it a record too short for the velocity band or the speed
        range is an error (a measurement point's frames must carry them).

    Raises
    ------
    PlanError
        band at or above Nyquist, record too short for the requested resolution, bad tolerances…  ``field`` names
        the plan field at fault.
    GeometryError
        impossible bearing geometry.
    """
    plan = AnalysisPlan(fs_hz=fs_hz, n_samples=n_samples, velocity_band_hz=tuple(velocity_band_hz),  # type: ignore[arg-type]
                        envelope_band_hz=None if envelope_band_hz is None else tuple(envelope_band_hz),  # type: ignore[arg-type]
                        bearing=bearing, orders=tuple(orders), order_tolerance=order_tolerance,
                        speed_range_hz=tuple(speed_range_hz),  # type: ignore[arg-type]
                        slip_tolerance=slip_tolerance, harmonics=harmonics, false_alarm=false_alarm,
                        min_depth=min_depth, partial=partial)
    plan = _validate(plan)
    kernel_for(plan)  # derived sizes are checked too; the kernel is built once and kept for the analysis
    return plan


def default_envelope_band(fs_hz: float, bandwidth_hz: tuple[float, float] | None, *,
                          shaft_hz_max: float | None = None) -> tuple[float, float] | None:
    """A demodulation band from the sample rate and the sensor's usable bandwidth, or None when the sensor cannot
    carry envelope analysis: the inputs validated, then :func:`edgevib.common.bands.envelope_band` (the rule and
    its reasons are there).

    Examples
    --------
    12 kHz sampling, no sensor limit: 1180–4680 Hz.  25.6 kHz with a 0.5 Hz–10 kHz piezo: 2500–10000 Hz.

    Raises
    ------
    PlanError
        a non-finite or non-positive sample rate, an impossible bandwidth or shaft speed.
    """
    fs = _finite("sample rate", fs_hz)
    if fs <= 0:
        raise PlanError(f"sample rate {fs:g} Hz must be > 0")
    band = None
    if bandwidth_hz is not None:
        band = (_finite("sensor bandwidth low edge", bandwidth_hz[0]),
                _finite("sensor bandwidth high edge", bandwidth_hz[1]))
        if band[0] < 0 or band[1] <= band[0]:
            raise PlanError(f"sensor bandwidth {band[0]:g}–{band[1]:g} Hz is not a valid range")
    shaft = None if shaft_hz_max is None else _finite("highest shaft speed", shaft_hz_max)
    return envelope_band(fs, band, shaft)


class TransformLengths(NamedTuple):
    """The transforms :meth:`AnalysisKernel.analyze` makes of each frame, in single precision: a real forward
    transform of ``frame`` samples; with an envelope stage, a complex inverse transform of ``envelope`` points (of
    ``envelope_band_lines`` band lines, the rest zeros) and a real forward transform of two rows of ``envelope``
    samples (the envelope and its square); a real inverse transform of two rows of ``waveform`` samples (velocity
    and displacement).  ``envelope`` is 0 where the plan has no envelope stage."""

    frame: int
    envelope: int
    envelope_band_lines: int
    waveform: int


class AnalysisKernel:
    """Precomputed, read-only state for the frames of one plan; :meth:`analyze` does only arithmetic."""

    __slots__ = (
        "_cage",
        "_centre",
        "_df",
        "_disp_coef",
        "_env",
        "_env_lines",
        "_env_m",
        "_env_stop",
        "_estimate",
        "_gaps",
        "_integrate",
        "_mod",
        "_mult",
        "_mv",
        "_n",
        "_order_keys",
        "_order_min_hz",
        "_speed_stop",
        "_split",
        "_thresholds",
        "_vel_lines",
        "_vel_stop",
        "_velocity",
        "notes",
        "plan",
    )

    def __init__(self, plan: AnalysisPlan) -> None:
        plan = _validate(plan)
        self.plan = plan
        n = plan.n_samples
        self._n = n
        df = plan.fs_hz / n
        self._df = df
        nyq = plan.fs_hz / 2.0
        notes: list[PlanNote] = []
        length = f"the {_duration(n, plan.fs_hz)} record resolves {df:.3g} Hz"
        k = np.arange(n // 2 + 1, dtype=np.float64)
        omega = 2.0 * np.pi * k * df
        coef = integration_coefficients(plan.fs_hz, n, n // 2 + 1)
        coef.flags.writeable = False
        self._integrate = coef
        v_band = plan.velocity_band_hz
        lo, hi = band_lines(plan.fs_hz, n, v_band)
        need_v = min_frame_samples(plan.fs_hz, v_band[0], v_band[0])  # make_plan's rule (edgevib.common.bands)
        self._velocity = n >= need_v and hi >= lo
        if not self._velocity:
            notes.append(PlanNote("velocity", f"{length}, too coarse for the velocity band's {v_band[0]:g} Hz low "
                                  f"edge ({LINES_BELOW_EDGE:g} lines needed; needs ≥ {_duration(need_v, plan.fs_hz)})"))
            lo, hi = max(lo, 1), max(hi, max(lo, 1))
        self._vel_lines = (lo, hi)
        self._mv = max(fast_length(math.ceil(PEAK_OVERSAMPLING * hi)), 2 * hi + 2)
        # band lines → the velocity (mm/s) and displacement (µm) waveforms: from the windowed velocity lines low in
        # the band, from the windowed acceleration lines above 8 × its low edge (see analyze)
        w_band = omega[lo : hi + 1]
        low = k[lo : hi + 1] * df < 8.0 * v_band[0]
        # (the low lines come first: the velocity lines below the split, the acceleration lines from it on), each
        # times m/N, which turns irfft(Y, m) into the waveform; single precision like the spectrum
        split = int(np.count_nonzero(low))
        scale = self._mv / n
        dcoef = (np.full(split, scale, dtype=np.complex64),  # velocity waveform, from velocity lines
                 (-1j * G_MM_S2 * scale / w_band[split:]).astype(np.complex64),  # … from acceleration lines
                 (-1j * 1000.0 * scale / w_band[:split]).astype(np.complex64),  # displacement, from velocity
                 (-G_MM_S2 * 1000.0 * scale / w_band[split:] ** 2).astype(np.complex64))  # … from acceleration
        for a in dcoef:
            a.flags.writeable = False
        self._disp_coef = dcoef
        self._split = lo + split
        # the central half of a frame, where the Hann window is ≥ 0.5, in each waveform's samples
        self._centre = _central_window(self._mv)
        self._vel_stop = min(n // 2 - 1, hi + 2)
        s_lo, s_hi = plan.speed_range_hz
        need_s = min_frame_samples(plan.fs_hz, s_lo, s_lo)
        self._estimate = n >= need_s and SPEED_HARMONICS * s_hi * (1 + plan.order_tolerance) < nyq
        if n < need_s:
            notes.append(PlanNote("speed estimate", f"{length}, too coarse for the lowest shaft speed {s_lo:g} Hz "
                                  f"({LINES_BELOW_EDGE:g} lines needed; needs ≥ {_duration(need_s, plan.fs_hz)})",
                                  advice="give the speed"))
        elif not self._estimate:
            notes.append(PlanNote("speed estimate", f"{SPEED_HARMONICS} harmonics of {s_hi:g} Hz reach Nyquist "
                                  f"{nyq:g} Hz", advice="give the speed"))
        self._speed_stop = min(n // 2, math.ceil(SPEED_HARMONICS * s_hi * (1 + plan.order_tolerance) / df) + 3) \
            if self._estimate else 0
        # orders: each at least 2 lines from DC and 1 line from the other orders, so each has a lowest shaft speed
        o = np.asarray(plan.orders)
        apart = np.abs(o[:, None] - o[None, :]) + np.diag(np.full(o.size, np.inf))
        order_min = np.maximum(2.0 * df / o, df / apart.min(axis=1))
        self._order_keys = tuple(order_key(v) for v in plan.orders)  # (per call: only arithmetic, see analyze)
        order_min.flags.writeable = False
        self._order_min_hz = order_min
        below = [(order_key(v), float(f)) for v, f in zip(plan.orders, order_min, strict=True) if f > s_lo]
        if below:
            notes.append(PlanNote("orders", f"{length}: left out below {max(f for _, f in below):.3g} Hz shaft "
                                  "speed (an order needs 2 lines from DC and 1 from the next order)",
                                  items=tuple(k for k, _ in below)))
        self._cage = None if plan.bearing is None else defect_multiples(plan.bearing).ftf_hz
        self._env = plan.bearing is not None and plan.envelope_band_hz is not None
        self._env_lines = (0, 0)
        self._env_m = 0
        self._env_stop = 0
        self._mult = np.zeros(0)
        self._mod = np.zeros(0)
        self._thresholds = np.zeros(0)
        self._gaps = (np.zeros(0), np.zeros(0, dtype=np.intp))
        if plan.bearing is not None and plan.envelope_band_hz is not None:
            m = defect_multiples(plan.bearing)
            mult = np.array([m.ftf_hz, m.bpfo_hz, m.bpfi_hz, 2.0 * m.bsf_hz])
            mult.flags.writeable = False
            self._mult = mult
            mod = np.array([np.nan, 1.0, 1.0, m.ftf_hz])
            mod.flags.writeable = False
            self._mod = mod
            self._gaps = pattern_gaps(mult, mod, plan.harmonics)
            e_lo, e_hi = band_lines(plan.fs_hz, n, plan.envelope_band_hz)
            self._env_lines = (e_lo, e_hi)
            h, slip = plan.harmonics, plan.slip_tolerance
            top_fund = float(mult.max()) * s_hi * (1 + slip) / df
            top = max(h * top_fund + math.ceil(h / 2) + 1,
                      float(np.nanmax(mult + 2.0 * np.nan_to_num(mod))) * s_hi * (1 + slip) / df + 3)
            need = math.ceil(top) + level_headroom() + 2
            self._env_m = min_decimated_length(e_hi - e_lo + 1, need)
            self._env_stop = need + 1
            widest = max(2 * slip * h * top_fund, 2 * SHAFT_TOLERANCE * SHAFT_HARMONICS * s_hi / df,
                         2 * (2 + 2 * slip * float(np.nanmax(mod)) * s_hi / df)) + 3
            self._thresholds = window_thresholds(plan.false_alarm, math.ceil(widest))
            # a fundamental's window must start at line MIN_LINE: the family's lowest shaft speed
            fam_min = (MIN_LINE + 1.0) * df / (mult * (1.0 - slip))
            short = [(name.upper() if name != "bsf" else "2×BSF", float(f))
                     for name, f in zip(FAMILIES, fam_min, strict=True) if f > s_lo]
            if short:
                notes.append(PlanNote("envelope", f"{length}: left out below {max(f for _, f in short):.3g} Hz "
                                      f"shaft speed (a defect line needs {MIN_LINE + 1} lines from DC)",
                                      items=tuple(k for k, _ in short)))
        self.notes: tuple[PlanNote, ...] = tuple(notes)

    @property
    def transform_lengths(self) -> TransformLengths:
        """The lengths of the transforms :meth:`analyze` makes of each frame (a benchmark's floor is their cost)."""
        e_lo, e_hi = self._env_lines
        return TransformLengths(frame=self._n, envelope=self._env_m if self._env else 0,
                                envelope_band_lines=e_hi - e_lo + 1 if self._env else 0, waveform=self._mv)

    def analyze(self, x_g: npt.ArrayLike, shaft_hz: npt.ArrayLike | None = None) -> list[FrameIndicators]:
        """Indicators of frames ``x_g`` (channels, n_samples) in g; see :func:`analyze_frames`."""
        return self._analyze(x_g, shaft_hz, None)

    def _analyze(self, x_g: npt.ArrayLike, shaft_hz: npt.ArrayLike | None,
                 mixed: _Rows | None) -> list[FrameIndicators]:
        """:meth:`analyze`; with ``mixed``, the frames of :func:`analyze_mixed`: each row analysed as its own plan's
        kernel analyses it alone (this kernel's plan has the batch key of every row's plan: the shared arithmetic
        is this kernel's, the per-row parameters are ``mixed``')."""
        plan = self.plan
        n = self._n
        x = as_frames(x_g)  # float64, or float32 as the daemon's frames are (not widened)
        if x.shape[1] != n:
            raise SignalError(f"frames have {x.shape[1]} samples, the plan expects {n}")
        c = x.shape[0]
        if mixed is not None and mixed.channels != c:
            raise SignalError(f"{mixed.channels} plans given for {c} channels")
        f_given = _shaft_array(shaft_hz, c, plan.fs_hz)
        # One single-precision transform serves everything: the frames go in less their first sample (so a DC
        # offset such as a MEMS sensor's 1 g of gravity stays out of the float32 rounding), cast in the same pass.
        x0 = x[:, :1]
        x32 = np.empty(x.shape, dtype=np.float32)
        np.subtract(x, x0, out=x32, casting="same_kind")
        spec = _fft.rfft(x32)
        # line 0 is the sum of the samples (NaN/Inf anywhere reach it)
        mean = spec[:, 0].real / n + x0[:, 0].astype(np.float64)
        if not np.isfinite(spec[:, 0]).all():
            finite_mean(x)  # raises SignalError naming the channel and the count
        spec[:, 0] = 0.0  # the mean, removed (lines ≥ 1 are those of the centred frame)
        # the moments from the same offset frames, centred in single precision by what remains of the mean
        td = centred_moments(x32, mean, (mean - x0[:, 0]).astype(np.float32))
        del x32  # (batch-sized arrays are let go as soon as they are used: see DEVELOPERS.md, page faults)

        given = np.isfinite(f_given)
        # A given speed below the plan's lowest shaft speed (a stopped or coasting machine: 0 from a speed tag is
        # valid) keeps the time-domain and velocity indicators; orders and envelope families need a speed the
        # frame resolves, so they are absent for it.
        speed_lo: float | FloatArray
        speed_hi: float | FloatArray
        speed_stop: int | IntArray
        if mixed is None:
            estimate = ~given
            if not self._estimate:
                estimate[:] = False
            speed_lo, speed_hi, speed_stop = plan.speed_range_hz[0], plan.speed_range_hz[1], self._speed_stop
        else:  # each row's own plan
            estimate = ~given & mixed.estimate
            speed_lo, speed_hi, speed_stop = mixed.speed_lo, mixed.speed_hi, mixed.speed_stop
        slow = given & (f_given < speed_lo)
        fast = given & ~slow
        # each row's lines as many as its plan's kernel computes for it alone (the velocity band, the speed estimate
        # without a speed, the highest order at its speed or at the top of its range), so that no row's result
        # depends on the other frames of its batch; the batch computes the most any row needs
        known = np.where(fast, f_given, speed_hi)
        order_stop = np.ceil(max(plan.orders) * known * (1 + plan.order_tolerance) / self._df) + 3
        first = np.where(estimate, np.maximum(speed_stop, self._vel_stop), self._vel_stop)
        own_stop: IntArray = np.minimum(np.maximum(first, order_stop), n // 2).astype(np.intp)
        stop = int(own_stop.max())
        acc = hann_lines(spec, stop)
        acc_pow = acc.real**2 + acc.imag**2
        vel = hann_lines(spec[:, : stop + 1] * self._integrate[: stop + 1], stop)  # integrate, then window
        vel_pow = vel.real**2 + vel.imag**2
        v_lo, v_hi = self._vel_lines
        factor = 16.0 / (3.0 * n * n)
        vel_rms = np.sqrt(vel_pow[:, v_lo : v_hi + 1].sum(axis=-1) * factor)

        shaft, quality = self._speeds(vel_pow, acc_pow, f_given, estimate, own_stop, mixed)
        running = np.isfinite(shaft) & ~slow & (shaft > 0)
        shaft_running = np.where(running, shaft, np.nan)
        orders = order_amplitudes_mm_s(vel_pow, shaft_running, plan.orders, plan.order_tolerance, self._df, n,
                                       lines=own_stop)
        families: list[dict[str, FamilyResult]]
        if mixed is not None:
            families = self._mixed_families(spec, shaft_running, running, mixed)
            del spec
        elif self._env and running.any():
            z = self._demodulated(spec)
            del spec
            families = _family_results(self._families_of(z, shaft_running)[3], shaft, self._mult, self._df)
            del z
        else:
            del spec
            families = [{}] * c

        # velocity and displacement waveforms from the band's Hann lines only (for peak and peak-to-peak): the
        # windowed waveform, divided by the window over the frame's central half, is the band-limited waveform
        # itself (see _central_window).
        # Which windowed lines: integrating before the window is exact for a tone's own lines, but the frame's
        # end-mismatch leakage that it integrates too grows at low lines by f/f_low per integration; integrating
        # after the window has no such leakage but is off by ~(Δf/f)² near the band's low edge.  So: windowed
        # velocity lines below 8 × the low edge, windowed acceleration lines ÷ jω above it.
        # all m//2 + 1 lines (scipy's own zero padding of a shorter input costs several times the transform), in
        # single precision like the shared spectrum (relative error ~1e-7 on the peaks)
        y = np.zeros((2, c, self._mv // 2 + 1), dtype=np.complex64)
        s = self._split
        v_from_v, v_from_a, d_from_v, d_from_a = self._disp_coef
        np.multiply(vel[:, v_lo:s], v_from_v, out=y[0, :, v_lo:s], casting="same_kind")
        np.multiply(acc[:, s : v_hi + 1], v_from_a, out=y[0, :, s : v_hi + 1])
        np.multiply(vel[:, v_lo:s], d_from_v, out=y[1, :, v_lo:s], casting="same_kind")
        np.multiply(acc[:, s : v_hi + 1], d_from_a, out=y[1, :, s : v_hi + 1])
        sl, w = self._centre
        wave = _fft.irfft(y, self._mv)[:, :, sl]
        wave *= w  # (÷ the window: w holds its reciprocal)
        peaks = _refined_peaks(wave.reshape(2 * c, -1)).reshape(2, 2, c)  # (maximum, −minimum), waveform, channel
        vel_peak = np.maximum(peaks[0, 0], peaks[1, 0])  # signed: |v| would fold neighbours
        disp_pp = peaks[0, 1] + peaks[1, 1]

        # per-channel values as Python lists, None where unavailable (converted once per column, not per channel)
        none = np.array(None, dtype=object)
        known = np.isfinite(shaft)
        estimated = estimate & known
        shaft_l = np.where(known, shaft, none).tolist()
        est_l = estimated.tolist()
        quality_l = np.where(estimate & np.isfinite(quality), quality, none).tolist()  # (also for no speed found)
        run_l = running.tolist()
        keys = self._order_keys
        orders_l = orders.tolist()
        order_ok = (running[:, None] & (shaft[:, None] >= self._order_min_hz) & np.isfinite(orders)).tolist()
        cols = (td.rms_g, td.peak_g, td.peak_to_peak_g, td.crest_factor, td.kurtosis, td.skewness, td.mean_g,
                vel_rms, vel_peak, disp_pp)
        rows = np.stack(cols, axis=1).tolist()
        velocity = self._velocity
        band = plan.envelope_band_hz
        out: list[FrameIndicators] = []
        for r, f, est, q, run, amps, ok, env in zip(rows, shaft_l, est_l, quality_l, run_l, orders_l, order_ok,
                                                    families, strict=True):
            out.append(FrameIndicators(
                acceleration_rms_g=r[0], acceleration_peak_g=r[1], acceleration_peak_to_peak_g=r[2],
                crest_factor=r[3], kurtosis=r[4], skewness=r[5], mean_g=r[6],
                velocity_rms_mm_s=r[7] if velocity else None,
                velocity_peak_mm_s=r[8] if velocity else None,
                displacement_pp_um=r[9] if velocity else None,
                shaft_hz=f, shaft_estimated=est,
                orders_mm_s={key: v for key, v, good in zip(keys, amps, ok, strict=True) if good},
                envelope_band_hz=band, envelope=env if run else {}, shaft_quality=q,
            ))
        return out

    def _speeds(self, vel_pow: FloatArray, acc_pow: FloatArray, f_given: FloatArray,
                estimate: npt.NDArray[np.bool_], own_stop: IntArray,
                rows: _Rows | None) -> tuple[FloatArray, FloatArray]:
        """The speeds of :meth:`_analyze`: the given ones, and the estimate of the rows that need one on their own
        lines (``own_stop``) — in one call for a batch of one plan; with ``rows`` (a mixed batch), once per distinct
        speed range, each row with its own bearing's cage ratio."""
        c, k = vel_pow.shape
        shaft = f_given.copy()
        quality = np.full(c, np.nan)
        which = np.flatnonzero(estimate)
        if not which.size:
            return shaft, quality
        groups: list[tuple[IntArray, tuple[float, float], float | FloatArray | None]] = []
        if rows is None:
            groups.append((which, self.plan.speed_range_hz, self._cage))
        else:
            of = rows.speed_group[which]
            for g in np.unique(of).tolist():
                idx = which[of == g]
                groups.append((idx, rows.speed_ranges[g], _cage_ratio(rows.cage[idx])))
        for idx, speed_range, cage in groups:
            stop = int(own_stop[idx[0]])  # (the same for every row of a group: no speed given, one range)
            if idx.size == c and stop == k:  # (every row, as with one plan: no copies of the rows)
                v, a = vel_pow, acc_pow
            else:
                v, a = vel_pow[idx, :stop], acc_pow[idx, :stop]
            est, q = estimate_speed_hz(v, a, speed_range, self._df, SPEED_HARMONICS, cage_ratio=cage,
                                       tolerance=self.plan.order_tolerance)
            shaft[idx] = est
            quality[idx] = q
        return shaft, quality

    def _mixed_families(self, spec: npt.NDArray[np.complex64], shaft_running: FloatArray,
                        running: npt.NDArray[np.bool_], rows: _Rows) -> list[dict[str, FamilyResult]]:
        """The envelope families of :meth:`_analyze` with ``rows``: the rows with an envelope stage and a speed,
        each demodulated at its own plan's decimated length (one transform per distinct length) and searched in
        one call up to its own plan's last line, with its own bearing's multiples, pattern gaps and threshold
        table."""
        c = spec.shape[0]
        out: list[dict[str, FamilyResult]] = [{}] * c
        sel = rows.env & running
        if not sel.any():
            return out
        idx = np.flatnonzero(sel)
        e_lo, e_hi = self._env_lines  # (one band: the batch key's)
        m = rows.env_m[idx]
        stops = rows.env_stop[idx]
        own = np.minimum(stops, m // 2)  # each row's envelope spectrum length alone
        lengths = np.unique(m).tolist()
        spectra: list[tuple[IntArray, FloatArray, FloatArray, FloatArray]] = []
        for length in lengths:
            part = np.flatnonzero(m == length)
            rows_g = idx[part]
            if rows_g.size == c:  # (every row, as with one plan: no copies of the rows)
                z = demodulate(spec, e_lo, e_hi, length)
            else:
                z = demodulate(spec[rows_g, e_lo : e_hi + 1], 0, e_hi - e_lo, length)
            amp_g, ses_g, mean_g = envelope_spectra(z, self._n, int(stops[part].max()), overwrite=True)
            del z
            spectra.append((part, amp_g, ses_g, mean_g))
        if len(spectra) == 1:
            amp, ses, mean_line = spectra[0][1:]
        else:  # (lines beyond a row's own length are never read: zeros)
            width = max(a.shape[1] for _, a, _, _ in spectra)
            amp = np.zeros((idx.size, width))
            ses = np.zeros((idx.size, width))
            mean_line = np.empty(idx.size)
            for part, amp_g, ses_g, mean_g in spectra:
                amp[part, : amp_g.shape[1]] = amp_g
                ses[part, : ses_g.shape[1]] = ses_g
                mean_line[part] = mean_g
        shaft = shaft_running[idx]
        mult = rows.mult[idx]
        expected = shaft[:, None] * mult
        modulation = shaft[:, None] * rows.mod[idx]
        plan = self.plan
        limits = RowLimits(own[:, None], rows.threshold_cap[idx][:, None])
        fam = search_families(amp, ses, mean_line, expected, modulation, shaft, plan.slip_tolerance,
                              plan.harmonics, self._df, rows.thresholds, plan.min_depth,
                              (rows.gap[idx], rows.shaft_order[idx]), limits)
        for i, res in zip(idx.tolist(), _family_results(fam, shaft, mult, self._df), strict=True):
            out[i] = res
        return out

    def _families(self, spec: npt.NDArray[np.complex64],
                  shaft_hz: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FamilySearch]:
        """Envelope spectra and the family search of frames whose rfft is ``spec`` (shaft NaN: not searched)."""
        return self._families_of(self._demodulated(spec), shaft_hz)

    def _demodulated(self, spec: npt.NDArray[np.complex64]) -> npt.NDArray[np.complex64]:
        """The complex envelopes of frames whose rfft is ``spec`` (:func:`demodulate` in the plan's band)."""
        e_lo, e_hi = self._env_lines
        return demodulate(spec, e_lo, e_hi, self._env_m)

    def _families_of(self, z: npt.NDArray[np.complex64],
                     shaft_hz: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FamilySearch]:
        """:meth:`_families` from the complex envelopes ``z`` (:meth:`_demodulated`; its memory is reused)."""
        amp, ses, mean_line = envelope_spectra(z, self._n, self._env_stop, overwrite=True)
        expected = shaft_hz[:, None] * self._mult[None, :]
        modulation = shaft_hz[:, None] * self._mod[None, :]
        plan = self.plan
        fam = search_families(amp, ses, mean_line, expected, modulation, shaft_hz, plan.slip_tolerance,
                              plan.harmonics, self._df, self._thresholds, plan.min_depth, self._gaps)
        return amp, ses, mean_line, fam

    def envelope_detail(self, x_g: npt.ArrayLike,
                        shaft_hz: float) -> tuple[FloatArray, FloatArray, FloatArray, FamilySearch]:
        """The envelope stage of one frame in full, for displays: envelope amplitude spectrum (g), squared-envelope
        periodogram, its mean line and the family search (see :mod:`edgevib.pipelines.envelope`).

        Raises
        ------
        PlanError
            the plan has no bearing or no envelope band.
        """
        if not self._env:
            raise PlanError("the plan has no bearing or no envelope band: no envelope stage")
        x = as_channels(x_g)
        if x.shape != (1, self._n):
            raise SignalError(f"one frame of {self._n} samples expected, got shape {x.shape}")
        f = _shaft_array([shaft_hz], 1, self.plan.fs_hz)
        spec = _fft.rfft((x - finite_mean(x)[:, None]).astype(np.float32))
        return self._families(spec, f)


def _family_results(fam: FamilySearch, shaft_hz: FloatArray, mult: FloatArray,
                    df_hz: float) -> list[dict[str, FamilyResult]]:
    """Per-channel :class:`FamilyResult` maps from a family search (families whose window does not fit the
    spectrum are left out); ``mult`` of shape (families,), or (channels, families) for rows of different
    bearings."""
    index = fam.part("index")
    stat = fam.part("statistic")
    thr = fam.part("threshold")
    fits = fam.part("fits")
    found = index >= 0
    counted = found & (stat >= thr)  # (NaN compares False, silently)
    n_sb = len(SIDEBAND_ORDERS)
    harmonics = counted[..., : fam.slots - n_sb].sum(axis=-1).tolist()
    sidebands = counted[..., fam.slots - n_sb :].sum(axis=-1).tolist()
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = 10.0 * np.log10(stat[..., 0])
        thr_db = 10.0 * np.log10(thr[..., 0])
    freq_l = np.where(found[..., 0], index[..., 0] * df_hz, np.nan).tolist()
    snr_l, thr_l = snr.tolist(), thr_db.tolist()
    amp_l, depth_l = fam.amplitude_g.tolist(), fam.depth.tolist()
    det_l, amb_l, fits_l = fam.detected.tolist(), fam.ambiguous_with.tolist(), fits[..., 0].tolist()
    shaft_l = shaft_hz.tolist()
    per_row = mult.ndim == 2  # (rows of different bearings: (channels, families))
    mult_l = mult.tolist()
    names = (*FAMILIES, "shaft")
    out: list[dict[str, FamilyResult]] = []
    for ch in range(index.shape[0]):
        res: dict[str, FamilyResult] = {}
        for j, name in enumerate(FAMILIES):
            if not fits_l[ch][j]:
                continue
            f = freq_l[ch][j]
            has = math.isfinite(f)
            res[name] = FamilyResult(
                expected_hz=shaft_l[ch] * (mult_l[ch][j] if per_row else mult_l[j]), frequency_hz=f if has else None,
                amplitude_g=amp_l[ch][j] if has else None, snr_db=snr_l[ch][j] if has else None,
                harmonics_found=int(harmonics[ch][j]), sidebands_found=int(sidebands[ch][j]),
                depth=depth_l[ch][j] if has else None, detected=bool(det_l[ch][j]),
                ambiguous_with=names[amb_l[ch][j]] if amb_l[ch][j] >= 0 else None,
                threshold_db=thr_l[ch][j])
        out.append(res)
    return out


def _central_window(m: int) -> tuple[slice, npt.NDArray[np.float32]]:
    """Samples of an m-point frame where the periodic Hann window is at least 0.5, and the window's reciprocal
    there (single precision, like the waveforms it scales).

    Dividing a windowed waveform by the window over this central half recovers the waveform (at most doubling
    its noise); peaks of stationary signals are taken there.
    """
    sl = slice(math.ceil(m / 4), math.floor(3 * m / 4) + 1)
    w = (1.0 / (0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(m)[sl] / m))).astype(np.float32)
    w.flags.writeable = False
    return sl, w


def _refined_peaks(w: npt.NDArray[np.floating[Any]]) -> FloatArray:
    """Largest value of each row and largest value of its negation, each refined through the extreme sample and
    its two neighbours.

    Three samples a, b, c of A·cos(φ(t − τ)) give cos φ = (a + c)/2b and A = √(b² + ((c − a)/(2 sin φ))²) exactly,
    whatever the sampling (more than 2 samples per period); that is used where it applies (−1 < cos φ < 1), a
    parabola otherwise.

    Parameters
    ----------
    w : ndarray, shape (rows, samples) — band-limited waveforms sampled at ≥ 2 × their top frequency

    Returns
    -------
    ndarray, shape (2, rows): the refined maxima, then the refined maxima of −w (in float64)
    """
    r, m = w.shape
    i = np.concatenate([w.argmax(axis=-1), w.argmin(axis=-1)])
    rows, sign = _peak_rows(r)
    j = i[:, None] + _NEIGHBOURS  # the extreme sample and its neighbours (the refinement only uses in-range ones)
    np.minimum(np.maximum(j, 0, out=j), m - 1, out=j)
    abc = sign * w[rows, j]
    a, b, c = abc[:, 0], abc[:, 1], abc[:, 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        cos_phi = (a + c) / (2.0 * b)
        sin_phi = np.sqrt(np.maximum(1.0 - cos_phi**2, 0.0))
        cosine = np.sqrt(b**2 + ((c - a) / (2.0 * sin_phi)) ** 2)
        denom = a - 2.0 * b + c
        parabola = np.where(denom < 0, b - 0.125 * (a - c) ** 2 / np.where(denom < 0, denom, -1.0), b)
    use_cosine = (b > 0) & (cos_phi > -1) & (cos_phi < 1) & np.isfinite(cosine)
    inner = (i > 0) & (i < m - 1)  # an extreme sample on the edge has no neighbour to refine with
    peak: FloatArray = np.where(inner, np.where(use_cosine, np.maximum(cosine, b), parabola), b).reshape(2, r)
    return peak


_SIGNS = np.array([1.0, -1.0])


@lru_cache(maxsize=64)
def _peak_rows(r: int) -> tuple[npt.NDArray[np.intp], FloatArray]:
    """:func:`_refined_peaks`' row of each extreme (0 … r−1 twice, as a column) and its sign (+1 for the maxima,
    −1 for the minima, as a column): constants of the batch size."""
    rows = np.arange(2 * r)
    rows[r:] -= r
    sign = np.repeat(_SIGNS, r)
    out = (rows[:, None], sign[:, None])
    for a in out:
        a.flags.writeable = False
    return out

_NEIGHBOURS = np.arange(-1, 2)
for _a in (_SIGNS, _NEIGHBOURS):
    _a.flags.writeable = False


def _shaft_array(shaft_hz: npt.ArrayLike | None, channels: int, fs_hz: float) -> FloatArray:
    if shaft_hz is None:
        return np.full(channels, np.nan)
    try:
        f = np.asarray(shaft_hz, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise SignalError(f"shaft speeds are not numeric: {exc}") from exc
    if f.ndim == 0:
        f = np.full(channels, float(f))
    if f.shape != (channels,):
        raise SignalError(f"{f.size} shaft speeds given for {channels} channels")
    bad = np.isfinite(f) & ((f < 0) | (f >= fs_hz / 2)) | np.isinf(f)
    if bad.any():
        ch = int(np.flatnonzero(bad)[0])
        raise SignalError(f"channel {ch}: shaft speed {f[ch]:g} Hz must be ≥ 0 and below Nyquist {fs_hz / 2:g} Hz "
                          "(0 is a standing shaft; NaN means unknown)")
    return f


def _cage_ratio(cages: FloatArray) -> float | FloatArray | None:
    """The speed estimate's ``cage_ratio`` for rows of these bearings' FTF ratios (NaN: no bearing): None for none,
    one float when they agree, else one per row."""
    if np.isnan(cages).all():
        return None
    if (cages == cages[0]).all():
        return float(cages[0])
    return cages


@lru_cache(maxsize=2048)
def _key_of(plan: AnalysisPlan) -> AnalysisPlan:
    return dataclasses.replace(plan, bearing=None, speed_range_hz=(0.0, 0.0))


def batch_key(plan: AnalysisPlan) -> AnalysisPlan:
    """What plans analysed in one call of :func:`analyze_mixed` must share: every field but the bearing and the
    speed range (a hashable value, not a plan to analyse with).  Plans with equal keys mix; results are those of
    each frame analysed alone with its own plan.

    Raises
    ------
    PlanError, GeometryError
        an invalid plan (as :func:`make_plan`).
    """
    return _key_of(_validate(plan))


class _Rows(NamedTuple):
    """The per-row parameters of a batch of mixed plans (:func:`analyze_mixed`), each row's from its own plan's
    kernel; read-only arrays of shape (channels, ...).  Rows without an envelope stage (no bearing) have ``env``
    False and neutral values in the envelope fields (never read)."""

    channels: int
    estimate: npt.NDArray[np.bool_]  # the plan can estimate a speed (AnalysisKernel._estimate)
    speed_lo: FloatArray
    speed_hi: FloatArray
    speed_stop: IntArray
    speed_group: IntArray  # index into speed_ranges: rows of one speed range
    speed_ranges: tuple[tuple[float, float], ...]
    cage: FloatArray  # the bearing's FTF ratio (the speed estimate's cage_ratio); NaN without a bearing
    env: npt.NDArray[np.bool_]
    env_m: IntArray
    env_stop: IntArray
    threshold_cap: IntArray  # the row's threshold table's size less 2
    thresholds: FloatArray  # the longest table (the entries do not depend on its length)
    mult: FloatArray  # (channels, families)
    mod: FloatArray  # (channels, families)
    gap: FloatArray  # (channels, families, families + 1)
    shaft_order: IntArray  # (channels, families)


def _key_mismatch(a: AnalysisPlan, b: AnalysisPlan) -> str:
    """The fields in which two batch keys differ, with their values."""
    fields = [f.name for f in dataclasses.fields(AnalysisPlan)
              if getattr(a, f.name) != getattr(b, f.name)]
    return ", ".join(f"{name} ({getattr(b, name)!r} vs {getattr(a, name)!r})" for name in fields)


@lru_cache(maxsize=64)  # (the daemon's batches repeat their composition from one round to the next)
def _rows_for(kernels: tuple[AnalysisKernel, ...]) -> tuple[AnalysisKernel, _Rows]:
    """The kernel whose shared arithmetic serves a mixed batch, and the batch's per-row parameters.

    Raises
    ------
    PlanError
        plans whose batch keys differ (naming the first row that differs and the fields).
    """
    unique: dict[AnalysisKernel, int] = {}
    which = np.array([unique.setdefault(k, len(unique)) for k in kernels], dtype=np.intp)
    ks = list(unique)
    key = batch_key(ks[0].plan)
    for row, k in enumerate(kernels):
        other = batch_key(k.plan)
        if other != key:
            raise PlanError(f"plan of row {row} cannot share a call with row 0's: only the bearing and the speed "
                            f"range may differ, it differs in {_key_mismatch(key, other)}")
    nf = len(FAMILIES)
    groups: dict[tuple[float, float], int] = {}
    speed_group = [groups.setdefault(k.plan.speed_range_hz, len(groups)) for k in ks]
    env = [k._env for k in ks]
    tables = [k._thresholds for k in ks if k._env]

    def per_row(values: Sequence[Any], dtype: type) -> npt.NDArray[Any]:
        out: npt.NDArray[Any] = np.asarray(values, dtype=dtype)[which]
        out.flags.writeable = False
        return out

    rows = _Rows(
        channels=len(kernels),
        estimate=per_row([k._estimate for k in ks], bool),
        speed_lo=per_row([k.plan.speed_range_hz[0] for k in ks], np.float64),
        speed_hi=per_row([k.plan.speed_range_hz[1] for k in ks], np.float64),
        speed_stop=per_row([k._speed_stop for k in ks], np.intp),
        speed_group=per_row(speed_group, np.intp),
        speed_ranges=tuple(groups),
        cage=per_row([math.nan if k._cage is None else k._cage for k in ks], np.float64),
        env=per_row(env, bool),
        env_m=per_row([k._env_m for k in ks], np.intp),
        env_stop=per_row([k._env_stop for k in ks], np.intp),
        threshold_cap=per_row([k._thresholds.size - 2 if e else 0 for k, e in zip(ks, env, strict=True)], np.intp),
        thresholds=max(tables, key=len) if tables else np.zeros(0),
        mult=per_row([k._mult if e else np.full(nf, np.nan) for k, e in zip(ks, env, strict=True)], np.float64),
        mod=per_row([k._mod if e else np.full(nf, np.nan) for k, e in zip(ks, env, strict=True)], np.float64),
        gap=per_row([k._gaps[0] if e else np.full((nf, nf + 1), np.inf) for k, e in zip(ks, env, strict=True)],
                    np.float64),
        shaft_order=per_row([k._gaps[1] if e else np.ones(nf, dtype=np.intp) for k, e in zip(ks, env, strict=True)],
                            np.intp),
    )
    # (a kernel with an envelope stage, if any: a plan without a bearing has no envelope lines)
    return next((k for k in ks if k._env), ks[0]), rows


@lru_cache(maxsize=2048)  # above the daemon's 1,000 points: every distinct plan's kernel is built once, never
def kernel_for(plan: AnalysisPlan) -> AnalysisKernel:  # evicted and rebuilt between batches (a reload adds some)
    """The kernel of ``plan`` (a pure memo: kernels are immutable and depend on the frozen plan only)."""
    return AnalysisKernel(plan)


def plan_notes(plan: AnalysisPlan) -> tuple[str, ...]:
    """One line per indicator group the plan's record is too short for: what is missing and why (empty when
    everything can be computed).  For example ``"velocity: the 0.05 s record resolves 20 Hz, coarser than the
    velocity band's 10 Hz low edge (needs ≥ 0.1 s)"``.  The same notes as :class:`PlanNote` (to pick a group by
    its ``group``): ``kernel_for(plan).notes``."""
    return tuple(str(note) for note in kernel_for(plan).notes)


def analyze_mixed(x_g: npt.ArrayLike, plans: Sequence[AnalysisPlan],
                  shaft_hz: npt.ArrayLike | None = None) -> list[FrameIndicators]:
    """Analyse frames whose plans differ only in the bearing and the speed range (equal :func:`batch_key`), one
    plan per row, in one vectorised call.

    Each row's result is that of the row analysed alone with its own plan (``analyze_frames(x_g[i], plans[i],
    [shaft_hz[i]])``), to the bit; arguments otherwise as :func:`analyze_frames`.  The envelope stage makes one
    demodulating transform per distinct decimated length among the rows, the speed estimate one call per distinct
    speed range (each row with its own bearing's cage ratio); the family search is one call.

    Raises
    ------
    PlanError
        plans whose batch keys differ (the message names the first such row and the fields), or invalid plans.
    SignalError
        as :func:`analyze_frames`; also a number of plans other than the number of channels.
    """
    kernels = tuple(kernel_for(p) for p in plans)
    if not kernels:
        raise SignalError("no plans given: one plan per channel is needed")
    shared, rows = _rows_for(kernels)
    return shared._analyze(x_g, shaft_hz, rows)


def analyze_frames(x_g: npt.ArrayLike, plan: AnalysisPlan | Sequence[AnalysisPlan],
                   shaft_hz: npt.ArrayLike | None = None) -> list[FrameIndicators]:
    """Analyse frames that share one plan (or, given one plan per channel, frames of mixed plans:
    :func:`analyze_mixed`).

    Parameters
    ----------
    x_g : array_like, shape (channels, plan.n_samples) or (plan.n_samples,)
        Acceleration in g (a 1-D array is one channel).
    plan : AnalysisPlan
        from :func:`make_plan`.
    shaft_hz : None, float or array_like of shape (channels,)
        Shaft speeds in Hz; None or NaN entries are estimated from the spectrum within ``plan.speed_range_hz``
        (``shaft_estimated=True``, with ``shaft_quality``).  Where no speed can be determined, ``shaft_hz`` is
        None and the orders and envelope families are empty.  A given speed below ``plan.speed_range_hz[0]`` — 0
        for a standing shaft, or a machine coasting or running up below the speeds its frames resolve — is
        valid: it is reported as ``shaft_hz``, the time-domain and velocity indicators are computed, and the
        orders and envelope families are absent (empty), not zero.

    Returns
    -------
    list of FrameIndicators, one per channel.  Orders are keyed ``"0.5x"``, ``"1x"`` … (velocity r.m.s. in
    mm/s); envelope families ``"ftf"``, ``"bpfo"``, ``"bpfi"``, ``"bsf"`` (the last searched at 2 × BSF) when the
    plan has a bearing and an envelope band and the speed is known.

    Raises
    ------
    SignalError
        NaN/Inf samples, wrong shape or frame length, negative given speeds or speeds at or above Nyquist.
    """
    if isinstance(plan, AnalysisPlan):
        return kernel_for(plan).analyze(x_g, shaft_hz)
    return analyze_mixed(x_g, plan, shaft_hz)
