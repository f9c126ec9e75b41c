"""The analysis API the daemon calls: plan validation (numbers in the messages), shapes and keys, channel
vectorization, thread safety, scaling linearity, bearings and ISO 20816-3 severity."""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from edgevib.pipelines.analysis import (
    AnalysisKernel,
    analyze_frames,
    default_envelope_band,
    kernel_for,
    make_plan,
    order_key,
    plan_notes,
)
from edgevib.pipelines.bearings import defect_frequencies, defect_multiples, validate_geometry
from edgevib.pipelines.severity import ISO_20816_3_VELOCITY_MM_S, iso_zone, zone_boundaries_mm_s
from edgevib.pipelines.types import AnalysisPlan, BearingGeometry, GeometryError, PlanError, SignalError

FS, N = 25600.0, 16384
T = np.arange(N) / FS
RNG = np.random.default_rng(3)
B6205 = BearingGeometry(9, 0.3126, 1.537, 0.0)  # CWRU drive-end 6205 (datasets README)
B6203 = BearingGeometry(8, 0.2656, 1.122, 0.0)  # CWRU fan-end 6203 (datasets README)


def machine(n: int = N, channels: int = 1, shaft: float = 24.7, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    x = 0.3 * np.sin(2 * np.pi * shaft * t) + 0.1 * np.sin(4 * np.pi * shaft * t)
    tau = (t * 3.5848 * shaft % 1.0) / (3.5848 * shaft)
    x = x + 0.5 * np.exp(-600 * tau) * np.sin(2 * np.pi * 6000 * tau)
    return x + rng.normal(0, 0.1, (channels, n))


# ------------------------------------------------------------------------------------------- plans


@pytest.mark.parametrize("kwargs, match", [
    ({"fs_hz": 0.0}, "sample rate 0 Hz must be > 0"),
    ({"fs_hz": float("nan")}, "sample rate nan"),
    ({"n_samples": 10}, "record of 10 samples is too short"),
    ({"velocity_band_hz": (10.0, 13000.0)}, "velocity band high edge 13000 Hz is at or above Nyquist 12800 Hz"),
    ({"velocity_band_hz": (0.0, 1000.0)}, "low edge 0 Hz must be > 0"),
    ({"velocity_band_hz": (100.0, 50.0)}, "must be above its low edge"),
    ({"n_samples": 63}, "record of 63 samples is too short: need at least 64"),
    # one frame-resolution rule for measurement points: lines at most half the velocity band's low edge apart
    # (common practice: the edge two lines above DC, clear of the Hann window's ±2-line leakage of the mean)
    ({"n_samples": 2048}, r"too short: it resolves 12\.5 Hz, too coarse for the velocity band's low edge 10 Hz \(2 "
                          r"lines needed\); need at least 5120"),
    ({"n_samples": 4096, "velocity_band_hz": (20.0, 1000.0)},
     r"too short: .* lowest shaft speed 5 Hz .* need at least 10240 samples"),
    ({"false_alarm": 0.5}, "false-alarm probability 0.5"),
    ({"false_alarm": 0.0}, "false-alarm probability 0"),
    ({"min_depth": -0.1}, "minimum modulation depth -0.1"),
    ({"envelope_band_hz": (2000.0, 12800.0)}, "envelope band high edge 12800 Hz is at or above Nyquist 12800 Hz"),
    ({"envelope_band_hz": (2000.0, 2005.0)}, "fewer than 8 lines"),
    ({"envelope_band_hz": (2000.0, 2400.0), "bearing": B6205}, "narrower than the highest defect frequency"),
    ({"speed_range_hz": (5.0, 5000.0)}, "reaches .* at or above Nyquist 12800 Hz"),
    ({"orders": ()}, "non-empty"),
    ({"orders": (1.0, -2.0)}, "positive"),
    ({"order_tolerance": 0.0}, "order tolerance 0"),
    ({"slip_tolerance": 0.5}, "slip tolerance 0.5"),
    ({"harmonics": 0}, "harmonics 0"),
])
def test_plan_errors_name_the_numbers(kwargs: dict[str, object], match: str) -> None:
    args: dict[str, object] = {"fs_hz": FS, "n_samples": N}
    args.update(kwargs)
    with pytest.raises(PlanError, match=match):
        make_plan(**args)  # type: ignore[arg-type]


@pytest.mark.parametrize("geometry, match", [
    (BearingGeometry(0, 0.3, 1.5), "element count 0"),
    (BearingGeometry(9, 1.6, 1.5), "ball diameter 1.6 must be smaller than the pitch diameter 1.5"),
    (BearingGeometry(9, 1.5, 1.5), "smaller than the pitch"),
    (BearingGeometry(9, -0.3, 1.5), "ball diameter -0.3"),
    (BearingGeometry(9, 0.3, float("inf")), "pitch diameter inf"),
    (BearingGeometry(9, 0.3, 1.5, 90.0), "contact angle 90"),
    (BearingGeometry(9, 0.3, 1.5, -5.0), "contact angle -5"),
])
def test_impossible_geometry(geometry: BearingGeometry, match: str) -> None:
    with pytest.raises(GeometryError, match=match):
        validate_geometry(geometry)
    with pytest.raises(GeometryError):
        make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=geometry)


