"""Readers of recorded waveforms for ``edgevib analyze``: WAV, ``.npy``, CSV/text and MATLAB ``.mat`` files.

Every reader returns one channel as float64 with what the file says about it (sample rate, shaft speed, where
they came from); every problem raises :class:`InputError` with one line naming it.

* **WAV** (``scipy.io.wavfile``): rate from the header; float samples are taken as they are (in ``--unit``),
  integer PCM is scaled to ±1 full scale times ``full_scale``; a multichannel file gives ``channel`` (default 0).
* **.npy**: a 1-D array, or a 2-D one whose longer axis is time (``channel`` picks the other).
* **CSV / text**: comma, semicolon, tab or blank separated; ``#`` comment lines skipped.  A first row that is not
  numeric is a **header** (column names).  ``column`` chooses the signal by name or 0-based index; without it the
  signal is the first column that is neither constant nor monotonic — a time stamp, sample counter or clock field
  is never taken as the signal silently: when no column qualifies, the error lists the columns.
* **MATLAB .mat** (v4–v7, ``scipy.io.loadmat``): ``var`` names the signal, with dots into structs and MATLAB
  indices into struct arrays (``rec.Y(7).Data``); without it, the one ``*_DE_time`` variable, or else the one
  numeric vector in the file (struct fields included).  The sample rate comes from ``fs_var`` (a dotted path), or
  else by convention from a scalar named ``fs``, ``Fs``, ``FS``, ``fs_hz``, ``sr``, ``sample_rate``,
  ``sampling_rate`` or ``samplerate`` beside the signal (in the same struct), in a struct above it, or at the top
  level.  The shaft speed
  comes from ``rpm_var`` (r/min) or ``shaft_hz_var`` (Hz), or else by convention from the scalar whose name ends
  in ``RPM``/``rpm`` found the same way; of several in one place, the first by name when they agree within
  0.1 % (the source names the others), none when they disagree (``rpm_conflict`` names them, and the caller asks
  for the speed).  MATLAB v7.3 (HDF5) files are refused with a hint.
"""

from __future__ import annotations

import csv
import io
import math
import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = ["FORMATS", "InputError", "Waveform", "read_text_waveform", "read_waveform"]

FORMATS = (".wav", ".npy", ".csv", ".txt", ".mat")
FS_NAMES = ("fs", "Fs", "FS", "fs_hz", "sr", "sample_rate", "sampling_rate", "samplerate")
_PATH_PART = re.compile(r"^([A-Za-z_]\w*)(?:\((\d+)\))?$")
_LISTED = 40  # at most this many variables in an error message


class InputError(Exception):
    """Bad input to an offline subcommand (the message is the one line shown)."""


@dataclass(frozen=True, slots=True)
class Waveform:
    """One channel read from a file; ``fs_hz``/``rpm`` are None when the file does not carry them."""

    samples: npt.NDArray[np.float64]
    fs_hz: float | None
    rpm: float | None = None
    source: str = ""  # what was read, e.g. "variable X130_DE_time" or "column 4 of 6"
    rpm_source: str = ""  # where the speed came from, e.g. "file variable X130RPM"
    fs_source: str = ""  # where the sample rate came from
    warning: str = ""  # one line on a doubtful choice the caller made, e.g. a monotonic column chosen explicitly
    note: str = ""  # one line on what was left out of the file, e.g. a cut last line of a CSV file
    unterminated: bool = False  # a text file whose last line has no line break (it may be cut short)
    rpm_conflict: str = ""  # speed variables of the file that disagree (then ``rpm`` is None): one line naming them


# --------------------------------------------------------------------------------------------- shared


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


# --------------------------------------------------------------------------------------------- WAV, npy


def _read_wav(path: Path, channel: int | None, full_scale: float) -> Waveform:
    from scipy.io import wavfile

    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", wavfile.WavFileWarning)
            rate, data = wavfile.read(path)
    except Exception as exc:  # scipy raises ValueError, struct.error, EOFError… on malformed files
        raise InputError(f"cannot read {path} as WAV: {exc}") from None
    for w in caught:
        # a file cut short (an interrupted copy or recording) is refused like a truncated .npy or .mat, not
        # analysed silently as a shorter record; scipy only warns and returns the samples it found
        if "EOF" in str(w.message):
            raise InputError(f"WAV file {path} is truncated: {w.message}")
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)  # others pass on as before
    x, which = _pick_column(np.asarray(data), channel, f"WAV file {path}")
    if x.dtype.kind == "f":
        samples = x.astype(np.float64)
    elif x.dtype == np.uint8:
        samples = (x.astype(np.float64) - 128.0) / 128.0 * full_scale
    elif x.dtype.kind == "i":
        samples = x.astype(np.float64) / float(2 ** (8 * x.dtype.itemsize - 1)) * full_scale
    else:
        raise InputError(f"WAV file {path} holds {x.dtype} samples; expected float or integer PCM")
    return Waveform(samples, float(rate), source=which, fs_source="WAV header")


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


