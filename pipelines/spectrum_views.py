"""Whole spectra of one frame with their markers, for displays (the browser view, offline reports).

Two pure functions, each computing one frame exactly as :func:`edgevib.pipelines.analysis.analyze_frames` does:

* :func:`envelope_view` — the envelope spectra over the searched range (frequency axis, envelope amplitude in g
  with method E1's peak scaling, the squared envelope as modulation depth per line), the band used, and for each
  defect family its markers: expected and found lines of the fundamental, harmonics and sidebands (each with its
  search window, level over its local level and threshold, in dB, and whether it counts), the family's verdict,
  and the shaft-harmonic lines recognised in the envelope.
* :func:`spectrum_view` — the Hann-windowed amplitude spectrum of acceleration (g) or velocity (mm/s), **r.m.s.
  scaling** (a sine centred on a line reads its r.m.s. there; between lines up to 1.4 dB less — the order values
  themselves sum the power of three lines and carry no such loss), with a marker per shaft order (expected
  frequency, search window, the line found, its velocity r.m.s. in mm/s).

Not used per frame by the daemon; only arithmetic, no I/O.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt

from edgevib.pipelines import _fft
from edgevib.pipelines.analysis import FAMILIES, analyze_frames, kernel_for, order_key
from edgevib.pipelines.envelope import SIDEBAND_ORDERS
from edgevib.pipelines.indicators import as_channels, finite_mean
from edgevib.pipelines.spectrum import hann_lines, integration_coefficients
from edgevib.pipelines.types import AnalysisPlan, PlanError, SignalError

__all__ = ["EnvelopeView", "FamilyMarkers", "LineMarker", "OrderMarker", "SpectrumView", "envelope_view",
           "spectrum_view"]

FloatArray = npt.NDArray[np.float64]
LineKind = Literal["fundamental", "harmonic", "sideband", "shaft"]


@dataclass(frozen=True, slots=True)
class LineMarker:
    """One searched line: ``order`` is the harmonic number (fundamental 1), the sideband's multiple of the
    modulation frequency (−2, −1, 1, 2) or the shaft order.  ``found_hz`` is None where the window holds no local
    maximum; ``counted`` says whether the line is significant (level over the window's threshold)."""

    kind: LineKind
    order: float
    expected_hz: float
    window_hz: tuple[float, float]
    found_hz: float | None
    level_db: float | None
    threshold_db: float | None
    counted: bool


@dataclass(frozen=True, slots=True)
class FamilyMarkers:
    """A defect family's markers and verdict (``bsf`` is the 2×BSF family)."""

    family: str
    expected_hz: float
    detected: bool
    ambiguous_with: str | None
    depth: float | None
    amplitude_g: float | None
    lines: tuple[LineMarker, ...]


@dataclass(frozen=True, slots=True)
class EnvelopeView:
    """The envelope stage of one frame.  Arrays share ``freqs_hz`` (the frame's line spacing fs/N)."""

    band_hz: tuple[float, float]
    shaft_hz: float
    freqs_hz: FloatArray
    amplitude_g: FloatArray  # envelope amplitude spectrum, peak reading (method E1's scaling), g
    depth: FloatArray  # squared-envelope spectrum as modulation depth (line over the mean; dimensionless)
    families: tuple[FamilyMarkers, ...]
    shaft_lines: tuple[LineMarker, ...]
    detected: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class OrderMarker:
    """A shaft order: where it is expected, its search window, the line found and its velocity r.m.s."""

    key: str
    expected_hz: float
    window_hz: tuple[float, float]
    found_hz: float | None
    velocity_rms_mm_s: float | None


@dataclass(frozen=True, slots=True)
class SpectrumView:
    """The amplitude spectrum of one frame (r.m.s. scaling, Hann window) with its order markers."""

    quantity: Literal["acceleration", "velocity"]
    unit: str  # "g" or "mm/s"
    freqs_hz: FloatArray
    amplitude: FloatArray
    shaft_hz: float | None
    orders: tuple[OrderMarker, ...]


def _frame(x_g: npt.ArrayLike, plan: AnalysisPlan) -> npt.NDArray[np.float64]:
    x = as_channels(x_g)
    if x.shape != (1, plan.n_samples):
        raise SignalError(f"one frame of {plan.n_samples} samples expected, got shape {x.shape}")
    finite_mean(x)
    return x


def _speed(x: npt.NDArray[np.float64], plan: AnalysisPlan, shaft_hz: float | None) -> float | None:
    if shaft_hz is not None:
        return float(shaft_hz)
    return analyze_frames(x, plan)[0].shaft_hz


def _db(value: float) -> float | None:
    return 10.0 * math.log10(value) if math.isfinite(value) and value > 0 else None


def envelope_view(x_g: npt.ArrayLike, plan: AnalysisPlan, shaft_hz: float | None = None) -> EnvelopeView | None:
    """The envelope spectra of one frame and its family markers (see the module docstring).

    Parameters
    ----------
    x_g : array_like, shape (plan.n_samples,) or (1, plan.n_samples) — one frame in g
    plan : a plan with a bearing and an envelope band
    shaft_hz : the shaft speed; None: estimated as the analysis does

    Returns
    -------
    EnvelopeView, or None when the speed is unknown (nothing to mark)

    Raises
    ------
    PlanError
        the plan has no bearing or no envelope band.
    """
    if plan.bearing is None or plan.envelope_band_hz is None:
        raise PlanError("the plan has no bearing or no envelope band: no envelope view")
    x = _frame(x_g, plan)
    f = _speed(x, plan, shaft_hz)
    if f is None or not f > 0:
        return None
    kernel = kernel_for(plan)
    amp, ses, mean_line, fam = kernel.envelope_detail(x, f)
    df = plan.fs_hz / plan.n_samples
    with np.errstate(divide="ignore", invalid="ignore"):
        depth = np.where(mean_line[0] > 0, 4.0 * np.sqrt(ses[0]) / mean_line[0], 0.0)
    index, stat = fam.part("index")[0], fam.part("statistic")[0]
    thr, lo, hi = fam.part("threshold")[0], fam.part("lo")[0], fam.part("hi")[0]
    fits = fam.part("fits")[0]
    centres = fam.expected_lines[0]
    h = plan.harmonics
    kinds: list[tuple[LineKind, float]] = [("fundamental", 1.0)]
    for k in range(2, h + 1):
        kinds.append(("harmonic", float(k)))
    for o in SIDEBAND_ORDERS.tolist():
        kinds.append(("sideband", float(o)))
    names = (*FAMILIES, "shaft")
    families: list[FamilyMarkers] = []
    for j, name in enumerate(FAMILIES):
        if not fits[j, 0]:
            continue
        lines = []
        for q, (kind, order) in enumerate(kinds):
            if not fits[j, q]:
                continue
            found = index[j, q] >= 0
            t = float(stat[j, q])
            lines.append(LineMarker(kind=kind, order=order, expected_hz=float(centres[j, q]) * df,
                                    window_hz=(float(lo[j, q]) * df, float(hi[j, q]) * df),
                                    found_hz=float(index[j, q]) * df if found else None,
                                    level_db=_db(t) if found else None, threshold_db=_db(float(thr[j, q])),
                                    counted=bool(found and t >= thr[j, q])))
        amb = int(fam.ambiguous_with[0, j])
        families.append(FamilyMarkers(
            family=name, expected_hz=float(centres[j, 0]) * df, detected=bool(fam.detected[0, j]),
            ambiguous_with=names[amb] if amb >= 0 else None,
            depth=float(fam.depth[0, j]) if math.isfinite(fam.depth[0, j]) else None,
            amplitude_g=float(fam.amplitude_g[0, j]) if math.isfinite(fam.amplitude_g[0, j]) else None,
            lines=tuple(lines)))
    shaft_lines = []
    s = fam.shaft
    for k in range(s.index.shape[1]):
        if not s.fits[0, k]:
            continue
        found = s.index[0, k] >= 0
        t = float(s.statistic[0, k])
        shaft_lines.append(LineMarker(kind="shaft", order=float(k + 1), expected_hz=(k + 1) * f,
                                      window_hz=(float(s.lo[0, k]) * df, float(s.hi[0, k]) * df),
                                      found_hz=float(s.index[0, k]) * df if found else None,
                                      level_db=_db(t) if found else None, threshold_db=_db(float(s.threshold[0, k])),
                                      counted=bool(found and t >= s.threshold[0, k])))
    freqs: FloatArray = np.arange(amp.shape[-1], dtype=np.float64) * df
    return EnvelopeView(band_hz=plan.envelope_band_hz, shaft_hz=f, freqs_hz=freqs, amplitude_g=amp[0],
                        depth=depth, families=tuple(families), shaft_lines=tuple(shaft_lines),
                        detected=tuple(m.family for m in families if m.detected))


def spectrum_view(x_g: npt.ArrayLike, plan: AnalysisPlan, shaft_hz: float | None = None, *,
                  quantity: Literal["acceleration", "velocity"] = "acceleration",
                  max_frequency_hz: float | None = None) -> SpectrumView:
    """The amplitude spectrum of one frame (r.m.s. scaling, Hann) with shaft-order markers.

    Parameters
    ----------
    x_g : array_like, shape (plan.n_samples,) or (1, plan.n_samples) — one frame in g
    shaft_hz : the shaft speed; None: estimated as the analysis does (no order markers when unknown)
    quantity : ``"acceleration"`` (g) or ``"velocity"`` (mm/s, by frequency-domain integration; lines below the
        plan's velocity band are zero, like the indicators)
    max_frequency_hz : highest frequency returned (default: Nyquist)

    Returns
    -------
    SpectrumView — a sine of amplitude A centred on a line reads A/√2 (acceleration) or A·gₙ/(2πf)/√2 (velocity)
    """
    if quantity not in ("acceleration", "velocity"):
        raise PlanError(f"quantity {quantity!r} is not acceleration or velocity")
    x = _frame(x_g, plan)
    f = _speed(x, plan, shaft_hz)
    n = plan.n_samples
    df = plan.fs_hz / n
    stop = n // 2
    if max_frequency_hz is not None:
        stop = max(2, min(stop, math.floor(max_frequency_hz / df) + 1))
    spec = _fft.rfft(x - x.mean(axis=-1, keepdims=True))
    if quantity == "velocity":
        coef = integration_coefficients(plan.fs_hz, n, stop + 1)
        lo = math.ceil(plan.velocity_band_hz[0] / df - 1e-9)
        coef[:lo] = 0.0
        spec = spec[:, : stop + 1] * coef
    lines = hann_lines(spec, stop)
    amp: FloatArray = np.abs(lines[0]) * (2.0 / (n / 2.0)) / math.sqrt(2.0)  # Σw = N/2; r.m.s. reading
    orders: list[OrderMarker] = []
    if f is not None and f > 0:
        ind = analyze_frames(x, plan, [f])[0]
        vel = np.abs(hann_lines(_fft.rfft(x - x.mean(axis=-1, keepdims=True))[:, : n // 2 + 1]
                                * integration_coefficients(plan.fs_hz, n, n // 2 + 1), n // 2)[0])
        for o in plan.orders:
            centre = o * f
            half = max(df, plan.order_tolerance * centre)
            k_lo = max(1, math.ceil((centre - half) / df - 1e-9))
            k_hi = min(n // 2 - 1, math.floor((centre + half) / df + 1e-9))
            key = order_key(o)
            value = ind.orders_mm_s.get(key)
            found = None
            if value is not None and k_hi >= k_lo:
                found = float(k_lo + int(np.argmax(vel[k_lo : k_hi + 1]))) * df
            orders.append(OrderMarker(key=key, expected_hz=centre, window_hz=(k_lo * df, k_hi * df), found_hz=found,
                                      velocity_rms_mm_s=value))
    freqs: FloatArray = np.arange(stop, dtype=np.float64) * df
    return SpectrumView(quantity=quantity, unit="g" if quantity == "acceleration" else "mm/s", freqs_hz=freqs,
                        amplitude=amp, shaft_hz=f, orders=tuple(orders))

