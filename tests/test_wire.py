"""The block wire format: round trips, strict decoding, and one specific error per documented failure.

The reference is the format documented in ``edgevib.common.wire`` (its module docstring) and IEEE-754 float32
rounding as numpy implements it.
"""

from __future__ import annotations

import base64
import json
import struct

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from edgevib.common.wire import (
    DEFAULT_MAX_SAMPLES,
    Block,
    InvalidField,
    InvalidSampleRate,
    LengthMismatch,
    MalformedPayload,
    NonFiniteSamples,
    PayloadTooLarge,
    UnsupportedVersion,
    WireError,
    decode,
    encode_binary,
    encode_json,
)

HEADER = struct.Struct("<4sBBHQqdfI")

sensor_ids = st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=0x2FFF, exclude_categories=("Cs",)),
                     min_size=1, max_size=40)
finite_samples = st.lists(st.floats(-1e4, 1e4, allow_nan=False, allow_infinity=False, width=32),
                          min_size=1, max_size=300)


def block(samples: object = (0.0, 1.0, -2.5), **kw: object) -> Block:
    fields: dict[str, object] = dict(sensor_id="QL-P101-DE-H", seq=7, t0_ns=1_764_633_600_000_000_000,
                                     fs_hz=25600.0, unit="g")
    fields.update(kw)
    return Block(samples=np.asarray(samples, dtype=np.float64), **fields)  # type: ignore[arg-type]


def json_doc(**kw: object) -> bytes:
    doc: dict[str, object] = {"v": 1, "sensor": "QL-P101-DE-H", "seq": 1, "t0_ns": 0, "fs_hz": 25600.0,
                              "unit": "g", "encoding": "array", "data": [0.0, 1.0]}
    doc.update(kw)
    return json.dumps({k: v for k, v in doc.items() if v is not ...}).encode()


def binary(samples: bytes = struct.pack("<2f", 0.0, 1.0), *, magic: bytes = b"EVB\x01", code: int = 1,
           unit: int = 0, sid: bytes = b"QL-1", fs: float = 1000.0, scale: float = 0.0, n: int | None = None) -> bytes:
    width = 4 if code == 1 else 2
    count = len(samples) // width if n is None else n
    return HEADER.pack(magic, code, unit, len(sid), 3, 5, fs, scale, count) + sid + samples


# ------------------------------------------------------------------------------------------- round trips


@settings(max_examples=60, deadline=None)
@given(sid=sensor_ids, seq=st.integers(0, 2**64 - 1), t0=st.integers(-(2**63), 2**63 - 1),
       fs=st.floats(1e-3, 1e7), unit=st.sampled_from(["g", "m/s2"]), samples=finite_samples)
def test_round_trip_float32_forms(sid: str, seq: int, t0: int, fs: float, unit: str, samples: list[float]) -> None:
    b = Block(sid, seq, t0, fs, unit, np.asarray(samples))
    expected = np.asarray(samples, dtype=np.float32).astype(np.float64)  # IEEE-754 float32 rounding
    for payload in (encode_json(b), encode_binary(b)):
        out = decode(payload)
        assert (out.sensor_id, out.seq, out.t0_ns, out.unit) == (sid, seq, t0, unit)
        assert out.fs_hz == fs  # JSON carries a float64 (repr round-trips); binary a float64
        np.testing.assert_array_equal(out.samples, expected)
    out = decode(encode_json(b, "array"))
    np.testing.assert_array_equal(out.samples, np.asarray(samples))  # plain JSON numbers are exact


@settings(max_examples=60, deadline=None)
@given(samples=finite_samples)
def test_round_trip_int16_within_half_a_count(samples: list[float]) -> None:
    x = np.asarray(samples)
    b = block(x)
    for payload in (encode_json(b, "i16le-b64"), encode_binary(b, "int16")):
        out = decode(payload)
        peak = float(np.max(np.abs(x)))
        scale = peak / 32767.0 if peak / 32767.0 >= np.finfo(np.float32).tiny else 1.0  # documented default
        # quantization to round(x/scale): error at most half a count (plus float32 rounding of the binary scale)
        assert np.max(np.abs(out.samples - x)) <= 0.5 * scale * (1 + 1e-6) + 1e-7 * peak


