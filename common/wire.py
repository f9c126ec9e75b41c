"""The block wire format: one block of accelerometer samples and its MQTT payload encodings.

A *block* is a contiguous run of samples from one sensor: sensor id, sequence number, start time,
sample rate, unit and the samples themselves.  Devices publish blocks as MQTT payloads in one of two forms:

JSON form (``application/json``)::

    {"v": 1, "sensor": "PS1-P101-DE-H", "seq": 42, "t0_ns": 1764633600000000000,
     "fs_hz": 25600.0, "unit": "g", "encoding": "f32le-b64", "data": "<base64>"}

``encoding`` is one of

* ``"f32le-b64"``: ``data`` is base64 of little-endian IEEE-754 float32 samples;
* ``"i16le-b64"``: ``data`` is base64 of little-endian int16 counts, and ``"scale"`` (required,
  finite, non-zero) converts them: ``value = count * scale`` in ``unit``;
* ``"array"``: ``data`` is a plain JSON array of numbers (for simple devices).

Binary form: a fixed little-endian header, the UTF-8 sensor id, then the samples::

    offset size field
    0      4    magic  b"EVB1"   (the trailing byte is the header version, currently 1)
    4      1    dtype  1 = float32, 2 = int16 (scaled by ``scale``)
    5      1    unit   0 = g, 1 = m/s2
    6      2    sensor id length in bytes (1..128)
    8      8    seq    uint64
    16     8    t0_ns  int64, nanoseconds since the Unix epoch
    24     8    fs_hz  float64
    32     4    scale  float32 (int16 only; 0 for float32)
    36     4    n      uint32 number of samples
    40     ...  sensor id, then n samples

Decoding is strict: a size limit, the version, the declared length against the bytes present, finite
values and a positive sample rate are all checked; each failure raises a specific :class:`WireError`
subclass whose ``reason`` is a short label suitable for a metric (``blocks_rejected_total{reason=...}``).

This module is shared by the daemon and the simulator; it depends on numpy only.
"""

from __future__ import annotations

import base64
import binascii
import functools
import json
import math
import operator
import re
import struct
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

__all__ = [
    "DEFAULT_MAX_PAYLOAD_BYTES",
    "DEFAULT_MAX_SAMPLES",
    "UNITS",
    "Block",
    "InvalidField",
    "InvalidSampleRate",
    "LengthMismatch",
    "MalformedPayload",
    "NonFiniteSamples",
    "PayloadTooLarge",
    "UnsupportedVersion",
    "WireError",
    "decode",
    "encode_binary",
    "encode_json",
]

WIRE_VERSION = 1
DEFAULT_MAX_PAYLOAD_BYTES = 4 * 1024 * 1024
DEFAULT_MAX_SAMPLES = 262_144
MAX_SENSOR_ID_BYTES = 128
MAX_FS_HZ = 10_000_000.0
UNITS: tuple[str, ...] = ("g", "m/s2")

_MAGIC = b"EVB"
_HEADER = struct.Struct("<4sBBHQqdfI")  # 40 bytes
_HEADER_BYTES = _HEADER.size
_DTYPE_F32 = 1
_DTYPE_I16 = 2
_JSON_KEYS = frozenset({"v", "sensor", "seq", "t0_ns", "fs_hz", "unit", "encoding", "data", "scale"})
_ENCODINGS = ("f32le-b64", "i16le-b64", "array")
_F32_TINY = float(np.finfo(np.float32).tiny)
_FLOAT_DTYPES = (np.dtype(np.float32), np.dtype(np.float64))  # dtype objects: compared without a conversion
_F32_LE, _I16_LE = np.dtype("<f4"), np.dtype("<i2")  # built once: a dtype string is parsed at every use
_CONTROL_CHARS = re.compile(r"[\x00-\x1f]")  # C0 control characters (code points below 32)


class WireError(ValueError):
    """A payload that is not a valid block.  ``reason`` is a short metric label."""

    reason = "malformed"


class PayloadTooLarge(WireError):
    reason = "too_large"


class UnsupportedVersion(WireError):
    reason = "unsupported_version"


class MalformedPayload(WireError):
    reason = "malformed"


class InvalidField(WireError):
    reason = "invalid_field"