def test_plan_is_normalized_frozen_and_hashable() -> None:
    plan = make_plan(12000, 12000, velocity_band_hz=[10, 1000], orders=[1, 2])  # type: ignore[arg-type]
    assert plan.velocity_band_hz == (10.0, 1000.0) and plan.orders == (1.0, 2.0) and plan.fs_hz == 12000.0
    assert hash(plan) == hash(make_plan(12000.0, 12000, orders=(1.0, 2.0)))
    assert kernel_for(plan) is kernel_for(make_plan(12000.0, 12000, orders=(1.0, 2.0)))  # a pure memo
    with pytest.raises(PlanError):
        AnalysisKernel(AnalysisPlan(fs_hz=1000.0, n_samples=100, velocity_band_hz=(10.0, 600.0)))  # checked


def test_default_envelope_band() -> None:
    # FIELD_NOTES §6: a MEMS point limited to ~1–1.5 kHz gets no envelope indicators
    assert default_envelope_band(3200.0, (0.0, 1000.0)) is None
    assert default_envelope_band(25600.0, (0.0, 1500.0)) is None
    assert default_envelope_band(25600.0, (0.5, 10000.0)) == (2500.0, 10000.0)
    lo, hi = default_envelope_band(12000.0, None)  # type: ignore[misc]
    # inside the anti-aliased band and the 1–5 kHz range where the CWRU check lines hold (datasets README)
    assert 1000 <= lo < hi <= min(5000, 12000 / 2.56)
    lo, hi = default_envelope_band(25600.0, (0.5, 10000.0), shaft_hz_max=300.0)  # type: ignore[misc]
    assert lo >= 20 * 300.0
    # a default band always makes a valid plan with a bearing
    for fs in (8000.0, 12000.0, 25600.0, 48000.0, 51200.0):
        band = default_envelope_band(fs, None)
        assert band is not None and band[1] < fs / 2
        make_plan(fs, int(fs), envelope_band_hz=band, bearing=B6205)


# ------------------------------------------------------------------------------------------- short records


def test_any_record_of_64_samples_gives_the_time_domain_indicators() -> None:
    # 64 samples at 25.6 kHz (2.5 ms): r.m.s., peak, crest factor and kurtosis of a sine (handbook: r.m.s. A/√2,
    # crest factor √2, Pearson kurtosis 1.5); velocity, orders and envelope absent, each with its reason
    fs, n = 25600.0, 64
    x = 2.0 * np.sin(2 * np.pi * 1600.0 * np.arange(n) / fs)  # 4 whole periods
    plan = make_plan(fs, n, envelope_band_hz=(2500.0, 10000.0), bearing=B6205, speed_range_hz=(29.0, 31.0),
                     partial=True)
    r = analyze_frames(x, plan, [30.0])[0]
    assert r.acceleration_rms_g == pytest.approx(2.0 / math.sqrt(2), rel=1e-6)
    assert r.crest_factor == pytest.approx(math.sqrt(2), rel=1e-3)
    assert r.kurtosis == pytest.approx(1.5, rel=1e-3)
    assert r.velocity_rms_mm_s is None and r.velocity_peak_mm_s is None and r.displacement_pp_um is None
    assert r.orders_mm_s == {} and r.envelope == {}
    notes = plan_notes(plan)
    assert any(n.startswith("velocity: the 0.0025 s record resolves 400 Hz") for n in notes), notes
    with pytest.raises(PlanError, match="too short"):  # a measurement point's plan must carry everything
        make_plan(fs, n, envelope_band_hz=(2500.0, 10000.0), bearing=B6205, speed_range_hz=(29.0, 31.0))
    assert any(n.startswith("orders 0.5x, 1x, 2x, 3x:") for n in notes), notes
    assert any(n.startswith("envelope FTF, BPFO, BPFI, 2×BSF:") for n in notes), notes
    assert all("\n" not in n for n in notes)


