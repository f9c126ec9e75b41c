"""The view's panels of one frame: amplitude spectrum with order and defect-frequency markers, envelope spectrum
with family markers (harmonics, sidebands, verdicts), and the waveform — as JSON-ready documents.

Shared by the daemon's API (computed in a worker thread, cached per frame) and the offline HTML report.  Only
arithmetic here: no I/O, clocks or logging.  The numbers come from the numerical core's own functions, so a marker
reads what the daemon's indicators read for the same frame:

* **Spectrum**: :func:`edgevib.pipelines.spectrum_views.spectrum_view` for acceleration and velocity (periodic Hann
  window; a line reads the **r.m.s.** of a sine centred on it, ``|Xw[k]| · 2/Σw / √2`` with ``Σw = N/2``; velocity
  by ``gₙ·1000/(jω)`` in mm/s r.m.s.); lines below the velocity band's low edge, which the numerical core does not
  integrate (drift, gravity), are omitted (``null``).
* **Order markers** are the view's order markers: the pipeline's own order values of the frame (velocity r.m.s. of
  the three lines around the largest line within the order's tolerance: a tone between two lines still reads its
  r.m.s.), with the acceleration r.m.s. over the same three lines.
* **Envelope spectrum**: :func:`edgevib.pipelines.spectrum_views.envelope_view` (peak reading, g) over the
  point's demodulation band, with each family's fundamental, harmonics and sidebands as the numerical core searched
  them (level over the local mean level, threshold, verdict) — the daemon's own detection for that frame.
* Large spectra are reduced by **peak hold** (each group of lines shows its largest value at its first line's
  frequency), so no peak is lost; markers always carry the exact values.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.analysis import order_key
from edgevib.pipelines.bearings import defect_frequencies
from edgevib.pipelines.envelope import envelope_amplitude_spectrum
from edgevib.pipelines.spectrum_views import FamilyMarkers, LineMarker, envelope_view, spectrum_view
from edgevib.pipelines.types import AnalysisPlan, FamilyResult, PipelineError

__all__ = [
    "DEFAULT_MAX_LINES",
    "DEFAULT_MAX_POINTS",
    "FAMILY_LABELS",
    "MAX_LINES",
    "MAX_POINTS",
    "PanelError",
    "envelope_panel",
    "family_verdict",
    "spectrum_panel",
    "waveform_panel",
]

FloatArray = npt.NDArray[np.float64]

DEFAULT_MAX_LINES = 4096
MAX_LINES = 16384
DEFAULT_MAX_POINTS = 4096
MAX_POINTS = 32768
MARKER_ORDERS = (0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0)
ANTI_ALIAS_RATIO = 2.56  # usable band of an anti-aliased acquisition: fs/2.56 (common practice)
FAMILY_LABELS = {"ftf": "FTF", "bpfo": "BPFO", "bpfi": "BPFI", "bsf": "2×BSF"}
FAMILY_MEANING = {"ftf": "cage", "bpfo": "outer race", "bpfi": "inner race", "bsf": "rolling element"}


class PanelError(PipelineError):
    """A panel that cannot be drawn from this frame (bad request parameters, no band, too few samples)."""


def _frame(x_g: npt.ArrayLike, fs_hz: float) -> FloatArray:
    x = np.asarray(x_g, dtype=np.float64)
    if x.ndim != 1 or x.size < 64:
        raise PanelError(f"a frame is a 1-D record of at least 64 samples, got shape {x.shape}")
    if not math.isfinite(fs_hz) or fs_hz <= 0:
        raise PanelError(f"sample rate {fs_hz!r} Hz must be finite and > 0")
    if not np.isfinite(x).all():
        raise PanelError(f"{int(np.count_nonzero(~np.isfinite(x)))} samples are NaN or infinite")
    return x


def _limit(name: str, value: int | None, default: int, hi: int) -> int:
    v = default if value is None else value
    if not 16 <= v <= hi:
        raise PanelError(f"{name} {v} must be between 16 and {hi}")
    return v


def _peak_hold(freqs: FloatArray, series: list[FloatArray], max_lines: int) -> tuple[FloatArray, list[FloatArray], int]:
    """Reduce ``series`` (same length as ``freqs``) to at most ``max_lines`` by the largest value per group
    (NaN-aware; a group of NaN stays NaN); the group's first frequency is its abscissa."""
    n = freqs.size
    group = max(1, math.ceil(n / max_lines))
    if group == 1:
        return freqs, series, 1
    m = math.ceil(n / group)
    pad = m * group - n
    out = []
    for s in series:
        padded = np.concatenate([s, np.full(pad, np.nan)]).reshape(m, group)
        with np.errstate(invalid="ignore"):
            allnan = np.isnan(padded).all(axis=1)
            vals = np.where(allnan, np.nan, np.nanmax(np.where(np.isnan(padded), -np.inf, padded), axis=1))
        out.append(vals)
    return freqs[::group], out, group


