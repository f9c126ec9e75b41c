"""``edgevib replay DIR``: a directory (or glob) of timestamped snapshots run through the daemon's own analysis,
history, trend and projection code, as fast as the CPU allows.

Each file is one snapshot (CSV, WAV, ``.npy``, MATLAB ``.mat``: the readers of ``edgevib analyze``; a file named by
its date and time alone, ``2004.02.12.10.32.39``, is read as a text table).  Its time:

* ``--time-column SPEC`` — from the CSV file's first data row: ``N`` (a column of seconds; values above 10⁹ are
  Unix time, smaller ones count from ``--start``) or ``H,M,S[,US]`` (hour, minute, second and microsecond
  columns of a clock, the date from ``--start``, a new day when the clock goes back);
  without ``--start`` a clock goes on the first file's own date (UTC; from the date in its name, else its
  modification time), never on 1970-01-01;
* ``--interval S`` — the files in name order, S seconds apart; when every name carries a number (``acc_00017``),
  the time is (number − first number) × S, so a thinned-out set keeps its true spacing;
* ``--time-from-name`` — a date and time written in the name: ``20261201T223204Z`` (edgevib's captures and the
  simulator's snapshots), ``2026-12-01T22:32:04``, ``2003.10.22.12.06.24``;
* ``--mtime`` — the files' modification times.

Without any of them: the names' date and time when every name has one, else the modification times.

Every snapshot is analysed like ``analyze`` does with the same options (``--fs``, ``--rpm``, ``--bearing``,
``--column``…), judged running or stopped by the daemon's rule of thumb (velocity r.m.s. above 0.2 mm/s, a given
speed above 60 r/min; a speed recorded in the file decides alone, as a speed tag does), recorded in a history file
(a temporary one unless ``--history FILE``) and, for every trended indicator, assessed like the daemon does
(:func:`edgevib.daemon.trendwatch.evaluate`).  Trended: every indicator with a ``--limit NAME=VALUE``, velocity
r.m.s. when ``--group``/``--support`` give ISO zones, and each ``--indicator NAME``; velocity r.m.s. when none is
given.

``--json`` prints one JSON object per snapshot: ``index``, ``file``, ``time`` (RFC 3339), ``t_s``, ``state``,
``indicators``, ``limits`` (per limit: ``indicator``, ``label``, ``value``, ``status``, ``eta_s``, ``eta_low_s``,
``eta_high_s`` — null when not rising), ``trend`` (per indicator: ``status``, ``need``, ``level``,
``slope_per_day``, ``rising``, ``model``, ``advice``).  Otherwise a progress bar on a terminal and, at the end,
the chart of each trended indicator.  A file that cannot be read is reported on stderr and skipped (counted), and
so is a file whose ``--time-column`` gives no time and a text snapshot whose length differs from the run's most
common one (found on the first 64 snapshots in time order): a cut or partial snapshot is never mixed into the trend
(recordings in WAV, .mat or .npy files are taken at any length: their readers refuse a truncated file).  A
text snapshot whose last line is cut (no line break at its end, unlike the run's other files) loses that line,
with a note.  Exit code 2 when nothing could be replayed or an option is wrong.
"""

from __future__ import annotations

import argparse
import glob
import json
import math
import re
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from edgevib.daemon.history import HistoryReader, HistoryRecorder, HistorySettings
from edgevib.daemon.indicators import INDICATORS, LIMITABLE
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.offline import (
    FORMATS,
    InputError,
    _band,
    _bearing,
    _check_report_path,
    _check_samples,
    _clean,
    _file_rate,
    _full_scale,
    _index,
    _iso_class,
    _number,
    _one_line_errors,
    _positive,
    _rpm,
    _unit,
    read_waveform,
    write_frame_report,
)
from edgevib.daemon.timestamps import rfc3339_utc_s
from edgevib.daemon.trendwatch import (
    HISTORY_INDICATORS,
    evaluate,
    frame_values,
    learn_baseline,
    limit_lines,
    running_state,
)
from edgevib.daemon.waveform_files import read_text_waveform
from edgevib.pipelines.analysis import analyze_frames, default_envelope_band, kernel_for, make_plan
from edgevib.pipelines.conditioning import to_g
from edgevib.pipelines.severity import iso_zone, zone_boundaries_mm_s
from edgevib.pipelines.trend import TrendSpec
from edgevib.pipelines.types import AnalysisPlan, FrameIndicators, PipelineError

__all__ = ["ReplayOptions", "configure_replay", "replay", "run_replay", "snapshot_files", "snapshot_times"]

_BATCH = 64
OnError = Callable[[Path | None, str], None]  # (the file skipped, or None for a note; the message)
_COPY_GAP_S = 0.05  # modification times closer than this (median gap) are copy times, not snapshot times
_NAME_TIMES = (
    (re.compile(r"(\d{4})(\d{2})(\d{2})T(\d{2})(\d{2})(\d{2})(\.\d+)?Z?"), True),
    (re.compile(r"(\d{4})-(\d{2})-(\d{2})[T _](\d{2})[:-](\d{2})[:-](\d{2})(\.\d+)?"), True),
    (re.compile(r"(\d{4})\.(\d{2})\.(\d{2})\.(\d{2})\.(\d{2})\.(\d{2})()"), True),
)


