"""Smoke test of the pipeline benchmark harness (timings are the benchmark's business, not asserted here)."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest

from edgevib.bench.__main__ import main, run


def test_bench_rows_are_well_formed() -> None:
    rows = run(sizes=(4096,), channels=(1, 2), target_s=0.005, repeats=1)
    assert [(r["samples"], r["channels"]) for r in rows] == [(4096, 1), (4096, 2)]
    for r in rows:
        assert set(r) == {"samples", "channels", "pipeline_us_per_block", "rfft_us_per_block", "ratio",
                          "scipy_rfft_us_per_block", "peer_us_per_block", "peer_ratio",
                          "pipeline_f32_us_per_block", "ratio_f32", "band_auto_us_per_frame",
                          "ratio_with_band_auto", "ratio_target", "ratio_over_target", "peer_ratio_target",
                          "health_us_per_block", "health_impulsive_us_per_block", "transforms_us_per_block",
                          "transforms_ratio"}
        assert r["pipeline_us_per_block"] > 0 and r["rfft_us_per_block"] > 0
        assert r["band_auto_us_per_frame"] > 0 and r["health_us_per_block"] > 0
        assert r["health_impulsive_us_per_block"] > 0
        assert r["ratio_with_band_auto"] >= r["ratio"] * 0.98
        assert r["ratio_target"] is None and r["ratio_over_target"] is None  # targets are set at 16384 samples
        assert r["ratio"] == pytest.approx(r["pipeline_us_per_block"] / r["rfft_us_per_block"], rel=0.02)
        assert r["peer_ratio"] == pytest.approx(r["peer_us_per_block"] / r["pipeline_us_per_block"], rel=0.02)
        assert r["transforms_ratio"] == pytest.approx(r["transforms_us_per_block"] / r["rfft_us_per_block"], rel=0.02)


def test_bench_json_lists_every_case(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    import edgevib.bench.__main__ as bench

    monkeypatch.setattr(bench, "run", lambda: run(sizes=(4096,), channels=(1,), target_s=0.005, repeats=1))
    assert main(["--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows[0]["samples"] == 4096 and rows[0]["channels"] == 1


def test_the_fft_floor_makes_the_transforms_analyze_makes(monkeypatch: pytest.MonkeyPatch) -> None:
    """The floor times the same transforms (kind, dtype, shape, length) as the pipeline, whose calls are recorded
    through scipy.fft while it analyses the benchmark's frames."""
    import scipy.fft

    import edgevib.bench.__main__ as bench
    from edgevib.pipelines.analysis import AnalysisKernel, default_envelope_band, make_plan

    calls: list[tuple[str, str, tuple[int, ...], int]] = []

    def recorder(name: str) -> object:
        real = getattr(scipy.fft, name)

        def record(x: np.ndarray, *args: Any, **kwargs: Any) -> Any:
            n = int(kwargs.get("n") or (args[0] if args else x.shape[-1]))
            calls.append((name, x.dtype.name, x.shape[:-1], n))
            return real(x, *args, **kwargs)
        return record

    for name in ("rfft", "ifft", "irfft"):
        monkeypatch.setattr(scipy.fft, name, recorder(name))
    n, c = 4096, 3
    band = default_envelope_band(bench.FS_HZ, (0.5, 10_000.0), shaft_hz_max=60.0)
    plan = make_plan(bench.FS_HZ, n, velocity_band_hz=(max(10.0, 2 * bench.FS_HZ / n), 1000.0),
                     envelope_band_hz=band, bearing=bench.BEARING, speed_range_hz=(15.0, 60.0))
    kernel = AnalysisKernel(plan)
    x = bench._frames(n, c)
    kernel.analyze(x)
    made = sorted(calls)
    calls.clear()
    bench.pipeline_transforms(kernel.transform_lengths, x)
    assert sorted(calls) == made and len(made) == 4