def spectrum_panel(x_g: npt.ArrayLike, fs_hz: float, plan: AnalysisPlan, shaft_hz: float | None, *,
                   fmax_hz: float | None = None, max_lines: int | None = None) -> dict[str, Any]:
    """Amplitude spectrum of one frame with order and defect-frequency markers, from
    :func:`edgevib.pipelines.spectrum_views.spectrum_view` (acceleration and velocity).

    Parameters
    ----------
    x_g : array_like, shape (plan.n_samples,) — acceleration in g
    plan : the point's analysis plan (sample rate, frame length, velocity band, orders, tolerance, bearing)
    shaft_hz : the frame's shaft speed (None: estimated as the analysis does; no markers when unknown)
    fmax_hz : highest frequency shown (default fs/2.56, the usable band of an anti-aliased acquisition)
    max_lines : most lines returned (default 4096; peak hold beyond)

    Returns
    -------
    dict with ``frequency_hz``, ``acceleration_g`` and ``velocity_mm_s`` (arrays, r.m.s. per line), the scaling
    stated in ``scaling``, and ``markers``: the plan's orders with the pipeline's own order value (velocity r.m.s.
    of the three lines around the largest line in the order's window) and the acceleration r.m.s. over the same
    lines; the positions of further shaft harmonics; the bearing's defect frequencies.
    """
    x = _frame(x_g, fs_hz)
    n = x.size
    if n != plan.n_samples or not math.isclose(fs_hz, plan.fs_hz, rel_tol=1e-12):
        raise PanelError(f"a frame of {n} samples at {fs_hz:g} Hz does not fit the plan ({plan.n_samples} samples "
                         f"at {plan.fs_hz:g} Hz)")
    nyq = fs_hz / 2.0
    fmax = min(nyq, fs_hz / ANTI_ALIAS_RATIO) if fmax_hz is None else float(fmax_hz)
    if not math.isfinite(fmax) or not 0 < fmax <= nyq:
        raise PanelError(f"fmax {fmax_hz!r} Hz must be > 0 and at most Nyquist {nyq:g} Hz")
    lines = _limit("max_lines", max_lines, DEFAULT_MAX_LINES, MAX_LINES)
    shaft = shaft_hz if shaft_hz is not None and math.isfinite(shaft_hz) and shaft_hz > 0 else None
    acc = spectrum_view(x, plan, shaft, quantity="acceleration")
    vel = spectrum_view(x, plan, acc.shaft_hz, quantity="velocity")
    freqs = acc.freqs_hz
    df = fs_hz / n
    vel_rms = vel.amplitude.copy()
    vel_rms[freqs < plan.velocity_band_hz[0]] = np.nan  # not integrated there (zero in the view): not drawn
    keep = freqs <= fmax + 1e-9
    f_shown, (a_shown, v_shown), group = _peak_hold(freqs[keep], [acc.amplitude[keep], vel_rms[keep]], lines)

    markers: list[dict[str, Any]] = []
    f = acc.shaft_hz
    if f is not None and f > 0:
        for m in acc.orders:
            if m.expected_hz > fmax or m.velocity_rms_mm_s is None or not math.isfinite(m.velocity_rms_mm_s):
                continue
            a_rms = None
            if m.found_hz is not None:
                k = round(m.found_hz / df)
                # mean square over the found line and its neighbours (periodic Hann: Σ|Xw|²·16/(3N²) = ⅔·Σ line²),
                # the pipeline's three-line reading of an order
                a_rms = math.sqrt(2.0 / 3.0 * float(np.sum(acc.amplitude[max(0, k - 1) : k + 2] ** 2)))
            order = m.expected_hz / f
            markers.append({"kind": "order", "label": f"{order:g}×", "key": m.key, "order": order,
                            "frequency_hz": m.expected_hz, "window_hz": list(m.window_hz),
                            "peak_frequency_hz": m.found_hz, "velocity_mm_s": m.velocity_rms_mm_s,
                            "acceleration_g": a_rms})
        measured = {round(mk["order"], 6) for mk in markers}
        for o in MARKER_ORDERS:
            if o * f <= fmax and round(o, 6) not in measured and o == int(o):
                markers.append({"kind": "harmonic", "label": f"{o:g}×", "key": order_key(o), "order": o,
                                "frequency_hz": o * f})
        if plan.bearing is not None:
            d = defect_frequencies(plan.bearing, f)
            for key, hz in (("ftf", d.ftf_hz), ("bpfo", d.bpfo_hz), ("bpfi", d.bpfi_hz), ("bsf", 2 * d.bsf_hz)):
                if hz <= fmax:
                    markers.append({"kind": "defect", "label": FAMILY_LABELS[key], "key": key,
                                    "meaning": FAMILY_MEANING[key], "frequency_hz": hz})
    return {
        "fs_hz": fs_hz, "n_samples": n, "resolution_hz": df, "max_frequency_hz": fmax,
        "window": "hann",
        "scaling": {"acceleration_g": "r.m.s. per line, g (a sine centred on a line reads its r.m.s.)",
                    "velocity_mm_s": "r.m.s. per line, mm/s, by frequency-domain integration; null below "
                                     f"{plan.velocity_band_hz[0]:g} Hz (the velocity band's low edge)",
                    "orders": "the pipeline's order value: velocity r.m.s. over the three lines around the largest "
                              "line within the order's window (no loss for a tone between lines); acceleration "
                              "over the same three lines",
                    "reduction": "none" if group == 1 else f"peak hold over groups of {group} lines"},
        "velocity_band_hz": list(plan.velocity_band_hz),
        "shaft_hz": f,
        "frequency_hz": f_shown, "acceleration_g": a_shown, "velocity_mm_s": v_shown,
        "markers": markers,
    }