# --------------------------------------------------------------------------------------------- files and times


def snapshot_files(source: str, notes: list[str] | None = None) -> list[Path]:
    """The snapshot files of a directory (its files with a known suffix) or a glob pattern, in natural name
    order (``acc_9`` before ``acc_10``).

    A directory that holds several series of numbered files (``acc_00001.csv`` … beside ``temp_00001.csv`` …:
    names equal but for their numbers) is one recording with side channels: the series with the most files is
    replayed and the others are named in ``notes`` (a glob pattern picks another)."""
    p = Path(source)
    if p.is_dir():
        files = [f for f in p.iterdir() if f.is_file() and _snapshot_name(f)]
        families: dict[str, list[Path]] = {}
        for f in files:
            families.setdefault(_family(f.name), []).append(f)
        if len(families) > 1:
            ranked = sorted(families.items(), key=lambda kv: (-len(kv[1]), kv[0]))
            if len(ranked[0][1]) > max(1, len(ranked[1][1])):
                files = ranked[0][1]
                if notes is not None:
                    others = ", ".join(f"{len(v)} {k}" for k, v in ranked[1:])
                    notes.append(f"{source} holds several series of files; replaying the {len(files)} "
                                 f"{ranked[0][0]} files, leaving out {others} (give a glob pattern to choose)")
    elif any(c in source for c in "*?["):
        files = [Path(f) for f in glob.glob(source) if Path(f).is_file()]
    elif p.exists():
        raise InputError(f"{source} is a file; replay takes a directory or a glob pattern of snapshot files")
    else:
        raise InputError(f"{source}: no such directory")
    files = [f for f in files if _snapshot_name(f)]
    if not files:
        raise InputError(f"{source}: no snapshot files ({', '.join(FORMATS)})")
    return sorted(files, key=_natural_key)


def _snapshot_name(f: Path) -> bool:
    """A snapshot file: a known suffix, or a name that is a date and time and nothing else (a logger's text
    files named ``2004.02.12.10.32.39``, read as text tables)."""
    if f.suffix.lower() in FORMATS:
        return True
    return any(rx.fullmatch(f.name) for rx, _ in _NAME_TIMES)


def _family(name: str) -> str:
    """A file name with every run of digits written ``N`` (``acc_00017.csv`` → ``acc_N.csv``)."""
    return re.sub(r"\d+", "N", name.lower())


def _natural_key(p: Path) -> list[Any]:
    return [int(part) if part.isdigit() else part for part in re.split(r"(\d+)", p.name)]


def _name_time(name: str) -> float | None:
    for rx, _ in _NAME_TIMES:
        m = rx.search(name)
        if m is not None:
            y, mo, d, h, mi, s, frac = m.groups()
            try:
                dt = datetime(int(y), int(mo), int(d), int(h), int(mi), int(s), tzinfo=UTC)
            except ValueError:
                continue
            return dt.timestamp() + (float(frac) if frac else 0.0)
    return None


def _start(text: str) -> float:
    try:
        dt = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise InputError(f"--start {text!r} is not an RFC 3339 / ISO 8601 date or time") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def _first_row(path: Path) -> list[float]:
    """The first row of a CSV file whose fields are all numbers (a header line before it is passed over)."""
    try:
        with path.open("r", encoding="utf-8", errors="replace") as f:
            for line in f:
                text = line.strip()
                if not text or text.startswith("#"):
                    continue
                parts = [x for x in re.split(r"[,;\t ]+", text) if x]
                try:
                    return [float(x) for x in parts]
                except ValueError:
                    continue  # a header line
    except OSError as exc:
        raise InputError(f"cannot read {path.name}: {exc.strerror or exc}") from None
    raise InputError(f"{path.name} holds no numeric row to take the time from")


def _clock_date(files: list[Path], start: str | None) -> tuple[float, str]:
    """Midnight (UTC) of the day a clock without a date is placed on: ``--start``'s (its time as given), else the
    first file's own date — from the date and time in its name, else its modification time — so that snapshots
    land on the day they were recorded, not in 1970."""
    if start is not None:
        return _start(start), f"--start {start}"
    named = _name_time(files[0].name)
    t, why = (named, f"the name of {files[0].name}") if named is not None else \
        (files[0].stat().st_mtime, f"the modification time of {files[0].name}")
    return 86400.0 * math.floor(t / 86400.0), why


# the clock fields of --time-column H,M,S[,US] and their ranges (a leap second allowed)
_CLOCK_FIELDS = (("hour", 0.0, 24.0), ("minute", 0.0, 60.0), ("second", 0.0, 61.0), ("microsecond", 0.0, 1e6))


def _row_time(f: Path, idx: list[int], spec: str) -> list[float]:
    """The time fields ``idx`` of the file's first numeric row, checked (one line naming the problem)."""
    if f.suffix.lower() not in (".csv", ".txt"):
        raise InputError(f"--time-column reads CSV files; {f.name} is not one")
    row = _first_row(f)
    if max(idx) >= len(row):
        raise InputError(f"--time-column {spec} needs {max(idx) + 1} columns; the first row of {f.name} has "
                         f"{len(row)}")
    values = [row[i] for i in idx]
    for i, v in zip(idx, values, strict=True):
        if not math.isfinite(v):
            raise InputError(f"{f.name}: time column {i} holds {v!r}, not a finite number")
    if len(idx) > 1:
        for (name, lo, hi), i, v in zip(_CLOCK_FIELDS, idx, values, strict=False):
            if not lo <= v < hi:
                raise InputError(f"{f.name}: column {i} holds {v:g}, not a clock {name} ({lo:g} to below {hi:g}); "
                                 f"check --time-column {spec}")
    return values