def test_a_snapshot_of_a_tenth_of_a_second() -> None:
    # a 0.1 s burst at 25.6 kHz (a wireless sensor's snapshot, as the FEMTO records in ../shared/datasets) with
    # the speed given: velocity (10 Hz lines: two below a 20 Hz band edge), orders 1×–3× and the envelope at the
    # speed ± tolerance; only 0.5× (1.5 lines from DC) and FTF (1.3 lines) are left out, with their reasons
    fs, n, shaft = 25600.0, 2560, 30.0
    t = np.arange(n) / fs
    x = 1.0 * np.sin(2 * np.pi * shaft * t)
    plan = make_plan(fs, n, envelope_band_hz=(2500.0, 10000.0), bearing=B6205,
                     speed_range_hz=(shaft * 0.97, shaft * 1.03), velocity_band_hz=(20.0, 1000.0), partial=True)
    r = analyze_frames(x, plan, shaft)[0]
    # velocity of a 1 g sine: 9806.65 / (2π f) / √2 mm/s (FIELD_NOTES §5)
    assert r.orders_mm_s["1x"] == pytest.approx(9806.65 / (2 * np.pi * shaft) / math.sqrt(2), rel=0.01)
    assert set(r.orders_mm_s) == {"1x", "2x", "3x"}
    assert set(r.envelope) == {"bpfo", "bpfi", "bsf"}
    assert r.velocity_rms_mm_s is not None
    notes = plan_notes(plan)
    assert len(notes) == 2 and notes[0].startswith("orders 0.5x:") and notes[1].startswith("envelope FTF:")
    # without a speed there is no estimate at this resolution (5 Hz lowest speed needs 2 lines of 2.5 Hz)
    free = make_plan(fs, n, velocity_band_hz=(20.0, 1000.0), partial=True)
    assert analyze_frames(x, free)[0].shaft_hz is None
    assert any(n.startswith("speed estimate:") and "give the speed" in n for n in plan_notes(free))


def test_long_enough_records_have_no_notes() -> None:
    assert plan_notes(make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205,
                                speed_range_hz=(20.0, 60.0))) == ()
    # over the default 5–100 Hz speed range the slowest speeds are too slow for 0.5× and FTF at 1.56 Hz lines
    notes = plan_notes(make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205))
    assert [n.split(":")[0] for n in notes] == ["orders 0.5x", "envelope FTF"]
    assert "left out below 6.25 Hz shaft speed" in notes[0]


def test_plan_notes_name_their_group() -> None:
    # 128 samples at 25.6 kHz resolve 200 Hz lines (DFT line spacing fs / n): no velocity band edge at 10 Hz, no
    # speed estimate from 5 Hz, no order of a shaft below 100 Hz has the 2 lines from DC it needs (make_plan's rule)
    plan = make_plan(FS, 128, partial=True)
    notes = kernel_for(plan).notes
    assert [n.group for n in notes] == ["velocity", "speed estimate", "orders"]
    assert tuple(str(n) for n in notes) == plan_notes(plan)
    speed = notes[1]
    assert speed.advice == "give the speed" and str(speed) == f"speed estimate: {speed.reason}; give the speed"
    assert speed.reason.startswith("the 0.005 s record resolves 200 Hz, too coarse for the lowest shaft speed 5 Hz")
    assert notes[2].items == ("0.5x", "1x", "2x", "3x") and plan_notes(plan)[2].startswith("orders 0.5x, 1x, 2x, 3x: ")


# ------------------------------------------------------------------------------------------- frames


def test_keys_and_shapes() -> None:
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    out = analyze_frames(machine(), plan, shaft_hz=[24.7])
    assert len(out) == 1
    r = out[0]
    assert list(r.orders_mm_s) == ["0.5x", "1x", "2x", "3x"] == [order_key(o) for o in plan.orders]
    assert list(r.envelope) == ["ftf", "bpfo", "bpfi", "bsf"]
    assert r.envelope["bsf"].expected_hz == pytest.approx(2 * defect_frequencies(B6205, 24.7).bsf_hz)  # 2×BSF
    assert r.envelope["bpfo"].snr_db > 20
    assert r.envelope_band_hz == (4000.0, 9000.0)
    assert all(isinstance(v, float) for v in (r.acceleration_rms_g, r.velocity_rms_mm_s, r.kurtosis, r.mean_g))


