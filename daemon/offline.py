"""Offline subcommands: ``edgevib analyze FILE`` (a recorded waveform) and ``edgevib bearing`` (defect frequencies).

The file formats and layouts (WAV, ``.npy``, CSV with or without a header, MATLAB ``.mat`` with struct fields)
are read by :mod:`edgevib.daemon.waveform_files`.  ``analyze`` treats the whole record as one frame:

* **speed** — ``--rpm`` (source ``given``), else the file's own speed (``file``), else the estimate from the
  spectrum (``estimated``, with its quality 0–1); unknown (None) when the estimate is ambiguous, and then orders and
  envelope verdicts are skipped.  When ``--rpm`` disagrees with the file's speed or with the spectrum by more than
  the order tolerance, one warning line goes to stderr.  A given speed plans the analysis for that speed ± the order
  tolerance instead of the whole 300–6000 r/min estimate range;
* **envelope band** — ``--band LO:HI`` (``configured``), ``--band auto`` (``auto``: spectral kurtosis on the fast
  kurtogram's grid among bands whose envelope is periodic, :mod:`edgevib.pipelines.kurtogram`), else the default
  band from the sample rate (``default``; also the fallback when no band qualifies automatically);
* **short records** — anything of 64 samples or more gives the time-domain indicators; what the record is too
  short for is left out with a one-line note (``notes``).

Bad input prints one line on stderr naming the problem and exits with code 2; nothing prints a traceback.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

from edgevib.common.bands import min_frame_samples
from edgevib.daemon.indicators import REGISTRY, Indicator, document
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.waveform_files import FORMATS, InputError, Waveform, read_waveform
from edgevib.pipelines.analysis import (
    FAMILIES,
    analyze_frames,
    default_envelope_band,
    kernel_for,
    make_plan,
    order_key,
)
from edgevib.pipelines.bearings import defect_frequencies, validate_geometry
from edgevib.pipelines.conditioning import to_g
from edgevib.pipelines.envelope import DEPTH_NOISE_RMS
from edgevib.pipelines.kurtogram import select_band_for
from edgevib.pipelines.severity import iso_zone, zone_boundaries_mm_s
from edgevib.pipelines.types import AnalysisPlan, BearingGeometry, FrameIndicators, PipelineError, PlanNote

__all__ = ["FORMATS", "InputError", "Waveform", "configure_analyze", "configure_bearing", "read_waveform",
           "run_analyze", "run_bearing"]

ORDER_TOLERANCE = 0.03  # the plan's default: speeds, orders and warnings use the same tolerance
ESTIMATE_RANGE_HZ = (5.0, 100.0)  # 300–6000 r/min when no speed is given
FAMILY_LABELS = {"ftf": "FTF", "bpfo": "BPFO", "bpfi": "BPFI", "bsf": "2xBSF"}


# --------------------------------------------------------------------------------------------- parsing helpers


def _one_line_errors(parser: argparse.ArgumentParser, name: str) -> None:
    """Make argparse usage errors one line on stderr (exit 2), like every other bad input."""

    def error(message: str) -> NoReturn:
        print(f"edgevib {name}: {message} (see edgevib {name} --help)", file=sys.stderr)
        raise SystemExit(2)

    parser.error = error  # type: ignore[method-assign]
    known = parser.parse_known_args

    def strict(args: Any = None, namespace: Any = None) -> tuple[argparse.Namespace, list[str]]:
        # the dispatcher parses subcommands with parse_known_args and would print usage for leftovers
        ns, extras = known(args, namespace)
        if extras:
            error(f"unrecognized arguments: {' '.join(extras)}")
        return ns, extras

    parser.parse_known_args = strict  # type: ignore[method-assign,assignment]


def _number(option: str, text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{option} {text!r} is not a number") from None
    if not math.isfinite(value):
        raise InputError(f"{option} {text!r} must be finite")
    return value


def _positive(option: str, text: str, what: str = "") -> float:
    """A number > 0 (``what`` says what it is, in the message)."""
    value = _number(option, text)
    if value <= 0:
        raise InputError(f"{option} {text} must be > 0{what}")
    return value


def _index(option: str, text: str) -> int:
    """A 0-based column or channel index."""
    try:
        i = int(text)
    except ValueError:
        raise InputError(f"{option} {text!r} is not an integer") from None
    if i < 0:
        raise InputError(f"{option} {i} must be ≥ 0")
    return i


def _band(option: str, text: str | None) -> tuple[float, float] | None:
    if text is None:
        return None
    parts = text.split(":")
    if len(parts) != 2:
        raise InputError(f"{option} {text!r} must be LO:HI in Hz, e.g. 2000:5000")
    lo, hi = _number(option, parts[0]), _number(option, parts[1])
    if lo <= 0 or hi <= lo:
        raise InputError(f"{option} {text!r}: need 0 < LO < HI")
    return lo, hi


def _bearing(text: str | None) -> BearingGeometry | None:
    if text is None:
        return None
    parts = text.split(",")
    if len(parts) not in (3, 4):
        raise InputError(f"--bearing {text!r} must be ELEMENTS,BALL_D,PITCH_D[,ANGLE_DEG], e.g. 9,7.94,39.04,0")
    try:
        elements = int(parts[0])
    except ValueError:
        raise InputError(f"--bearing element count {parts[0]!r} is not an integer") from None
    ball, pitch = _number("--bearing ball diameter", parts[1]), _number("--bearing pitch diameter", parts[2])
    angle = _number("--bearing contact angle", parts[3]) if len(parts) == 4 else 0.0
    return validate_geometry(BearingGeometry(elements, ball, pitch, angle))


def _rpm(text: str | None) -> float | None:
    return None if text is None else _positive("--rpm", text, " (a shaft speed in revolutions per minute)")


def _false_alarm(text: str) -> float:
    p = _number("--false-alarm", text)
    if not 1e-12 <= p <= 0.1:
        raise InputError(f"--false-alarm {text} must be a probability from 1e-12 to 0.1")
    return p


def _unit(text: str) -> str:
    if text not in ("g", "m/s2"):
        raise InputError(f"--unit {text!r} must be g or m/s2")
    return text


def _full_scale(text: str) -> float:
    return _positive("--full-scale", text)


def _iso_class(group_text: str | None, support: str | None) -> int | None:
    """The ISO 20816-3 machine group of ``--group``, checked with ``--support`` (both or neither)."""
    group = None
    if group_text is not None:
        if group_text not in ("1", "2"):
            raise InputError(f"--group {group_text!r} must be 1 or 2")
        group = int(group_text)
    if support is not None and support not in ("rigid", "flexible"):
        raise InputError(f"--support {support!r} must be rigid or flexible")
    if (group is None) != (support is None):
        raise InputError("--group and --support go together (both are needed for the ISO 20816-3 zone)")
    return group


def _check_samples(label: str, x: np.ndarray) -> None:
    """Refuse an empty record or one with NaN or infinite samples (``label`` names the file)."""
    if x.size == 0:
        raise InputError(f"{label} holds no samples")
    bad = int(np.count_nonzero(~np.isfinite(x)))
    if bad:
        raise InputError(f"{label}: {bad} of {x.size} samples are NaN or infinite")


# --------------------------------------------------------------------------------------------- analyze


def configure_analyze(parser: argparse.ArgumentParser) -> None:
    _one_line_errors(parser, "analyze")
    parser.description = ("Analyse a recorded waveform (WAV, .npy, CSV, MATLAB .mat) as one frame: time-domain "
                          "indicators, velocity r.m.s. (ISO 20816 band), orders, bearing defect families with "
                          "detection verdicts and the ISO 20816-3 zone.  edgevib advises; it is not a machinery "
                          "protection system.")
    parser.add_argument("file", metavar="FILE", type=Path, help="the waveform file")
    parser.add_argument("--fs", metavar="HZ", help="sample rate (required for .npy, CSV and .mat files without one)")
    parser.add_argument("--var", metavar="PATH", help="signal of a .mat file: a variable, or a struct field as "
                                                      "a.b.c (struct arrays: a.Y(7).Data); default: the one "
                                                      "*_DE_time or the only numeric vector")
    parser.add_argument("--fs-var", metavar="PATH", help="sample rate of a .mat file (default: a scalar fs, Fs, "
                                                         "sr, sample_rate... beside the signal or at the top level)")
    parser.add_argument("--rpm-var", metavar="PATH", help="shaft speed in r/min of a .mat file (default: the one "
                                                          "scalar named ...RPM beside the signal or at the top level)")
    parser.add_argument("--shaft-hz-var", metavar="PATH", help="shaft speed in Hz of a .mat file")
    parser.add_argument("--channel", metavar="N", help="channel/column to analyse, 0-based (default 0)")
    parser.add_argument("--column", metavar="NAME|INDEX",
                        help="CSV column to analyse (default: the first that is neither constant nor monotonic)")
    parser.add_argument("--unit", default="g", metavar="g|m/s2", help="unit of the samples (default g)")
    parser.add_argument("--full-scale", metavar="X", default="1",
                        help="for integer PCM WAV: the value, in --unit, of digital full scale (default 1)")
    parser.add_argument("--rpm", metavar="R", help="shaft speed in r/min (default: from the file, else estimated)")
    parser.add_argument("--bearing", metavar="ELEMENTS,BALL_D,PITCH_D,ANGLE_DEG",
                        help="rolling-element bearing for the envelope families, e.g. 9,7.94,39.04,0")
    parser.add_argument("--band", metavar="LO:HI|auto",
                        help="envelope demodulation band in Hz, or auto (spectral kurtosis; default: from fs)")
    parser.add_argument("--false-alarm", metavar="P", default="1e-3",
                        help="probability that a defect family is called detected in stationary noise (default "
                             "1e-3)")
    parser.add_argument("--velocity-band", metavar="LO:HI", default="10:1000",
                        help="velocity r.m.s. band in Hz (default 10:1000; 2:1000 below 600 r/min)")
    parser.add_argument("--group", metavar="1|2", help="ISO 20816-3 machine group (1: > 300 kW, 2: 15–300 kW)")
    parser.add_argument("--support", metavar="rigid|flexible", help="ISO 20816-3 support")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--report", metavar="OUT.html", type=Path,
                        help="also write a self-contained HTML report (spectrum, envelope, waveform, indicators)")


def _fail(command: str, message: str) -> int:
    print(f"edgevib {command}: {message}", file=sys.stderr)
    return 2


def _clean(value: Any) -> Any:
    """JSON-safe: NaN/Inf → None, tuples → lists, numpy scalars → floats."""
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, float | np.floating):
        f = float(value)
        return f if math.isfinite(f) else None
    return value


def _estimate_range(fs: float, n: int, orders: tuple[float, ...]) -> tuple[float, float] | None:
    """The speed-estimate range: 5–100 Hz narrowed to what the record resolves and its rate carries."""
    lo = max(ESTIMATE_RANGE_HZ[0], 2.0 * fs / n)
    hi = min(ESTIMATE_RANGE_HZ[1], 0.99 * fs / 2 / (max(max(orders), 3.0) * (1 + ORDER_TOLERANCE)))
    return (lo, hi) if lo < hi else None


def _auto_band(x: np.ndarray, fs: float, speed: tuple[float, float], bearing: BearingGeometry | None,
               harmonics: int = 3) -> tuple[tuple[float, float] | None, dict[str, Any]]:
    """The automatic demodulation band and what the selection saw."""
    choice, reason = select_band_for(x, fs, speed, bearing, harmonics=harmonics)
    info: dict[str, Any] = {"bands_examined": len(choice.grid), "kurtosis": choice.kurtosis,
                            "periodicity_db": choice.periodicity_db}
    if reason is not None:
        info["reason"] = reason
    return choice.band_hz, info


def _speed_text(rpm: float) -> str:
    return f"{rpm:.0f} r/min"


@dataclass(frozen=True)
class _Options:
    """The analyse options, checked before the file is read."""

    unit: str
    channel: int | None
    full_scale: float
    group: int | None
    rpm: float | None
    bearing: BearingGeometry | None
    auto: bool
    band: tuple[float, float] | None
    velocity_band: tuple[float, float]
    alpha: float


@dataclass
class _Speed:
    """The shaft speed chosen for the record and where it came from."""

    shaft_hz: float | None
    source: str | None
    source_text: str
    quality: float | None
    range_hz: tuple[float, float]


def _options(args: argparse.Namespace) -> _Options:
    unit = _unit(args.unit)
    channel = None if args.channel is None else _index("--channel", args.channel)
    full_scale = _full_scale(args.full_scale)
    group = _iso_class(args.group, args.support)
    rpm_opt = _rpm(args.rpm)
    bearing = _bearing(args.bearing)
    auto = args.band is not None and args.band.strip().lower() == "auto"
    band = None if auto else _band("--band", args.band)
    vel_band = _band("--velocity-band", args.velocity_band)
    assert vel_band is not None
    alpha = _false_alarm(args.false_alarm)
    return _Options(unit=unit, channel=channel, full_scale=full_scale, group=group, rpm=rpm_opt, bearing=bearing,
                    auto=auto, band=band, velocity_band=vel_band, alpha=alpha)


def _file_rate(wave: Waveform, path: Path, fs: float | None, name: str) -> float:
    """A record's sample rate: ``fs`` (``--fs``; a WAV header's rate may not be contradicted), else the file's;
    ``name`` names the file in messages."""
    if fs is None:
        if wave.fs_hz is None:
            raise InputError(f"{name} does not carry a sample rate: give --fs HZ")
        fs = wave.fs_hz
    elif wave.fs_hz is not None and path.suffix.lower() == ".wav" and abs(fs - wave.fs_hz) > 1e-9 * fs:
        raise InputError(f"{name}: --fs {fs:g} Hz contradicts the WAV header's {wave.fs_hz:g} Hz")
    if not math.isfinite(fs) or fs <= 0:
        raise InputError(f"{name}: sample rate {fs!r} Hz must be finite and > 0")
    return fs


def _sample_rate(args: argparse.Namespace, wave: Waveform, warnings: list[str]) -> tuple[float, str | None]:
    """The sample rate (``--fs`` or the file's) and where it came from."""
    option = None if args.fs is None else _positive("--fs", args.fs)
    fs = _file_rate(wave, args.file, option, str(args.file))
    if option is None:
        return fs, wave.fs_source
    if wave.fs_hz is not None and abs(fs - wave.fs_hz) > 1e-9 * fs:
        warnings.append(f"--fs {fs:g} Hz differs from the {wave.fs_hz:g} Hz of {wave.fs_source}; using --fs")
    return fs, "option --fs"


def _samples_g(args: argparse.Namespace, x: np.ndarray, unit: str) -> np.ndarray:
    """The record in g, refused when empty or not finite."""
    _check_samples(str(args.file), x)
    return to_g(x, unit)


def _spectrum_estimate(x_g: np.ndarray, fs: float, opts: _Options, est_range: tuple[float, float] | None,
                       orders: tuple[float, ...]) -> tuple[float | None, float | None]:
    """The shaft speed the spectrum shows and its quality (None, None when it cannot be estimated)."""
    if est_range is None:
        return None, None
    try:
        est_plan = make_plan(fs, int(x_g.size), velocity_band_hz=opts.velocity_band, bearing=opts.bearing,
                             speed_range_hz=est_range, orders=orders, partial=True)
    except PipelineError:
        return None, None
    first = analyze_frames(x_g, est_plan)[0]
    return first.shaft_hz, first.shaft_quality


def _given_speed_warnings(rpm_opt: float, file_rpm: float | None, rpm_source: str | None, est_hz: float | None,
                          warnings: list[str]) -> None:
    """One warning when ``--rpm`` disagrees with the file's speed, the spectrum's, or both, by more than the order
    tolerance; it names every speed that disagrees."""
    def off(rpm: float) -> str:
        return f"{100 * abs(rpm_opt / rpm - 1):.1f} %"

    others: list[str] = []
    if file_rpm is not None and abs(rpm_opt / file_rpm - 1) > ORDER_TOLERANCE:
        others.append(f"the file's {_speed_text(file_rpm)} ({rpm_source}) by {off(file_rpm)}")
    if est_hz is not None and abs(rpm_opt / 60.0 / est_hz - 1) > ORDER_TOLERANCE:
        others.append(f"the {_speed_text(est_hz * 60)} the spectrum shows by {off(est_hz * 60)}")
    if others:
        warnings.append(f"--rpm {rpm_opt:g} differs from {' and from '.join(others)}, more than the "
                        f"{100 * ORDER_TOLERANCE:g} % order tolerance; using --rpm")


def _undetermined_speed_text(est_range: tuple[float, float] | None, est_quality: float | None, n: int, fs: float,
                             notes: list[str]) -> str:
    """Why no speed was found (one note) and the source text that says so."""
    if est_range is None:
        notes.append(f"speed: the {n / fs:.3g} s record is too short to estimate a shaft speed; give --rpm")
        return "not determined"
    if est_quality is not None:
        notes.append(f"speed: the spectrum is ambiguous (quality {est_quality:.2f}: another line pattern "
                     "explains it as well); orders and envelope verdicts skipped; give --rpm")
        return "not determined (ambiguous)"
    notes.append("speed: no clear shaft line in the spectrum; orders and envelope verdicts skipped; give "
                 "--rpm")
    return "not determined"


def _known_speed_notes(notes: tuple[PlanNote, ...], speed: _Speed, fs: float, n: int) -> list[str]:
    """The plan's notes, its speed-estimate note said as it stands when the speed is known (given or from the
    file): the speed is used without an estimate, and the note says why the spectrum cannot check it — how many
    samples the record has and how many checking needs — instead of asking for the speed."""
    if speed.shaft_hz is None or speed.source not in ("given", "file"):
        return [str(note) for note in notes]
    out: list[str] = []
    for note in notes:
        if note.group != "speed estimate":
            out.append(str(note))
            continue
        head = f"speed: {_speed_text(speed.shaft_hz * 60)} from {speed.source_text}, not checked against the spectrum"
        need = min_frame_samples(fs, speed.range_hz[0], speed.range_hz[0])
        if n < need:
            out.append(f"{head}: the record's {n} samples ({n / fs:.3g} s at {fs:g} Hz) are too few (checking needs "
                       f"≥ {need} samples, {need / fs:.3g} s)")
        else:
            out.append(f"{head}: {note.reason}")
    return out


def _speed(x_g: np.ndarray, fs: float, wave: Waveform, opts: _Options, orders: tuple[float, ...],
           notes: list[str], warnings: list[str]) -> _Speed:
    """Speed: given, from the file, or estimated; the estimate also checks a given speed."""
    n = int(x_g.size)
    rpm_opt = opts.rpm
    file_rpm = wave.rpm
    if wave.rpm_conflict:  # the file's speed variables disagree: no choice is made for the user
        if rpm_opt is None:
            raise InputError(f"{wave.rpm_conflict}: give the speed with --rpm R or choose one with --rpm-var NAME")
        warnings.append(f"{wave.rpm_conflict}; using --rpm {rpm_opt:g}")
    if file_rpm is not None and (not math.isfinite(file_rpm) or file_rpm <= 0):
        if rpm_opt is None:
            raise InputError(f"{wave.rpm_source} holds an impossible speed {file_rpm:g} r/min; give --rpm")
        file_rpm = None
    est_range = _estimate_range(fs, n, orders)
    est_hz, est_quality = _spectrum_estimate(x_g, fs, opts, est_range, orders)
    shaft_hz: float | None
    source: str | None
    if rpm_opt is not None:
        shaft_hz = rpm_opt / 60.0
        source, source_text = "given", "option --rpm"
        _given_speed_warnings(rpm_opt, file_rpm, wave.rpm_source, est_hz, warnings)
    elif file_rpm is not None:
        shaft_hz, source, source_text = file_rpm / 60.0, "file", wave.rpm_source
    elif est_hz is not None:
        shaft_hz, source, source_text = est_hz, "estimated", "estimated from the spectrum"
    else:
        shaft_hz, source = None, None
        source_text = _undetermined_speed_text(est_range, est_quality, n, fs, notes)
    if shaft_hz is not None:
        speed_range = (shaft_hz * (1 - ORDER_TOLERANCE), shaft_hz * (1 + ORDER_TOLERANCE))
    else:
        speed_range = est_range or (1.0, min(2.0, 0.4 * fs / 2 / 3.1))
    return _Speed(shaft_hz=shaft_hz, source=source, source_text=source_text, quality=est_quality,
                  range_hz=speed_range)


def _envelope_band(x_g: np.ndarray, fs: float, opts: _Options, speed_range: tuple[float, float],
                   notes: list[str]) -> tuple[tuple[float, float] | None, str | None, dict[str, Any] | None]:
    """The demodulation band, where it came from, and what an automatic selection saw."""
    band = opts.band
    bearing = opts.bearing
    band_source: str | None = None
    selection: dict[str, Any] | None = None
    if band is not None:
        band_source = "configured"
        if band[1] >= fs / 2.0:  # refused whether or not a bearing is given (the plan checks it only with one)
            raise InputError(f"envelope band high edge {band[1]:g} Hz is at or above Nyquist {fs / 2.0:g} Hz")
    elif opts.auto:
        band, selection = _auto_band(x_g, fs, speed_range, bearing)
        if band is not None:
            band_source = "auto"
        else:
            notes.append(f"envelope band: automatic choice not possible ({selection.get('reason')}); the default "
                         "band is used")
    if band is None and (bearing is not None or opts.auto):
        band = default_envelope_band(fs, None, shaft_hz_max=speed_range[1])
        if band is not None:
            band_source = "default"
        elif bearing is not None:
            notes.append(f"envelope: a {fs:g} Hz sample rate cannot carry a demodulation band (needs fs/2.56 ≥ "
                         "2 kHz)")
    return band, band_source, selection


def _envelope_document(ind: FrameIndicators, values: dict[str, Any], band: tuple[float, float] | None,
                       band_source: str | None, selection: dict[str, Any] | None) -> dict[str, Any]:
    """The envelope part of the result: band, verdicts, and per family the registry's numbers and evidence."""
    envelope: dict[str, Any] = {"band_hz": list(band) if band is not None else None, "band_source": band_source,
                                "detected": list(ind.envelope_detected)}
    if selection is not None:
        envelope["band_selection"] = selection
    for name in FAMILIES:
        fam = ind.envelope.get(name)
        if fam is not None:  # the registry's numbers, then the verdict and what it rests on
            envelope[name] = {**((values.get("envelope") or {}).get(name) or {}),
                              "frequency_hz": fam.frequency_hz, "amplitude_g": fam.amplitude_g,
                              "snr_db": fam.snr_db, "detected": fam.detected, "expected_hz": fam.expected_hz,
                              "threshold_db": fam.threshold_db, "depth": fam.depth,
                              "harmonics_found": fam.harmonics_found, "sidebands_found": fam.sidebands_found,
                              "ambiguous_with": fam.ambiguous_with}
    return envelope


def _add_bearing_and_iso(result: dict[str, Any], ind: FrameIndicators, opts: _Options, support: str | None,
                         shaft_hz: float | None) -> None:
    """Defect frequencies (bearing and speed known) and the ISO 20816-3 zone (group and support given)."""
    if opts.bearing is not None and shaft_hz is not None:
        d = defect_frequencies(opts.bearing, shaft_hz)
        result["defect_frequencies_hz"] = {"ftf": d.ftf_hz, "bpfo": d.bpfo_hz, "bpfi": d.bpfi_hz, "bsf": d.bsf_hz,
                                           "2xbsf": 2 * d.bsf_hz}
    if opts.group is not None and support is not None:
        if ind.velocity_rms_mm_s is not None:
            result["iso_zone"] = iso_zone(ind.velocity_rms_mm_s, opts.group, support)
        result["iso_group"] = opts.group
        result["iso_support"] = support
        result["iso_boundaries_mm_s"] = list(zone_boundaries_mm_s(opts.group, support))


def _analyze(args: argparse.Namespace) -> tuple[dict[str, Any], list[str]]:
    warnings: list[str] = []
    opts = _options(args)
    wave = read_waveform(args.file, var=args.var, channel=opts.channel, column=args.column,
                         full_scale=opts.full_scale, fs_var=args.fs_var, rpm_var=args.rpm_var,
                         shaft_hz_var=args.shaft_hz_var)
    if wave.warning:
        warnings.append(wave.warning)
    if wave.note:  # a cut last line the reader dropped
        warnings.append(f"{Path(args.file).name}: {wave.note}")
    fs, fs_source = _sample_rate(args, wave, warnings)
    x_g = _samples_g(args, wave.samples, opts.unit)
    n = int(x_g.size)
    if n and float(np.ptp(x_g)) == 0.0:  # a dead channel or a column that holds no signal
        warnings.append(f"the signal is constant ({float(x_g[0]):g} g in every sample): nothing to analyse; check the "
                        "channel (--channel), column (--column) or variable (--var)")
    orders = (0.5, 1.0, 2.0, 3.0)
    notes: list[str] = []
    speed = _speed(x_g, fs, wave, opts, orders, notes, warnings)
    shaft_hz, source, source_text, est_quality = speed.shaft_hz, speed.source, speed.source_text, speed.quality
    band, band_source, selection = _envelope_band(x_g, fs, opts, speed.range_hz, notes)
    plan = make_plan(fs, n, velocity_band_hz=opts.velocity_band,
                     envelope_band_hz=band if opts.bearing is not None else None, bearing=opts.bearing,
                     speed_range_hz=speed.range_hz, orders=orders, order_tolerance=ORDER_TOLERANCE,
                     false_alarm=opts.alpha, partial=True)
    notes.extend(_known_speed_notes(kernel_for(plan).notes, speed, fs, n))
    ind: FrameIndicators = analyze_frames(x_g, plan, [math.nan if shaft_hz is None else shaft_hz])[0]
    if shaft_hz is None and ind.shaft_hz is not None:  # (the final plan's own estimate; kept consistent)
        shaft_hz, source, source_text = ind.shaft_hz, "estimated", "estimated from the spectrum"
        est_quality = ind.shaft_quality

    frame = FrameResult(point_id="", machine_id="", t_end_ns=0, received_ns=0, fs_hz=fs, indicators=ind,
                        iso_zone=None, samples=x_g.astype(np.float32))
    values = document(frame, "report", {"order": [order_key(o) for o in plan.orders]})  # the registry's report keys
    result: dict[str, Any] = {
        "file": str(args.file),
        "signal": wave.source,
        "unit": opts.unit,
        "fs_hz": fs,
        "fs_source": fs_source or "option --fs",
        "n_samples": n,
        "duration_s": n / fs,
        **values,
        "velocity_band_hz": list(plan.velocity_band_hz),
        "shaft_hz": shaft_hz,
        "shaft_hz_source": source,
        "shaft_hz_quality": est_quality if source == "estimated" else None,
        "shaft_source": source_text,
        "orders": {order_key(o): ind.orders_mm_s.get(order_key(o)) for o in plan.orders},
        "envelope": _envelope_document(ind, values, band, band_source, selection),
        "iso_zone": None,
        "false_alarm": opts.alpha,
        "min_depth": plan.min_depth,
        "notes": notes,
        "warnings": warnings,
    }
    _add_bearing_and_iso(result, ind, opts, args.support, shaft_hz)
    if getattr(args, "report", None) is not None:
        _check_report_path(args.report)
        write_frame_report(args.report, replace(frame, iso_zone=result["iso_zone"]), plan, x_g=x_g,
                           title=Path(result["file"]).name, meta=_report_meta(result, plan, ind),
                           notes=["The record is analysed as one frame.", *notes])
    return result, warnings


def _report_meta(result: dict[str, Any], plan: AnalysisPlan, ind: FrameIndicators) -> dict[str, Any]:
    return {"file": result["file"], "signal": result["signal"], "sample rate (Hz)": result["fs_hz"],
            "samples": result["n_samples"], "duration (s)": result["duration_s"],
            "shaft speed (r/min)": None if ind.shaft_hz is None else ind.shaft_hz * 60,
            "speed from": result["shaft_source"],
            "velocity band (Hz)": "–".join(f"{b:g}" for b in plan.velocity_band_hz),
            "envelope band (Hz)": "–".join(f"{b:g}" for b in plan.envelope_band_hz) if plan.envelope_band_hz
            else "none"}


def _check_report_path(out: Path) -> None:
    if out.is_dir():
        raise InputError(f"--report {out} is a directory; give a file name such as report.html")
    if not out.parent.is_dir():
        raise InputError(f"--report {out}: folder {out.parent} does not exist")


def write_frame_report(out: Path, frame: FrameResult, plan: AnalysisPlan, *, title: str, meta: dict[str, Any],
                       x_g: np.ndarray | None = None, trend: dict[str, Any] | None = None, notes: list[str]) -> None:
    """``--report`` of ``analyze`` and ``replay``: a frame's spectrum, envelope, waveform (of ``x_g``, default its
    samples) and indicators, and a trend when given, in one self-contained HTML file."""
    from edgevib.daemon.web.api import indicator_rows
    from edgevib.daemon.web.report import build_report, write_report
    from edgevib.pipelines.panels import envelope_panel, spectrum_panel, waveform_panel

    x = np.asarray(frame.samples, dtype=np.float64) if x_g is None else x_g
    fs, shaft = frame.fs_hz, frame.indicators.shaft_hz
    rows = [(row["name"], row["value"], row["unit"]) for row in indicator_rows(frame) if row["kind"] != "limit"]
    text = build_report(title=title, meta=meta, indicators=rows, spectrum=spectrum_panel(x, fs, plan, shaft),
                        envelope=envelope_panel(x, fs, plan, shaft), waveform=waveform_panel(x, fs), trend=trend,
                        notes=notes)
    try:
        write_report(out, text)
    except OSError as exc:
        raise InputError(f"cannot write --report {out}: {exc.strerror or exc}") from None


def _fmt(value: float | None, spec: str, unit: str = "") -> str:
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:{spec}}{' ' + unit if unit else ''}"