def _column_times(files: list[Path], spec: str, start: str | None, on_error: OnError | None
                  ) -> tuple[list[Path], list[float], str]:
    """``--time-column N`` (seconds: Unix time above 10⁹, else counted from ``--start``) or ``H,M,S[,US]`` (a
    clock: on the date of :func:`_clock_date`, a new day when the clock goes back).  A file whose time cannot be
    read is reported through ``on_error`` and left out (without it, the first such file stops the replay); when
    no file gives a time, :class:`InputError` names the first reason."""
    try:
        idx = [int(c.strip()) for c in spec.split(",")]
    except ValueError:
        idx = []
    if len(idx) not in (1, 3, 4) or min(idx) < 0:
        raise InputError(f"--time-column {spec!r} must be N or H,M,S[,US] (0-based columns)")
    kept: list[Path] = []
    rows: list[list[float]] = []
    first_problem = ""
    for f in files:
        try:
            rows.append(_row_time(f, idx, spec))
        except InputError as exc:
            if on_error is None:
                raise
            first_problem = first_problem or str(exc)
            on_error(f, str(exc))
            continue
        kept.append(f)
    if not kept:
        raise InputError(f"none of the {len(files)} files gives a time in --time-column {spec} (the first: "
                         f"{first_problem})")
    if len(idx) == 1:
        base = 0.0 if start is None else _start(start)
        return kept, [v if v > 1e9 else base + v for v in (row[0] for row in rows)], f"column {spec} of each file"
    midnight, why = _clock_date(kept, start)
    out: list[float] = []
    day = 0.0
    prev = -math.inf
    for row in rows:
        clock = row[0] * 3600 + row[1] * 60 + row[2] + (row[3] * 1e-6 if len(idx) == 4 else 0.0)
        if clock + day < prev - 12 * 3600:  # the clock went back: the next day
            day += 86400.0
        prev = clock + day
        out.append(midnight + prev)
    date = datetime.fromtimestamp(midnight, UTC).strftime("%Y-%m-%d")
    return kept, out, f"the clock in columns {spec} of each file, from {date} (the date of {why})"


def snapshot_times(files: list[Path], *, time_column: str | None = None, interval_s: float | None = None,
                   from_name: bool = False, mtime: bool = False, start: str | None = None,
                   on_error: OnError | None = None) -> tuple[list[Path], list[float], str]:
    """The files that carry a time, each one's time in seconds since the Unix epoch, and a phrase saying where the
    times came from.  With ``--time-column`` a file whose first row gives no time is reported through
    ``on_error(path, message)`` and left out (without ``on_error`` it stops the replay with :class:`InputError`);
    the other ways give every file a time or stop."""
    if time_column is not None:
        return _column_times(files, time_column, start, on_error)
    if interval_s is not None:
        if not (math.isfinite(interval_s) and interval_s > 0):
            raise InputError(f"--interval {interval_s!r} must be > 0 seconds")
        base = 0.0 if start is None else _start(start)
        nums = [re.findall(r"\d+", f.stem) for f in files]
        if all(nums):
            first = int(nums[0][-1])
            return files, [base + (int(n[-1]) - first) * interval_s for n in nums], \
                f"the number in each file name × {interval_s:g} s"
        return files, [base + i * interval_s for i in range(len(files))], f"file name order × {interval_s:g} s"
    named = [_name_time(f.name) for f in files]
    if from_name or (not mtime and all(t is not None for t in named)):
        missing = [f.name for f, t in zip(files, named, strict=True) if t is None]
        if missing:
            raise InputError(f"no date and time in the file name {missing[0]!r} (e.g. 20261201T223204Z)")
        return files, [float(t) for t in named if t is not None], "the date and time in each file name"
    stamps = [f.stat().st_mtime for f in files]
    if not mtime and len(files) >= 3:
        gaps = np.diff(np.sort(np.asarray(stamps)))
        if float(np.median(gaps)) < _COPY_GAP_S:  # written in one go: when they were copied, not recorded
            raise InputError(
                f"the {len(files)} files carry no date and time in their names and their modification times lie "
                f"within {max(stamps) - min(stamps):.3g} s (copied, not recorded, it seems): give the times with "
                "--time-column N|H,M,S[,US] (columns of each CSV file), --interval S (the numbers in the names), "
                "--time-from-name, or --mtime to use the modification times anyway")
    return files, stamps, "file modification times"


# --------------------------------------------------------------------------------------------- options


