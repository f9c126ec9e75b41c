"""Kernels are built once per distinct plan, also when an instance analyses more distinct plans than a small memo
would hold (issue 14 §4: a plant whose every machine has its own bearing has as many plans as points)."""

from __future__ import annotations

import numpy as np
import pytest

from edgevib.pipelines import analysis
from edgevib.pipelines.analysis import analyze_frames, make_plan


def test_each_of_many_distinct_plans_builds_its_kernel_once(monkeypatch: pytest.MonkeyPatch) -> None:
    built: list[object] = []
    init = analysis.AnalysisKernel.__init__
    monkeypatch.setattr(analysis.AnalysisKernel, "__init__", lambda self, plan: built.append(plan) or init(self, plan))
    plans = [make_plan(3200.0, 2048, orders=(1.0, 2.0 + 0.001 * i)) for i in range(300)]
    analysis.kernel_for.cache_clear()
    built.clear()  # (make_plan's own checks may build and keep kernels: counted from a clean memo)
    x = np.sin(2 * np.pi * 25.0 * np.arange(2048) / 3200.0)[None, :]
    for _ in range(2):  # round-robin over every plan, twice, as the daemon's batches do
        for plan in plans:
            assert analyze_frames(x, plan, shaft_hz=25.0)[0].shaft_hz == 25.0
    assert len(built) == len(plans)  # one kernel per distinct plan, none rebuilt