class LengthMismatch(WireError):
    reason = "length_mismatch"


class NonFiniteSamples(WireError):
    reason = "non_finite"


class InvalidSampleRate(WireError):
    reason = "invalid_sample_rate"


@dataclass(frozen=True, slots=True)
class Block:
    """One block of samples from one sensor.

    ``samples`` is a 1-D float array in ``unit`` (``"g"`` or ``"m/s2"``); ``t0_ns`` is the time of the first
    sample in nanoseconds since the Unix epoch.  The end time and duration are derived, not stored.  A decoded
    block's samples are read-only: float32 (a view of the payload) for the float32 forms, float64 otherwise.
    """

    sensor_id: str
    seq: int
    t0_ns: int
    fs_hz: float
    unit: str
    samples: npt.NDArray[np.floating[Any]] = field(repr=False)

    @property
    def n_samples(self) -> int:
        return int(self.samples.shape[0])

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.fs_hz

    @property
    def end_ns(self) -> int:
        """Time just after the last sample (the next block's expected ``t0_ns``)."""
        n: int = self.samples.shape[0]  # (n_samples without its call)
        return self.t0_ns + round(n * 1e9 / self.fs_hz)


# --------------------------------------------------------------------------------------------- encoding


def _to_f32(x: npt.NDArray[np.float64]) -> npt.NDArray[np.float32]:
    with np.errstate(over="ignore", invalid="ignore"):  # beyond ±3.4e38 becomes ±inf, which decoding rejects
        return x.astype("<f4")


def _check_block(block: Block) -> npt.NDArray[np.float64]:
    """Validate a block before encoding; return its samples as a 1-D float64 array."""
    _check_sensor_id(block.sensor_id)
    _check_fs(block.fs_hz)
    _check_unit(block.unit)
    for name, value, lo, hi in (("seq", block.seq, 0, 2**64 - 1), ("t0_ns", block.t0_ns, -(2**63), 2**63 - 1)):
        try:
            as_int = operator.index(value)  # ints and numpy integers, not floats or bools' surprises
        except TypeError:
            raise InvalidField(f"{name} must be an integer, got {type(value).__name__}") from None
        if not lo <= as_int <= hi:
            raise InvalidField(f"{name} {as_int} is outside {lo}..{hi}")
    x = np.asarray(block.samples, dtype=np.float64)
    if x.ndim != 1:
        raise InvalidField(f"samples must be 1-D, got shape {x.shape}")
    # Sample values are encoded as they are (NaN, empty blocks…): decoders reject them, and tests and fault
    # injection rely on producing such payloads.
    return x


def _int16_scale(x: npt.NDArray[np.float64], scale: float | None) -> float:
    if scale is None:
        peak = float(np.max(np.abs(x))) if x.size else 0.0
        scale = peak / 32767.0 if math.isfinite(peak) and peak > 0 else 1.0
        if scale < _F32_TINY:  # below float32's normal range (the binary header's scale): quantizes to zeros
            scale = 1.0
    if isinstance(scale, bool) or not isinstance(scale, int | float):
        raise InvalidField(f"scale {scale!r} must be a number")
    try:
        scale_f = float(scale)
    except OverflowError:
        raise InvalidField(f"scale {scale!r} does not fit a float") from None
    if not math.isfinite(scale_f) or scale_f == 0:
        raise InvalidField(f"scale {scale!r} must be finite and non-zero")
    return scale_f


def _quantize_i16(x: npt.NDArray[np.float64], scale: float) -> bytes:
    """Little-endian int16 counts ``round(x / scale)``, saturating at the int16 range."""
    with np.errstate(invalid="ignore"):
        return bytes(np.clip(np.rint(x / scale), -32768, 32767).astype("<i2").tobytes())