@dataclass
class ReplayOptions:
    """What ``replay`` needs, checked (the command line fills it; tests build it directly)."""

    fs_hz: float | None = None
    var: str | None = None
    channel: int | None = None
    unit: str = "g"
    full_scale: float = 1.0
    rpm: float | None = None
    bearing: Any = None
    band: tuple[float, float] | None = None
    velocity_band: tuple[float, float] = (10.0, 1000.0)
    group: int | None = None
    support: str | None = None
    limits: dict[str, float] = field(default_factory=dict)
    indicators: list[str] = field(default_factory=list)
    point: str = "replay"
    spec: TrendSpec = field(default_factory=TrendSpec)
    window_s: float | None = None
    run_threshold_velocity_mm_s: float = 0.2
    run_threshold_rpm: float = 60.0
    max_points: int = 500

    def tracked(self) -> list[str]:
        out = list(self.limits) + list(self.indicators)
        if self.group is not None:
            out.append("velocity_rms_mm_s")
        return list(dict.fromkeys(out)) or ["velocity_rms_mm_s"]


def _limit(text: str) -> tuple[str, float]:
    name, sep, value = text.partition("=")
    if not sep:
        raise InputError(f"--limit {text!r} must be NAME=VALUE, e.g. acceleration_peak_g=20")
    name = name.strip()
    if name not in LIMITABLE:
        raise InputError(f"--limit {name!r} is not an indicator (known: {', '.join(LIMITABLE)})")
    return name, _number(f"--limit {name}", value)


def _options(args: argparse.Namespace) -> ReplayOptions:
    o = ReplayOptions()
    o.fs_hz = None if args.fs is None else _positive("--fs", args.fs)
    o.var = args.var
    o.channel = None if args.column is None else _index("--column", args.column)
    o.unit = _unit(args.unit)
    o.full_scale = _full_scale(args.full_scale)
    o.rpm = _rpm(args.rpm)
    o.bearing = _bearing(args.bearing)
    o.band = _band("--band", args.band)
    vb = _band("--velocity-band", args.velocity_band)
    assert vb is not None
    o.velocity_band = vb
    o.group = _iso_class(args.group, args.support)
    o.support = args.support
    o.limits = dict(_limit(x) for x in args.limit or [])
    for name in args.indicator or []:
        if name not in LIMITABLE:
            raise InputError(f"--indicator {name!r} is not an indicator (known: {', '.join(LIMITABLE)})")
        o.indicators.append(name)
    if args.point is not None:
        o.point = args.point
    coverage = _number("--coverage", args.coverage)
    try:
        o.spec = TrendSpec(coverage=coverage, min_points=int(args.min_points), min_span_s=_number(
            "--min-span", args.min_span))
    except (ValueError, PipelineError) as exc:
        raise InputError(str(exc)) from None
    if args.window is not None:
        o.window_s = _positive("--window", args.window, " seconds")
    return o


# --------------------------------------------------------------------------------------------- the replay


def _plan(fs: float, n: int, o: ReplayOptions, shaft_hz: float | None) -> tuple[AnalysisPlan, list[str]]:
    """The analysis plan of ``analyze`` for a record of n samples; a velocity band or speed range finer than the
    record resolves is narrowed to what it does resolve (two lines, make_plan's rule) and said so."""
    notes: list[str] = []
    df = fs / n
    vel = o.velocity_band
    if vel[0] < 2 * df < vel[1]:
        notes.append(f"velocity band {vel[0]:g}–{vel[1]:g} Hz starts at {2 * df:g} Hz: a record of {n} samples at "
                     f"{fs:g} Hz resolves {df:g} Hz")
        vel = (2 * df, vel[1])
    if shaft_hz is None:
        speed = (max(5.0, 2.0 * df), min(100.0, 0.99 * fs / 2 / 3.1))
        if speed[0] >= speed[1]:
            raise InputError(f"records of {n} samples at {fs:g} Hz are too short to estimate a shaft speed; "
                             "give --rpm or longer records")
    else:
        speed = (max(0.5 * shaft_hz, min(2.0 * df, 0.99 * shaft_hz)), 1.5 * shaft_hz)
    band = o.band
    if band is None and o.bearing is not None:
        band = default_envelope_band(fs, None, shaft_hz_max=speed[1])
    try:
        plan = make_plan(fs, n, velocity_band_hz=vel, envelope_band_hz=band, bearing=o.bearing,
                         speed_range_hz=speed)
    except PipelineError as exc:
        if shaft_hz is None:
            raise
        # a given speed too low for the record's resolution: analysed in part, as `analyze` does — the
        # time-domain indicators and what the lines do resolve, the rest left out with the plan's reasons (the
        # speed estimate's not among them: a given speed is used as it is)
        plan = make_plan(fs, n, velocity_band_hz=vel, envelope_band_hz=band, bearing=o.bearing,
                         speed_range_hz=speed, partial=True)
        notes.append(f"{exc}; analysed in part: what the record resolves")
        notes += [str(note) for note in kernel_for(plan).notes if note.group != "speed estimate"]
    return plan, notes


@dataclass
class _Snap:
    index: int
    path: Path
    t_s: float
    x_g: np.ndarray
    fs_hz: float
    rpm: float | None
    text: bool = False  # read from a text table (its samples are rows)
    note: str = ""  # a cut last line dropped by the reader
    unterminated: bool = False  # a text table whose last line has no line break
    written: int = 0  # the samples (rows) the file holds, a cut last line the reader dropped included
    rpm_measured: bool = False  # the speed was recorded in the file (not given with --rpm)

    def __post_init__(self) -> None:
        if not self.written:
            self.written = self.x_g.size + (1 if self.note else 0)