def family_verdict(fam: FamilyMarkers | FamilyResult | None) -> str:
    """``detected``, ``ambiguous`` (the fundamental coincides with a line that carries more evidence: the verdict
    is withheld) or ``not detected`` — the numerical core's verdict."""
    if fam is None:
        return "not detected"
    if fam.detected:
        return "detected"
    return "ambiguous" if fam.ambiguous_with is not None else "not detected"


def _line(m: LineMarker, freqs: FloatArray, amp: FloatArray) -> dict[str, Any]:
    k = None if m.found_hz is None or freqs.size < 2 else round(m.found_hz / freqs[1])
    return {"order": m.order, "expected_hz": m.expected_hz, "window_hz": list(m.window_hz),
            "frequency_hz": m.found_hz, "amplitude_g": None if k is None or k >= amp.size else float(amp[k]),
            "snr_db": m.level_db, "threshold_db": m.threshold_db, "counted": m.counted}


def envelope_panel(x_g: npt.ArrayLike, fs_hz: float, plan: AnalysisPlan, shaft_hz: float | None, *,
                   fmax_hz: float | None = None, max_lines: int | None = None) -> dict[str, Any]:
    """Envelope spectrum of one frame with the bearing families' harmonics, sidebands and verdicts.

    Drawn from :func:`edgevib.pipelines.spectrum_views.envelope_view` (the same search and verdicts as the
    daemon's indicators).  A point without a demodulation band returns ``{"available": False, "reason": …}``;
    without a bearing or a known speed, the spectrum without families (``note`` says why).
    """
    x = _frame(x_g, fs_hz)
    band = plan.envelope_band_hz
    if band is None:
        return {"available": False, "reason": "this point has no envelope demodulation band (sensor bandwidth or "
                "sample rate too low, or none configured)"}
    lines = _limit("max_lines", max_lines, DEFAULT_MAX_LINES, MAX_LINES)
    df = fs_hz / x.size
    width = band[1] - band[0]
    shaft = shaft_hz if shaft_hz is not None and math.isfinite(shaft_hz) and shaft_hz > 0 else None
    view = envelope_view(x, plan, shaft) if plan.bearing is not None and shaft is not None else None
    if view is not None:
        freqs, amp = view.freqs_hz, view.amplitude_g
    else:
        freqs, amp2 = envelope_amplitude_spectrum(x, fs_hz, band, max_frequency_hz=min(width, 1000.0))
        amp = amp2[0]
    top = float(freqs[-1])
    fmax = top if fmax_hz is None else float(fmax_hz)
    if not math.isfinite(fmax) or not 2 * df < fmax:
        raise PanelError(f"fmax {fmax_hz!r} Hz must be above {2 * df:g} Hz")
    fmax = min(fmax, top)
    keep = freqs <= fmax + 1e-9
    f_shown, (a_shown,), group = _peak_hold(freqs[keep], [amp[keep]], lines)
    out_families: list[dict[str, Any]] = []
    d = defect_frequencies(plan.bearing, view.shaft_hz) if view is not None and plan.bearing is not None else None
    if view is not None:
        for fam in view.families:
            tones = [m for m in fam.lines if m.kind in ("fundamental", "harmonic")]
            sides = [m for m in fam.lines if m.kind == "sideband"]
            harmonics = [{"harmonic": int(m.order), **_line(m, freqs, amp), "sidebands": []} for m in tones]
            # modulation frequency of the sidebands (the numerical core's): FTF for 2×BSF, the shaft otherwise
            spacing = (d.ftf_hz if fam.family == "bsf" else view.shaft_hz) if sides and d is not None else None
            for m in sides:
                if harmonics:
                    harmonics[0]["sidebands"].append({"side": "-" if m.order < 0 else "+", **_line(m, freqs, amp)})
            first = harmonics[0] if harmonics else {}
            out_families.append({
                "key": fam.family, "label": FAMILY_LABELS[fam.family], "meaning": FAMILY_MEANING[fam.family],
                "expected_hz": fam.expected_hz, "sideband_spacing_hz": spacing,
                "verdict": family_verdict(fam), "ambiguous_with": fam.ambiguous_with,
                "snr_db": first.get("snr_db"), "depth": fam.depth, "amplitude_g": fam.amplitude_g,
                "harmonics_found": sum(1 for m in tones if m.counted),
                "sidebands_found": sum(1 for m in sides if m.counted),
                "harmonics": harmonics,
            })
    note = None
    if plan.bearing is None:
        note = "no bearing configured: no defect families"
    elif shaft is None:
        note = "shaft speed unknown: no defect families"
    return {
        "available": True, "fs_hz": fs_hz, "n_samples": x.size, "resolution_hz": df, "band_hz": list(band),
        "max_frequency_hz": fmax, "shaft_hz": shaft,
        "scaling": {"amplitude_g": "peak amplitude of each envelope component, g (Hann window)",
                    "reduction": "none" if group == 1 else f"peak hold over groups of {group} lines",
                    "snr_db": "squared-envelope line over its local mean level, dB; threshold_db is the level it "
                              "had to exceed (the numerical core's false-alarm setting)",
                    "verdict": "the numerical core's per-family detection (fundamental, harmonics and sidebands "
                               "over their thresholds, coincidences resolved)"},
        "slip_tolerance": plan.slip_tolerance,
        "frequency_hz": f_shown, "amplitude_g": a_shown,
        "families": out_families,
        "detected": list(view.detected) if view is not None else [],
        "note": note,
    }