def _not_detected(f: dict[str, Any], min_depth: float) -> str:
    """Why a family with a local maximum is not detected (the verdict's two tests, edgevib.pipelines.envelope)."""
    snr, thr, depth = f["snr_db"], f["threshold_db"], f["depth"]
    if snr is None or thr is None or not snr >= thr:
        return "not detected (SNR below its threshold)"
    if depth is None or not math.isfinite(depth):
        return "not detected"
    if depth < min_depth:
        return f"not detected (depth below {min_depth:g})"
    sure = depth * (1.0 - DEPTH_NOISE_RMS / math.sqrt(10.0 ** (snr / 10.0)))
    if sure < min_depth:
        return f"not detected (depth below {min_depth:g} once the line's noise is allowed for)"
    return "not detected"


def _family_line(name: str, f: dict[str, Any], min_depth: float) -> str:
    label = FAMILY_LABELS[name]
    head = f"  {label:<6} expected {f['expected_hz']:8.2f} Hz  "
    if f["frequency_hz"] is None:
        return head + "no local maximum within the slip window              not detected"
    verdict = "DETECTED" if f["detected"] else (
        f"ambiguous ({FAMILY_LABELS.get(f['ambiguous_with'], f['ambiguous_with'])} explains the line)"
        if f["ambiguous_with"] else _not_detected(f, min_depth))
    return (head + f"found {f['frequency_hz']:8.2f} Hz  {f['amplitude_g']:.4f} g  SNR {f['snr_db']:5.1f} dB "
            f"(needs {_fmt(f['threshold_db'], '.1f')})  depth {_fmt(f['depth'], '.2f')}  harmonics "
            f"{f['harmonics_found']}  sidebands {f['sidebands_found']}  {verdict}")