@dataclass(frozen=True)
class _RunShape:
    """What the run's snapshots look like — decided on the first snapshots read, in time order — so that a cut or
    partial snapshot is told apart: the most common length, and whether its text files end with a line break."""

    n_samples: int
    terminated: bool


def _run_shape(snaps: list[_Snap]) -> _RunShape:
    # only text tables can be cut silently (the binary formats' readers refuse a truncated file), and whole
    # recordings (a folder of WAV or .mat files) may differ in length: the length rule is the text snapshots'
    text = [s for s in snaps if s.text]
    counts: dict[int, int] = {}
    for s in text:
        counts[s.written] = counts.get(s.written, 0) + 1
    n = max(counts, key=lambda k: (counts[k], k)) if counts else 0  # the most common; of equals the longer
    return _RunShape(n, 2 * sum(not s.unterminated for s in text) > len(text))


def _check_shape(snaps: list[_Snap], shape: _RunShape, on_error: OnError) -> list[_Snap]:
    """The text snapshots of the run's length (binary recordings of any length); the others are reported and
    skipped, never mixed into the trend.  A text snapshot whose last line was cut (dropped by the reader) or ends
    without the line break the run's other files end with (its last value may be cut) keeps its other rows, with a
    note."""
    kept: list[_Snap] = []
    for s in snaps:
        if s.text and s.written != shape.n_samples:
            cut = ", its last line cut short" if s.note else ""
            on_error(s.path, f"{s.written} rows where the run's snapshots have {shape.n_samples} (the most "
                             f"common length){cut}: a cut or partial snapshot is not mixed into the trend; replay "
                             "snapshots of another length apart (a glob pattern)")
            continue
        if s.note:
            on_error(None, f"{s.path.name}: {s.note} ({s.x_g.size} of {s.written} rows analysed)")
        elif s.text and s.unterminated and shape.terminated and s.x_g.size > 1:
            s.x_g = s.x_g[:-1]
            on_error(None, f"{s.path.name}: ends without a line break, unlike the run's other snapshots: its last "
                           f"line may be cut; dropped ({s.x_g.size} of {s.written} rows analysed)")
        kept.append(s)
    return kept


def _read(index: int, path: Path, t_s: float, o: ReplayOptions) -> _Snap:
    text = path.suffix.lower() in (".csv", ".txt") or path.suffix.lower() not in FORMATS
    if path.suffix.lower() in FORMATS:
        wave = read_waveform(path, var=o.var, channel=o.channel, full_scale=o.full_scale)
    else:  # a time-named text table
        wave = read_text_waveform(path, column=None if o.channel is None else str(o.channel))
    fs = _file_rate(wave, path, o.fs_hz, path.name)
    _check_samples(path.name, wave.samples)
    if wave.rpm_conflict and o.rpm is None:
        raise InputError(f"{wave.rpm_conflict}: give the speed with --rpm R")
    rpm = o.rpm if o.rpm is not None else wave.rpm
    return _Snap(index, path, t_s, to_g(wave.samples, o.unit), fs, rpm, text=text, note=wave.note,
                 unterminated=wave.unterminated, rpm_measured=o.rpm is None and wave.rpm is not None)


def _read_batch(indices: list[int], files: list[Path], times: list[float], o: ReplayOptions,
                on_error: OnError) -> list[_Snap]:
    """The snapshots that can be read (the others reported through ``on_error``)."""
    snaps: list[_Snap] = []
    for i in indices:
        try:
            snaps.append(_read(i, files[i], times[i], o))
        except (InputError, PipelineError) as exc:
            on_error(files[i], str(exc))
    return snaps


def _analyze_batch(snaps: list[_Snap], o: ReplayOptions, plans: dict[tuple[float, int, float | None], AnalysisPlan],
                   noted: set[str], on_error: OnError) -> dict[int, FrameIndicators]:
    """The indicators of each snapshot by index, analysed in groups of one rate, length and speed."""
    groups: dict[tuple[float, int, float | None], list[_Snap]] = {}
    for s in snaps:
        groups.setdefault((s.fs_hz, s.x_g.size, s.rpm), []).append(s)
    results: dict[int, FrameIndicators] = {}
    for key, members in groups.items():
        fs, n, rpm = key
        shaft = None if rpm is None or rpm <= 0 else rpm / 60.0
        try:
            if key not in plans:
                plans[key], notes = _plan(fs, n, o, shaft)
                for note in notes:
                    if note not in noted:
                        noted.add(note)
                        on_error(None, note)
            inds = analyze_frames(np.stack([m.x_g for m in members]), plans[key],
                                  None if shaft is None else np.full(len(members), shaft))
        except (InputError, PipelineError) as exc:
            for m in members:
                on_error(m.path, str(exc))
            continue
        for m, ind in zip(members, inds, strict=True):
            results[m.index] = ind
    return results