def test_one_dimensional_input_is_one_channel() -> None:
    plan = make_plan(FS, N)
    x = machine()[0]
    assert analyze_frames(x, plan, [24.7]) == analyze_frames(x[None, :], plan, [24.7])


def test_channels_are_independent() -> None:
    # vectorized over channels: each channel's result equals its own single-channel analysis
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    x = np.concatenate([machine(seed=1), 3 * machine(seed=2), RNG.normal(size=(1, N))])
    speeds = [24.7, float("nan"), 24.7]
    together = analyze_frames(x, plan, speeds)
    for ch in range(3):
        alone = analyze_frames(x[ch], plan, [speeds[ch]])[0]
        a, b = together[ch], alone
        assert a.velocity_rms_mm_s == pytest.approx(b.velocity_rms_mm_s, rel=1e-12)
        assert a.kurtosis == pytest.approx(b.kurtosis, rel=1e-6)
        assert a.shaft_hz == pytest.approx(b.shaft_hz, rel=1e-12) if b.shaft_hz else a.shaft_hz is None
        assert a.orders_mm_s == pytest.approx(b.orders_mm_s, rel=1e-9)
        assert set(a.envelope) == set(b.envelope)
        for k in b.envelope:
            if b.envelope[k].amplitude_g is None:
                assert a.envelope[k].amplitude_g is None
            else:
                assert a.envelope[k].amplitude_g == pytest.approx(b.envelope[k].amplitude_g, rel=1e-5)
            assert a.envelope[k].detected == b.envelope[k].detected


def test_thread_safety() -> None:
    # the daemon runs analyze_frames in worker threads: concurrent calls give the sequential results
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    batches = [machine(channels=4, seed=s) * (1 + s) for s in range(8)]
    sequential = [analyze_frames(b, plan) for b in batches]
    with ThreadPoolExecutor(max_workers=4) as pool:
        concurrent = list(pool.map(lambda b: analyze_frames(b, plan), batches * 2))
    assert concurrent == sequential * 2


@pytest.mark.parametrize("bad, match", [
    (np.zeros((2, N - 1)), f"{N - 1} samples, the plan expects {N}"),
    (np.full((1, N), np.nan), "NaN or infinite"),
    (np.zeros((2, 3, N)), "shape"),
])
def test_bad_frames(bad: np.ndarray, match: str) -> None:
    with pytest.raises(SignalError, match=match):
        analyze_frames(bad, make_plan(FS, N))


@pytest.mark.parametrize("speeds, match", [
    ([24.7, 24.7], "2 shaft speeds given for 1 channels"),
    ([-3.0], "shaft speed -3 Hz must be ≥ 0"),
    ([float("inf")], "shaft speed inf"),
    ([20000.0], "below Nyquist"),
])
def test_bad_speeds(speeds: list[float], match: str) -> None:
    with pytest.raises(SignalError, match=match):
        analyze_frames(machine(), make_plan(FS, N), speeds)


@pytest.mark.parametrize("speed_hz", [0.0, 2.0])
def test_standing_or_slow_shaft_is_valid_input(speed_hz: float) -> None:
    # A standing shaft (speed tag 0) or one below the plan's lowest speed (5 Hz here) is a machine state, not an
    # error: the time-domain and velocity indicators are those of the same frame analysed without a speed (they
    # do not depend on it); orders and envelope families are absent, not zero.
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    x = np.concatenate([machine(seed=4), machine(seed=5)])
    slow, running = analyze_frames(x, plan, [speed_hz, 24.7])
    reference = analyze_frames(x[0], plan, [24.7])[0]
    assert slow.shaft_hz == speed_hz and not slow.shaft_estimated
    assert slow.orders_mm_s == {} and slow.envelope == {}
    for name in ("acceleration_rms_g", "acceleration_peak_g", "kurtosis", "crest_factor", "velocity_rms_mm_s",
                 "velocity_peak_mm_s", "displacement_pp_um"):
        assert getattr(slow, name) == pytest.approx(getattr(reference, name), rel=1e-12), name
    # the other channel of the batch is untouched by its neighbour's standing shaft
    assert running == analyze_frames(x[1], plan, [24.7])[0]
    assert list(running.orders_mm_s) == ["0.5x", "1x", "2x", "3x"] and running.envelope