# the registry's scalar report keys the text report lays out by hand; any other one is listed after them
_TEXT_LAID_OUT = frozenset({"mean_g", "acceleration_rms_g", "acceleration_peak_g", "acceleration_peak_to_peak_g",
                            "crest_factor", "kurtosis", "skewness", "velocity_rms_mm_s", "velocity_peak_mm_s",
                            "displacement_pp_um", "shaft_hz"})


def _other_indicators(r: dict[str, Any]) -> list[str]:
    """Lines for the registry's scalar indicators of the report that the fixed layout does not show."""
    rows = [(ind, r.get(ind.report)) for ind in REGISTRY
            if ind.per is None and ind.report is not None and ind.report not in _TEXT_LAID_OUT and ind.report in r]
    if not rows:
        return []
    def value(ind: Indicator, v: Any) -> str:
        if v is None or (isinstance(v, int | float) and not isinstance(v, bool)):
            return _fmt(v, ".4g", "" if ind.unit == "1" else ind.unit)
        return str(v)

    return ["other indicators"] + [f"  {ind.report:<17} {value(ind, v)}  ({ind.text()})" for ind, v in rows]


def _text_report(r: dict[str, Any]) -> str:
    lo, hi = r["velocity_band_hz"]
    out = [
        f"{r['file']} ({r['signal']}): {r['n_samples']} samples at {r['fs_hz']:g} Hz = {r['duration_s']:.3f} s, "
        f"unit {r['unit']}",
        "",
        "acceleration (mean removed)",
        f"  mean              {_fmt(r['mean_g'], '.5f', 'g')}",
        f"  r.m.s.            {_fmt(r['acceleration_rms_g'], '.5f', 'g')}",
        f"  peak              {_fmt(r['acceleration_peak_g'], '.4f', 'g')}",
        f"  peak-to-peak      {_fmt(r['acceleration_peak_to_peak_g'], '.4f', 'g')}",
        f"  crest factor      {_fmt(r['crest_factor'], '.3f')}",
        f"  kurtosis          {_fmt(r['kurtosis'], '.3f')}  (Pearson; Gaussian 3)",
        f"  skewness          {_fmt(r['skewness'], '.3f')}",
        f"velocity {lo:g}–{hi:g} Hz",
        f"  r.m.s.            {_fmt(r['velocity_rms_mm_s'], '.4f', 'mm/s')}",
        f"  peak              {_fmt(r['velocity_peak_mm_s'], '.4f', 'mm/s')}",
        f"  displacement p-p  {_fmt(r['displacement_pp_um'], '.3f', 'µm')}",
    ]
    if r["iso_zone"] is not None:
        ab, bc, cd = r["iso_boundaries_mm_s"]
        out.append(f"  ISO 20816-3 zone  {r['iso_zone']}  (group {r['iso_group']}, {r['iso_support']}: "
                   f"A/B {ab:g}, B/C {bc:g}, C/D {cd:g} mm/s)")
    shaft = r["shaft_hz"]
    quality = f", quality {r['shaft_hz_quality']:.2f}" if r["shaft_hz_quality"] is not None else ""
    out.append(f"shaft speed         {_fmt(shaft, '.3f', 'Hz')}"
               + (f" = {shaft * 60:.1f} r/min" if shaft else "") + f"  ({r['shaft_source']}{quality})")
    if shaft and any(v is not None for v in r["orders"].values()):
        out.append("orders (velocity r.m.s.)  " + "  ".join(f"{k} {_fmt(v, '.4f')}" for k, v in r["orders"].items())
                   + " mm/s")
    env = r["envelope"]
    if env["band_hz"] is None:
        out.append("envelope            not computed (no --bearing, or the sample rate cannot carry a band)")
    else:
        out.append(f"envelope {env['band_hz'][0]:g}–{env['band_hz'][1]:g} Hz ({env['band_source']} band; squared "
                   f"envelope for detection, envelope amplitude in g; false alarm {r['false_alarm']:g} per family)")
        found = [n for n in FAMILIES if n in env]
        if not found:
            out.append("  no defect families (needs --bearing and a known shaft speed)")
        for name in found:
            out.append(_family_line(name, env[name], r["min_depth"]))
        if found:
            out.append("  detected: " + (", ".join(FAMILY_LABELS[n] for n in env["detected"]) or "none"))
    out += _other_indicators(r)
    for note in r["notes"]:
        out.append(f"note: {note}")
    out.append("")
    out.append("edgevib advises; judge findings with a qualified analyst and the site's procedures.")
    return "\n".join(out)


