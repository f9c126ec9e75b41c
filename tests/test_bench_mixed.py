"""Smoke test of the mixed-plans benchmark harness (timings are the benchmark's business, not asserted here)."""

from __future__ import annotations

import pytest

from edgevib.bench.mixed import main, plans_of, run
from edgevib.pipelines.analysis import batch_key


def test_plans_differ_in_bearing_only_and_rows_are_well_formed() -> None:
    plans = plans_of(4096, 5)
    # analysis.batch_key: the plans mix (one call), yet each is its own
    assert len(set(plans)) == 5 and len({batch_key(p) for p in plans}) == 1
    rows = run(4096, 3, target_s=0.005, repeats=1)
    assert [r["speed"] for r in rows] == ["given", "estimated"]
    for r in rows:
        assert r["mixed_us_per_frame"] > 0 and r["per_plan_us_per_frame"] > 0 and r["one_plan_us_per_frame"] > 0
        assert r["per_plan_over_mixed"] == pytest.approx(r["per_plan_us_per_frame"] / r["mixed_us_per_frame"],
                                                         rel=0.05)


def test_bad_arguments_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--samples", "100"]) == 2
    assert "--samples" in capsys.readouterr().err