def test_scalar_speed_applies_to_all_channels() -> None:
    out = analyze_frames(machine(channels=2), make_plan(FS, N), 24.7)
    assert [r.shaft_hz for r in out] == [24.7, 24.7]


@settings(max_examples=15, deadline=None)
@given(scale=st.floats(1e-3, 1e3), seed=st.integers(0, 1000))
def test_scaling_linearity(scale: float, seed: int) -> None:
    # property: every amplitude scales with the input, every ratio (crest, kurtosis, SNR) and frequency stays
    plan = make_plan(FS, 8192, envelope_band_hz=(4000.0, 9000.0), bearing=B6205, speed_range_hz=(15.0, 60.0))
    x = machine(n=8192, seed=seed)
    a, b = analyze_frames(x, plan, [24.7])[0], analyze_frames(scale * x, plan, [24.7])[0]
    for name in ("acceleration_rms_g", "acceleration_peak_g", "velocity_rms_mm_s", "velocity_peak_mm_s",
                 "displacement_pp_um"):
        assert getattr(b, name) == pytest.approx(scale * getattr(a, name), rel=1e-5), name
    assert b.kurtosis == pytest.approx(a.kurtosis, rel=1e-4) and b.crest_factor == pytest.approx(a.crest_factor,
                                                                                                   rel=1e-5)
    assert b.orders_mm_s == pytest.approx({k: scale * v for k, v in a.orders_mm_s.items()}, rel=1e-5)
    assert a.envelope["bpfo"].detected and b.envelope_detected == a.envelope_detected
    for k, fam in a.envelope.items():
        assert b.envelope[k].frequency_hz == fam.frequency_hz
        if fam.amplitude_g is None:
            continue
        assert b.envelope[k].amplitude_g == pytest.approx(scale * fam.amplitude_g, rel=1e-4)
        assert b.envelope[k].snr_db == pytest.approx(fam.snr_db, abs=0.01)
        assert b.envelope[k].depth == pytest.approx(fam.depth, rel=1e-4)


# ------------------------------------------------------------------------------------------- bearings


def test_cwru_6205_multiples() -> None:
    # CWRU Bearing Data Center bearing specifications (datasets README): BPFI 5.4152, BPFO 3.5848, FTF 0.39828,
    # rolling element 4.7135 (= 2 × BSF) × shaft speed; the kinematic formulas agree to 4–5 significant figures
    m = defect_multiples(B6205)
    assert m.bpfi_hz == pytest.approx(5.4152, rel=1e-4)
    assert m.bpfo_hz == pytest.approx(3.5848, rel=1e-4)
    assert m.ftf_hz == pytest.approx(0.39828, rel=2e-4)
    assert 2 * m.bsf_hz == pytest.approx(4.7135, rel=1e-4)
    # FIELD_NOTES §2: at 1797 r/min BPFO ≈ 107.4 Hz, BPFI ≈ 162.2 Hz
    d = defect_frequencies(B6205, 1797 / 60)
    assert d.bpfo_hz == pytest.approx(107.4, abs=0.05) and d.bpfi_hz == pytest.approx(162.2, abs=0.05)


def test_cwru_6203_multiples() -> None:
    # CWRU fan-end 6203 (datasets README): published BPFI 4.9469, BPFO 3.0530, FTF 0.3817, rolling element 3.9874;
    # the README's own cross-check from geometry gives 4.9469, 3.0531, 0.3816, 3.9877
    m = defect_multiples(B6203)
    assert (m.bpfi_hz, m.bpfo_hz, m.ftf_hz, 2 * m.bsf_hz) == pytest.approx((4.9469, 3.0531, 0.3816, 3.9877), abs=1e-4)


@settings(max_examples=100, deadline=None)
@given(n=st.integers(3, 40), d=st.floats(0.5, 30.0), ratio=st.floats(0.05, 0.95), phi=st.floats(0.0, 89.0),
       fr=st.floats(0.1, 500.0))
def test_kinematic_identities(n: int, d: float, ratio: float, phi: float, fr: float) -> None:
    # FIELD_NOTES §2: BPFO + BPFI = n·fr and BPFO = n·FTF
    assume(n * ratio <= math.pi)  # a possible bearing: its elements fit side by side on the pitch circle
    f = defect_frequencies(BearingGeometry(n, d, d / ratio, phi), fr)
    assert f.bpfo_hz + f.bpfi_hz == pytest.approx(n * fr, rel=1e-12)
    assert f.bpfo_hz == pytest.approx(n * f.ftf_hz, rel=1e-12)
    assert 0 < f.ftf_hz < fr / 2 and f.bsf_hz > 0


