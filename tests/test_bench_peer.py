"""The benchmark's peer (the straightforward per-block scipy implementation) computes what the pipeline computes.

The peer takes the textbook route — ``scipy.stats`` moments, FFT integration, ``sosfiltfilt`` and
``scipy.signal.hilbert`` for the envelope — so agreement here checks that the benchmark compares like with like,
and is an outside check of the pipeline's shortcuts (windowing in the frequency domain, the decimated analytic
signal) against scipy's general routines.  No timing is asserted.
"""

from __future__ import annotations

import numpy as np
import pytest

from edgevib.bench.__main__ import BEARING, FS_HZ, _frames, peer_plan
from edgevib.bench.peer import peer_analyze, peer_block
from edgevib.pipelines.analysis import AnalysisKernel, default_envelope_band, make_plan


@pytest.fixture(scope="module")
def case() -> tuple[list[dict[str, object]], list[object]]:
    band = default_envelope_band(FS_HZ, (0.5, 10_000.0), shaft_hz_max=60.0)
    plan = make_plan(FS_HZ, 16384, envelope_band_hz=band, bearing=BEARING, speed_range_hz=(15.0, 60.0))
    x = _frames(16384, 3)
    peer = peer_plan(plan)
    return peer_analyze(x, peer, peer.design()), list(AnalysisKernel(plan).analyze(x))


def test_time_domain_moments_agree(case: tuple[list[dict[str, object]], list[object]]) -> None:
    # scipy.stats.kurtosis(fisher=False) and skew are the reference (population moments)
    peer, pipe = case
    for p, r in zip(peer, pipe, strict=True):
        for key in ("acceleration_rms_g", "acceleration_peak_g", "acceleration_peak_to_peak_g", "crest_factor",
                    "kurtosis", "skewness", "mean_g"):
            assert getattr(r, key) == pytest.approx(p[key], rel=1e-5, abs=1e-9), key


def test_velocity_speed_and_orders_agree(case: tuple[list[dict[str, object]], list[object]]) -> None:
    # FFT integration over the same band (the peer's rectangular band edges vs the pipeline's Hann lines: ~1 %)
    peer, pipe = case
    df = FS_HZ / 16384
    for p, r in zip(peer, pipe, strict=True):
        assert r.velocity_rms_mm_s == pytest.approx(p["velocity_rms_mm_s"], rel=0.02)
        # the peer's peak is over the whole block, where the circular integration's end mismatch overshoots; the
        # pipeline reads the central half: close, and never above the peer's
        assert p["velocity_peak_mm_s"] * 0.8 <= r.velocity_peak_mm_s <= p["velocity_peak_mm_s"] * 1.005
        assert abs(r.shaft_hz - p["shaft_hz"]) <= df  # the peer reads the nearest line, the pipeline refines
        # the 1× line (the dominant one); the peer's single line loses up to the Hann scalloping loss (~15 %)
        assert r.orders_mm_s["1x"] == pytest.approx(p["orders_mm_s"]["1x"], rel=0.16)


def test_envelope_bpfo_agrees(case: tuple[list[dict[str, object]], list[object]]) -> None:
    # the frames carry outer-race impacts at 3.585 × 24.7 Hz ringing at 7 kHz, inside the default band
    peer, pipe = case
    for p, r in zip(peer, pipe, strict=True):
        e, q = r.envelope["bpfo"], p["envelope"]["bpfo"]
        assert e.frequency_hz == pytest.approx(q["frequency_hz"], abs=FS_HZ / 16384)
        assert e.amplitude_g == pytest.approx(q["amplitude_g"], rel=0.1)
        assert e.harmonics_found == q["harmonics_found"] == 3


def test_peer_rejects_a_block_of_the_wrong_length() -> None:
    band = default_envelope_band(FS_HZ, (0.5, 10_000.0), shaft_hz_max=60.0)
    plan = peer_plan(make_plan(FS_HZ, 16384, envelope_band_hz=band, bearing=BEARING, speed_range_hz=(15.0, 60.0)))
    with pytest.raises(ValueError, match="16384"):
        peer_block(np.zeros(8192), plan, plan.design())
