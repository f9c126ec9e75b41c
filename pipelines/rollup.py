"""Roll-up statistics of indicator values: count, min, mean, max and percentiles per time bucket.

Two ways to a percentile:

* :func:`summarize` — exact (``numpy.percentile``, linear interpolation) over a batch held in memory, used for
  short buckets (a minute of frames);
* :class:`LogSketch` — a mergeable quantile sketch with logarithmic bins (the DDSketch construction: Masson,
  Rim & Lee, "DDSketch: a fast and fully-mergeable quantile sketch with relative-error guarantees", PVLDB 12
  (2019)): a value v > 0 falls in bin i = ⌈log_γ v⌉ with γ = (1 + α)/(1 − α), and the bin's representative
  2γⁱ/(γ + 1) is within a relative error α of every value in it.  Negative values use a mirrored set of bins and
  zeros their own count.  Used for long buckets (hours, days) that would not fit in memory as raw values; its
  state is a few integers per occupied bin and can be stored and restored.

Shapes: a batch is ``(n_values, n_indicators)``; NaN marks a missing value of one indicator (not counted).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.types import PipelineError

__all__ = ["STAT_FIELDS", "LogSketch", "RollupError", "sketch_summaries", "summarize", "summarize_many",
           "time_sums"]

FloatArray = npt.NDArray[np.float64]
STAT_FIELDS: tuple[str, ...] = ("count", "min", "mean", "max", "p50", "p_high")
"""Rows of a summary array (see :func:`summarize`)."""


class RollupError(PipelineError):
    """Invalid roll-up input."""


def summarize(values: npt.ArrayLike, high_percentile: float = 95.0) -> FloatArray:
    """Statistics of a batch per indicator: array (6, n_indicators) with rows :data:`STAT_FIELDS`.

    ``values``: shape (n, n_indicators) (or (n,) for one indicator); NaN = missing.  Percentiles are exact
    (``numpy.percentile``, linear interpolation).  An indicator without values gets count 0 and NaN elsewhere.
    """
    x = np.asarray(values, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise RollupError(f"values must be (n, indicators), got shape {x.shape}")
    if not 0.0 < high_percentile < 100.0:
        raise RollupError(f"high percentile {high_percentile!r} must be within (0, 100)")
    out = np.full((len(STAT_FIELDS), x.shape[1]), np.nan)
    if x.shape[0] == 1:  # one value per indicator: every statistic is that value
        ok = np.isfinite(x[0])
        out[0] = ok
        out[1:, ok] = x[0, ok]
        return out
    finite = np.isfinite(x)
    count = finite.sum(axis=0)
    out[0] = count
    have = count > 0
    if not np.any(have):
        return out
    xs = np.where(finite, x, np.inf)[:, have]
    srt = np.sort(xs, axis=0)  # the missing values (as +inf) at the end of each column
    c = count[have]
    cols = np.arange(srt.shape[1])
    out[1, have] = srt[0]
    out[3, have] = srt[c - 1, cols]
    out[2, have] = np.where(finite, x, 0.0)[:, have].sum(axis=0) / c
    for row, q in ((4, 50.0), (5, high_percentile)):
        # numpy.percentile's default (linear): position q/100 · (n − 1) between the order statistics
        pos = q / 100.0 * (c - 1)
        lo = np.floor(pos).astype(np.int64)
        hi = np.minimum(lo + 1, c - 1)
        frac = pos - lo
        out[row, have] = srt[lo, cols] + frac * (srt[hi, cols] - srt[lo, cols])
    return out


def summarize_many(blocks: Sequence[npt.ArrayLike], high_percentile: float = 95.0) -> FloatArray:
    """:func:`summarize` of several batches of the same indicators at once: array (6, len(blocks) · n_indicators),
    block i's statistics in columns i · n_indicators … (i + 1) · n_indicators − 1.

    ``blocks``: each of shape (n_i, n_indicators) (the n_i may differ, 0 included); NaN = missing.  Blocks of the
    same length are laid side by side and summarized in one call.  Every statistic of :func:`summarize` is worked
    out per column (a column's sum, too, is a sum over that column's own rows), so the result equals,
    bit for bit, :func:`summarize` of each block alone.  (Padding shorter blocks to a common length would change
    the grouping of those sums, hence the last bit of some means.)
    """
    if not 0.0 < high_percentile < 100.0:
        raise RollupError(f"high percentile {high_percentile!r} must be within (0, 100)")
    xs = [np.asarray(b, dtype=np.float64) for b in blocks]
    k = xs[0].shape[1] if xs and xs[0].ndim == 2 else 0
    for x in xs:
        if x.ndim != 2 or x.shape[1] != k:
            raise RollupError(f"blocks must all be (n, {k}), got shape {x.shape}")
    out = np.full((len(STAT_FIELDS), len(xs) * k), np.nan)
    by_rows: dict[int, list[int]] = {}
    for i, x in enumerate(xs):
        by_rows.setdefault(x.shape[0], []).append(i)
    for members in by_rows.values():
        stats = summarize(np.concatenate([xs[i] for i in members], axis=1), high_percentile)
        for j, i in enumerate(members):
            out[:, i * k:(i + 1) * k] = stats[:, j * k:(j + 1) * k]
    return out


def time_sums(t_offset_s: npt.ArrayLike, values: npt.ArrayLike) -> FloatArray:
    """Per indicator, the sum of the times of its values that are present: array (n_indicators,).

    ``t_offset_s``: shape (n,), each value's time in s from the bucket's start; ``values``: shape (n, n_indicators)
    (or (n,)), NaN = missing (not counted, as in :func:`summarize`).  Divided by the count of :func:`summarize` it
    gives the mean time of the values a bucket holds — the time its statistics stand for, which is the bucket's
    middle only when its values fill it evenly (a sum, so that a bucket that takes its values in batches, as an
    hour takes its minutes, adds them up).
    """
    x = np.asarray(values, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    t = np.asarray(t_offset_s, dtype=np.float64).reshape(-1)
    if x.ndim != 2 or t.size != x.shape[0]:
        raise RollupError(f"{t.size} times for values of shape {x.shape}")
    return np.asarray(t @ np.isfinite(x), dtype=np.float64)


def _occupied_bins(x: FloatArray, finite: npt.NDArray[np.bool_], bins: FloatArray) -> list[list[tuple[int, int, int]]]:
    """Per column of ``x`` (n, columns): its occupied bins as (1 for the negative side else 0, bin, count).

    Found once for a batch: a bucket's values cluster in a few bins, so a sketch's dictionaries then see one update
    per occupied bin rather than one per value."""
    rows, cols = np.nonzero(finite & (x != 0))
    occupied: list[list[tuple[int, int, int]]] = [[] for _ in range(x.shape[1])]
    if not rows.size:
        return occupied
    b = bins[rows, cols].astype(np.int64)
    neg = (x[rows, cols] < 0).astype(np.int64)
    if int(np.abs(b).max()) < 1 << 20:  # every finite double at accuracies above about 1e-3
        key = ((cols.astype(np.int64) * 2 + neg) << 21) + (b + (1 << 20))  # (column, sign, bin) in one integer
        uniq, n_in = np.unique(key, return_counts=True)
        for u, cnt in zip(uniq.tolist(), n_in.tolist(), strict=True):
            occupied[u >> 22].append(((u >> 21) & 1, (u & ((1 << 21) - 1)) - (1 << 20), cnt))
    else:
        for j, ng, k in zip(cols.tolist(), neg.tolist(), b.tolist(), strict=True):
            occupied[j].append((ng, k, 1))
    return occupied


@dataclass
class LogSketch:
    """Count, min, max, sum and a logarithmic-bin quantile sketch of one indicator's values.

    ``alpha`` is the relative accuracy of quantiles (default 1 %).  :meth:`add` takes a batch; :meth:`merge`
    another sketch with the same ``alpha``; :meth:`quantile` answers within the relative accuracy.
    """

    alpha: float = 0.01
    count: int = 0
    zeros: int = 0
    total: float = 0.0
    vmin: float = math.inf
    vmax: float = -math.inf
    pos: dict[int, int] = field(default_factory=dict)
    neg: dict[int, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not 0.0 < self.alpha < 0.5:
            raise RollupError(f"sketch accuracy {self.alpha!r} must be within (0, 0.5)")
        self._gamma = (1.0 + self.alpha) / (1.0 - self.alpha)
        self._log_gamma = math.log(self._gamma)

    def add(self, values: npt.ArrayLike) -> None:
        """Add a batch of values (non-finite ones are ignored)."""
        v = np.asarray(values, dtype=np.float64).reshape(-1)
        v = v[np.isfinite(v)]
        if v.size == 0:
            return
        self.count += int(v.size)
        self.total += float(v.sum())
        self.vmin = min(self.vmin, float(v.min()))
        self.vmax = max(self.vmax, float(v.max()))
        self.zeros += int(np.count_nonzero(v == 0))
        if v.size == 1:  # one value (a sparse bucket): no array machinery
            x = float(v[0])
            if x != 0:
                store = self.pos if x > 0 else self.neg
                k = math.ceil(math.log(abs(x)) / self._log_gamma)
                store[k] = store.get(k, 0) + 1
            return
        for sign, store in ((1.0, self.pos), (-1.0, self.neg)):
            part = v[v * sign > 0] * sign
            if part.size:
                idx = np.ceil(np.log(part) / self._log_gamma).astype(np.int64)
                keys, counts = np.unique(idx, return_counts=True)
                for k, c in zip(keys.tolist(), counts.tolist(), strict=True):
                    store[k] = store.get(k, 0) + c

    @staticmethod
    def add_columns(sketches: list[LogSketch], values: npt.ArrayLike,
                    also: Sequence[list[LogSketch]] = ()) -> None:
        """Add a batch (n, len(sketches)) to one sketch per column at once (same accuracy for all); ``also``: more
        lists of sketches (one per column each, same accuracy) that receive the same batch, worked out once."""
        x = np.asarray(values, dtype=np.float64)
        groups = [sketches, *also]
        for g in groups:
            if x.ndim != 2 or x.shape[1] != len(g):
                raise RollupError(f"values of shape {x.shape} do not match {len(g)} sketches")
        if not sketches or x.shape[0] == 0:
            return
        log_gamma = sketches[0]._log_gamma
        for g in groups:
            if any(abs(sk.alpha - sketches[0].alpha) > 1e-12 for sk in g):
                raise RollupError("add_columns needs sketches of one accuracy")
        if x.shape[0] == 1:  # one row (a sparse bucket): plain Python is quicker than array machinery
            for j, v in enumerate(x[0].tolist()):
                if not math.isfinite(v):
                    continue
                k = 0 if v == 0 else math.ceil(math.log(abs(v)) / log_gamma)
                for g in groups:
                    sk = g[j]
                    sk.count += 1
                    sk.total += v
                    sk.vmin = min(sk.vmin, v)
                    sk.vmax = max(sk.vmax, v)
                    if v == 0:
                        sk.zeros += 1
                    else:
                        store = sk.pos if v > 0 else sk.neg
                        store[k] = store.get(k, 0) + 1
            return
        finite = np.isfinite(x)
        counts = finite.sum(axis=0).tolist()
        xf = np.where(finite, x, 0.0)
        totals = xf.sum(axis=0).tolist()
        mins = np.where(finite, x, np.inf).min(axis=0).tolist()
        maxs = np.where(finite, x, -np.inf).max(axis=0).tolist()
        zeros = (finite & (x == 0)).sum(axis=0).tolist()
        with np.errstate(divide="ignore"):
            bins = np.ceil(np.log(np.abs(xf)) / log_gamma)
        occupied = _occupied_bins(x, finite, bins)
        for g in groups:
            for j, sk in enumerate(g):
                if counts[j] == 0:
                    continue
                sk.count += counts[j]
                sk.total += totals[j]
                sk.vmin = min(sk.vmin, mins[j])
                sk.vmax = max(sk.vmax, maxs[j])
                sk.zeros += zeros[j]
                stores = (sk.pos, sk.neg)
                for ng, k, cnt in occupied[j]:
                    store = stores[ng]
                    store[k] = store.get(k, 0) + cnt

    def merge(self, other: LogSketch) -> None:
        """Fold another sketch (same ``alpha``) into this one."""
        if abs(other.alpha - self.alpha) > 1e-12:
            raise RollupError(f"cannot merge sketches of accuracy {other.alpha} and {self.alpha}")
        self.count += other.count
        self.zeros += other.zeros
        self.total += other.total
        self.vmin = min(self.vmin, other.vmin)
        self.vmax = max(self.vmax, other.vmax)
        for mine, theirs in ((self.pos, other.pos), (self.neg, other.neg)):
            for k, c in theirs.items():
                mine[k] = mine.get(k, 0) + c

    @property
    def mean(self) -> float:
        return self.total / self.count if self.count else math.nan

    def quantile(self, q: float) -> float:
        """The q-quantile (0 ≤ q ≤ 1) within the relative accuracy; NaN when empty.

        numpy.percentile's default (linear), as :func:`summarize` gives the minute roll-ups: position q·(count − 1)
        between the order statistics below and above it, each read from the sketch (within the relative
        accuracy, so their interpolation is too) and clamped to [min, max].  (The lower order statistic alone,
        DDSketch's rank, read a sparse bucket's median low: the second of a day's four values.)"""
        return self.quantiles((q,))[0]

    def quantiles(self, qs: Sequence[float]) -> list[float]:
        """:meth:`quantile` of each of ``qs``, the order statistics of all of them read in one walk over the bins."""
        for q in qs:
            if not 0.0 <= q <= 1.0:
                raise RollupError(f"quantile {q!r} must be within [0, 1]")
        if self.count == 0:
            return [math.nan] * len(qs)
        spans = []  # (position, rank below it, rank above it)
        for q in qs:
            pos = q * (self.count - 1)
            lo = math.floor(pos)
            spans.append((pos, lo, lo + 1 if pos > lo else lo))
        at = self._at_ranks(sorted({r for _, lo, hi in spans for r in (lo, hi)}))
        return [at[lo] if pos == lo else at[lo] + (pos - lo) * (at[hi] - at[lo]) for pos, lo, hi in spans]

    def _at_ranks(self, ranks: list[int]) -> dict[int, float]:
        """The order statistics of ``ranks`` (ascending, 0-based) within the relative accuracy, read in one walk
        over the bins (most negative first): each is its bin's representative clamped to [min, max], the maximum
        beyond the last bin."""
        g = self._gamma
        out: dict[int, float] = {}
        seen, i = 0, 0
        for sign, store in ((-1.0, self.neg), (0.0, {0: self.zeros}), (1.0, self.pos)):
            for k in sorted(store, reverse=sign < 0):
                seen += store[k]
                if i < len(ranks) and seen > ranks[i]:
                    v = self._clamp(sign * 2.0 * g**k / (g + 1.0))
                    while i < len(ranks) and seen > ranks[i]:
                        out[ranks[i]] = v
                        i += 1
                    if i == len(ranks):
                        return out
        for r in ranks[i:]:
            out[r] = self.vmax
        return out

    def _clamp(self, v: float) -> float:
        return min(max(v, self.vmin), self.vmax)

    def to_array(self) -> npt.NDArray[np.float64]:
        """A flat float64 array holding the whole state (for storage); :meth:`from_array` reverses it."""
        return np.asarray(self.to_list(), dtype=np.float64)

    def to_list(self) -> list[float]:
        """The numbers of :meth:`to_array` as a list (for packing many sketches into one array)."""
        out = [self.alpha, float(self.count), float(self.zeros), self.total, self.vmin, self.vmax,
               float(len(self.pos)), float(len(self.neg))]
        for store in (self.pos, self.neg):
            for k in sorted(store):
                out += [float(k), float(store[k])]
        return out

    @classmethod
    def from_array(cls, a: npt.ArrayLike) -> LogSketch:
        arr = np.asarray(a, dtype=np.float64).reshape(-1)
        if arr.size < 8:
            raise RollupError(f"sketch state of {arr.size} numbers is too short")
        n_pos, n_neg = int(arr[6]), int(arr[7])
        if arr.size != 8 + 2 * (n_pos + n_neg):
            raise RollupError(f"sketch state of {arr.size} numbers does not match {n_pos}+{n_neg} bins")
        s = cls(alpha=float(arr[0]), count=int(arr[1]), zeros=int(arr[2]), total=float(arr[3]),
                vmin=float(arr[4]), vmax=float(arr[5]))
        pairs = arr[8:].reshape(-1, 2)
        s.pos = {int(k): int(c) for k, c in pairs[:n_pos]}
        s.neg = {int(k): int(c) for k, c in pairs[n_pos:]}
        return s

    def summary(self, high_percentile: float = 95.0) -> tuple[float, float, float, float, float, float]:
        """(count, min, mean, max, p50, p_high) like one column of :func:`summarize`."""
        if self.count == 0:
            return (0.0, math.nan, math.nan, math.nan, math.nan, math.nan)
        p50, p_high = self.quantiles((0.5, high_percentile / 100.0))
        return (float(self.count), self.vmin, self.mean, self.vmax, p50, p_high)


def sketch_summaries(sketches: Sequence[LogSketch], high_percentile: float = 95.0) -> FloatArray:
    """:meth:`LogSketch.summary` of each sketch: array (6, len(sketches)) with rows :data:`STAT_FIELDS`."""
    if not 0.0 < high_percentile < 100.0:
        raise RollupError(f"high percentile {high_percentile!r} must be within (0, 100)")
    return np.array([sk.summary(high_percentile) for sk in sketches], dtype=np.float64).reshape(
        -1, len(STAT_FIELDS)).T
