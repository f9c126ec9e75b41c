"""Float32 frames without copies: decoded float32 payloads are read-only views, a frame that is exactly one block
is that block's array, and the assembled (copying) path yields the same samples."""

from __future__ import annotations

import numpy as np

from edgevib.common.wire import Block, decode, encode_binary, encode_json
from edgevib.daemon.config import Config, parse_config
from edgevib.daemon.frames import BlockIngest, Stats

FS = 25600.0
N = 16384
T0 = 1_764_633_600_000_000_000


def config(overlap: float) -> Config:
    return parse_config({
        "site": {"name": "quarry-lane"},
        "analysis": {"frame_samples": N, "overlap": overlap, "queue_frames": 10},
        "sources": [{"name": "broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1883", "topics": ["fwb/#"]}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "broker", "sensor": "QL-P101-DE-H",
                    "fs_hz": FS, "block_samples": N}],
    })


def _payload(seq: int, n: int, values: np.ndarray | None = None) -> bytes:
    x = np.arange(seq * n, (seq + 1) * n, dtype=np.float64) if values is None else values
    return encode_binary(Block("QL-P101-DE-H", seq, T0 + round(seq * n * 1e9 / FS), FS, "g", x))


def test_float32_payloads_decode_to_read_only_float32_views() -> None:
    payload = _payload(0, 256)
    b = decode(payload)
    assert b.samples.dtype == np.float32 and not b.samples.flags.writeable
    assert np.shares_memory(b.samples, np.frombuffer(payload, dtype=np.uint8))  # no copy of the samples
    j = decode(encode_json(Block("S", 0, 0, FS, "g", np.arange(8.0)), "i16le-b64"))
    assert j.samples.dtype == np.float64 and not j.samples.flags.writeable


def test_finite_float32_block_whose_sum_overflows_is_accepted() -> None:
    # 2 × 3e38 overflows float32 (max 3.4028e38, IEEE 754 binary32) though every sample is finite
    b = decode(encode_binary(Block("S", 0, 0, FS, "g", np.array([3e38, 3e38, 1.0]))))
    np.testing.assert_array_equal(b.samples, np.array([3e38, 3e38, 1.0], dtype=np.float32))


def test_a_frame_of_one_block_is_the_block_itself() -> None:
    stats = Stats()
    ing = BlockIngest(config(0.0), stats)
    blocks = [decode(_payload(seq, N)) for seq in range(3)]
    for b in blocks:
        ing.block("broker", b, 0)
    out = list(ing.streams["P-101-DE-H"].queue)
    assert len(out) == 3
    for k, (f, b) in enumerate(zip(out, blocks, strict=True)):
        assert f.samples is b.samples  # no copy
        assert f.t_end_ns == T0 + round((k + 1) * N * 1e9 / FS)


def test_copied_and_zero_copy_frames_hold_the_same_samples() -> None:
    # overlap 0.5 takes the assembling path; overlap 0 with block == frame the zero-copy one
    whole = BlockIngest(config(0.0), Stats())
    assembled = BlockIngest(config(0.5), Stats())
    for seq in range(3):
        whole.payload("broker", None, _payload(seq, N), 0)
        assembled.payload("broker", None, _payload(seq, N), 0)
    a = list(whole.streams["P-101-DE-H"].queue)
    b = list(assembled.streams["P-101-DE-H"].queue)[::2]  # every other overlapping frame starts on a block
    assert len(a) == 3 and len(b) == 3
    for fa, fb in zip(a, b, strict=True):
        assert fa.samples.dtype == fb.samples.dtype == np.float32 and not fb.samples.flags.writeable
        np.testing.assert_array_equal(fa.samples, fb.samples)
        assert fa.t_end_ns == fb.t_end_ns
