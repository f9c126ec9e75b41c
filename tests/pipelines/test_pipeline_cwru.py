"""The real CWRU bearing recordings (../shared/datasets/cwru): time-domain values, velocity regression values and
envelope analysis against the check values of the datasets README (method E1 and its suggested tolerances).

Traps respected (datasets README): the normal baseline is sampled at 48 kHz; the ball-fault file has no clean
2×BSF line (used only for "no false race call"); 3×BPFO overlaps 2×BPFI, so only fundamentals are asserted; the
speed is the one stored in each file.
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path

import numpy as np
import pytest
import scipy.io

from edgevib.pipelines.analysis import analyze_frames, default_envelope_band, make_plan
from edgevib.pipelines.types import BearingGeometry, FrameIndicators

B6205 = BearingGeometry(9, 0.3126, 1.537, 0.0)  # drive-end 6205-2RS, datasets README
E1_BAND = (2000.0, 5000.0)  # method E1's band (datasets README)
FAULTS = {"bpfo": "outer", "bpfi": "inner"}


@cache
def _load(path: Path) -> tuple[np.ndarray, float, dict[str, object]]:
    checks = json.loads((path.parent / "check_values.json").read_text())[path.name]
    mat = scipy.io.loadmat(path)
    x = mat[checks["de_variable"]].reshape(-1).astype(np.float64)
    rpm = float(mat[checks["rpm_variable"]].reshape(-1)[0])
    return x, rpm / 60.0, checks


def record(cwru_dir: Path, name: str) -> tuple[np.ndarray, float, float, dict[str, object]]:
    x, shaft_hz, checks = _load(cwru_dir / name)
    return x, float(checks["fs_hz"]), shaft_hz, checks  # type: ignore[arg-type]


@cache
def _whole(path: Path) -> FrameIndicators:
    x, shaft_hz, checks = _load(path)
    fs = float(checks["fs_hz"])  # type: ignore[arg-type]
    plan = make_plan(fs, x.size, envelope_band_hz=E1_BAND, bearing=B6205)
    return analyze_frames(x, plan, [shaft_hz])[0]


def whole(cwru_dir: Path, name: str) -> FrameIndicators:
    return _whole(cwru_dir / name)


ALL = ["cwru_48k_de_normal_0hp.mat", "cwru_12k_de_outer_007_0hp.mat", "cwru_12k_de_inner_007_0hp.mat",
       "cwru_12k_de_ball_007_0hp.mat", "cwru_12k_de_outer_007_1hp.mat", "cwru_12k_de_inner_007_1hp.mat",
       "cwru_48k_de_outer_007_0hp.mat"]
RACE = [n for n in ALL if "outer" in n or "inner" in n]


@pytest.mark.parametrize("name", ALL)
def test_time_domain_values(cwru_dir: Path, name: str) -> None:
    # datasets README, "Time-domain values (DE channel, mean removed; kurtosis Pearson)": 4–5 significant figures
    r = whole(cwru_dir, name)
    td = record(cwru_dir, name)[3]["time_domain_de"]
    assert r.mean_g == pytest.approx(td["mean"], abs=6e-6)  # type: ignore[index]
    assert r.acceleration_rms_g == pytest.approx(td["rms_mean_removed"], rel=2e-4)  # type: ignore[index]
    assert r.acceleration_peak_g == pytest.approx(td["peak_abs_mean_removed"], rel=2e-4)  # type: ignore[index]
    assert r.crest_factor == pytest.approx(td["crest_factor"], abs=6e-4)  # type: ignore[index]
    assert r.kurtosis == pytest.approx(td["kurtosis_pearson"], abs=6e-4)  # type: ignore[index]


@pytest.mark.parametrize("name", ALL)
def test_velocity_regression_values(cwru_dir: Path, name: str) -> None:
    # datasets README: velocity r.m.s. 10–1000 Hz assuming g, by frequency-domain integration of the unwindowed
    # record (rounded to 3 figures).  edgevib integrates the Hann-windowed frame, which weights the record's ends
    # less: the two agree within 5 % (observed ≤ 3.2 %, largest for the 48 kHz files).
    r = whole(cwru_dir, name)
    expected = record(cwru_dir, name)[3]["time_domain_de"]["velocity_rms_mm_s_10_1000Hz_assuming_g"]  # type: ignore[index]
    assert r.velocity_rms_mm_s == pytest.approx(expected, rel=0.05)


@pytest.mark.parametrize("name", RACE)
def test_envelope_singles_out_the_race_fault(cwru_dir: Path, name: str) -> None:
    # datasets README check values (method E1, band 2–5 kHz, Hann, 2|FFT|/Σw, in g) and suggested tolerances:
    # peak within ±0.5 Hz of the measured line and ±2 % of the kinematic one, amplitude within ±20 %
    _, _, shaft_hz, checks = record(cwru_dir, name)
    r = whole(cwru_dir, name)
    fault = "bpfo" if "outer" in name else "bpfi"
    other = "bpfi" if fault == "bpfo" else "bpfo"
    measured = checks["envelope_2_5kHz"]["max_within_2pct"][f"{fault.upper()}_x1"]  # type: ignore[index]
    fam = r.envelope[fault]
    # expected at the stored speed with the CWRU multiples (BPFO 3.5848, BPFI 5.4152 × shaft speed)
    assert fam.expected_hz / shaft_hz == pytest.approx({"bpfo": 3.5848, "bpfi": 5.4152}[fault], rel=1e-4)
    assert fam.expected_hz == pytest.approx(measured["expected_hz"], abs=0.002)
    assert fam.frequency_hz == pytest.approx(measured["peak_hz"], abs=0.5)
    assert fam.frequency_hz == pytest.approx(fam.expected_hz, rel=0.02)
    assert fam.amplitude_g == pytest.approx(measured["amp"], rel=0.2)
    # the verdict: the labelled family detected and no other (README: 802/221/749/248/552 × median)
    assert r.envelope_detected == (fault,)
    assert fam.harmonics_found >= 2 and fam.snr_db is not None and fam.snr_db > 40
    assert not r.envelope[other].detected


@pytest.mark.parametrize("name", ["cwru_48k_de_normal_0hp.mat", "cwru_12k_de_ball_007_0hp.mat"])
def test_no_race_fault_in_the_baseline_or_ball_file(cwru_dir: Path, name: str) -> None:
    # README: the normal file has nothing near BPFO/BPFI (0.0008/0.0010 g against a 0.00035 g median); the ball
    # file has small lines there (0.012 g) but none stands out like a race fault (≥ 0.18 g), and no clean 2×BSF
    # (trap 3).  Verdicts: nothing in the baseline, neither race family in the ball file.
    r = whole(cwru_dir, name)
    for fam in ("bpfo", "bpfi"):
        assert not r.envelope[fam].detected
        assert (r.envelope[fam].amplitude_g or 0.0) < 0.02
    if "normal" in name:
        assert r.envelope_detected == ()


@pytest.mark.parametrize("name", ALL)
@pytest.mark.parametrize("band", ["e1", "default"])
def test_verdicts_on_every_file_and_band(cwru_dir: Path, name: str, band: str) -> None:
    # issue acceptance: on every CWRU file the labelled family is detected and no other; the baseline and the
    # ball file (no clean 2×BSF, datasets README trap 3) detect nothing — in method E1's band and in the default
    # band for the sample rate (1180–4680 Hz at 12 kHz, 4690–18750 Hz at 48 kHz)
    x, fs, shaft_hz, checks = record(cwru_dir, name)
    env = E1_BAND if band == "e1" else default_envelope_band(fs, None, shaft_hz_max=shaft_hz * 1.03)
    plan = make_plan(fs, x.size, envelope_band_hz=env, bearing=B6205,
                     speed_range_hz=(shaft_hz * 0.97, shaft_hz * 1.03))
    r = analyze_frames(x, plan, [shaft_hz])[0]
    label = {"outer": ("bpfo",), "inner": ("bpfi",)}.get(str(checks["fault"]).split("_")[0], ())
    assert r.envelope_detected == label, (checks["fault"], r.envelope_detected)


@pytest.mark.parametrize("name", ALL)
def test_streaming_one_second_frames(cwru_dir: Path, name: str) -> None:
    # README "Streaming windows": every non-overlapping 1-s window of 130, 105, 131, 106 and 135 has its fault line
    # within 2 % of the expected one, amplitudes 0.587–0.645 (130), 0.171–0.177 (105), 1.14–1.26 (135) by E1; no
    # window of the normal or ball file peaks near BPFO, BPFI or 2×BSF.  Here all windows go through one
    # vectorized call, and every window's verdict is the labelled family alone.
    x, fs, shaft_hz, checks = record(cwru_dir, name)
    n = int(fs)
    frames = x[: (x.size // n) * n].reshape(-1, n)
    plan = make_plan(fs, n, envelope_band_hz=E1_BAND, bearing=B6205)
    out = analyze_frames(frames, plan, [shaft_hz] * frames.shape[0])
    label = {"outer": ("bpfo",), "inner": ("bpfi",)}.get(str(checks["fault"]).split("_")[0], ())
    assert all(r.envelope_detected == label for r in out), [r.envelope_detected for r in out]
    if not label:
        return
    fault = label[0]
    amp_range = {"cwru_12k_de_outer_007_0hp.mat": (0.587, 0.645), "cwru_12k_de_inner_007_0hp.mat": (0.171, 0.177),
                 "cwru_48k_de_outer_007_0hp.mat": (1.14, 1.26)}.get(name)
    for r in out:
        fam = r.envelope[fault]
        assert fam.frequency_hz is not None and abs(fam.frequency_hz / fam.expected_hz - 1) < 0.02
        if amp_range is not None:
            assert 0.8 * amp_range[0] < fam.amplitude_g < 1.2 * amp_range[1]  # type: ignore[operator]


def test_block_by_block_and_whole_record_agree(cwru_dir: Path) -> None:
    # maths: the record's mean square is the average of the frames' mean squares (up to the frames' own means,
    # which differ by ~1e-3 of the r.m.s. here); the fault line's envelope amplitude is stationary
    x, fs, shaft_hz, _ = record(cwru_dir, "cwru_12k_de_outer_007_0hp.mat")
    n = int(fs)
    frames = x[: (x.size // n) * n].reshape(-1, n)
    plan = make_plan(fs, n, envelope_band_hz=E1_BAND, bearing=B6205)
    out = analyze_frames(frames, plan, [shaft_hz] * frames.shape[0])
    rms_blocks = np.sqrt(np.mean([r.acceleration_rms_g**2 for r in out]))
    whole_rec = analyze_frames(frames.reshape(-1), make_plan(fs, frames.size), [shaft_hz])[0]
    assert rms_blocks == pytest.approx(whole_rec.acceleration_rms_g, rel=1e-3)
    amps = [r.envelope["bpfo"].amplitude_g or 0.0 for r in out]
    assert np.mean(amps) == pytest.approx(whole(cwru_dir, "cwru_12k_de_outer_007_0hp.mat").envelope["bpfo"].amplitude_g,
                                          rel=0.1)


@pytest.mark.parametrize("name", ALL)
def test_speed_estimate_recovers_the_stored_speed(cwru_dir: Path, name: str) -> None:
    # the speed stored in each file (datasets README, trap 6) against the spectrum's estimate within a realistic
    # speed range of 1200–3600 r/min; observed within 0.05 % over the whole record.  The inner-race records carry
    # a 2× line 2.6 times their 1× line: with 60 Hz inside the range they read equally as a 60 Hz machine with a
    # 0.5× sub-harmonic, and the estimate declines (None, quality 0) rather than guess.
    x, fs, shaft_hz, _ = record(cwru_dir, name)
    r = analyze_frames(x, make_plan(fs, x.size, speed_range_hz=(20.0, 60.0)))[0]
    if "inner" in name:
        assert r.shaft_hz is None and r.shaft_quality == 0.0
    else:
        assert r.shaft_estimated and r.shaft_hz == pytest.approx(shaft_hz, rel=0.002)
        assert r.shaft_quality is not None and r.shaft_quality >= 0.5
    narrow = analyze_frames(x, make_plan(fs, x.size, speed_range_hz=(20.0, 40.0)))[0]
    assert narrow.shaft_hz == pytest.approx(shaft_hz, rel=0.002)


@pytest.mark.parametrize("seconds", [0.25, 0.5, 1.0])
@pytest.mark.parametrize("speed_range_hz", [(20.0, 60.0), (5.0, 100.0)])
def test_speed_estimate_never_guesses_wrong(cwru_dir: Path, seconds: float,
                                            speed_range_hz: tuple[float, float]) -> None:
    # over 300–6000 r/min the rig's own low-frequency lines (5.75 and 12 Hz, stronger in velocity than the 1×)
    # and the fault lines compete, and short frames resolve little: the estimate then declines (None) rather than
    # report a wrong speed.  Never more than the order tolerance (3 %) off, on whole records and on every frame.
    for name in ALL:
        x, fs, shaft_hz, _ = record(cwru_dir, name)
        n = int(fs * seconds)
        frames = np.concatenate([x[None, :n * (x.size // n)].reshape(-1, n)])
        for r in analyze_frames(frames, make_plan(fs, n, speed_range_hz=speed_range_hz, partial=True)):
            assert r.shaft_hz is None or r.shaft_hz == pytest.approx(shaft_hz, rel=0.03), name
        whole_rec = analyze_frames(x, make_plan(fs, x.size, speed_range_hz=speed_range_hz))[0]
        assert whole_rec.shaft_hz is None or whole_rec.shaft_hz == pytest.approx(shaft_hz, rel=0.002), name


B6203 = BearingGeometry(8, 0.2656, 1.122, 0.0)  # fan-end 6203-2RS, datasets README (BPFO 3.0530, 2×BSF 3.9874)


@pytest.mark.parametrize("name", ALL)
def test_every_channel_and_a_geometry_near_whole_orders(cwru_dir: Path, name: str) -> None:
    # Other sensors and another bearing on the same rig, as a check of the detector beyond the channel its
    # verdicts were first tried on.  The drive-end fault is seen from the fan-end and base accelerometers too
    # (detected or not, never as another family); the fan-end 6203 — healthy in every file (the faults are seeded
    # in the drive-end bearing, datasets README) — has BPFO at 3.053 × and 2×BSF at 3.987 × shaft, within the ±2 %
    # slip windows of the 3× and 4× shaft lines (and of the motor's 120 Hz line, 4.01 × at 1796 r/min): no family
    # of it is ever called, whichever channel and band.
    _, fs, shaft_hz, checks = record(cwru_dir, name)
    mat = scipy.io.loadmat(cwru_dir / name)
    label = {"outer": ("bpfo",), "inner": ("bpfi",)}.get(str(checks["fault"]).split("_")[0], ())
    default = default_envelope_band(fs, None, shaft_hz_max=shaft_hz * 1.03)
    for var in sorted(k for k in mat if k.endswith(("_DE_time", "_FE_time", "_BA_time"))):
        x = mat[var].reshape(-1).astype(np.float64)
        for band in (E1_BAND, default):
            speed = (shaft_hz * 0.97, shaft_hz * 1.03)
            fan_end = analyze_frames(x, make_plan(fs, x.size, envelope_band_hz=band, bearing=B6203,
                                                  speed_range_hz=speed), [shaft_hz])[0]
            assert fan_end.envelope_detected == (), (var, band, fan_end.envelope_detected)
            drive_end = analyze_frames(x, make_plan(fs, x.size, envelope_band_hz=band, bearing=B6205,
                                                    speed_range_hz=speed), [shaft_hz])[0]
            assert set(drive_end.envelope_detected) <= set(label), (var, band, drive_end.envelope_detected)


def test_ball_file_fan_end_cage_line_is_not_a_cage_fault(cwru_dir: Path) -> None:
    # the ball-fault record's fan-end channel (X118_FE_time) with the fan-end bearing, 6203-2RS: 8 balls of
    # 0.2656 in on a 1.122 in pitch (datasets README), 2 s frames in method E1's band.  2 × BSF is detected in every
    # frame (observed 5 of 5); FTF, the sideband spacing of 2 × BSF (the element travels with the cage, Randall &
    # Antoni 2011), is never reported as a cage fault of its own.
    mat = scipy.io.loadmat(cwru_dir / "cwru_12k_de_ball_007_0hp.mat")
    x = mat["X118_FE_time"].reshape(-1).astype(np.float64)
    shaft_hz = float(mat["X118RPM"].reshape(-1)[0]) / 60.0
    fs, n = 12000.0, 24000
    frames = x[: (x.size // n) * n].reshape(-1, n)
    plan = make_plan(fs, n, envelope_band_hz=E1_BAND, bearing=BearingGeometry(8, 0.2656, 1.122, 0.0))
    results = analyze_frames(frames, plan, [shaft_hz] * frames.shape[0])
    assert len(results) == 5
    assert sum(r.envelope["bsf"].detected for r in results) >= 4
    assert not any(r.envelope["ftf"].detected for r in results)


@pytest.mark.parametrize("name", ["cwru_48k_de_normal_0hp.mat", "cwru_12k_de_ball_007_0hp.mat",
                                  "cwru_48k_de_outer_007_0hp.mat"])
@pytest.mark.parametrize("bearing", [B6205, BearingGeometry(8, 0.2656, 1.122, 0.0)])
def test_speed_estimate_with_a_bearing_given(cwru_dir: Path, name: str, bearing: BearingGeometry) -> None:
    # the stored speed (datasets README, trap 6) read from the spectrum over 300–6000 r/min with a bearing's cage
    # ratio given (the drive-end 6205 or the fan-end 6203 of the README): the cage tests must not take the real
    # shaft for a cage line (observed: 1795.5–1796.5 r/min against 1796 stored)
    x, fs, shaft_hz, _ = record(cwru_dir, name)
    plan = make_plan(fs, x.size, speed_range_hz=(5.0, 100.0), bearing=bearing, orders=(0.5, 1.0, 2.0, 3.0),
                     partial=True)
    r = analyze_frames(x, plan)[0]
    assert r.shaft_hz == pytest.approx(shaft_hz, rel=0.03)  # the plan's order tolerance
