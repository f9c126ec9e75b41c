"""The sensor-health spike test's robust statistics (edgevib.pipelines.health) against numpy's own median."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import scipy.io

from edgevib.pipelines.health import HealthSpec, _medians, _nearest_distance, _spike_screen, check_health


def _rows(kind: str, rows: int, n: int, rng: np.random.Generator) -> np.ndarray:
    if kind == "gaussian":
        return rng.normal(size=(rows, n))
    if kind == "quantized":  # many ties, as a coarse converter gives
        return np.round(rng.normal(size=(rows, n)) * 3.0) / 3.0
    if kind == "constant":
        return np.full((rows, n), 0.25)
    if kind == "impacts":  # sparse impacts on a quiet floor (the rows the spike screen cannot rule out)
        x = rng.normal(0.0, 0.01, (rows, n))
        x[:, :: int(rng.integers(2, 400))] += 1.0
        return x
    if kind == "half-constant":  # the middle ranks sit in a run of equal values
        x = rng.exponential(size=(rows, n))
        x[:, : n // 2] = 5.0
        return x
    return np.sort(rng.normal(size=(rows, n)), axis=1)  # "sorted": the fixed subsample sees an ordered row


@pytest.mark.parametrize("kind", ["gaussian", "quantized", "constant", "impacts", "half-constant", "sorted"])
@pytest.mark.parametrize("n", [16, 17, 1023, 1024, 4097, 16384, 16385])
def test_row_medians_equal_numpys_median(kind: str, n: int) -> None:
    # reference: numpy.median (the middle sample, or the mean of the middle two); the values must be equal, not
    # close: the spike test's verdicts compare against them
    rng = np.random.default_rng(n)
    x = _rows(kind, 3, n, rng)
    got = _medians(x, np.empty(x.shape, dtype=np.bool_))
    assert np.array_equal(got, np.median(x, axis=1, keepdims=True))
    dev = np.abs(x - got)
    assert np.array_equal(_medians(dev, np.empty(x.shape, dtype=np.bool_)), np.median(dev, axis=1, keepdims=True))


@pytest.mark.parametrize("kind", ["gaussian", "quantized", "constant", "impacts", "half-constant", "sorted"])
@pytest.mark.parametrize(("m", "k"), [(1024, 462), (1024, 0), (1024, 1023), (256, 100), (7, 3)])
def test_nearest_distance_equals_the_order_statistic_of_sorted_distances(kind: str, m: int, k: int) -> None:
    # reference: numpy.sort of |sub − centre| taken at rank k; equal values, not close (the spike screen's MAD
    # bound is built from them), with the centre a sample of the row as the screen takes it and one that is not
    rng = np.random.default_rng(m + k)
    sub = np.sort(_rows(kind, 4, m, rng), axis=1)
    for centre in (sub[:, m // 2], sub[:, m // 2] + 0.37):
        expected = np.sort(np.abs(sub - centre[:, None]), axis=1)[:, k]
        assert np.array_equal(_nearest_distance(sub, centre, k), expected)


def test_spike_verdicts_match_a_direct_median_and_mad_count() -> None:
    # an electrical spike (one sample) among bearing impacts that ring: the count follows the definition computed
    # directly with numpy (median, MAD × 1.4826 — common practice —, isolation within ± 8 samples)
    rng = np.random.default_rng(11)
    n = 16384
    x = rng.normal(0.0, 0.01, (4, n))
    ring = 0.5 * np.exp(-np.arange(40) / 8.0) * np.sin(2.0 * np.pi * 0.27 * np.arange(40))
    for start in range(100, n - 100, 700):
        x[:, start : start + 40] += ring
    x[1, 5000] += 2.0
    x[3, [3000, 9000, 12000]] += 1.5
    health = check_health(x, 25_600.0, screen=False)
    med = np.median(x, axis=1, keepdims=True)
    dev = np.abs(x - med)
    sigma = 1.4826 * np.median(dev, axis=1, keepdims=True)
    expected = []
    for i in range(4):
        big = np.flatnonzero(dev[i] > 10.0 * sigma[i, 0])
        big = big[(big >= 8) & (big < n - 8)]
        lone = [k for k in big if max(np.max(dev[i, k - 8 : k]), np.max(dev[i, k + 1 : k + 9])) < dev[i, k] / 3.0]
        expected.append(len(lone))
    assert [h.spike_count for h in health] == expected
    assert expected == [0, 1, 0, 3]


def _reference_spikes(x: np.ndarray, spike_sigma: float = 10.0) -> list[int]:
    """The spike count by its definition, straight from numpy.median (the reference): samples farther than
    ``spike_sigma`` × 1.4826 × MAD from the median (σ from the MAD of a Gaussian: common practice), away from the
    frame edges, with nothing of a third of their deviation within ± 8 samples."""
    x = np.asarray(x, dtype=np.float64)
    n = x.shape[1]
    med = np.median(x, axis=1, keepdims=True)
    dev = np.abs(x - med)
    sigma = 1.4826 * np.median(dev, axis=1)
    out = []
    for i in range(x.shape[0]):
        big = np.flatnonzero(dev[i] > spike_sigma * sigma[i]) if sigma[i] > 0 else np.array([], dtype=int)
        big = big[(big >= 8) & (big < n - 8)]
        out.append(sum(max(np.max(dev[i, k - 8 : k]), np.max(dev[i, k + 1 : k + 9])) < dev[i, k] / 3.0 for k in big))
    return out


def _impulsive_rows(rows: int, n: int, rng: np.random.Generator) -> np.ndarray:
    """Bearing-impact-like rows: a structural resonance (3.2 kHz at 25.6 kHz, decaying in about 1 ms) struck at an
    outer-race rate on a noise floor with weak shaft lines, the impacts reaching about the spike threshold of
    10 robust σ (the rows whose robust spread is far below their peak)."""
    t = np.arange(n) / 25_600.0
    x = 0.04 * np.sin(2 * np.pi * 24.7 * t + rng.uniform(0, 2 * np.pi, (rows, 1))) + rng.normal(0.0, 0.05, (rows, n))
    ring = np.exp(-t[:256] * 900.0) * np.sin(2 * np.pi * 3200.0 * t[:256])
    for r in range(rows):
        strikes = np.zeros(n)
        strikes[(np.arange(0.0, t[-1], 1.0 / rng.uniform(85.0, 92.0)) * 25_600.0).astype(int)] = \
            rng.uniform(0.4, 0.9)
        x[r] += np.convolve(strikes, ring)[:n]
    return x


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_screen_on_impulsive_rows_gives_the_exact_results(dtype: type) -> None:
    # Impulsive rows pass the screen's sparse test; rows with genuine single-sample spikes (an electrical spike
    # does not ring), near the edges and amid the impacts, go to the exact test.  Every field must equal the
    # exact path's (screen=False) and the count must equal the definition computed with numpy.median.
    rng = np.random.default_rng(21)
    n = 16384
    x = _impulsive_rows(12, n, rng)
    x[1, 5000] += 3.0
    x[3, [9, n - 9, 7777]] -= [3.5, 3.5, 4.0]
    x[5, 4000:4003] += 3.0  # three samples in a row: not isolated
    x = x.astype(dtype)
    fast = check_health(x, 25_600.0, rms_g=x.astype(np.float64).std(axis=1))
    exact = check_health(x, 25_600.0, rms_g=x.astype(np.float64).std(axis=1), screen=False)
    assert fast == exact
    assert [h.spike_count for h in fast] == _reference_spikes(x)
    assert [h.spike_count for h in fast][:6] == [0, 1, 0, 3, 0, 0]
    # the impulsive rows without an isolated spike are settled by the screen itself, not by the exact fallback
    x64 = x.astype(np.float64)
    cleared = _spike_screen(x, 10.0, x64.max(axis=1), x64.min(axis=1), np.empty(x.shape, dtype=np.bool_))
    assert cleared.tolist() == [h.spike_count == 0 for h in fast]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_a_sample_at_the_spike_threshold_is_judged_as_the_exact_test_judges_it(dtype: type) -> None:
    # One isolated sample placed on the threshold median + 10 × 1.4826 × MAD itself and one representable step
    # either side (it lies far in the upper tail, so moving it leaves the median and the MAD unchanged): only the
    # step above is a spike ("farther than", as numpy.median's reference count says too), with or without screen.
    rng = np.random.default_rng(22)
    n = 16384
    base = _impulsive_rows(1, n, rng)[0].astype(dtype)
    base[6000] = 5.0
    b64 = base.astype(np.float64)
    med = float(np.median(b64))
    threshold = 10.0 * (1.4826 * float(np.median(np.abs(b64 - med))))
    at = dtype(med + threshold)
    rows = []
    for v in (np.nextafter(at, dtype(-np.inf)), at, np.nextafter(at, dtype(np.inf))):
        row = base.copy()
        row[6000] = v
        rows.append(row)
    x = np.stack(rows)
    assert np.array_equal(np.median(x.astype(np.float64), axis=1), [med] * 3)
    expected = _reference_spikes(x)
    assert expected[0] == 0 and expected[2] == 1
    assert [h.spike_count for h in check_health(x, 25_600.0)] == expected
    assert [h.spike_count for h in check_health(x, 25_600.0, screen=False)] == expected


@pytest.mark.parametrize("name", ["cwru_12k_de_outer_007_0hp.mat", "cwru_12k_de_inner_007_1hp.mat",
                                  "cwru_48k_de_outer_007_0hp.mat", "cwru_48k_de_normal_0hp.mat"])
def test_screen_on_recorded_bearing_faults_gives_the_exact_results(cwru_dir: Path, name: str) -> None:
    # Real seeded-fault recordings (CWRU bearing data, datasets README): impacts of a damaged race ringing the
    # housing, in frames of 4096 samples as float32 (as the daemon holds them) and float64.  The screen must give
    # every field of the exact path (screen=False), and the counts the numpy.median reference's.
    checks = json.loads((cwru_dir / "check_values.json").read_text())[name]
    x = scipy.io.loadmat(cwru_dir / name)[checks["de_variable"]].reshape(-1)
    n = 4096
    frames = x[: (x.size // n) * n].reshape(-1, n)[:24]
    for dtype in (np.float32, np.float64):
        f = frames.astype(dtype)
        fast = check_health(f, float(checks["fs_hz"]))
        assert fast == check_health(f, float(checks["fs_hz"]), screen=False)
        assert [h.spike_count for h in fast] == _reference_spikes(f)


def _varied_rows(rows: int, n: int, rng: np.random.Generator) -> np.ndarray:
    """Rows of every kind the checks tell apart, quantized to float32 (so their float64 copies hold the same
    samples): impacts, spikes, flat tops at a clipping level, a DC step, a stuck converter, a bias, noise."""
    x = np.concatenate([_impulsive_rows(rows - 6, n, rng), rng.normal(0.0, 0.02, (6, n))])
    x[1, n // 3] += 3.0  # an isolated spike
    x[2] = np.clip(x[2] * 4.0, -0.9, 0.9)  # pinned flat at ±0.9
    x[-6, n // 2 :] += 0.4  # a DC step
    x[-5] = np.repeat(x[-5, ::8], 8)[:n]  # a held value: most samples repeat the previous one
    x[-4] += 0.8  # a mean beyond what a piezo sensor shows
    x[-3] *= 1e-7  # a dead output
    x[-2] = np.round(x[-2] / 0.01) * 0.01  # a coarse converter
    return x.astype(np.float32)


@pytest.mark.parametrize(("n", "segments"), [(16384, 4), (4096, 4), (5000, 3), (65536, 4), (40000, 7)])
def test_float32_frames_give_the_health_of_the_same_samples_in_float64(n: int, segments: int) -> None:
    # The daemon hands its float32 frames over as they are (edgevib.pipelines.health works in their precision
    # where a comparison gives the same answer, and in float64 where arithmetic needs it): every field of every
    # row must equal that of the same samples given in float64 (float32 → float64 is exact: IEEE 754), with and
    # without the r.m.s. given, the screen or the exact spike test, a full scale and a noise specification.
    rng = np.random.default_rng(n + segments)
    x32 = _varied_rows(12, n, rng)
    x64 = x32.astype(np.float64)
    rms = x64.std(axis=1)
    running = [True] * 11 + [False]
    specs = [HealthSpec(segments=segments),
             HealthSpec(segments=segments, full_scale_g=0.9, noise_density_ug_rthz=50.0, spike_sigma=6.0)]
    for spec in specs:
        for kwargs in ({"rms_g": rms}, {}, {"screen": False}):
            got = check_health(x32, 25_600.0, spec, running=running, **kwargs)  # type: ignore[arg-type]
            assert got == check_health(x64, 25_600.0, spec, running=running, **kwargs)  # type: ignore[arg-type]
            assert {f for h in got for f in h.faults} >= {"spikes", "clipping", "dc-step", "flatline", "bias"}