def test_int16_explicit_scale_and_saturation() -> None:
    b = block([0.001, -0.002, 5.0])
    out = decode(encode_json(b, "i16le-b64", scale=1e-4))
    np.testing.assert_allclose(out.samples, [0.001, -0.002, 32767 * 1e-4])  # 5.0 saturates at +32767 counts


def test_block_derived_times() -> None:
    b = block(np.zeros(25600), t0_ns=1_000)
    assert b.duration_s == 1.0 and b.end_ns == 1_000 + 1_000_000_000 and b.n_samples == 25600


def test_decoded_samples_are_read_only() -> None:
    out = decode(encode_binary(block()))
    with pytest.raises(ValueError):
        out.samples[0] = 1.0


# ------------------------------------------------------------------------------------------- never anything else


def _decode_or_wire_error(payload: bytes) -> None:
    try:
        decode(payload, max_bytes=1 << 16, max_samples=4096)
    except WireError as exc:
        assert exc.reason and isinstance(exc.reason, str)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.binary(max_size=400))
def test_random_bytes_raise_only_wire_errors(payload: bytes) -> None:
    _decode_or_wire_error(payload)
    _decode_or_wire_error(b"EVB" + payload)
    _decode_or_wire_error(b"{" + payload)


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=10)


@settings(max_examples=300, deadline=None)
@given(st.dictionaries(st.sampled_from(["v", "sensor", "seq", "t0_ns", "fs_hz", "unit", "encoding", "data", "scale",
                                        "extra"]), json_values, max_size=9))
def test_random_json_objects_raise_only_wire_errors(doc: dict[str, object]) -> None:
    _decode_or_wire_error(json.dumps(doc).encode())
    base = json.loads(json_doc())
    base.update(doc)
    _decode_or_wire_error(json.dumps(base).encode())


@settings(max_examples=200, deadline=None)
@given(st.data())
def test_mutated_valid_payloads_raise_only_wire_errors(data: st.DataObject) -> None:
    good = data.draw(st.sampled_from([encode_binary(block()), encode_binary(block(), "int16"),
                                      encode_json(block()), encode_json(block(), "i16le-b64"),
                                      encode_json(block(), "array")]))
    raw = bytearray(good)
    for _ in range(data.draw(st.integers(1, 4))):
        i = data.draw(st.integers(0, len(raw) - 1))
        raw[i] = data.draw(st.integers(0, 255))
    cut = data.draw(st.integers(0, len(raw)))
    _decode_or_wire_error(bytes(raw))
    _decode_or_wire_error(bytes(raw[:cut]))


# ------------------------------------------------------------------------------------------- each failure


