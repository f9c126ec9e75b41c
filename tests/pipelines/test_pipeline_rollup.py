"""Roll-up statistics (edgevib.pipelines.rollup) against numpy's exact statistics."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from edgevib.pipelines.rollup import (
    STAT_FIELDS,
    LogSketch,
    RollupError,
    sketch_summaries,
    summarize,
    summarize_many,
)


def test_summarize_matches_numpy_and_skips_missing_values() -> None:
    rng = np.random.default_rng(4)
    x = rng.lognormal(0.0, 0.5, size=(180, 3))
    x[::7, 1] = np.nan          # an indicator missing in some frames
    x[:, 2] = np.nan            # one never available
    s = summarize(x, 95.0)
    assert s.shape == (len(STAT_FIELDS), 3)
    for j in (0, 1):
        v = x[:, j][np.isfinite(x[:, j])]
        # reference: numpy's exact statistics (linear-interpolation percentiles)
        assert_allclose(s[:, j], [v.size, v.min(), v.mean(), v.max(), np.percentile(v, 50), np.percentile(v, 95)],
                        rtol=1e-12)
    assert s[0, 2] == 0 and np.all(np.isnan(s[1:, 2]))
    with pytest.raises(RollupError, match="high percentile 100"):
        summarize(x, 100.0)


def test_summarize_many_matches_numpy_and_each_block_alone_bit_for_bit() -> None:
    # Blocks of different lengths (one row, none, one indicator holding every value, zeros of both signs, missing
    # values): each block's statistics against numpy's exact statistics, and the same bytes as summarize of the
    # block alone (the history stores float32 roll-ups written by either).
    rng = np.random.default_rng(21)
    blocks = []
    for n in (94, 93, 1, 0, 2, 94, 9, 1, 150, 93):
        x = rng.lognormal(0.0, 1.0, size=(n, 4)) * 10.0 ** rng.integers(-3, 4, size=(n, 4))
        x[rng.random((n, 4)) < 0.2] = np.nan
        blocks.append(x)
    blocks[1][:, 1:] = np.nan                   # one indicator holds every value
    blocks[4][:, 0] = [-0.0, -0.0]              # a negative zero (summed it gives +0.0, as numpy's sum does)
    blocks[7][0, :2] = [-0.0, -3.0]             # one row: every statistic is that value, sign of zero kept
    blocks[8][:, 3] = -blocks[8][:, 3]
    s = summarize_many(blocks, 90.0)
    assert s.shape == (len(STAT_FIELDS), 4 * len(blocks))
    for i, x in enumerate(blocks):
        alone = summarize(x, 90.0)
        assert s[:, 4 * i:4 * i + 4].tobytes() == alone.tobytes(), f"block {i}"
        for j in range(4):
            v = x[:, j][np.isfinite(x[:, j])]
            col = s[:, 4 * i + j]
            if v.size == 0:
                assert col[0] == 0 and np.all(np.isnan(col[1:]))
                continue
            # reference: numpy's exact statistics (linear-interpolation percentiles)
            assert_allclose(col, [v.size, v.min(), v.mean(), v.max(), np.percentile(v, 50), np.percentile(v, 90)],
                            rtol=1e-12)
    assert math.copysign(1.0, s[4, 4 * 7]) == -1.0  # the one-row block's -0.0 median
    assert summarize_many([], 95.0).shape == (len(STAT_FIELDS), 0)
    with pytest.raises(RollupError, match=r"must all be \(n, 4\), got shape \(3, 2\)"):
        summarize_many([blocks[0], np.zeros((3, 2))])
    with pytest.raises(RollupError, match="high percentile 0"):
        summarize_many(blocks, 0.0)


def test_sketch_summaries_are_each_sketchs_summary_and_near_numpy() -> None:
    # Sketches of both signs, zeros, one value, none: the same numbers as LogSketch.summary bit for bit (the
    # history stores them either way), and the percentiles within the sketch's relative accuracy of numpy's
    # (DDSketch, Masson, Rim & Lee, PVLDB 12, 2019; linear interpolation as numpy.percentile).
    rng = np.random.default_rng(31)
    data = [rng.lognormal(0.0, 1.0, 3000), -rng.lognormal(1.0, 0.5, 200), np.zeros(25), np.array([4.2]),
            np.array([]), np.concatenate([rng.lognormal(0.0, 0.2, 50), -rng.lognormal(0.0, 0.2, 50), np.zeros(9)]),
            np.array([-0.5, 0.0, 0.5, 7.0])]
    sketches = []
    for v in data:
        sk = LogSketch(alpha=0.01)
        sk.add(v)
        sketches.append(sk)
    s = sketch_summaries(sketches, 99.0)
    assert s.shape == (len(STAT_FIELDS), len(data))
    assert s.tobytes() == np.array([sk.summary(99.0) for sk in sketches]).T.tobytes()
    for j, v in enumerate(data):
        if v.size == 0:
            assert s[0, j] == 0 and np.all(np.isnan(s[1:, j]))
            continue
        assert_allclose(s[:4, j], [v.size, v.min(), v.mean(), v.max()], rtol=1e-12, atol=1e-12)
        for row, q in ((4, 50.0), (5, 99.0)):
            # each order statistic within alpha of itself, so their interpolation within alpha of the larger one
            around = [np.percentile(v, q, method=m) for m in ("lower", "higher")]
            bound = 0.01 * max(abs(a) for a in around)
            assert abs(s[row, j] - np.percentile(v, q)) <= bound * (1 + 1e-9) + 1e-15, (j, q)
    with pytest.raises(RollupError, match="high percentile 100"):
        sketch_summaries(sketches, 100.0)


@pytest.mark.parametrize("q", [0.0, 0.05, 0.5, 0.95, 0.99, 1.0])
def test_sketch_quantiles_within_relative_accuracy(q: float) -> None:
    # DDSketch (Masson, Rim & Lee, PVLDB 12, 2019): every order statistic within relative error alpha; the
    # quantile interpolates the two around q (n - 1) as numpy.percentile's default (linear) does, so it is within
    # alpha of numpy's value (the same definition as the minute roll-ups' summarize).
    rng = np.random.default_rng(9)
    v = np.concatenate([rng.lognormal(0.5, 1.0, 5000), -rng.lognormal(-1.0, 0.5, 300), np.zeros(40)])
    sk = LogSketch(alpha=0.01)
    for chunk in np.array_split(rng.permutation(v), 13):
        sk.add(chunk)
    exact = np.quantile(v, q)
    assert abs(sk.quantile(q) - exact) <= 0.01 * abs(exact) + 1e-12
    assert sk.count == v.size and sk.mean == pytest.approx(v.mean(), rel=1e-12)
    assert sk.vmin == v.min() and sk.vmax == v.max()


def test_sparse_bucket_median_is_numpys() -> None:
    # a day of four snapshots 6 h apart (route-style data, replay of the simulator's months): the day's median
    # is numpy.median's (2.5 for 1, 2, 3, 4; numpy documentation, even count: the mean of the two middle values),
    # as the minute roll-ups give it.  The acceptance re-check of issue 11 found 1.99 (the second value): on a
    # rising series every day read low, and `edgevib replay` projected the zone D crossing of trend-exponential
    # about a day late (coverage 1/10 at 95 % of the life against a stated 80 %).
    for v in ([1.0, 2.0, 3.0, 4.0], [4.0, 1.0], [0.5, 0.7, 3.0, 3.1, 3.2, 9.0], [-2.0, -1.0, 1.0, 2.0]):
        sk = LogSketch(alpha=0.01)
        sk.add(v)
        assert sk.quantile(0.5) == pytest.approx(np.median(v), rel=0.01, abs=1e-12)
        assert sk.summary(95.0)[4] == pytest.approx(summarize(np.array(v)[:, None], 95.0)[4, 0], rel=0.01)
        assert sk.quantile(0.95) == pytest.approx(np.percentile(v, 95), rel=0.01)


def test_sketch_quantile_between_bins_of_either_sign() -> None:
    # numpy.percentile's default (linear): position q (n - 1) between the order statistics below and above it
    # (numpy documentation); each is read from the sketch within alpha (DDSketch, Masson, Rim & Lee, PVLDB 12,
    # 2019), so the interpolation is within alpha of the larger of the two.  The two neighbours here lie in
    # different bins: negative, zero and positive ones.
    v = np.array([-3.0, -1.0, 0.0, 0.0, 2.0, 5.0, 5.2])
    sk = LogSketch(alpha=0.01)
    sk.add(v)
    s = np.sort(v)
    for q in np.linspace(0.0, 1.0, 61):
        pos = q * (v.size - 1)
        lo, hi = math.floor(pos), min(math.ceil(pos), v.size - 1)
        bound = 0.01 * max(abs(s[lo]), abs(s[hi])) + 1e-12
        assert abs(sk.quantile(float(q)) - np.percentile(v, 100.0 * q)) <= bound, q


def test_sketch_merge_and_storage_round_trip() -> None:
    rng = np.random.default_rng(2)
    a, b = rng.gamma(2.0, 1.0, 700), rng.gamma(5.0, 2.0, 900)
    s1, s2, whole = LogSketch(), LogSketch(), LogSketch()
    s1.add(a)
    s2.add(b)
    whole.add(np.concatenate([a, b]))
    s1.merge(s2)
    for q in (0.1, 0.5, 0.95):
        assert s1.quantile(q) == whole.quantile(q)  # merging is exact (same bins)
    back = LogSketch.from_array(s1.to_array())
    assert back.summary(95.0) == s1.summary(95.0)
    assert math.isnan(LogSketch().quantile(0.5))
    with pytest.raises(RollupError, match="cannot merge"):
        s1.merge(LogSketch(alpha=0.02))
    with pytest.raises(RollupError, match="does not match"):
        LogSketch.from_array(np.zeros(9))


def test_sketch_columns_equal_one_by_one() -> None:
    rng = np.random.default_rng(8)
    x = rng.normal(0.0, 2.0, (300, 3))
    x[::9, 1] = np.nan
    x[5, 2] = 0.0
    cols = [LogSketch() for _ in range(3)]
    LogSketch.add_columns(cols, x[:120])
    LogSketch.add_columns(cols, x[120:])
    for j, sk in enumerate(cols):
        ref = LogSketch()
        ref.add(x[:, j])
        assert (sk.count, sk.zeros, sk.pos, sk.neg, sk.vmin, sk.vmax) == \
            (ref.count, ref.zeros, ref.pos, ref.neg, ref.vmin, ref.vmax)
        assert sk.total == pytest.approx(ref.total, rel=1e-12)
    with pytest.raises(RollupError, match="do not match 3"):
        LogSketch.add_columns(cols, x[:, :2])


def test_single_row_paths_agree_with_the_array_paths() -> None:
    row = np.array([[2.5, np.nan, -1.0, 0.0]])
    s = summarize(row)
    assert_allclose(s[:, 0], [1, 2.5, 2.5, 2.5, 2.5, 2.5])
    assert s[0, 1] == 0 and np.all(np.isnan(s[1:, 1]))
    two = np.vstack([row, row])
    assert_allclose(summarize(two)[1:], s[1:])
    a, b = [LogSketch() for _ in range(4)], [LogSketch() for _ in range(4)]
    LogSketch.add_columns(a, row)
    for sk, v in zip(b, row[0], strict=True):
        sk.add([v])
    assert [(x.count, x.pos, x.neg, x.zeros) for x in a] == [(x.count, x.pos, x.neg, x.zeros) for x in b]


def test_time_sums_over_the_values_present_give_numpys_mean_time() -> None:
    # The mean time of the values a bucket holds (its stamp) = time_sums / summarize's count, against numpy's mean
    # of the times of each indicator's finite values; batches add up (an hour from its minutes).
    from edgevib.pipelines.rollup import time_sums

    rng = np.random.default_rng(12)
    t = np.sort(rng.uniform(0.0, 3600.0, 500))
    x = rng.lognormal(0.0, 0.3, size=(500, 3))
    x[rng.random(500) < 0.3, 1] = np.nan
    x[:, 2] = np.nan
    sums = time_sums(t, x)
    count = summarize(x)[0]
    for j in (0, 1):
        assert sums[j] / count[j] == pytest.approx(float(np.mean(t[np.isfinite(x[:, j])])), rel=1e-12)
    assert sums[2] == 0.0 and count[2] == 0
    assert_allclose(time_sums(t[:200], x[:200]) + time_sums(t[200:], x[200:]), sums, rtol=1e-12)
    with pytest.raises(RollupError, match="499 times for values of shape"):
        time_sums(t[1:], x)