def run_analyze(args: argparse.Namespace) -> int:
    try:
        result, warnings = _analyze(args)
    except (InputError, PipelineError) as exc:
        return _fail("analyze", str(exc))
    for w in warnings:
        print(f"edgevib analyze: warning: {w}", file=sys.stderr)
    if args.json:
        print(json.dumps(_clean(result)))
    else:
        print(_text_report(result))
    return 0


# --------------------------------------------------------------------------------------------- bearing


def configure_bearing(parser: argparse.ArgumentParser) -> None:
    _one_line_errors(parser, "bearing")
    parser.description = ("Kinematic defect frequencies of a rolling-element bearing (outer ring stationary). "
                          "A rolling-element defect shows at 2 × BSF.  Diameters in any one unit.")
    parser.add_argument("--elements", metavar="N", required=True, help="number of rolling elements")
    parser.add_argument("--ball-diameter", metavar="D", required=True, help="rolling-element diameter")
    parser.add_argument("--pitch-diameter", metavar="P", required=True, help="pitch diameter (same unit)")
    parser.add_argument("--contact-angle", metavar="DEG", default="0", help="contact angle in degrees (default 0)")
    parser.add_argument("--rpm", metavar="R", required=True, help="shaft speed in r/min")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def run_bearing(args: argparse.Namespace) -> int:
    try:
        try:
            elements = int(args.elements)
        except ValueError:
            raise InputError(f"--elements {args.elements!r} is not an integer") from None
        geometry = validate_geometry(BearingGeometry(
            elements, _number("--ball-diameter", args.ball_diameter),
            _number("--pitch-diameter", args.pitch_diameter), _number("--contact-angle", args.contact_angle)))
        rpm = _rpm(args.rpm)
        assert rpm is not None
        d = defect_frequencies(geometry, rpm / 60.0)
    except (InputError, PipelineError) as exc:
        return _fail("bearing", str(exc))
    fr = d.shaft_hz
    rows = {"ftf": d.ftf_hz, "bpfo": d.bpfo_hz, "bpfi": d.bpfi_hz, "bsf": d.bsf_hz, "2xbsf": 2.0 * d.bsf_hz}
    if args.json:
        doc: dict[str, Any] = {"shaft_hz": fr, "rpm": rpm}
        doc.update({k: {"hz": v, "order": v / fr} for k, v in rows.items()})
        print(json.dumps(doc))
        return 0
    labels = {"ftf": "FTF (cage)", "bpfo": "BPFO (outer race)", "bpfi": "BPFI (inner race)",
              "bsf": "BSF (ball spin)", "2xbsf": "2×BSF (rolling-element defect)"}
    print(f"shaft {fr:.4f} Hz ({rpm:g} r/min); {geometry.elements} elements, d/D = "
          f"{geometry.ball_diameter / geometry.pitch_diameter:.5f}, contact angle {geometry.contact_angle_deg:g}°")
    for key, hz in rows.items():
        print(f"  {labels[key]:<32} {hz:10.3f} Hz   {hz / fr:8.5f} × shaft")
    return 0
