"""Display spectra of one frame: their scaling against closed forms (a sine's r.m.s., FIELD_NOTES §5), their
markers against the indicators of the same frame, and the CWRU outer-race record (datasets README)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import scipy.io

from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.spectrum_views import envelope_view, spectrum_view
from edgevib.pipelines.types import BearingGeometry, PlanError

FS, N = 25600.0, 16384
T = np.arange(N) / FS
B6205 = BearingGeometry(9, 0.3126, 1.537, 0.0)  # CWRU drive-end bearing (datasets README)


def test_acceleration_and_velocity_lines_read_rms() -> None:
    # handbook: a sine of amplitude A reads A/√2 r.m.s.; its velocity A·gₙ/(2πf)/√2 (1 g at 50 Hz: 22.07 mm/s)
    f = 32 * FS / N * 1.0  # on a line (50 Hz)
    x = np.sin(2 * np.pi * f * T) + 0.5 * np.sin(2 * np.pi * 3 * f * T)
    plan = make_plan(FS, N)
    acc = spectrum_view(x, plan, shaft_hz=f, max_frequency_hz=500.0)
    assert acc.unit == "g" and acc.freqs_hz[32] == pytest.approx(f)
    assert acc.amplitude[32] == pytest.approx(1 / math.sqrt(2), rel=1e-6)
    assert acc.amplitude[96] == pytest.approx(0.5 / math.sqrt(2), rel=1e-6)
    vel = spectrum_view(x, plan, shaft_hz=f, quantity="velocity", max_frequency_hz=500.0)
    assert vel.unit == "mm/s" and vel.amplitude[32] == pytest.approx(22.07, abs=0.01)  # FIELD_NOTES §5
    assert vel.amplitude[:6].max() == 0.0  # below the 10 Hz velocity band edge: zero, like the indicators
    # order markers carry the indicators' own values
    ind = analyze_frames(x, plan, [f])[0]
    by_key = {m.key: m for m in vel.orders}
    assert by_key["1x"].velocity_rms_mm_s == ind.orders_mm_s["1x"]
    assert by_key["1x"].found_hz == pytest.approx(f) and by_key["3x"].found_hz == pytest.approx(3 * f)
    lo, hi = by_key["2x"].window_hz
    assert lo <= 2 * f <= hi


def test_envelope_view_of_the_cwru_outer_race_record(cwru_dir: Path) -> None:
    # datasets README: 130.mat, BPFO 107.61 Hz (E1: 0.6307 g) at the stored 1796 r/min; the view's markers and
    # verdicts are those of the indicators of the same frame
    mat = scipy.io.loadmat(cwru_dir / "cwru_12k_de_outer_007_0hp.mat")
    x = mat["X130_DE_time"].reshape(-1)
    shaft = float(mat["X130RPM"].reshape(-1)[0]) / 60.0
    plan = make_plan(12000.0, x.size, envelope_band_hz=(2000.0, 5000.0), bearing=B6205,
                     speed_range_hz=(shaft * 0.97, shaft * 1.03))
    view = envelope_view(x, plan, shaft)
    assert view is not None and view.detected == ("bpfo",) and view.band_hz == (2000.0, 5000.0)
    ind = analyze_frames(x, plan, [shaft])[0]
    bpfo = next(m for m in view.families if m.family == "bpfo")
    assert bpfo.detected and bpfo.amplitude_g == ind.envelope["bpfo"].amplitude_g
    fund = bpfo.lines[0]
    assert fund.kind == "fundamental" and fund.found_hz == pytest.approx(107.61, abs=0.5)
    assert fund.window_hz[0] <= fund.found_hz <= fund.window_hz[1] and fund.counted
    assert sum(m.counted for m in bpfo.lines if m.kind in ("fundamental", "harmonic")) == \
        ind.envelope["bpfo"].harmonics_found
    assert [m.order for m in bpfo.lines if m.kind == "sideband"] == [-2.0, -1.0, 1.0, 2.0]
    k = round(fund.found_hz / view.freqs_hz[1])  # type: ignore[operator]
    assert view.amplitude_g[k] == pytest.approx(0.6307, rel=0.2)  # E1 check value and tolerance
    assert view.depth[k] == pytest.approx(ind.envelope["bpfo"].depth, rel=1e-6)
    assert view.shaft_lines[0].expected_hz == pytest.approx(shaft)


def test_envelope_view_needs_a_bearing_and_a_speed() -> None:
    with pytest.raises(PlanError, match="no envelope view"):
        envelope_view(np.zeros(N), make_plan(FS, N), 25.0)
    rng = np.random.default_rng(0)
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    assert envelope_view(rng.normal(size=N), plan) is None  # noise: no speed, nothing to mark
