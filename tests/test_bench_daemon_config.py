"""The daemon benchmark's configuration: its points' plans, as the daemon groups them for analysis."""

from __future__ import annotations

from pathlib import Path

import pytest

from edgevib.bench.daemon import bench_config


@pytest.mark.parametrize(("channels", "plans"), [(12, 1), (12, 5), (40, 40)])
def test_points_cycle_through_distinct_plans(tmp_path: Path, channels: int, plans: int) -> None:
    cfg = bench_config(1883, channels, 0.0, str(tmp_path), plans=plans)  # (the configuration is only parsed)
    by_point = {p.id: cfg.plan(p.id) for p in cfg.points}
    assert len(by_point) == channels
    assert len(set(by_point.values())) == plans  # every geometry valid and distinct, cycled over the points
    # a plan's points are those c ≡ k (mod plans): the benchmark's signals and publishing do not depend on it
    ids = [p.id for p in cfg.points]
    assert all(by_point[ids[c]] == by_point[ids[c % plans]] for c in range(channels))