def _frame(s: _Snap, ind: FrameIndicators, o: ReplayOptions, iso: tuple[float, float, float] | None) -> FrameResult:
    zone = None
    if iso is not None and o.group is not None and o.support is not None and \
            ind.velocity_rms_mm_s is not None and math.isfinite(ind.velocity_rms_mm_s):
        zone = iso_zone(ind.velocity_rms_mm_s, o.group, o.support)
    return FrameResult(point_id=o.point, machine_id=o.point, t_end_ns=round(s.t_s * 1e9),
                       received_ns=round(s.t_s * 1e9), fs_hz=s.fs_hz, indicators=ind, iso_zone=zone,
                       samples=s.x_g.astype(np.float32))


def replay(files: list[Path], times: list[float], o: ReplayOptions, history_path: Path, *,
           on_error: OnError | None = None) -> Iterator[dict[str, Any]]:
    """Yield one document per snapshot (see the module docstring), in time order.  ``on_error(path, message)``
    is called for a file that is skipped."""
    notify: OnError = on_error or (lambda _path, _message: None)
    order = sorted(range(len(files)), key=lambda i: (times[i], i))
    settings = HistorySettings(file=str(history_path), path=str(history_path), recent_s=120.0,
                               minute_s=3660 * 86400.0, hour_s=3660 * 86400.0, day_s=36600 * 86400.0,
                               max_bytes=1 << 40)
    rec = HistoryRecorder(settings, HISTORY_INDICATORS, durable=False)
    tracked = o.tracked()
    iso = zone_boundaries_mm_s(o.group, o.support) if o.group is not None and o.support is not None else None
    plans: dict[tuple[float, int, float | None], AnalysisPlan] = {}
    noted: set[str] = set()
    baselines: dict[str, tuple[float, float, int]] = {}
    reader: HistoryReader | None = None
    last_docs: tuple[int, dict[str, Any]] | None = None
    shape: _RunShape | None = None
    try:
        for b0 in range(0, len(order), _BATCH):
            snaps = _read_batch(order[b0:b0 + _BATCH], files, times, o, notify)
            if shape is None and snaps:
                shape = _run_shape(snaps)
            if shape is not None:
                snaps = _check_shape(snaps, shape, notify)
            results = _analyze_batch(snaps, o, plans, noted, notify)
            for s in snaps:
                ind = results.get(s.index)
                if ind is None:
                    continue
                r = _frame(s, ind, o, iso)
                state = running_state(ind.velocity_rms_mm_s, ind.shaft_hz, ind.shaft_estimated, o.run_threshold_rpm,
                                      o.run_threshold_velocity_mm_s, speed_measured=s.rpm_measured)
                values = frame_values(r)
                rec.record(o.point, r.t_end_ns, values, state)
                rec.flush()
                if reader is None:
                    reader = HistoryReader(history_path)
                doc = _document(s, r, state, values, tracked, o, iso, reader, baselines)
                doc["_frame"] = (r, plans[(s.fs_hz, s.x_g.size, s.rpm)])  # for --report (the latest snapshot)
                last_docs = (r.t_end_ns, doc["_docs"])
                yield doc
    finally:
        if reader is not None:
            reader.close()
        if last_docs is not None:  # the latest projections, for `edgevib trend --history FILE`
            for name, d in last_docs[1].items():
                rec.write_projection(o.point, name, last_docs[0], _clean(d))
        rec.close()


def _document(s: _Snap, r: FrameResult, state: str, values: np.ndarray, tracked: list[str], o: ReplayOptions,
              iso: tuple[float, float, float] | None, reader: HistoryReader,
              baselines: dict[str, tuple[float, float, int]]) -> dict[str, Any]:
    indicators = {name: (None if not math.isfinite(v) else float(v)) for name, v in
                  zip(HISTORY_INDICATORS, values.tolist(), strict=True)}
    indicators["shaft_hz"] = r.indicators.shaft_hz
    doc: dict[str, Any] = {"index": s.index, "file": s.path.name, "time": rfc3339_utc_s(s.t_s), "t_s": s.t_s,
                           "state": state, "iso_zone": r.iso_zone, "indicators": indicators, "limits": [],
                           "trend": {}}
    for name in tracked:
        base = baselines.get(name)
        t = evaluate(reader, o.point, name, spec=o.spec, window_s=o.window_s, now_s=s.t_s,
                     iso=iso if name == "velocity_rms_mm_s" else None, user_limit=o.limits.get(name),
                     baseline=base, max_points=o.max_points)
        if base is None and t.get("status") == "ok":
            learned = learn_baseline(reader, o.point, name, min_points=o.spec.min_points, max_points=o.max_points)
            if learned is not None:
                baselines[name] = learned
        doc["trend"][name] = {k: t.get(k) for k in ("status", "need", "level", "slope_per_day", "rising", "model",
                                                    "advice", "coverage")}
        for lim in t.get("limits", []):
            doc["limits"].append({"indicator": name, "label": lim["label"], "value": lim["value"],
                                  "status": lim["status"], "eta_s": lim["eta_s"], "eta_low_s": lim["eta_low_s"],
                                  "eta_high_s": lim["eta_high_s"]})
        doc.setdefault("_docs", {})[name] = t
    return doc


# --------------------------------------------------------------------------------------------- command


