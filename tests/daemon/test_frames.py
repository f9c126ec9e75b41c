"""Ingest: frame assembly with overlap, continuity (gap, duplicate, out-of-order), rejects by reason,
drop-oldest backpressure, unit conversion and EW trends."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from edgevib.common.wire import Block, encode_binary, encode_json
from edgevib.daemon.config import Config, parse_config
from edgevib.daemon.frames import BlockIngest, EwTrend, LatencyHistogram, Stats

FS = 25600.0
BLOCK = 4096
NS_PER_BLOCK = round(BLOCK * 1e9 / FS)


def config(frame: int = 16384, overlap: float = 0.5, queue: int = 4, source: dict[str, Any] | None = None,
           **point: Any) -> Config:
    doc = {
        "site": {"name": "quarry-lane"},
        "analysis": {"frame_samples": frame, "overlap": overlap, "queue_frames": queue},
        "sources": [{"name": "broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1883", "topics": ["fwb/#"],
                     **(source or {})}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0}],
        "points": [dict({"id": "P-101-DE-H", "machine": "P-101", "source": "broker", "sensor": "QL-P101-DE-H",
                         "fs_hz": FS, "block_samples": BLOCK}, **point)],
    }
    return parse_config(doc)


def block(seq: int, values: np.ndarray | None = None, *, sensor: str = "QL-P101-DE-H", t0_ns: int | None = None,
          fs: float = FS, unit: str = "g", n: int = BLOCK) -> Block:
    x = np.arange(seq * n, (seq + 1) * n, dtype=np.float64) if values is None else values
    return Block(sensor, seq, 1_764_633_600_000_000_000 + seq * NS_PER_BLOCK if t0_ns is None else t0_ns, fs, unit, x)


def make(cfg: Config | None = None) -> tuple[BlockIngest, Stats]:
    stats = Stats()
    return BlockIngest(cfg or config(), stats), stats


def frames(ing: BlockIngest) -> list[Any]:
    return list(ing.streams["P-101-DE-H"].queue)


def test_overlapping_frames_hold_the_right_samples() -> None:
    ing, stats = make(config(queue=100))
    for seq in range(12):
        ing.block("broker", block(seq), 0)
    out = frames(ing)
    # 12 blocks × 4096 = 49152 samples; frames of 16384 every 8192 → (49152 − 16384) / 8192 + 1 = 5 frames
    assert len(out) == 5
    for k, f in enumerate(out):
        np.testing.assert_array_equal(f.samples, np.arange(k * 8192, k * 8192 + 16384, dtype=np.float64))
        assert f.t_end_ns == 1_764_633_600_000_000_000 + round((k * 8192 + 16384) * 1e9 / FS)
    assert stats.blocks_received["broker"] == 12 and not stats.blocks_rejected


def test_no_overlap() -> None:
    ing, _ = make(config(overlap=0.0, queue=100))
    for seq in range(8):
        ing.block("broker", block(seq), 0)
    out = frames(ing)
    assert len(out) == 2
    np.testing.assert_array_equal(out[1].samples[:3], [16384.0, 16385.0, 16386.0])


def test_gap_restarts_assembly_and_is_counted() -> None:
    ing, stats = make(config(queue=100))
    for seq in (0, 1, 2, 4, 5, 6, 7):  # seq 3 lost
        ing.block("broker", block(seq), 0)
    out = frames(ing)
    assert stats.gaps["P-101-DE-H"] == 1
    assert len(out) == 1  # only blocks 4..7 form a frame; the 3 blocks before the gap are discarded
    np.testing.assert_array_equal(out[0].samples[:2], [4 * BLOCK, 4 * BLOCK + 1])
    assert not stats.blocks_rejected


def test_time_jump_at_consecutive_seq_is_a_gap() -> None:
    ing, stats = make()
    ing.block("broker", block(0), 0)
    ing.block("broker", block(1, t0_ns=block(1).t0_ns + 10 * NS_PER_BLOCK), 0)
    assert stats.gaps["P-101-DE-H"] == 1


@pytest.mark.parametrize(("second", "reason"), [
    (lambda: block(1), "duplicate"),
    (lambda: block(0), "out_of_order"),
    (lambda: block(2, fs=12800.0), "wrong_sample_rate"),
    (lambda: block(2, np.zeros(1000), n=1000), "wrong_length"),
    (lambda: block(2, sensor="QL-UNKNOWN"), "unknown_sensor"),
])
def test_rejects_by_reason(second: Any, reason: str) -> None:
    ing, stats = make()
    ing.block("broker", block(0), 0)
    ing.block("broker", block(1), 0)
    ing.block("broker", second(), 0)
    assert stats.blocks_rejected == {("broker", reason): 1}
    ing.block("broker", block(2), 0)  # the stream continues unharmed
    assert ing.streams["P-101-DE-H"].last_seq == 2


def test_wire_errors_counted_by_reason() -> None:
    ing, stats = make()
    good = encode_json(block(0))
    ing.payload("broker", "fwb/x", b"\x00garbage", 0)
    ing.payload("broker", "fwb/x", good[:-20], 0)
    ing.payload("broker", "fwb/x", good.replace(b'"data":"', b'"data":"!!'), 0)
    nan = encode_binary(block(0, np.full(BLOCK, np.nan)))
    ing.payload("broker", "fwb/x", nan, 0)
    ing.payload("broker", "fwb/x", b"{" + b" " * (5 * 1024 * 1024) + b"}", 0)
    ing.payload("broker", "fwb/x", good, 0)
    assert stats.blocks_rejected == {("broker", "malformed"): 3, ("broker", "non_finite"): 1,
                                     ("broker", "too_large"): 1}
    assert stats.blocks_received["broker"] == 6  # every payload, before validation


def test_device_restart_with_time_moving_forward_is_a_gap_not_a_reject() -> None:
    ing, stats = make()
    for seq in range(3):
        ing.block("broker", block(seq), 0)
    ing.block("broker", block(0, t0_ns=block(3).t0_ns), 0)
    assert not stats.blocks_rejected and stats.gaps["P-101-DE-H"] == 1


def test_unit_m_s2_is_converted_to_g() -> None:
    ing, _ = make(config(frame=8192, overlap=0.0, queue=10))
    ing.block("broker", block(0, np.full(BLOCK, 9.80665), unit="m/s2"), 0)
    ing.block("broker", block(1, np.full(BLOCK, 9.80665), unit="m/s2"), 0)
    # standard gravity gₙ = 9.80665 m/s² exactly (3rd CGPM, 1901)
    np.testing.assert_allclose(frames(ing)[0].samples, 1.0, rtol=1e-15)


def test_drop_oldest_when_analysis_falls_behind() -> None:
    ing, stats = make(config(overlap=0.0, queue=2))
    for seq in range(4 * 5):  # five frames of four blocks each, nobody analysing
        ing.block("broker", block(seq), 0)
    out = frames(ing)
    assert len(out) == 2 and stats.frames_dropped["P-101-DE-H"] == 3
    np.testing.assert_array_equal([f.samples[0] for f in out], [3 * 16384.0, 4 * 16384.0])  # newest two kept


def test_a_long_block_keeps_all_its_frames_with_a_short_queue() -> None:
    # One block of 65,536 samples cut into frames of 8,192 with half overlap: (65536 − 8192) / 4096 + 1 = 15
    # frames (common practice: overlapped framing, hop = frame × (1 − overlap)). With queue_frames = 4 the queue
    # still holds at least two blocks' worth, so none is dropped while nothing has had time to analyse them.
    long_block = 65536
    ing, stats = make(config(frame=8192, overlap=0.5, queue=4, block_samples=long_block))
    t0 = 1_764_633_600_000_000_000
    ns = round(long_block * 1e9 / FS)
    ing.block("broker", block(0, n=long_block, t0_ns=t0), 0)
    out = frames(ing)
    assert len(out) == 15 and stats.frames_dropped.get("P-101-DE-H", 0) == 0
    np.testing.assert_array_equal([f.samples[0] for f in out], [k * 4096.0 for k in range(15)])
    for seq in range(1, 4):  # four blocks and nobody analysing: now the oldest go, counted
        ing.block("broker", block(seq, n=long_block, t0_ns=t0 + seq * ns), 0)
    # (4 × 65536 − 8192) / 4096 + 1 = 63 frames in all, the newest 32 kept
    assert len(frames(ing)) == 32 and stats.frames_dropped["P-101-DE-H"] == 63 - 32


def test_sensor_from_topic_level() -> None:
    cfg = config(source={"sensor_from": "topic:2"})
    ing, stats = make(cfg)
    ing.block("broker", block(0, sensor="ignored"), 0, topic="fwb/quarry-lane/QL-P101-DE-H/block")
    ing.block("broker", block(1, sensor="QL-P101-DE-H"), 0, topic="fwb/quarry-lane/other/block")
    assert ing.streams["P-101-DE-H"].blocks == 1
    assert stats.blocks_rejected == {("broker", "unknown_sensor"): 1}


def test_connection_counts_reconnects() -> None:
    ing, stats = make()
    ing.connection("broker", True)
    ing.connection("broker", False)
    ing.connection("broker", True)
    ing.connection("broker", True)
    assert stats.reconnects["broker"] == 1 and stats.connected["broker"] is True


def test_speed_tag_converted_and_expires() -> None:
    doc = {
        "sources": [{"name": "broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1883", "topics": ["fwb/#"]}],
        "machines": [{"id": "F-201", "speed_tag": {"source": "broker", "topic": "fwb/F-201/speed", "unit": "rpm",
                                                   "max_age_s": 5.0}, "speed_range_rpm": [300.0, 1800.0]}],
        "points": [{"id": "F-201-NDE-V", "machine": "F-201", "source": "broker", "fs_hz": 3200.0,
                    "block_samples": 3200, "sensor_type": "mems"}],
    }
    cfg = parse_config(doc)
    now = [10_000_000_000]
    ing = BlockIngest(cfg, Stats(), clock_ns=lambda: now[0])
    m = cfg.machines[0]
    assert ing.speed_hz(m) is None
    ing.speed("broker", "fwb/F-201/speed", 1200.0, now[0])
    assert ing.speed_hz(m) == pytest.approx(20.0)  # 1200 r/min = 20 Hz
    now[0] += 6_000_000_000
    assert ing.speed_hz(m) is None


def test_ew_trend_half_life() -> None:
    tr = EwTrend(halflife_s=10.0)
    tr.update({"v": 0.0}, 0.0)
    out = tr.update({"v": 1.0, "none": None}, 10.0)
    # after one half-life the trend has moved half-way to a new constant value (definition of half-life)
    assert out["v"] == pytest.approx(0.5)
    assert "none" not in out


def test_latency_histogram_cumulative() -> None:
    h = LatencyHistogram((0.1, 1.0))
    for v in (0.05, 0.5, 0.5, 3.0):
        h.observe(v)
    assert h.cumulative() == [("0.1", 1), ("1.0", 3), ("+Inf", 4)]
    assert h.sum_s == pytest.approx(4.05)


def test_rate_limited_logger_suppresses_and_reports() -> None:
    from structlog.testing import capture_logs

    from edgevib.daemon.logs import RateLimitedLogger, get_logger

    now = [0.0]
    rl = RateLimitedLogger(get_logger("test"), interval_s=10.0, clock=lambda: now[0])
    with capture_logs() as logs:
        for _ in range(5):
            rl.warning("k", "block rejected", reason="malformed")
        rl.warning("other", "block rejected", reason="too_large")
        now[0] = 11.0
        rl.warning("k", "block rejected", reason="malformed")
    assert [(e["reason"], e.get("suppressed")) for e in logs] == [("malformed", None), ("too_large", None),
                                                                  ("malformed", 4)]


def test_implausible_speed_tag_reading_is_rejected_and_counted() -> None:
    # A reading above what the machine can turn (above its speed range's top by more than 20 %, overspeed trips
    # being set near 110–115 % of the maximum continuous speed: common practice) is a wrong tag, unit or
    # transmitter fault; it must not move the order lines (200000 r/min and 1e308 were once used as is).
    doc = {
        "sources": [{"name": "broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1883", "topics": ["fwb/#"]}],
        "machines": [
            {"id": "F-201", "speed_tag": {"source": "broker", "topic": "fwb/F-201/speed"},
             "speed_range_rpm": [300.0, 1800.0]},
            # no configured range: only the configuration's 120 000 r/min bound applies
            {"id": "C-301", "speed_tag": {"source": "broker", "topic": "fwb/C-301/speed", "unit": "hz"}},
        ],
        "points": [{"id": "F-201-NDE-V", "machine": "F-201", "source": "broker", "fs_hz": 3200.0,
                    "block_samples": 3200, "sensor_type": "mems"},
                   {"id": "C-301-DE-H", "machine": "C-301", "source": "broker", "fs_hz": 3200.0,
                    "block_samples": 3200, "sensor_type": "mems"}],
    }
    cfg = parse_config(doc)
    now = [10_000_000_000]
    stats = Stats()
    ing = BlockIngest(cfg, stats, clock_ns=lambda: now[0])
    fan, comp = cfg.machines
    ing.speed("broker", "fwb/F-201/speed", 1500.0, now[0])
    assert ing.speed_hz(fan) == pytest.approx(25.0)
    warnings: list[tuple[str, dict[str, Any]]] = []
    ing.log.warning = lambda key, msg, **kw: warnings.append((msg, kw))  # type: ignore[method-assign]
    for bad in (200000.0, 1e308, 2161.0):  # 2161 > 1.2 × 1800 = 2160 r/min
        ing.speed("broker", "fwb/F-201/speed", bad, now[0])
        assert ing.speed_hz(fan) == pytest.approx(25.0)  # the last plausible reading stands
    assert stats.blocks_rejected == {("broker", "invalid_speed"): 3}
    _msg, kw = warnings[0]
    assert "200000" in kw["detail"] and "F-201" in kw["detail"] and kw["point"] == "F-201-NDE-V"
    ing.speed("broker", "fwb/F-201/speed", 2100.0, now[0])  # within the margin: an overspeed is still reported
    assert ing.speed_hz(fan) == pytest.approx(35.0)
    ing.speed("broker", "fwb/C-301/speed", 1999.0, now[0])  # 1999 Hz = 119 940 r/min: below the bound
    assert ing.speed_hz(comp) == pytest.approx(1999.0)
    ing.speed("broker", "fwb/C-301/speed", 2001.0, now[0])  # 120 060 r/min
    assert ing.speed_hz(comp) == pytest.approx(1999.0)
    assert stats.blocks_rejected == {("broker", "invalid_speed"): 4}