# --------------------------------------------------------------------------------------------- CSV


def _delimiter(lines: list[str]) -> str | None:
    sample = lines[:5] + lines[-1:]
    for cand in (",", ";", "\t"):
        if any(cand in ln for ln in sample):
            return cand
    return None


def _split(line: str, delimiter: str | None) -> list[str]:
    if delimiter is None:
        return line.split()
    return [f.strip() for f in next(csv.reader(io.StringIO(line), delimiter=delimiter))]


def _column_kind(col: npt.NDArray[np.float64]) -> str:
    """``"constant"``, ``"monotonic"`` (strictly increasing or decreasing: a time axis or counter) or ``""``."""
    if col.size < 2 or np.all(col == col[0]):
        return "constant"
    d = np.diff(col)
    if np.all(d > 0) or np.all(d < 0):
        return "monotonic"
    return ""


@dataclass(frozen=True, slots=True)
class _Table:
    """A text table: its header (the first line when not numeric, else None), rows × columns, and what was left
    out of it."""

    header: list[str] | None
    data: npt.NDArray[np.float64]
    note: str = ""  # the cut last line that was dropped, in words
    unterminated: bool = False  # the last line has no line break


def _csv_table(path: Path) -> _Table:
    """Read a text table.  A last line without a line break that is incomplete — fewer fields than the rows, or
    a field cut inside a number — is a file cut short while written or copied: it is dropped and said so in
    ``note``.  Any other malformed line raises :class:`InputError`."""
    try:
        text = path.read_text(encoding="utf-8-sig", errors="strict")
    except UnicodeDecodeError:
        raise InputError(f"{path} is not a UTF-8 text (CSV) file") from None
    lines = [(i + 1, ln.strip()) for i, ln in enumerate(text.splitlines())
             if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"CSV file {path} holds no data")
    unterminated = not text.endswith(("\n", "\r"))
    delimiter = _delimiter([ln for _, ln in lines])
    header: list[str] | None = None
    rows: list[list[float]] = []
    note = ""
    for k, (lineno, line) in enumerate(lines):
        fields = [f for f in _split(line, delimiter) if f != ""]
        try:
            rows.append([float(f) for f in fields])
        except ValueError:
            if k == 0:
                header = [f.strip().strip('"').strip("'") for f in fields]
                continue
            if k == len(lines) - 1 and unterminated and rows:
                note = (f"its last line (line {lineno}) is cut short: {line[:60]!r} is not numeric and has no line "
                        "break; dropped")
                break
            raise InputError(f"CSV file {path}: line {lineno} is not numeric: {line[:60]!r}") from None
    if not rows:
        raise InputError(f"CSV file {path} holds no numeric rows")
    width = len(rows[0])
    if len(rows) > 1 and unterminated and not note and len(rows[-1]) < width:
        note = (f"its last line (line {lines[-1][0]}) is cut short: {len(rows[-1])} of {width} fields and no "
                "line break; dropped")
        rows.pop()
    bad = next((i for i, r in enumerate(rows) if len(r) != width), None)
    if bad is not None:
        raise InputError(f"CSV file {path}: row {bad + 1} has {len(rows[bad])} columns, the first has {width}")
    if header is not None and len(header) != width:
        raise InputError(f"CSV file {path}: the header names {len(header)} columns, the rows have {width}")
    return _Table(header, np.asarray(rows, dtype=np.float64), note, unterminated and not note)