def configure_replay(parser: argparse.ArgumentParser) -> None:
    _one_line_errors(parser, "replay")
    parser.description = ("Replay a directory (or glob) of timestamped snapshot files (CSV, WAV, .npy, .mat) "
                          "through the daemon's analysis, history, trend and projection, as fast as the CPU allows. "
                          "edgevib advises; it is not a machinery protection system.")
    parser.add_argument("source", metavar="DIR", help="a directory of snapshot files, or a glob pattern (quoted)")
    a = parser.add_argument_group("analysis (as `edgevib analyze`)")
    a.add_argument("--fs", metavar="HZ", help="sample rate (required for .npy, CSV and most .mat files)")
    a.add_argument("--var", metavar="NAME", help="variable of .mat files")
    a.add_argument("--column", "--channel", dest="column", metavar="N", help="column/channel, 0-based (default 0)")
    a.add_argument("--unit", default="g", metavar="g|m/s2", help="unit of the samples (default g)")
    a.add_argument("--full-scale", metavar="X", default="1", help="integer PCM WAV: full scale in --unit")
    a.add_argument("--rpm", metavar="R", help="shaft speed in r/min (default: from the files, else estimated)")
    a.add_argument("--bearing", metavar="ELEMENTS,BALL_D,PITCH_D,ANGLE_DEG", help="bearing for the envelope families")
    a.add_argument("--band", metavar="LO:HI", help="envelope demodulation band in Hz")
    a.add_argument("--velocity-band", metavar="LO:HI", default="10:1000", help="velocity band in Hz (default "
                   "10:1000; narrowed to what short snapshots resolve)")
    a.add_argument("--group", metavar="1|2", help="ISO 20816-3 machine group (its zone boundaries become limits)")
    a.add_argument("--support", metavar="rigid|flexible", help="ISO 20816-3 support")
    t = parser.add_argument_group("time of each snapshot (default: the date and time in the names, else mtime)")
    w = t.add_mutually_exclusive_group()
    w.add_argument("--time-column", metavar="N|H,M,S[,US]", help="from the first row of each CSV file")
    w.add_argument("--interval", metavar="S", help="file name order, S seconds apart (the number in the names)")
    w.add_argument("--time-from-name", action="store_true", help="a date and time in each file name")
    w.add_argument("--mtime", action="store_true", help="the files' modification times")
    t.add_argument("--start", metavar="TIME", help="date/time that relative times count from (RFC 3339; default "
                   "1970-01-01T00:00:00Z, but a clock column H,M,S goes on the first file's date: from its name, "
                   "else its modification time)")
    p = parser.add_argument_group("trend and projection")
    p.add_argument("--limit", action="append", metavar="NAME=VALUE", help="an absolute limit, e.g. "
                   "acceleration_peak_g=20 (repeatable)")
    p.add_argument("--indicator", action="append", metavar="NAME", help="also trend this indicator (repeatable)")
    p.add_argument("--window", metavar="S", help="trend window in seconds (default: all history)")
    p.add_argument("--coverage", default="0.8", metavar="C", help="stated coverage of the intervals (default 0.8)")
    p.add_argument("--min-points", default="12", metavar="N", help="least running values for a trend (default 12)")
    p.add_argument("--min-span", default="0", metavar="S", help="least history in seconds (default 0)")
    p.add_argument("--point", metavar="NAME", help="point name in the history (default: the directory's name)")
    p.add_argument("--history", metavar="FILE", help="keep the history in FILE (then `edgevib trend --history "
                   "FILE`); default: a temporary file")
    parser.add_argument("--json", action="store_true", help="one JSON object per snapshot")
    parser.add_argument("--report", metavar="OUT.html", help="also write a self-contained HTML report: the latest "
                        "snapshot's spectrum, envelope, waveform and indicators, and the trend with its projection")


class _Progress:
    def __init__(self, total: int) -> None:
        self.total = total
        self.on = sys.stderr.isatty()
        self.t0 = time.monotonic()
        self.last = 0.0

    def update(self, done: int) -> None:
        now = time.monotonic()
        if not self.on or (now - self.last < 0.1 and done < self.total):
            return
        self.last = now
        width = 30
        filled = round(width * done / max(self.total, 1))
        rate = done / max(now - self.t0, 1e-9)
        sys.stderr.write(f"\rreplay {done:>6}/{self.total} [{'#' * filled}{'.' * (width - filled)}] "
                         f"{100 * done / max(self.total, 1):5.1f} %  {rate:6.1f} snapshots/s")
        sys.stderr.flush()

    def close(self) -> None:
        if self.on:
            sys.stderr.write("\n")


def run_replay(args: argparse.Namespace) -> int:
    try:
        return _run(args)
    except (InputError, PipelineError) as exc:
        print(f"edgevib replay: {exc}", file=sys.stderr)
        return 2


