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


def test_estimated_speeds_leave_the_machines_a_range_only(tmp_path: Path) -> None:
    fixed = bench_config(1883, 4, 0.0, str(tmp_path), plans=2)
    free = bench_config(1883, 4, 0.0, str(tmp_path), plans=2, estimated=True)
    assert all(m.speed_rpm == 1480.0 for m in fixed.machines)
    assert all(m.speed_rpm is None and m.speed_range_hz == (15.0, 50.0) for m in free.machines)  # 900–3000 r/min
    # the pumps' 1480 r/min (24.7 Hz) lies inside the range, so it can be estimated; the plans differ only in the
    # bearing (and so mix), as with a fixed speed
    assert len({free.plan(p.id) for p in free.points}) == 2