def waveform_panel(x_g: npt.ArrayLike, fs_hz: float, *, max_points: int | None = None) -> dict[str, Any]:
    """The frame's samples (mean removed), reduced to at most ``max_points`` by min/max pairs per bucket (every
    impact's extreme survives the reduction)."""
    x = _frame(x_g, fs_hz)
    limit = _limit("max_points", max_points, DEFAULT_MAX_POINTS, MAX_POINTS)
    mean = float(x.mean())
    xc = x - mean
    n = x.size
    t = np.arange(n, dtype=np.float64) / fs_hz
    factor = 1
    if n > limit:
        buckets = limit // 2
        factor = math.ceil(n / buckets)
        m = math.ceil(n / factor)
        pad = m * factor - n
        xs = np.concatenate([xc, np.full(pad, np.nan)]).reshape(m, factor)
        idx_min = np.nanargmin(xs, axis=1)
        idx_max = np.nanargmax(xs, axis=1)
        first = np.minimum(idx_min, idx_max)
        second = np.maximum(idx_min, idx_max)
        base = np.arange(m) * factor
        order = np.stack([base + first, base + second], axis=1).reshape(-1)
        order = np.unique(order)  # a flat bucket gives one sample, not two
        t, xc = t[order], xc[order]
    return {"fs_hz": fs_hz, "n_samples": n, "duration_s": n / fs_hz, "mean_g": mean,
            "reduction": "none" if factor == 1 else f"min and max of each bucket of {factor} samples",
            "t_s": t, "acceleration_g": xc,
            "peak_g": float(np.max(np.abs(x - mean))), "rms_g": float(np.sqrt(np.mean((x - mean) ** 2)))}