def encode_json(block: Block, encoding: Literal["f32le-b64", "i16le-b64", "array"] = "f32le-b64",
                scale: float | None = None) -> bytes:
    """Encode ``block`` in the JSON form.

    For ``"i16le-b64"`` the samples are quantized to ``round(x / scale)`` (``scale`` defaults to the value
    that maps the block's peak to 32767, or 1 for an all-zero or vanishingly small block); values outside the
    int16 range saturate.
    """
    x = _check_block(block)
    doc: dict[str, Any] = {
        "v": WIRE_VERSION, "sensor": block.sensor_id, "seq": int(block.seq), "t0_ns": int(block.t0_ns),
        "fs_hz": float(block.fs_hz), "unit": block.unit, "encoding": encoding,
    }
    if encoding == "f32le-b64":
        doc["data"] = base64.b64encode(_to_f32(x).tobytes()).decode("ascii")
    elif encoding == "i16le-b64":
        scale = _int16_scale(x, scale)
        doc["scale"] = scale
        doc["data"] = base64.b64encode(_quantize_i16(x, scale)).decode("ascii")
    elif encoding == "array":
        doc["data"] = [float(v) for v in x]
    else:
        raise InvalidField(f"unknown encoding {encoding!r}; expected one of {', '.join(_ENCODINGS)}")
    return json.dumps(doc, separators=(",", ":")).encode("utf-8")


def encode_binary(block: Block, dtype: Literal["float32", "int16"] = "float32",
                  scale: float | None = None) -> bytes:
    """Encode ``block`` in the compact binary form (see the module docstring for the layout)."""
    x = _check_block(block)
    sid = block.sensor_id.encode("utf-8")
    if dtype == "float32":
        code, scale_out, body = _DTYPE_F32, 0.0, _to_f32(x).tobytes()
    elif dtype == "int16":
        scale = _int16_scale(x, scale)
        with np.errstate(over="ignore"):
            scale_out = float(np.float32(scale))  # the header carries float32: quantize with the scale sent
        if not math.isfinite(scale_out) or scale_out == 0:
            raise InvalidField(f"scale {scale!r} does not fit the binary header's float32")
        code, body = _DTYPE_I16, _quantize_i16(x, scale_out)
    else:
        raise InvalidField(f"unknown binary dtype {dtype!r}; expected float32 or int16")
    header = _HEADER.pack(_MAGIC + bytes([WIRE_VERSION]), code, UNITS.index(block.unit), len(sid),
                          int(block.seq), int(block.t0_ns), float(block.fs_hz), scale_out, x.shape[0])
    return header + sid + body


# --------------------------------------------------------------------------------------------- decoding


def decode(payload: bytes | bytearray | memoryview, *, max_bytes: int = DEFAULT_MAX_PAYLOAD_BYTES,
           max_samples: int = DEFAULT_MAX_SAMPLES) -> Block:
    """Decode a JSON or binary payload into a :class:`Block`.

    Raises
    ------
    WireError
        (one of its subclasses) for every way the payload can be invalid; nothing else escapes.
    """
    if type(payload) is bytes:  # as received: a float32 block's samples are a view of it, no copy
        data = payload
    else:
        try:
            data = bytes(payload)
        except (TypeError, ValueError) as exc:
            raise MalformedPayload(f"payload is not bytes: {exc}") from exc
    if len(data) > max_bytes:
        raise PayloadTooLarge(f"payload of {len(data)} bytes exceeds the limit of {max_bytes} bytes")
    if not data:
        raise MalformedPayload("empty payload")
    if data.startswith(_MAGIC):
        block = _decode_binary(data, max_samples)
    elif data.lstrip()[:1] == b"{":
        block = _decode_json(data, max_samples)
    else:
        raise MalformedPayload("payload is neither a JSON object nor a binary block (no 'EVB' magic)")
    return block


def _check_sensor_id(sid: object) -> str:
    if not isinstance(sid, str) or not sid:
        raise InvalidField("sensor id must be a non-empty string")
    if len(sid.encode("utf-8")) > MAX_SENSOR_ID_BYTES:
        raise InvalidField(f"sensor id longer than {MAX_SENSOR_ID_BYTES} bytes")
    if _CONTROL_CHARS.search(sid):
        raise InvalidField("sensor id contains control characters")
    return sid


def _check_fs(fs: object) -> float:
    if isinstance(fs, bool) or not isinstance(fs, int | float):
        raise InvalidSampleRate(f"fs_hz must be a number, got {type(fs).__name__}")
    try:
        fs_f = float(fs)
    except OverflowError:
        raise InvalidSampleRate(f"fs_hz {fs!r} does not fit a float") from None
    if not math.isfinite(fs_f) or fs_f <= 0:
        raise InvalidSampleRate(f"fs_hz {fs!r} must be finite and > 0")
    if fs_f > MAX_FS_HZ:
        raise InvalidSampleRate(f"fs_hz {fs_f:g} is above the 10 MHz limit")
    return fs_f