def _read_csv(path: Path, column: str | None) -> Waveform:
    table = _csv_table(path)
    header, data = table.header, table.data
    width = data.shape[1]
    names = header or [""] * width

    def label(j: int) -> str:
        return f"{j} {names[j]!r}" if names[j] else str(j)

    kinds = [_column_kind(data[:, j]) for j in range(width)]
    listing = ", ".join(label(j) + (f" ({kinds[j]})" if kinds[j] else "") for j in range(width))
    j = _csv_column(path, column, names, kinds, listing)
    which = f"column {label(j)} of {width}" if width > 1 or names[j] else "column 0 of 1"
    warning = ""
    if column is not None and kinds[j]:
        like = "like a time axis or counter" if kinds[j] == "monotonic" else "it carries no vibration"
        warning = (f"--column {column} chose column {label(j)}, which is {kinds[j]} ({like}); analysed as asked; "
                   f"columns: {listing}")
    return Waveform(data[:, j].copy(), None, source=which, warning=warning, note=table.note,
                    unterminated=table.unterminated)


def _csv_column(path: Path, column: str | None, names: list[str], kinds: list[str], listing: str) -> int:
    """The column asked for (a header name or a 0-based index), else the first that is neither constant nor
    monotonic."""
    width = len(names)
    if column is None:
        candidates = [j for j in range(width) if not kinds[j]]
        if not candidates:
            raise InputError(f"CSV file {path}: no column looks like a signal (each is constant or monotonic, "
                             f"like a time axis); choose one with --column NAME|INDEX; columns: {listing}")
        return candidates[0]
    if column in names:
        return names.index(column)
    try:
        j = int(column)
    except ValueError:
        raise InputError(f"CSV file {path} has no column {column!r}; columns: {listing}") from None
    if not 0 <= j < width:
        raise InputError(f"CSV file {path} has {width} columns; column {j} does not exist (0-based); "
                         f"columns: {listing}")
    return j


# --------------------------------------------------------------------------------------------- MATLAB


def _unwrap(value: Any) -> Any:
    """A 1×1 object or struct array's one element (MATLAB keeps scalars as 1×1 arrays)."""
    while isinstance(value, np.ndarray) and value.dtype == object and value.size == 1:
        value = value.reshape(-1)[0]
    return value


def _is_struct(value: Any) -> bool:
    from scipy.io.matlab import mat_struct

    return isinstance(value, mat_struct)


def _is_numeric(value: Any) -> bool:
    return isinstance(value, np.ndarray) and value.dtype.kind in "iuf" and value.size > 0


def _fields(value: Any) -> list[str]:
    return list(getattr(value, "_fieldnames", []) or [])


def _walk(name: str, value: Any, depth: int, out: list[tuple[str, Any]]) -> None:
    """Every numeric leaf under ``value`` as (dotted path, array), structs and struct arrays descended."""
    value = _unwrap(value)
    if _is_numeric(value):
        out.append((name, value))
    elif _is_struct(value) and depth < 4:
        for f in _fields(value):
            _walk(f"{name}.{f}", getattr(value, f), depth + 1, out)
    elif isinstance(value, np.ndarray) and value.dtype == object and depth < 4:
        for i, item in enumerate(value.reshape(-1)[:16]):
            if _is_struct(_unwrap(item)):
                _walk(f"{name}({i + 1})", item, depth + 1, out)


def _resolve(variables: dict[str, Any], dotted: str, path: Path, listing: str) -> Any:
    """The value at ``a.b(2).c`` (MATLAB's 1-based indices into struct arrays)."""
    value: Any = None
    parts = dotted.split(".")
    for k, part in enumerate(parts):
        m = _PATH_PART.match(part)
        if m is None:
            raise InputError(f"{dotted!r} is not a variable path like name.field or name.field(2).data")
        key, index = m.group(1), m.group(2)
        where = ".".join(parts[:k]) or str(path)
        if k == 0:
            if key not in variables:
                raise InputError(f"{path} has no variable {key!r}; variables: {listing}")
            value = variables[key]
        else:
            value = _unwrap(value)
            if not _is_struct(value):
                raise InputError(f"{where} in {path} is not a struct (no field {key!r}); variables: {listing}")
            if key not in _fields(value):
                raise InputError(f"struct {where} in {path} has no field {key!r}; fields: "
                                 f"{', '.join(_fields(value))}")
            value = getattr(value, key)
        if index is not None:
            arr = value if isinstance(value, np.ndarray) else np.asarray([value], dtype=object)
            i = int(index)
            if not 1 <= i <= arr.size:
                raise InputError(f"{'.'.join(parts[:k + 1])} in {path}: index {i} is outside 1..{arr.size}")
            value = arr.reshape(-1, order="F")[i - 1]
    return _unwrap(value)


