"""Offline subcommands: ``edgevib analyze FILE`` (a recorded waveform) and ``edgevib bearing`` (defect frequencies).

Readers (all return one channel as float64 plus the sample rate when the file carries one):

* WAV (``scipy.io.wavfile``): rate from the header; float samples are taken as they are (in ``--unit``), integer
  PCM is scaled to ±1 full scale (``--full-scale`` gives what full scale means in ``--unit``); a multichannel file
  gives its first channel or ``--channel N``.
* ``.npy``: a 1-D array, or a 2-D one whose longer axis is time (``--channel`` picks the other); ``--fs`` required.
* CSV / text: one column per channel, comma, semicolon, tab or blank separated, an optional header line;
  ``--fs`` required.
* MATLAB ``.mat`` (v4–v7, ``scipy.io.loadmat``): ``--var NAME``, or else the one ``*_DE_time`` variable, or the
  one numeric vector in the file; a scalar ``*RPM`` variable gives the shaft speed when ``--rpm`` is not given;
  ``--fs`` required unless the file holds a scalar ``fs``/``Fs``/``fs_hz``/``sample_rate``.

Bad input prints one line on stderr naming the problem and exits with code 2; nothing prints a traceback.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import numpy.typing as npt

from edgevib.daemon.indicators import document
from edgevib.daemon.interfaces import FrameResult
from edgevib.pipelines.analysis import FAMILIES, default_envelope_band, make_plan, order_key
from edgevib.pipelines.analysis import analyze_frames as _analyze_frames
from edgevib.pipelines.bearings import defect_frequencies, validate_geometry
from edgevib.pipelines.conditioning import to_g
from edgevib.pipelines.severity import iso_zone, zone_boundaries_mm_s
from edgevib.pipelines.types import BearingGeometry, FrameIndicators, PipelineError

__all__ = ["InputError", "configure_analyze", "configure_bearing", "read_waveform", "run_analyze", "run_bearing"]

FORMATS = (".wav", ".npy", ".csv", ".txt", ".mat")
_FS_NAMES = ("fs", "Fs", "FS", "fs_hz", "sample_rate", "sampling_rate", "samplerate")


class InputError(Exception):
    """Bad input to an offline subcommand (the message is the one line shown)."""


@dataclass(frozen=True, slots=True)
class Waveform:
    """One channel read from a file; ``fs_hz``/``rpm`` are None when the file does not carry them."""

    samples: npt.NDArray[np.float64]
    fs_hz: float | None
    rpm: float | None = None
    source: str = ""  # what was read, e.g. "variable X130_DE_time" or "channel 0 of 2"
    rpm_source: str = ""


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
    if text is None:
        return None
    rpm = _number("--rpm", text)
    if rpm <= 0:
        raise InputError(f"--rpm {text} must be > 0 (a shaft speed in revolutions per minute)")
    return rpm


# --------------------------------------------------------------------------------------------- readers


def _pick_column(data: npt.NDArray[Any], channel: int | None, what: str) -> tuple[npt.NDArray[Any], str]:
    """``data`` is (samples,) or (samples, channels)."""
    if data.ndim == 1:
        if channel not in (None, 0):
            raise InputError(f"{what} has 1 channel; --channel {channel} does not exist")
        return data, "channel 0 of 1"
    if data.ndim != 2:
        raise InputError(f"{what} has {data.ndim} dimensions; expected samples or samples × channels")
    ch = 0 if channel is None else channel
    if not 0 <= ch < data.shape[1]:
        raise InputError(f"{what} has {data.shape[1]} channels; --channel {ch} does not exist (0-based)")
    return data[:, ch], f"channel {ch} of {data.shape[1]}"


def _read_wav(path: Path, channel: int | None, full_scale: float) -> Waveform:
    from scipy.io import wavfile

    try:
        rate, data = wavfile.read(path)
    except Exception as exc:  # scipy raises ValueError, struct.error, EOFError… on malformed files
        raise InputError(f"cannot read {path} as WAV: {exc}") from None
    x, which = _pick_column(np.asarray(data), channel, f"WAV file {path}")
    if x.dtype.kind == "f":
        samples = x.astype(np.float64)
    elif x.dtype == np.uint8:
        samples = (x.astype(np.float64) - 128.0) / 128.0 * full_scale
    elif x.dtype.kind == "i":
        samples = x.astype(np.float64) / float(2 ** (8 * x.dtype.itemsize - 1)) * full_scale
    else:
        raise InputError(f"WAV file {path} holds {x.dtype} samples; expected float or integer PCM")
    return Waveform(samples, float(rate), source=which)


def _read_npy(path: Path, channel: int | None) -> Waveform:
    try:
        data = np.load(path, allow_pickle=False)
    except Exception as exc:  # ValueError for pickled objects, OSError/EOFError for truncated files
        raise InputError(f"cannot read {path} as .npy: {exc}") from None
    if not isinstance(data, np.ndarray) or data.dtype.kind not in "iuf":
        raise InputError(f"{path} does not hold a numeric array")
    if data.ndim == 2 and data.shape[0] < data.shape[1]:
        data = data.T  # the longer axis is time
    x, which = _pick_column(data, channel, f".npy file {path}")
    return Waveform(x.astype(np.float64), None, source=which)


def _read_csv(path: Path, channel: int | None) -> Waveform:
    try:
        text = path.read_text(encoding="utf-8", errors="strict")
    except UnicodeDecodeError:
        raise InputError(f"{path} is not a UTF-8 text (CSV) file") from None
    lines = [ln.strip() for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"CSV file {path} holds no data")
    delimiter: str | None = None
    sample = lines[:5] + lines[-1:]
    for cand in (",", ";", "\t"):
        if any(cand in ln for ln in sample):
            delimiter = cand
            break

    def parse(line: str) -> list[float]:
        fields = line.split(delimiter) if delimiter else line.split()
        return [float(f) for f in fields if f.strip() != ""]

    rows: list[list[float]] = []
    for i, line in enumerate(lines):
        try:
            rows.append(parse(line))
        except ValueError:
            if i == 0:
                continue  # a header line
            raise InputError(f"CSV file {path}: line {i + 1} is not numeric: {line[:60]!r}") from None
    if not rows:
        raise InputError(f"CSV file {path} holds no numeric rows")
    width = len(rows[0])
    bad = next((i for i, r in enumerate(rows) if len(r) != width), None)
    if bad is not None:
        raise InputError(f"CSV file {path}: row {bad + 1} has {len(rows[bad])} columns, the first has {width}")
    data = np.asarray(rows, dtype=np.float64)
    x, which = _pick_column(data if width > 1 else data[:, 0], channel, f"CSV file {path}")
    return Waveform(x, None, source=which)


def _read_mat(path: Path, var: str | None, channel: int | None) -> Waveform:
    from scipy.io import loadmat

    try:
        mat = loadmat(path)
    except NotImplementedError:
        raise InputError(f"{path} is a MATLAB v7.3 (HDF5) file; save it with -v7 or export the signal as .npy") \
            from None
    except Exception as exc:  # malformed files raise ValueError, TypeError, struct errors…
        raise InputError(f"cannot read {path} as a MATLAB .mat file: {exc}") from None
    variables = {k: v for k, v in mat.items() if not k.startswith("__")}
    numeric = {k: np.asarray(v) for k, v in variables.items()
               if isinstance(v, np.ndarray) and v.dtype.kind in "iuf"}
    listing = ", ".join(f"{k} {tuple(np.shape(v))}" for k, v in variables.items()) or "none"
    if var is not None:
        if var not in variables:
            raise InputError(f"{path} has no variable {var!r}; variables: {listing}")
        if var not in numeric:
            raise InputError(f"variable {var!r} in {path} is not a numeric array")
        name = var
    else:
        vectors = [k for k, v in numeric.items() if v.size > 1 and sum(d > 1 for d in v.shape) == 1]
        de = [k for k in vectors if k.endswith("_DE_time")]
        if len(de) == 1:
            name = de[0]
        elif len(vectors) == 1:
            name = vectors[0]
        else:
            raise InputError(f"{path}: choose the signal with --var NAME; variables: {listing}")
    data = numeric[name]
    if sum(d > 1 for d in data.shape) <= 1:
        data = data.reshape(-1)
    elif data.ndim == 2 and data.shape[0] < data.shape[1]:
        data = data.T
    x, which = _pick_column(data, channel, f"variable {name!r}")
    fs = None
    for fs_name in _FS_NAMES:
        if fs_name in numeric and numeric[fs_name].size == 1:
            fs = float(numeric[fs_name].reshape(-1)[0])
            break
    rpm, rpm_source = None, ""
    rpm_vars = [k for k, v in numeric.items() if k.upper().endswith("RPM") and v.size == 1]
    if len(rpm_vars) == 1:
        rpm, rpm_source = float(numeric[rpm_vars[0]].reshape(-1)[0]), f"file variable {rpm_vars[0]}"
    source = f"variable {name}" + ("" if which.endswith("of 1") else f", {which}")
    return Waveform(x.astype(np.float64), fs, rpm=rpm, source=source, rpm_source=rpm_source)


def read_waveform(path: Path, *, var: str | None = None, channel: int | None = None,
                  full_scale: float = 1.0) -> Waveform:
    """Read one channel of a recorded waveform (see the module docstring for the formats)."""
    if not path.exists():
        raise InputError(f"file {path} not found")
    if path.is_dir():
        raise InputError(f"{path} is a directory, not a waveform file")
    suffix = path.suffix.lower()
    if suffix not in FORMATS:
        raise InputError(f"unknown format {suffix or '(no extension)'!r} of {path}; expected one of "
                         f"{', '.join(FORMATS)}")
    if var is not None and suffix != ".mat":
        raise InputError("--var applies to MATLAB .mat files only")
    try:
        with path.open("rb"):
            pass
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror or exc}") from None
    if suffix == ".wav":
        return _read_wav(path, channel, full_scale)
    if suffix == ".npy":
        return _read_npy(path, channel)
    if suffix == ".mat":
        return _read_mat(path, var, channel)
    return _read_csv(path, channel)


# --------------------------------------------------------------------------------------------- analyze


def configure_analyze(parser: argparse.ArgumentParser) -> None:
    _one_line_errors(parser, "analyze")
    parser.description = ("Analyse a recorded waveform (WAV, .npy, CSV, MATLAB .mat) as one frame: time-domain "
                          "indicators, velocity r.m.s. (ISO 20816 band), orders, envelope defect families and the "
                          "ISO 20816-3 zone.  edgevib advises; it is not a machinery protection system.")
    parser.add_argument("file", metavar="FILE", type=Path, help="the waveform file")
    parser.add_argument("--fs", metavar="HZ", help="sample rate (required for .npy, CSV and most .mat files)")
    parser.add_argument("--var", metavar="NAME", help="variable of a .mat file (default: the one *_DE_time or "
                                                      "the only numeric vector)")
    parser.add_argument("--channel", metavar="N", help="channel/column to analyse, 0-based (default 0)")
    parser.add_argument("--unit", default="g", metavar="g|m/s2", help="unit of the samples (default g)")
    parser.add_argument("--full-scale", metavar="X", default="1",
                        help="for integer PCM WAV: the value, in --unit, of digital full scale (default 1)")
    parser.add_argument("--rpm", metavar="R", help="shaft speed in r/min (default: from the file, else estimated)")
    parser.add_argument("--bearing", metavar="ELEMENTS,BALL_D,PITCH_D,ANGLE_DEG",
                        help="rolling-element bearing for the envelope families, e.g. 9,7.94,39.04,0")
    parser.add_argument("--band", metavar="LO:HI", help="envelope demodulation band in Hz (default: from fs)")
    parser.add_argument("--velocity-band", metavar="LO:HI", default="10:1000",
                        help="velocity r.m.s. band in Hz (default 10:1000; 2:1000 below 600 r/min)")
    parser.add_argument("--group", metavar="1|2", help="ISO 20816-3 machine group (1: > 300 kW, 2: 15–300 kW)")
    parser.add_argument("--support", metavar="rigid|flexible", help="ISO 20816-3 support")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def _fail(command: str, message: str) -> int:
    print(f"edgevib {command}: {message}", file=sys.stderr)
    return 2


def _clean(value: Any) -> Any:
    """JSON-safe: NaN/Inf → None, tuples → lists, numpy scalars → floats."""
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, float | np.floating):
        f = float(value)
        return f if math.isfinite(f) else None
    return value


def _analyze(args: argparse.Namespace) -> dict[str, Any]:
    unit = args.unit
    if unit not in ("g", "m/s2"):
        raise InputError(f"--unit {unit!r} must be g or m/s2")
    channel = None
    if args.channel is not None:
        try:
            channel = int(args.channel)
        except ValueError:
            raise InputError(f"--channel {args.channel!r} is not an integer") from None
        if channel < 0:
            raise InputError(f"--channel {channel} must be ≥ 0")
    full_scale = _number("--full-scale", args.full_scale)
    if full_scale <= 0:
        raise InputError(f"--full-scale {args.full_scale} must be > 0")
    group = None
    if args.group is not None:
        if args.group not in ("1", "2"):
            raise InputError(f"--group {args.group!r} must be 1 or 2")
        group = int(args.group)
    if args.support is not None and args.support not in ("rigid", "flexible"):
        raise InputError(f"--support {args.support!r} must be rigid or flexible")
    if (group is None) != (args.support is None):
        raise InputError("--group and --support go together (both are needed for the ISO 20816-3 zone)")
    rpm_opt = _rpm(args.rpm)
    bearing = _bearing(args.bearing)
    band = _band("--band", args.band)
    vel_band = _band("--velocity-band", args.velocity_band)
    assert vel_band is not None

    wave = read_waveform(args.file, var=args.var, channel=channel, full_scale=full_scale)
    if args.fs is not None:
        fs = _number("--fs", args.fs)
        if fs <= 0:
            raise InputError(f"--fs {args.fs} must be > 0")
        if wave.fs_hz is not None and args.file.suffix.lower() == ".wav" and abs(fs - wave.fs_hz) > 1e-9 * fs:
            raise InputError(f"--fs {fs:g} Hz contradicts the WAV header's {wave.fs_hz:g} Hz")
    elif wave.fs_hz is not None:
        fs = wave.fs_hz
    else:
        raise InputError(f"{args.file} does not carry a sample rate: give --fs HZ")
    if not math.isfinite(fs) or fs <= 0:
        raise InputError(f"sample rate {fs!r} Hz must be finite and > 0")
    x = wave.samples
    if x.size == 0:
        raise InputError(f"{args.file} holds no samples")
    bad = int(np.count_nonzero(~np.isfinite(x)))
    if bad:
        raise InputError(f"{args.file}: {bad} of {x.size} samples are NaN or infinite")
    x_g = to_g(x, unit)

    rpm, shaft_source = rpm_opt, "option --rpm"
    if rpm is None and wave.rpm is not None:
        if not math.isfinite(wave.rpm) or wave.rpm <= 0:
            raise InputError(f"{wave.rpm_source} holds an impossible speed {wave.rpm:g} r/min; give --rpm")
        rpm, shaft_source = wave.rpm, wave.rpm_source
    shaft_hz = None if rpm is None else rpm / 60.0
    if shaft_hz is None:
        # estimate within 5–100 Hz (300–6000 r/min), narrowed to what the record resolves and its rate carries
        speed_range = (max(5.0, 2.0 * fs / x_g.size), min(100.0, 0.99 * fs / 2 / 3.1))
        if speed_range[0] >= speed_range[1]:
            raise InputError(f"record of {x_g.size} samples at {fs:g} Hz is too short to estimate a shaft speed; "
                             "give --rpm or a longer record")
    else:
        speed_range = (0.5 * shaft_hz, 1.5 * shaft_hz)
    if band is None and bearing is not None:
        band = default_envelope_band(fs, None, shaft_hz_max=speed_range[1])
    plan = make_plan(fs, int(x_g.size), velocity_band_hz=vel_band, envelope_band_hz=band, bearing=bearing,
                     speed_range_hz=speed_range)
    ind: FrameIndicators = _analyze_frames(x_g, plan, None if shaft_hz is None else [shaft_hz])[0]
    if ind.shaft_hz is None:
        shaft_source = "not determined"
    elif ind.shaft_estimated:
        shaft_source = "estimated from the spectrum"

    frame = FrameResult(point_id="", machine_id="", t_end_ns=0, received_ns=0, fs_hz=fs, indicators=ind,
                        iso_zone=None, samples=x_g.astype(np.float32))
    values = document(frame, "report", {"order": [order_key(o) for o in plan.orders]})  # the registry's report keys
    result: dict[str, Any] = {
        "file": str(args.file), "signal": wave.source, "unit": unit, "fs_hz": fs, "n_samples": int(x_g.size),
        "duration_s": x_g.size / fs, "velocity_band_hz": list(plan.velocity_band_hz), "shaft_source": shaft_source,
        **values,
        "envelope": {"band_hz": list(plan.envelope_band_hz) if plan.envelope_band_hz else None,
                     **(values.get("envelope") or {})},
        "iso_zone": None,
    }
    if bearing is not None and ind.shaft_hz is not None:
        d = defect_frequencies(bearing, ind.shaft_hz)
        result["defect_frequencies_hz"] = {"ftf": d.ftf_hz, "bpfo": d.bpfo_hz, "bpfi": d.bpfi_hz, "bsf": d.bsf_hz,
                                           "2xbsf": 2 * d.bsf_hz}
    if group is not None and args.support is not None:
        result["iso_zone"] = iso_zone(ind.velocity_rms_mm_s, group, args.support)
        result["iso_group"] = group
        result["iso_support"] = args.support
        result["iso_boundaries_mm_s"] = list(zone_boundaries_mm_s(group, args.support))
    return result


def _fmt(value: float | None, spec: str, unit: str = "") -> str:
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:{spec}}{' ' + unit if unit else ''}"


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
    out.append(f"shaft speed         {_fmt(shaft, '.3f', 'Hz')}"
               + (f" = {shaft * 60:.1f} r/min" if shaft else "") + f"  ({r['shaft_source']})")
    if shaft:
        out.append("orders (velocity r.m.s.)  " + "  ".join(f"{k} {_fmt(v, '.4f')}" for k, v in r["orders"].items())
                   + " mm/s")
    env = r["envelope"]
    if env["band_hz"] is None:
        out.append("envelope            not computed (no --bearing, or the sample rate cannot carry a band)")
    else:
        out.append(f"envelope {env['band_hz'][0]:g}–{env['band_hz'][1]:g} Hz (amplitude of the envelope spectrum)")
        found = [n for n in FAMILIES if n in env]
        if not found:
            out.append("  no defect families (needs --bearing and a known shaft speed)")
        for name in found:
            f = env[name]
            label = "2xBSF" if name == "bsf" else name.upper()
            out.append(f"  {label:<6} expected {f['expected_hz']:8.2f} Hz  found {f['frequency_hz']:8.2f} Hz  "
                       f"{f['amplitude_g']:.4f} g  SNR {f['snr_db']:5.1f} dB  harmonics {f['harmonics_found']}")
    out.append("")
    out.append("edgevib advises; judge findings with a qualified analyst and the site's procedures.")
    return "\n".join(out)


def run_analyze(args: argparse.Namespace) -> int:
    try:
        result = _analyze(args)
    except (InputError, PipelineError) as exc:
        return _fail("analyze", str(exc))
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