def _run(args: argparse.Namespace) -> int:
    o = _options(args)
    listing: list[str] = []
    files = snapshot_files(args.source, listing)
    for note in listing:
        print(f"edgevib replay: note: {note}", file=sys.stderr)
    interval = None if args.interval is None else _number("--interval", args.interval)
    skipped = 0

    def on_error(path: Path | None, message: str) -> None:
        nonlocal skipped
        if path is not None:
            skipped += 1
            print(f"edgevib replay: skipped {path.name}: {message}", file=sys.stderr)
        else:
            print(f"edgevib replay: note: {message}", file=sys.stderr)

    listed = len(files)
    files, times, how = snapshot_times(files, time_column=args.time_column, interval_s=interval,
                                       from_name=args.time_from_name, mtime=args.mtime, start=args.start,
                                       on_error=on_error)
    if args.point is None:
        src = Path(args.source)
        o.point = re.sub(r"[^A-Za-z0-9_-]", "_", (src if src.is_dir() else src.parent).resolve().name) or "replay"

    tmp = None
    if args.history:
        history = Path(args.history)
        if history.exists():
            raise InputError(f"--history {history} exists; give a new file")
    else:
        tmp = tempfile.TemporaryDirectory(prefix="edgevib-replay-")
        history = Path(tmp.name) / "history.sqlite"
    if not args.json:
        print(f"replaying {len(files)} snapshots of {args.source} as point {o.point}; times from {how}",
              file=sys.stderr)
    progress = _Progress(listed)
    last: dict[str, Any] | None = None
    done = 0
    try:
        report = Path(args.report) if getattr(args, "report", None) else None
        if report is not None:
            _check_report_path(report)
        frame = None
        for doc in replay(files, times, o, history, on_error=on_error):
            docs = doc.pop("_docs", {})
            frame = doc.pop("_frame", None)
            if args.json:
                print(json.dumps(_clean(doc), allow_nan=False), flush=False)
            last = {**doc, "_docs": docs}
            done += 1
            progress.update(done + skipped)
        progress.close()
        if done == 0:
            raise InputError(f"none of the {listed} files could be replayed")
        if not args.json and last is not None:
            _summary(last, history, o, done, skipped)
        if report is not None and last is not None and frame is not None:
            _report(report, last, frame, history, o, done)
    finally:
        sys.stdout.flush()
        if tmp is not None:
            tmp.cleanup()
    return 0


def _summary(last: dict[str, Any], history: Path, o: ReplayOptions, done: int, skipped: int) -> None:
    from edgevib.daemon.trendchart import render_chart, terminal_width

    width = min(120, max(60, terminal_width()))
    print(f"{done} snapshots replayed" + (f", {skipped} skipped" if skipped else "") + f"; last at {last['time']}")
    with HistoryReader(history) as r:
        for name, doc in last.get("_docs", {}).items():
            series = r.series(o.point, name, max_points=2 * width)
            print()
            print(render_chart(series, doc, width=width))
    unit_note = ", ".join(f"{k} in {INDICATORS[k].unit}" for k in o.tracked() if k in INDICATORS)
    print(f"\n({unit_note}; edgevib advises: judge findings with a qualified analyst and the site's procedures)")


def _report(out: Path, last: dict[str, Any], frame: tuple[FrameResult, AnalysisPlan], history: Path,
            o: ReplayOptions, done: int) -> None:
    """``--report``: the latest snapshot's panels and the trend of the first tracked indicator with its projection
    (:mod:`edgevib.daemon.web.report`)."""
    from edgevib.daemon.web.trend_source import projection_curve

    r, plan = frame
    shaft = r.indicators.shaft_hz
    trend = None
    name = next(iter(last.get("_docs", {})), None)
    if name is not None:
        doc = last["_docs"][name]
        with HistoryReader(history) as reader:
            series = reader.series(o.point, name, max_points=2000)
        labelled = {lim["label"]: lim["value"] for lim in doc.get("limits", [])}
        alert = next((labelled[k] for k in ("alert", "limit", "zone C") if k in labelled), None)
        danger = next((labelled[k] for k in ("danger", "zone D") if k in labelled), None)
        trend = {"indicator": name, "unit": INDICATORS[name].unit if name in INDICATORS else "",
                 "t_s": series.stamp_s.tolist(), "values": series.value,
                 "limits": {"indicator": name, "alert": alert, "danger": danger, "all": doc.get("limits", [])},
                 "limit_lines": _limit_lines(o, name), "projection": projection_curve(doc), "trend": doc,
                 # the page adds the advice text after the source
                 "source": f"{done} replayed snapshots" + ("" if doc.get("advice_text") else f"; {doc.get('status')}")}
    meta = {"point": o.point, "snapshots": done, "latest snapshot": f"{last['file']} at {last['time']}",
            "sample rate (Hz)": r.fs_hz, "samples": int(np.asarray(r.samples).size),
            "shaft speed (r/min)": None if shaft is None else shaft * 60, "machine state": last.get("state")}
    write_frame_report(out, r, plan, title=f"{o.point} replay", meta=meta, trend=trend,
                       notes=["Spectrum, envelope and waveform: the latest snapshot.",
                              "Trend and projection: every replayed snapshot."])


def _limit_lines(o: ReplayOptions, name: str) -> list[dict[str, Any]]:
    """The report's limit lines of a series: the ISO 20816-3 zone boundaries (velocity r.m.s., with ``--group`` and
    ``--support``) and the ``--limit`` value."""
    iso = None
    if name == "velocity_rms_mm_s" and o.group is not None and o.support is not None:
        iso = zone_boundaries_mm_s(o.group, o.support)
    return limit_lines(INDICATORS[name].unit if name in INDICATORS else "", iso=iso, user=o.limits.get(name))
