"""The sensor-health spike test's robust statistics (edgevib.pipelines.health) against numpy's own median."""

from __future__ import annotations

import numpy as np
import pytest

from edgevib.pipelines.health import _medians, check_health


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
