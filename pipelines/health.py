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
    samples at the frame's extreme, which a band-limited signal never produces;
``dc-step``
    the frame's local mean jumping between segments by more than the vibration's own spread (an intermittent
    connector or a cable being moved);
``spikes``
    isolated single-sample excursions far above the robust spread with nothing comparable within ±8 samples —
    unlike bearing impacts, which ring a structural resonance over many samples;
``noise``
    the noise floor (median power spectral density in a band above the machine's content) above the sensor's
    specified noise density by a factor.

"No data for N frames" is a timer and belongs to the daemon.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.types import PlanError, SignalError

__all__ = ["FAULT_ORDER", "HealthSpec", "SensorFault", "SensorHealth", "check_health"]

SensorFault = Literal["bias", "flatline", "clipping", "dc-step", "spikes", "noise"]
FAULT_ORDER: tuple[SensorFault, ...] = ("bias", "flatline", "clipping", "dc-step", "spikes", "noise")
SPIKE_WINDOW = 8  # samples each side in which a ringing response would show
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


def check_health(frames: npt.ArrayLike, fs_hz: float, spec: HealthSpec | None = None,
                 bias_v: npt.ArrayLike | None = None) -> tuple[SensorHealth, ...]:
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

    Returns
    -------
    tuple of SensorHealth, one per channel.

    Raises
    ------
    SignalError
        Non-finite samples, fewer than 16 samples per channel, or a mismatched ``bias_v``.
    PlanError
        A noise band that cannot be resolved.
    """
    spec = spec or HealthSpec()
    x = np.asarray(frames, dtype=np.float64)
    if x.ndim == 1:
        x = x[None, :]
    if x.ndim != 2 or x.shape[1] < max(16, 4 * spec.segments):
        raise SignalError(f"health check needs frames shaped (channels, samples ≥ 16 and ≥ 4 per segment), "
                          f"got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise SignalError("health check got non-finite samples")
    if not (math.isfinite(fs_hz) and fs_hz > 0):
        raise SignalError(f"sample rate {fs_hz!r} Hz must be finite and > 0")
    c, n = x.shape
    bias = None
    if bias_v is not None:
        bias = np.asarray(bias_v, dtype=np.float64).reshape(-1)
        if bias.shape != (c,):
            raise SignalError(f"bias_v has {bias.size} values for {c} channels")

    mean = x.mean(axis=1)
    std = x.std(axis=1)
    repeats = np.diff(x, axis=1) == 0.0

    # Clipping: samples at full scale, or flat tops (consecutive samples pinned at the frame's extreme).
    hi, lo = x.max(axis=1, keepdims=True), x.min(axis=1, keepdims=True)
    tol = 1e-6 * (hi - lo) + 1e-12
    at_hi, at_lo = x >= hi - tol, x <= lo + tol
    pinned = (at_hi[:, 1:] & at_hi[:, :-1]) | (at_lo[:, 1:] & at_lo[:, :-1])
    if spec.full_scale_g is not None:
        clip = np.mean(np.abs(x) >= 0.995 * spec.full_scale_g, axis=1)
    else:
        clip = pinned.mean(axis=1)
    repeats &= ~pinned  # pinned tops are clipping, not a stuck value

    repeat = repeats.mean(axis=1)

    # DC step: spread of segment means against the within-segment spread.
    seg = n // spec.segments
    xs = x[:, : seg * spec.segments].reshape(c, spec.segments, seg)
    seg_mean = xs.mean(axis=2)
    within = np.sqrt(np.mean((xs - seg_mean[:, :, None]) ** 2, axis=(1, 2)))
    step = seg_mean.max(axis=1) - seg_mean.min(axis=1)
    step_limit = np.maximum(spec.step_floor_g, spec.step_ratio * within)

    # Spikes: samples far above the robust spread with nothing comparable within ±SPIKE_WINDOW samples.  A
    # bearing impact rings a resonance (opposite half-cycles of similar size a few samples away); an electrical
    # spike does not.
    med = np.median(x, axis=1, keepdims=True)
    xc_abs = np.abs(x - med)
    sigma_r = _MAD_TO_SIGMA * np.median(xc_abs, axis=1, keepdims=True)
    big = xc_abs > spec.spike_sigma * np.where(sigma_r > 0, sigma_r, np.inf)
    spikes = np.zeros(c, dtype=np.int64)
    ci, ii = np.nonzero(big)
    if ci.size:
        offs = np.concatenate([np.arange(-SPIKE_WINDOW, 0), np.arange(1, SPIKE_WINDOW + 1)])
        idx = np.clip(ii[:, None] + offs[None, :], 0, n - 1)
        around = xc_abs[ci[:, None], idx].max(axis=1)
        isolated = around < xc_abs[ci, ii] / 3.0
        spikes = np.bincount(ci[isolated], minlength=c).astype(np.int64)

    noise: npt.NDArray[np.float64] | None = None
    if spec.noise_density_ug_rthz is not None:
        band = spec.noise_band_hz or (0.35 * fs_hz, 0.45 * fs_hz)
        if band[1] > fs_hz / 2:
            raise PlanError(f"noise band high edge {band[1]:g} Hz is above Nyquist {fs_hz / 2:g} Hz")
        noise = _noise_density(x - mean[:, None], fs_hz, band)

    out: list[SensorHealth] = []
    for i in range(c):
        found: list[tuple[SensorFault, str]] = []
        m = float(mean[i])
        b = None if bias is None or not math.isfinite(bias[i]) else float(bias[i])
        if b is not None and not spec.bias_window_v[0] <= b <= spec.bias_window_v[1]:
            why = "open cable or no sensor" if b > spec.bias_window_v[1] else "short circuit"
            found.append(("bias", f"IEPE bias {b:.2f} V outside {spec.bias_window_v[0]:g}–"
                                  f"{spec.bias_window_v[1]:g} V ({why})"))
        elif spec.expected_mean_g is not None:
            if abs(m - spec.expected_mean_g) > spec.mean_tolerance_g:
                found.append(("bias", f"mean {m:.3f} g is more than {spec.mean_tolerance_g:g} g from the expected "
                                      f"{spec.expected_mean_g:g} g"))
        else:
            allowed = spec.mean_tolerance_g + (1.0 if spec.sensor_type == "mems" else 0.0)
            if abs(m) > allowed:
                found.append(("bias", f"mean {m:.3f} g is beyond the ±{allowed:g} g a {spec.sensor_type} sensor "
                                      f"can show"))
        if std[i] < spec.flatline_std_g or repeat[i] > spec.repeat_fraction:
            found.append(("flatline", f"standard deviation {std[i]:.3g} g (floor {spec.flatline_std_g:g} g), "
                                      f"{100 * repeat[i]:.1f} % of samples repeat the previous one"))
        if clip[i] > spec.clip_fraction:
            where = f"at full scale {spec.full_scale_g:g} g" if spec.full_scale_g is not None else "pinned flat"
            found.append(("clipping", f"{100 * clip[i]:.2f} % of samples {where} (limit "
                                      f"{100 * spec.clip_fraction:g} %)"))
        if step[i] > step_limit[i]:
            found.append(("dc-step", f"segment means differ by {step[i]:.3g} g (limit {step_limit[i]:.3g} g)"))
        if spikes[i] > 0:
            found.append(("spikes", f"{int(spikes[i])} isolated spike(s) above {spec.spike_sigma:g} × the robust "
                                    f"spread {float(sigma_r[i, 0]):.3g} g"))
        nd = None if noise is None else float(noise[i])
        if nd is not None and spec.noise_density_ug_rthz is not None and \
                nd > spec.noise_factor * spec.noise_density_ug_rthz:
            found.append(("noise", f"noise floor {nd:.0f} µg/√Hz above {spec.noise_factor:g} × the specified "
                                   f"{spec.noise_density_ug_rthz:g} µg/√Hz"))
        if any(f == "flatline" for f, _ in found):
            # A flat signal makes the other statistics meaningless (no spread, every sample "pinned").
            found = [(f, d) for f, d in found if f in ("bias", "flatline")]
        found.sort(key=lambda fd: FAULT_ORDER.index(fd[0]))
        out.append(SensorHealth(
            faults=tuple(f for f, _ in found), detail="; ".join(d for _, d in found), mean_g=m, std_g=float(std[i]),
            repeat_fraction=float(repeat[i]), clip_fraction=float(clip[i]), step_g=float(step[i]),
            spike_count=int(spikes[i]), noise_density_ug_rthz=nd, bias_v=b))
    return tuple(out)