def test_contact_angle_enters_through_its_cosine() -> None:
    flat, angled = defect_frequencies(B6205, 1.0), defect_frequencies(BearingGeometry(9, 0.3126, 1.537, 60.0), 1.0)
    k = 0.3126 / 1.537
    assert angled.bpfo_hz == pytest.approx(4.5 * (1 - 0.5 * k), rel=1e-12)  # cos 60° = 0.5
    assert angled.bpfi_hz > flat.bpfo_hz


def test_negative_speed_is_rejected() -> None:
    with pytest.raises(PlanError, match="shaft speed -1"):
        defect_frequencies(B6205, -1.0)


# ------------------------------------------------------------------------------------------- severity


def test_iso_20816_3_table() -> None:
    # ISO 20816-3 (ISO 10816-3:2009 Annex A) via FIELD_NOTES §1; beware the wrong G2-rigid C/D 7.1 copies
    assert ISO_20816_3_VELOCITY_MM_S == {
        (1, "rigid"): (2.3, 4.5, 7.1), (1, "flexible"): (3.5, 7.1, 11.0),
        (2, "rigid"): (1.4, 2.8, 4.5), (2, "flexible"): (2.3, 4.5, 7.1)}
    assert zone_boundaries_mm_s(2, "rigid")[2] == 4.5


@pytest.mark.parametrize("v, group, support, zone", [
    (0.0, 2, "rigid", "A"), (1.39, 2, "rigid", "A"), (1.4, 2, "rigid", "B"), (2.8, 2, "rigid", "C"),
    (4.49, 2, "rigid", "C"), (4.5, 2, "rigid", "D"), (7.0, 2, "flexible", "C"), (7.1, 1, "rigid", "D"),
    (10.9, 1, "flexible", "C"), (11.0, 1, "flexible", "D"), (3.4, 1, "flexible", "A"),
])
def test_iso_zones(v: float, group: int, support: str, zone: str) -> None:
    # a value on a boundary belongs to the higher zone
    assert iso_zone(v, group, support) == zone


@given(v=st.floats(0, 50), w=st.floats(0, 50), group=st.sampled_from([1, 2]),
       support=st.sampled_from(["rigid", "flexible"]))
def test_zones_are_monotone(v: float, w: float, group: int, support: str) -> None:
    lo, hi = sorted((v, w))
    assert iso_zone(lo, group, support) <= iso_zone(hi, group, support)


@pytest.mark.parametrize("args", [(1.0, 3, "rigid"), (1.0, 1, "soft"), (-1.0, 1, "rigid"), (math.nan, 2, "rigid"),
                                  (1.0, True, "rigid")])
def test_iso_zone_errors(args: tuple[float, int, str]) -> None:
    with pytest.raises(PlanError):
        iso_zone(*args)


def test_float32_transform_keeps_small_vibration_beside_gravity_and_a_strong_tone() -> None:
    # Velocity of a sine a = A sin 2πft is A/(2πf), r.m.s. the same over √2 (FIELD_NOTES §5, handbook formula).
    # A MEMS frame carries 1 g of gravity (FIELD_NOTES §6) and here a 2 g tone at 3 kHz outside the velocity band
    # beside a 0.5 mg, 80.3 Hz vibration: the single-precision transform must not bury the small line.
    fs, n = 12800.0, 16384
    t = np.arange(n) / fs
    small_g = 0.0005
    x = 1.0 + small_g * np.sin(2 * np.pi * 80.3 * t) + 2.0 * np.sin(2 * np.pi * 3000.0 * t)
    plan = make_plan(fs, n)
    (ind,) = analyze_frames(x, plan, shaft_hz=[25.0])
    expected_mm_s = small_g * 9.80665 / (2 * np.pi * 80.3) / np.sqrt(2) * 1000.0
    np.testing.assert_allclose(ind.velocity_rms_mm_s, expected_mm_s, rtol=5e-3)
    # The mean is 1 g plus what the 80.3 Hz sine's unfinished period leaves, at most A/(π·cycles) = 1.5e-6 g
    # (102.8 cycles in the frame; the 3 kHz tone completes 3840): analytic bound.
    assert abs(ind.mean_g - 1.0) <= small_g / (np.pi * 80.3 * n / fs)
