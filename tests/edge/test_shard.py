"""Sharding points across instances: exactly one owner per point, stable across processes, roughly balanced."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys

import pytest

from edgevib.daemon.config import ShardConfig, validate_document
from edgevib.daemon.interfaces import ConfigError
from edgevib.daemon.shard import shard_of

IDS = [f"{m}-{end}-{axis}" for m in ("P-101", "P-102", "M-101", "M-102", "F-201", "B-301", "B-302")
       for end in ("DE", "NDE") for axis in ("H", "V", "A")]

# First 8 bytes of SHA-256 of the UTF-8 id, big-endian (the documented rule), computed once with
# hashlib.sha256 and written down so that a change of the rule shows up as a failure here:
#   P-101-DE-H  300e824f7a6b3097,  P-101-NDE-V f0de48a165649d0a,  M-101-DE-A 5f4f4256ba0b3637,
#   F-201-NDE-V 0690072d1e050bbf,  B-301-DE-H  354c85a38e0b8f32
EXPECTED = {  # id: (index of 2, index of 3, index of 5)
    "P-101-DE-H": (1, 0, 4),
    "P-101-NDE-V": (0, 1, 3),
    "M-101-DE-A": (1, 2, 2),
    "F-201-NDE-V": (1, 1, 4),
    "B-301-DE-H": (0, 0, 1),
}


@pytest.mark.parametrize("point_id", sorted(EXPECTED))
def test_fixed_assignment(point_id: str) -> None:
    assert tuple(shard_of(point_id, n) for n in (2, 3, 5)) == EXPECTED[point_id]
    # the same rule, spelled out with hashlib
    h = int.from_bytes(hashlib.sha256(point_id.encode()).digest()[:8], "big")
    assert [shard_of(point_id, n) for n in (2, 3, 5, 7, 64)] == [h % n for n in (2, 3, 5, 7, 64)]


@pytest.mark.parametrize("count", [1, 2, 3, 5, 8])
def test_every_point_owned_by_exactly_one_instance(count: int) -> None:
    shards = [ShardConfig(count=count, index=i) for i in range(count)]
    for pid in IDS:
        owners = [i for i, s in enumerate(shards) if s.owns(pid)]
        assert len(owners) == 1, (pid, owners)


def test_stable_across_processes_and_hash_seeds() -> None:
    code = ("import json, sys; from edgevib.daemon.shard import shard_of; "
            "print(json.dumps([shard_of(p, 7) for p in json.loads(sys.argv[1])]))")
    results = []
    for seed in ("1", "2"):
        env = dict(os.environ, PYTHONHASHSEED=seed)
        out = subprocess.run([sys.executable, "-c", code, json.dumps(IDS)], env=env, capture_output=True,
                             text=True, timeout=60, check=True).stdout
        results.append(json.loads(out))
    assert results[0] == results[1] == [shard_of(p, 7) for p in IDS]


def test_roughly_balanced() -> None:
    ids = [f"QL-{i:05d}-DE-H" for i in range(4000)]
    counts = [0, 0, 0, 0]
    for pid in ids:
        counts[shard_of(pid, 4)] += 1
    # Binomial(4000, 1/4): mean 1000, standard deviation sqrt(4000 * 1/4 * 3/4) = 27.4 (textbook formula);
    # a bound of five standard deviations cannot be missed by a uniform hash except by a broken rule.
    assert all(abs(c - 1000) < 5 * 27.4 for c in counts), counts


def test_adding_a_point_moves_no_other_point() -> None:
    before = {p: shard_of(p, 3) for p in IDS}
    after = {p: shard_of(p, 3) for p in [*IDS, "B-303-DE-H"]}
    assert all(after[p] == before[p] for p in IDS)


def test_explicit_list() -> None:
    shard = ShardConfig(points=("P-101-DE-H", "M-101-DE-A"))
    assert shard.owns("P-101-DE-H")
    assert not shard.owns("F-201-NDE-V")
    assert [p for p in IDS if shard.owns(p)] == ["P-101-DE-H", "M-101-DE-A"]  # in the order of the points


@pytest.mark.parametrize(
    ("raw", "path", "fragment"),
    [
        ("2/0", "site.shard", "must be a table"),
        ({"count": 2}, "site.shard", "missing index"),
        ({"index": 0}, "site.shard", "missing count"),
        ({"count": 2, "index": 2}, "site.shard.index", "2 is out of range: must be below count 2"),
        ({"count": 2, "index": -1}, "site.shard.index", "-1 is out of range: must be >= 0"),
        ({"count": 0, "index": 0}, "site.shard.count", "0 is out of range: must be >= 1"),
        ({"count": 10**6, "index": 0}, "site.shard.count", "1e+06 is out of range: must be <= 4096"),
        ({"count": 2.0, "index": 0}, "site.shard.count", "must be an integer, got float"),
        ({"count": True, "index": 0}, "site.shard.count", "must be an integer, got boolean"),
        ({"count": 2, "index": 0, "seed": 1}, "site.shard.seed", "unknown key"),
        ({"count": 2, "index": 0, "points": ["a"]}, "site.shard", "not both"),
        ({"points": []}, "site.shard.points", "must not be empty"),
        ({"points": "P-101-DE-H"}, "site.shard.points", "must be an array"),
        ({"points": ["P-101-DE-H", ""]}, "site.shard.points[1]", "must not be empty"),
        ({"points": ["P-101-DE-H", "P-101-DE-H"]}, "site.shard.points[1]", "listed twice"),
    ],
)
def test_invalid_shard_is_a_config_error(raw: object, path: str, fragment: str) -> None:
    with pytest.raises(ConfigError) as info:
        validate_document({"site": {"shard": raw}})
    assert info.value.path == path
    assert fragment in info.value.problem


def test_shard_count_must_be_positive() -> None:
    with pytest.raises(ValueError, match="at least 1, got 0"):
        shard_of("P-101-DE-H", 0)


def test_blocks_of_other_instances_points_are_not_rejections() -> None:
    """With wildcard subscriptions every instance of a shard set receives every block; the blocks of points that
    belong to another instance must be ignored quietly, or each instance reports (N-1)/N of its traffic rejected
    and the rejected-block alert fires (config/prometheus/edgevib-rules.yml)."""
    import numpy as np

    from edgevib.common.wire import Block
    from edgevib.daemon.config import parse_config
    from edgevib.daemon.frames import BlockIngest, Stats

    def pt(pid: str, sensor: str) -> dict[str, object]:
        return {"id": pid, "machine": "P-101", "axis": "horizontal", "source": "station-broker", "sensor": sensor,
                "fs_hz": 3200.0, "block_samples": 1024, "sensor_type": "mems", "bandwidth_hz": [0.0, 1000.0]}

    # EXPECTED above: P-101-DE-H is index 1 of 2, P-101-NDE-V index 0 of 2
    doc = {"site": {"name": "quarry-lane", "state_dir": "/tmp/edgevib-shard-test", "shard": {"count": 2, "index": 0}},
           "analysis": {"frame_samples": 4096, "overlap": 0.0},
           "sources": [{"name": "station-broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1",
                        "topics": ["fwb/quarry-lane/+/+/block"]}],
           "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0}],
           "points": [pt("P-101-DE-H", "QL-P101-DE-H"), pt("P-101-NDE-V", "QL-P101-NDE-V")]}
    cfg = parse_config(doc, ".")
    assert cfg.skipped_points == ("P-101-DE-H",)
    stats = Stats()
    ingest = BlockIngest(cfg, stats, on_frames=lambda _s: None)
    block = Block(sensor_id="QL-P101-DE-H", seq=0, t0_ns=0, fs_hz=3200.0, unit="g",
                  samples=np.zeros(1024, dtype=np.float32))
    ingest.block("station-broker", block, 0)
    assert not stats.blocks_rejected, stats.blocks_rejected
    assert stats.blocks_ignored == {("station-broker", "other_shard"): 1}
    assert stats.blocks_received == {"station-broker": 1}
    assert not ingest.streams["P-101-NDE-V"].blocks
    # a sensor that no instance of the set configures is still a rejection
    stray = Block(sensor_id="QL-P999-DE-H", seq=0, t0_ns=0, fs_hz=3200.0, unit="g",
                  samples=np.zeros(1024, dtype=np.float32))
    ingest.block("station-broker", stray, 0)
    assert stats.blocks_rejected == {("station-broker", "unknown_sensor"): 1}
    # the point this instance owns is accepted
    own = Block(sensor_id="QL-P101-NDE-V", seq=0, t0_ns=0, fs_hz=3200.0, unit="g",
                samples=np.zeros(1024, dtype=np.float32))
    ingest.block("station-broker", own, 0)
    assert ingest.streams["P-101-NDE-V"].blocks == 1
    assert stats.blocks_rejected == {("station-broker", "unknown_sensor"): 1}

    # the ignored count is exposed apart from the rejections
    from prometheus_client import CollectorRegistry, generate_latest

    from edgevib.daemon.sinks.prometheus import IndicatorCollector

    registry = CollectorRegistry()
    registry.register(IndicatorCollector("quarry-lane", stats, {}))
    text = generate_latest(registry).decode()
    assert 'edgevib_blocks_ignored_total{reason="other_shard",source="station-broker"} 1.0' in text
