"""The view's recent-values store: rows at most every ``interval_s`` of frame time, values built only for them."""

from __future__ import annotations

import math

import numpy as np
from numpy.testing import assert_allclose

from edgevib.daemon.web.recent import RecentValues

FRAME_S = 16384 / 25600.0  # a 16384-sample frame at 25.6 kHz lasts 0.64 s (samples / sample rate)


def test_values_are_built_only_for_the_rows_kept() -> None:
    recent = RecentValues(capacity=100, interval_s=5.0)
    calls: list[float] = []

    def values_at(t_s: float) -> dict[str, float | None]:
        calls.append(t_s)
        return {"velocity_rms_mm_s": t_s / 10.0, "shaft_hz": None}

    times = [k * FRAME_S for k in range(40)]  # 25.6 s of frames
    kept = [recent.add("P-1", t, lambda t=t: values_at(t)) for t in times]
    # expected by hand: a row at 0 s, then at the first frame at least 5 s after the previous row
    # (5.12 s = frame 8, 10.24 s = frame 16, ... every 8th frame, since 7 x 0.64 s = 4.48 s < 5 s <= 8 x 0.64 s)
    expected = [t for k, t in enumerate(times) if k % 8 == 0]
    assert [t for t, k in zip(times, kept, strict=True) if k] == expected
    assert calls == expected  # the values function ran for the kept rows and no other frame
    t, v = recent.series("P-1", "velocity_rms_mm_s")
    assert_allclose(t, expected, rtol=0, atol=1e-12)
    assert_allclose(v, np.asarray(expected) / 10.0, rtol=1e-6)  # stored as float32: 24-bit mantissa, 6e-8
    t, v = recent.series("P-1", "shaft_hz")
    assert len(t) == len(expected) and bool(np.all(np.isnan(v)))  # unavailable is NaN, never a made-up number


def test_a_mapping_and_a_function_give_the_same_rows() -> None:
    a, b = RecentValues(capacity=10, interval_s=1.0), RecentValues(capacity=10, interval_s=1.0)
    rows = [(0.0, {"x": 1.0}), (0.5, {"x": 2.0}), (1.2, {"x": math.inf, "y": 3.0}), (2.5, {"x": 4.0})]
    for t, values in rows:
        assert a.add("P", t, values) == b.add("P", t, lambda values=values: values)
    for name in ("x", "y"):
        ta, va = a.series("P", name)
        tb, vb = b.series("P", name)
        assert_allclose(ta, tb)
        assert_allclose(va, vb, equal_nan=True)
    assert_allclose(a.series("P", "x")[1], [1.0, math.nan, 4.0], equal_nan=True)  # infinite is kept as NaN


def test_frames_added_together_give_the_rows_of_frames_added_one_by_one() -> None:
    # add_frames is add under one lock: the same rows and columns (grown past the first 8); each value is stored as
    # numpy's float32 cast rounds the Python value (the reference: np.float32(v)), None / NaN / Inf as NaN.
    one, many = RecentValues(capacity=100, interval_s=1.0), RecentValues(capacity=100, interval_s=1.0)
    frames = [(f"P-{k % 3}", 0.4 * k, {f"i{(k * 7 + j) % 13}": (1.0 / (k + j + 3) if j % 4 else
                                                              [None, math.nan, True, -math.inf][k % 4])
                                       for j in range(k % 11)}) for k in range(60)]
    kept = [one.add(p, t, v) for p, t, v in frames]
    assert many.add_frames(frames, lambda v: v) == sum(kept)
    for p in ("P-0", "P-1", "P-2"):
        assert one.indicators(p) == many.indicators(p) and len(one.indicators(p)) > 8
        rows = [(t, v) for (q, t, v), k in zip(frames, kept, strict=True) if k and q == p]
        for name in one.indicators(p):
            (t1, v1), (t2, v2) = one.series(p, name), many.series(p, name)
            assert t1.tolist() == t2.tolist() == [t for t, _ in rows] and v1.tobytes() == v2.tobytes()
            want = [np.float32(x) if (x := v.get(name)) is not None and math.isfinite(x) else np.float32(np.nan)
                    for _, v in rows]
            assert np.asarray(want, dtype=np.float32).tobytes() == v2.astype(np.float32).tobytes()