def _scalar(value: Any, what: str) -> float:
    value = _unwrap(value)
    if not _is_numeric(value) or value.size != 1:
        raise InputError(f"{what} is not a number")
    v = float(np.asarray(value).reshape(-1)[0])
    if not math.isfinite(v):
        raise InputError(f"{what} holds {v!r}, not a finite number")
    return v


def _siblings(variables: dict[str, Any], dotted: str) -> list[tuple[str, dict[str, Any]]]:
    """Scopes to look for rate and speed in: the struct holding the signal, then each struct above it, then the
    file's top level."""
    scopes: list[tuple[str, dict[str, Any]]] = []
    parts = dotted.split(".")
    for k in range(len(parts) - 1, 0, -1):
        parent = ".".join(parts[:k])
        try:
            holder = _resolve(variables, parent, Path(""), "")
        except InputError:
            continue
        if _is_struct(holder):
            scopes.append((parent + ".", {f: getattr(holder, f) for f in _fields(holder)}))
    scopes.append(("", variables))
    return scopes


def _read_mat(path: Path, var: str | None, channel: int | None, fs_var: str | None, rpm_var: str | None,
              shaft_hz_var: str | None) -> Waveform:
    from scipy.io import loadmat

    try:
        mat = loadmat(path, struct_as_record=False, squeeze_me=False)
    except NotImplementedError:
        raise InputError(f"{path} is a MATLAB v7.3 (HDF5) file; save it with -v7 or export the signal as .npy") \
            from None
    except Exception as exc:  # malformed files raise ValueError, TypeError, struct errors…
        raise InputError(f"cannot read {path} as a MATLAB .mat file: {exc}") from None
    variables = {k: v for k, v in mat.items() if not k.startswith("__")}
    leaves: list[tuple[str, Any]] = []
    for k, v in variables.items():
        _walk(k, v, 0, leaves)
    shown = [f"{k} {tuple(np.shape(v))}" for k, v in leaves[:_LISTED]]
    listing = ", ".join(shown) + (f" … ({len(leaves)} in all)" if len(leaves) > _LISTED else "") or "none"
    name, data = _mat_signal(path, variables, leaves, var, listing)
    if sum(d > 1 for d in data.shape) <= 1:
        data = data.reshape(-1)
    elif data.ndim == 2 and data.shape[0] < data.shape[1]:
        data = data.T
    x, which = _pick_column(data, channel, f"variable {name!r}")
    scopes = _siblings(variables, name)

    def given(option: str, var_name: str) -> tuple[float | None, str]:
        return _scalar(_resolve(variables, var_name, path, listing), f"{option} {var_name}"), \
            f"file variable {var_name}"

    fs, fs_source = given("--fs-var", fs_var) if fs_var is not None else _mat_found(scopes, _is_fs_name)
    if rpm_var is not None and shaft_hz_var is not None:
        raise InputError("--rpm-var and --shaft-hz-var both give the speed: choose one")
    conflict = ""
    if rpm_var is not None:
        rpm, rpm_source = given("--rpm-var", rpm_var)
    elif shaft_hz_var is not None:
        rpm = 60.0 * _scalar(_resolve(variables, shaft_hz_var, path, listing), f"--shaft-hz-var {shaft_hz_var}")
        rpm_source = f"file variable {shaft_hz_var} (Hz)"
    else:
        rpm, rpm_source, conflict = _mat_speed(scopes, path)
    source = f"variable {name}" + ("" if which.endswith("of 1") else f", {which}")
    return Waveform(x.astype(np.float64), fs, rpm=rpm, source=source, rpm_source=rpm_source, fs_source=fs_source,
                    rpm_conflict=conflict)


def _mat_signal(path: Path, variables: dict[str, Any], leaves: list[tuple[str, Any]], var: str | None,
                listing: str) -> tuple[str, Any]:
    """The signal's name and array: ``--var``, else the one ``*_DE_time`` vector, else the one vector."""
    if var is not None:
        data = _resolve(variables, var, path, listing)
        if not _is_numeric(data):
            raise InputError(f"variable {var!r} in {path} is not a numeric array; variables: {listing}")
        return var, np.asarray(data)
    vectors = [(k, v) for k, v in leaves if v.size > 1 and sum(d > 1 for d in v.shape) == 1]
    de = [(k, v) for k, v in vectors if k.endswith("_DE_time")]
    if len(de) == 1:
        return de[0][0], np.asarray(de[0][1])
    if len(vectors) == 1:
        return vectors[0][0], np.asarray(vectors[0][1])
    raise InputError(f"{path}: choose the signal with --var NAME (a.b.c for struct fields); variables: {listing}")