def _check_unit(unit: object) -> str:
    if unit not in UNITS:
        raise InvalidField(f"unit {unit!r} is not one of {', '.join(UNITS)}")
    return str(unit)


def _check_int(name: str, value: object, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise InvalidField(f"{name} must be an integer, got {type(value).__name__}")
    if not lo <= value <= hi:
        raise InvalidField(f"{name} {value} is outside {lo}..{hi}")
    return value


def _finish(sid: str, seq: int, t0_ns: int, fs: float, unit: str, samples: npt.NDArray[Any],
            max_samples: int) -> Block:
    """The block, with ``samples`` read-only: float32 payloads stay float32 (a view of the payload, no copy),
    everything else float64."""
    n = samples.shape[0]
    if n == 0:
        raise LengthMismatch("block has no samples")
    if n > max_samples:
        raise LengthMismatch(f"block has {n} samples, more than the limit of {max_samples}")
    x = samples if samples.dtype in _FLOAT_DTYPES else samples.astype(np.float64)
    # isfinite sets no floating-point flags (a sum would, for ±Inf or an overflow, and need np.errstate round it)
    if not np.isfinite(x).all():
        bad = int(np.count_nonzero(~np.isfinite(x)))
        raise NonFiniteSamples(f"{bad} of {n} samples are NaN or infinite")
    if x.flags.writeable:
        x.flags.writeable = False
    return Block(sensor_id=sid, seq=seq, t0_ns=t0_ns, fs_hz=fs, unit=unit, samples=x)


@functools.lru_cache(maxsize=4096)
def _binary_sensor_id(raw: bytes) -> str:
    """A binary block's sensor id from its UTF-8 bytes, checked; remembered, as a sensor sends the same id with
    every block (a refused id raises every time: exceptions are not cached)."""
    try:
        sid = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidField("sensor id is not valid UTF-8") from exc
    return _check_sensor_id(sid)


def _decode_binary(data: bytes, max_samples: int) -> Block:
    size = len(data)
    if size < _HEADER_BYTES:
        raise LengthMismatch(f"binary block of {size} bytes is shorter than its {_HEADER_BYTES}-byte header")
    magic, code, unit_code, sid_len, seq, t0_ns, fs, scale, n = _HEADER.unpack_from(data)
    if magic[3] != WIRE_VERSION:
        raise UnsupportedVersion(f"binary block version {magic[3]} is not supported (expected {WIRE_VERSION})")
    if code != _DTYPE_F32 and code != _DTYPE_I16:
        raise InvalidField(f"binary dtype code {code} is not 1 (float32) or 2 (int16)")
    if unit_code >= len(UNITS):
        raise InvalidField(f"binary unit code {unit_code} is not 0 (g) or 1 (m/s2)")
    if not 1 <= sid_len <= MAX_SENSOR_ID_BYTES:
        raise InvalidField(f"sensor id length {sid_len} is outside 1..{MAX_SENSOR_ID_BYTES}")
    if n > max_samples:
        raise LengthMismatch(f"block declares {n} samples, more than the limit of {max_samples}")
    start = _HEADER_BYTES + sid_len
    expected = start + n * (4 if code == _DTYPE_F32 else 2)
    if size != expected:
        raise LengthMismatch(f"binary block declares {n} samples ({expected} bytes) but has {size} bytes")
    sid = _binary_sensor_id(data[_HEADER_BYTES:start])
    fs_f = fs if 0.0 < fs <= MAX_FS_HZ else _check_fs(fs)  # (a float from the header: _check_fs raises)
    samples: npt.NDArray[Any]
    if code == _DTYPE_F32:
        samples = np.frombuffer(data, dtype=_F32_LE, count=n, offset=start)  # a view of the payload
    else:
        if not math.isfinite(scale) or scale == 0:
            raise InvalidField(f"int16 block scale {scale!r} must be finite and non-zero")
        with np.errstate(over="ignore"):
            samples = np.frombuffer(data, dtype=_I16_LE, count=n, offset=start).astype(np.float64) * float(scale)
    return _finish(sid, seq, t0_ns, fs_f, UNITS[unit_code], samples, max_samples)


def _json_array(raw: Any, max_samples: int) -> np.ndarray:
    """The samples of encoding ``array``: a JSON array of numbers."""
    if not isinstance(raw, list):
        raise InvalidField("encoding 'array' needs 'data' to be a JSON array of numbers")
    if len(raw) > max_samples:
        raise LengthMismatch(f"block has {len(raw)} samples, more than the limit of {max_samples}")
    if not all(isinstance(v, int | float) and not isinstance(v, bool) for v in raw):
        raise InvalidField("'data' array holds something other than numbers")
    try:
        return np.asarray(raw, dtype=np.float64)
    except OverflowError as exc:
        raise NonFiniteSamples("a sample does not fit a float64") from exc


def _json_base64(doc: dict[str, Any], encoding: str, raw: Any, max_samples: int) -> np.ndarray:
    """The samples of encodings ``f32le-b64`` and ``i16le-b64`` (the latter scaled by ``scale``)."""
    if not isinstance(raw, str):
        raise InvalidField(f"encoding {encoding!r} needs 'data' to be a base64 string")
    width = 4 if encoding == "f32le-b64" else 2
    if len(raw) * 3 // 4 > (max_samples + 2) * width:
        raise LengthMismatch(f"block has more samples than the limit of {max_samples}")
    try:
        body = base64.b64decode(raw, validate=True)
    except (binascii.Error, ValueError) as exc:
        raise MalformedPayload(f"'data' is not valid base64: {exc}") from exc
    if len(body) % width:
        raise LengthMismatch(f"{len(body)} data bytes is not a whole number of {width}-byte samples")
    if encoding == "f32le-b64":
        if "scale" in doc:
            raise InvalidField("'scale' is only allowed with encoding 'i16le-b64'")
        return np.frombuffer(body, dtype="<f4")
    scale = doc.get("scale")
    try:
        scale_ok = not isinstance(scale, bool) and isinstance(scale, int | float) and \
            math.isfinite(scale) and scale != 0
    except OverflowError:  # an integer too large for a float
        scale_ok = False
    if not scale_ok:
        raise InvalidField("encoding 'i16le-b64' needs a finite, non-zero numeric 'scale'")
    with np.errstate(over="ignore"):
        samples: np.ndarray = np.frombuffer(body, dtype="<i2").astype(np.float64) * float(scale)  # type: ignore[arg-type]
    return samples


def _decode_json(data: bytes, max_samples: int) -> Block:
    try:
        doc = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:  # ValueError: JSONDecodeError, huge integers
        raise MalformedPayload(f"invalid JSON: {exc}") from exc
    if not isinstance(doc, dict):
        raise MalformedPayload("JSON payload is not an object")
    unknown = set(doc) - _JSON_KEYS
    if unknown:
        raise InvalidField(f"unknown field(s) {', '.join(sorted(map(str, unknown)))}")
    missing = [k for k in ("v", "sensor", "seq", "fs_hz", "unit", "encoding", "data") if k not in doc]
    if missing:
        raise InvalidField(f"missing field(s) {', '.join(missing)}")
    version = doc["v"]
    if version != WIRE_VERSION or isinstance(version, bool):
        raise UnsupportedVersion(f"JSON block version {version!r} is not supported (expected {WIRE_VERSION})")
    sid = _check_sensor_id(doc["sensor"])
    seq = _check_int("seq", doc["seq"], 0, 2**64 - 1)
    t0_ns = _check_int("t0_ns", doc.get("t0_ns", 0), -(2**63), 2**63 - 1)
    fs = _check_fs(doc["fs_hz"])
    unit = _check_unit(doc["unit"])
    encoding = doc["encoding"]
    raw = doc["data"]
    if encoding == "array":
        samples = _json_array(raw, max_samples)
    elif encoding in ("f32le-b64", "i16le-b64"):
        samples = _json_base64(doc, encoding, raw, max_samples)
    else:
        raise InvalidField(f"unknown encoding {encoding!r}; expected one of {', '.join(_ENCODINGS)}")
    return _finish(sid, seq, t0_ns, fs, unit, samples, max_samples)