@pytest.mark.parametrize("payload, error", [
    (b"", MalformedPayload),
    (b"hello", MalformedPayload),
    (b"[1, 2]", MalformedPayload),
    (b"{not json", MalformedPayload),
    (b'{"v": 1, "seq": ' + b"9" * 5000 + b"}", MalformedPayload),  # beyond Python's integer-string limit
    (b'{"a":' * 100_000 + b"1" + b"}" * 100_000, MalformedPayload),  # nesting deeper than the parser's stack
    (json_doc(v=2), UnsupportedVersion),
    (json_doc(v=True), UnsupportedVersion),
    (json_doc(extra=1), InvalidField),
    (json_doc(unit=...), InvalidField),
    (json_doc(unit="mm/s"), InvalidField),
    (json_doc(sensor=""), InvalidField),
    (json_doc(sensor="a\nb"), InvalidField),
    (json_doc(sensor="x" * 129), InvalidField),
    (json_doc(seq=-1), InvalidField),
    (json_doc(seq=1.5), InvalidField),
    (json_doc(seq=True), InvalidField),
    (json_doc(t0_ns=2**63), InvalidField),
    (json_doc(encoding="f64"), InvalidField),
    (json_doc(data="AAAA"), InvalidField),  # 'array' needs a list
    (json_doc(data=[1, "2"]), InvalidField),
    (json_doc(data=[1, True]), InvalidField),
    (json_doc(encoding="f32le-b64", data="@@@@"), MalformedPayload),
    (json_doc(encoding="f32le-b64", data="AAA="), LengthMismatch),  # 2 bytes: not a whole float32
    (json_doc(encoding="f32le-b64", data="AAAAAA==", scale=1.0), InvalidField),
    (json_doc(encoding="i16le-b64", data="AAAAAA=="), InvalidField),  # no scale
    (json_doc(encoding="i16le-b64", data="AAAAAA==", scale=0), InvalidField),
    (json_doc(encoding="i16le-b64", data="AAAAAA==", scale=10**400), InvalidField),
    (json_doc(data=[]), LengthMismatch),
    (json_doc(data=[0.0] * (DEFAULT_MAX_SAMPLES + 1)), LengthMismatch),
    (json_doc(data=[10**400]), NonFiniteSamples),
    (b'{"v":1,"sensor":"s","seq":1,"fs_hz":100.0,"unit":"g","encoding":"array","data":[1.0,NaN]}', NonFiniteSamples),
    (json_doc(encoding="f32le-b64", data=base64.b64encode(struct.pack("<f", float("inf"))).decode()),
     NonFiniteSamples),
    (json_doc(fs_hz=0), InvalidSampleRate),
    (json_doc(fs_hz=-1.0), InvalidSampleRate),
    (json_doc(fs_hz="25600"), InvalidSampleRate),
    (json_doc(fs_hz=True), InvalidSampleRate),
    (json_doc(fs_hz=1e8), InvalidSampleRate),
    (json_doc(fs_hz=10**400), InvalidSampleRate),
    (binary(magic=b"EVB\x02"), UnsupportedVersion),
    (binary()[:39], LengthMismatch),
    (binary() + b"\x00", LengthMismatch),
    (binary(n=3), LengthMismatch),
    (binary(n=DEFAULT_MAX_SAMPLES + 1), LengthMismatch),
    (binary(code=3), InvalidField),
    (binary(unit=2), InvalidField),
    (binary(sid=b""), InvalidField),
    (binary(sid=b"\xff\xfe"), InvalidField),
    (binary(code=2, samples=b"\x01\x00", scale=0.0), InvalidField),
    (binary(code=2, samples=b"\x01\x00", scale=float("nan")), InvalidField),
    (binary(samples=struct.pack("<f", float("nan"))), NonFiniteSamples),
    (binary(fs=0.0), InvalidSampleRate),
    (binary(fs=float("nan")), InvalidSampleRate),
    (binary(fs=-5.0), InvalidSampleRate),
], ids=lambda v: v.__name__ if isinstance(v, type) else "")
def test_each_failure_raises_its_error(payload: bytes, error: type[WireError]) -> None:
    # (ids are the parameter index: some payloads are large)
    with pytest.raises(error) as info:
        decode(payload)
    assert info.value.reason == error.reason
    assert str(info.value)  # a message naming the problem


def test_size_limit_is_checked_before_parsing() -> None:
    payload = encode_json(block(np.zeros(1000)))
    with pytest.raises(PayloadTooLarge, match=f"{len(payload)} bytes"):
        decode(payload, max_bytes=len(payload) - 1)
    decode(payload, max_bytes=len(payload))


def test_sample_limit_is_a_parameter() -> None:
    with pytest.raises(LengthMismatch, match="limit of 10"):
        decode(encode_binary(block(np.zeros(11))), max_samples=10)


def test_non_bytes_payload_is_malformed() -> None:
    with pytest.raises(MalformedPayload):
        decode("a string")  # type: ignore[arg-type]