def _is_fs_name(name: str) -> bool:
    return name in FS_NAMES


def _scalar_hits(scope: dict[str, Any], wanted: Callable[[str], bool]) -> list[str]:
    return [k for k, v in scope.items() if wanted(k) and _is_numeric(_unwrap(v)) and _unwrap(v).size == 1]


def _mat_found(scopes: list[tuple[str, dict[str, Any]]], wanted: Callable[[str], bool]) -> tuple[float | None, str]:
    """A numeric scalar beside the signal whose name is ``wanted`` (nearest scope first; of several, the first of
    :data:`FS_NAMES`): its value and where it came from, else ``(None, "")``."""
    for prefix, scope in scopes:
        hits = _scalar_hits(scope, wanted)
        if hits:
            hit = min(hits, key=FS_NAMES.index)
            return _scalar(scope[hit], f"{prefix}{hit}"), f"file variable {prefix}{hit}"
    return None, ""


RPM_AGREE = 1e-3  # speed variables within 0.1 % of each other agree (a stored speed rounded to 1 r/min in 1000)


def _mat_speed(scopes: list[tuple[str, dict[str, Any]]], path: Path) -> tuple[float | None, str, str]:
    """The shaft speed (r/min) from the scalars named ``…RPM``/``…rpm`` of the nearest scope that has any: its
    value, where it came from, and — when that scope holds several that disagree — a line naming them (the speed
    is then None: the caller asks for ``--rpm``).  Several that agree give the first in name order, the source
    naming the others."""
    for prefix, scope in scopes:
        hits = sorted(_scalar_hits(scope, lambda k: k.upper().endswith("RPM")))
        if not hits:
            continue
        values = [_scalar(scope[k], f"{prefix}{k}") for k in hits]
        named = [f"{prefix}{k} ({v:g} r/min)" for k, v in zip(hits, values, strict=True)]
        if len(hits) == 1:
            return values[0], f"file variable {prefix}{hits[0]}", ""
        if max(values) - min(values) <= RPM_AGREE * max(abs(v) for v in values):
            others = ", ".join(named[1:])
            return values[0], (f"file variable {prefix}{hits[0]}; {others} "
                               f"agree{'s' if len(hits) == 2 else ''} within {100 * RPM_AGREE:g} %"), ""
        return None, "", (f"{path.name} holds {len(hits)} speed variables that disagree: {', '.join(named[:-1])} "
                          f"and {named[-1]}")
    return None, "", ""


# --------------------------------------------------------------------------------------------- entry point


def read_text_waveform(path: Path, *, column: str | None = None) -> Waveform:
    """One column of a text table whose name has no known suffix — a logger's files named by their time only
    (``2004.02.12.10.32.39``) — read like a CSV file (comma, semicolon, tab or blank separated)."""
    if not path.is_file():
        raise InputError(f"file {path} not found")
    return _read_csv(path, column)


def read_waveform(path: Path, *, var: str | None = None, channel: int | None = None, column: str | None = None,
                  full_scale: float = 1.0, fs_var: str | None = None, rpm_var: str | None = None,
                  shaft_hz_var: str | None = None) -> Waveform:
    """Read one channel of a recorded waveform (see the module docstring for the formats)."""
    if not path.exists():
        raise InputError(f"file {path} not found")
    if path.is_dir():
        raise InputError(f"{path} is a directory, not a waveform file")
    suffix = path.suffix.lower()
    if suffix not in FORMATS:
        raise InputError(f"unknown format {suffix or '(no extension)'!r} of {path}; expected one of "
                         f"{', '.join(FORMATS)}")
    mat_only = {"--var": var, "--fs-var": fs_var, "--rpm-var": rpm_var, "--shaft-hz-var": shaft_hz_var}
    for option, value in mat_only.items():
        if value is not None and suffix != ".mat":
            raise InputError(f"{option} applies to MATLAB .mat files only")
    if column is not None and suffix not in (".csv", ".txt"):
        raise InputError("--column applies to CSV/text files only (use --channel N for the others)")
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
        return _read_mat(path, var, channel, fs_var, rpm_var, shaft_hz_var)
    if channel is not None and column is not None:
        raise InputError("--channel and --column both choose the CSV column: give one")
    return _read_csv(path, column if column is not None else (None if channel is None else str(channel)))