def test_reasons_are_distinct_metric_labels() -> None:
    reasons = {cls.reason for cls in (PayloadTooLarge, UnsupportedVersion, MalformedPayload, InvalidField,
                                      LengthMismatch, NonFiniteSamples, InvalidSampleRate)}
    assert len(reasons) == 7


# ------------------------------------------------------------------------------------------- encoder side


@pytest.mark.parametrize("kw, error", [
    ({"sensor_id": ""}, InvalidField),
    ({"unit": "mm"}, InvalidField),
    ({"fs_hz": 0.0}, InvalidSampleRate),
    ({"seq": -1}, InvalidField),
    ({"seq": 2**64}, InvalidField),
    ({"t0_ns": 2**63}, InvalidField),  # would not fit the binary header's int64
])
def test_encoders_reject_invalid_metadata(kw: dict[str, object], error: type[WireError]) -> None:
    for encode in (encode_json, encode_binary):
        with pytest.raises(error):
            encode(block(**kw))


def test_encoders_reject_bad_scales() -> None:
    with pytest.raises(InvalidField):
        encode_json(block(), "i16le-b64", scale=0.0)
    with pytest.raises(InvalidField):
        encode_binary(block(), "int16", scale=1e300)  # beyond the header's float32
    with pytest.raises(InvalidField):
        encode_binary(block(), "float64")  # type: ignore[arg-type]
    with pytest.raises(InvalidField):
        encode_json(block(), "f64")  # type: ignore[arg-type]


def test_encoders_carry_non_finite_samples_for_the_decoder_to_reject() -> None:
    # fault injection relies on this: the encoder is faithful, the decoder strict
    bad = block([0.0, float("nan")])
    for payload in (encode_binary(bad), encode_json(bad), encode_json(bad, "array")):
        with pytest.raises(NonFiniteSamples):
            decode(payload)


def test_non_finite_samples_are_counted_in_the_message() -> None:
    # IEEE 754: NaN and both infinities are the non-finite values; each form names how many of how many
    samples = [0.0, float("nan"), 1.0, float("-inf"), float("inf")]
    for payload in (encode_binary(block(samples)), encode_json(block(samples))):
        with pytest.raises(NonFiniteSamples, match="3 of 5 samples are NaN or infinite"):
            decode(payload)


def test_finite_samples_near_the_float32_limit_pass() -> None:
    # float32's largest finite value is (2 - 2**-23) * 2**127 ≈ 3.4028235e38 (IEEE 754 binary32): a block of
    # such values is finite, although their sum is not representable
    top = float(np.finfo(np.float32).max)
    decoded = decode(encode_binary(block([top, top, -top, top])))
    assert np.array_equal(decoded.samples, np.array([top, top, -top, top], dtype=np.float32))


@pytest.mark.parametrize("sid, ok", [
    ("QL-P101", True), ("QL P101", True), ("QL-P101\x7f", True),  # space and DEL are not C0 controls
    ("QL\tP101", False), ("QL-P101\n", False), ("\x00QL", False), ("QL\x1f", False),
])
def test_sensor_ids_with_control_characters_are_refused(sid: str, ok: bool) -> None:
    # C0 control characters are U+0000..U+001F (ISO/IEC 6429, the C0 set)
    payload = binary(sid=sid.encode("utf-8"))
    if ok:
        assert decode(payload).sensor_id == sid
    else:
        with pytest.raises(InvalidField, match="control characters"):
            decode(payload)


def test_binary_header_layout_is_as_documented() -> None:
    payload = encode_binary(block([1.0, 2.0], sensor_id="AB", seq=42, t0_ns=-3, fs_hz=512.0, unit="m/s2"))
    magic, code, unit, sid_len, seq, t0, fs, scale, n = HEADER.unpack_from(payload)
    assert (magic, code, unit, sid_len, seq, t0, fs, scale, n) == (b"EVB\x01", 1, 1, 2, 42, -3, 512.0, 0.0, 2)
    assert payload[40:42] == b"AB" and struct.unpack("<2f", payload[42:]) == (1.0, 2.0)
    assert len(payload) == 40 + 2 + 8
