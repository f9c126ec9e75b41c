"""``edgevib analyze`` on real file layouts and short records: MATLAB structs, CSV headers and time columns, the
FEMTO 0.1 s snapshots, speed sources and warnings, detection verdicts and the automatic band (datasets README and
the issue's acceptance)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.io
import scipy.io.wavfile

from edgevib.daemon.cli import main

CWRU_BEARING = "9,0.3126,1.537,0"  # drive-end 6205 (datasets README)
FEMTO_BEARING = "13,3.5,25.6,0"  # PRONOSTIA bearing: 13 elements of 3.5 mm on a 25.6 mm pitch (datasets README)
FS = 10000.0


def run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    try:
        code = main(argv)
    except SystemExit as exc:
        code = int(exc.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def analyze_json(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[dict[str, object], str]:
    code, out, err = run(["analyze", *argv, "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)
    assert isinstance(doc, dict)
    return doc, err


def sine(seconds: float, f: float, amplitude: float, fs: float = FS) -> np.ndarray:
    return amplitude * np.sin(2 * np.pi * f * np.arange(int(fs * seconds)) / fs)


# ------------------------------------------------------------------------------------------- MATLAB layouts


def test_struct_fields_with_rate_and_speed_beside_the_signal(tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    # a layout common in open datasets: one struct holding the signal, its rate and the speed
    x = sine(1.0, 100.0, 2.0)
    path = tmp_path / "rec.mat"
    scipy.io.savemat(path, {"rec": {"meta": {"site": "quarry lane"}, "acc": {"sig": x, "fs": FS, "rpm": 1500.0}}})
    doc, _ = analyze_json([str(path), "--var", "rec.acc.sig"], capsys)
    assert doc["signal"] == "variable rec.acc.sig" and doc["fs_hz"] == FS
    assert doc["fs_source"] == "file variable rec.acc.fs"
    assert doc["shaft_hz"] == pytest.approx(25.0) and doc["shaft_hz_source"] == "file"
    assert doc["acceleration_peak_g"] == pytest.approx(2.0, rel=1e-4)
    # the one numeric vector in the file is found without --var too
    doc, _ = analyze_json([str(path)], capsys)
    assert doc["signal"] == "variable rec.acc.sig"


def test_explicit_rate_and_speed_paths(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # a layout like a bearing data set's "bearing" struct: gs (signal), sr (rate) and rate (shaft Hz)
    x = sine(1.0, 60.0, 1.0)
    path = tmp_path / "baseline.mat"
    scipy.io.savemat(path, {"bearing": {"gs": x, "sr": FS, "rate": 25.0, "load": 270.0}})
    doc, _ = analyze_json([str(path), "--var", "bearing.gs", "--shaft-hz-var", "bearing.rate"], capsys)
    assert doc["fs_hz"] == FS and doc["fs_source"] == "file variable bearing.sr"  # "sr" by convention
    assert doc["shaft_hz"] == pytest.approx(25.0) and doc["shaft_source"] == "file variable bearing.rate (Hz)"
    doc, _ = analyze_json([str(path), "--var", "bearing.gs", "--fs-var", "bearing.sr", "--rpm-var", "bearing.load"],
                          capsys)
    assert doc["shaft_hz"] == pytest.approx(270.0 / 60.0)


def test_struct_arrays_by_matlab_index(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # a struct array of channels, each with a name and data: rec.Y(2).Data (MATLAB's 1-based index)
    channels = np.zeros((1, 2), dtype=[("Name", object), ("Data", object)])
    channels[0, 0] = ("force", sine(1.0, 10.0, 5.0))
    channels[0, 1] = ("vibration", sine(1.0, 100.0, 3.0))
    path = tmp_path / "arr.mat"
    scipy.io.savemat(path, {"rec": {"Y": channels, "fs": FS}})
    doc, _ = analyze_json([str(path), "--var", "rec.Y(2).Data"], capsys)
    assert doc["acceleration_peak_g"] == pytest.approx(3.0, rel=1e-4) and doc["fs_hz"] == FS


@pytest.mark.parametrize("argv, message", [
    (["--var", "rec.acc.nope"], "struct rec.acc in"),
    (["--var", "rec.acc.sig.x"], "is not a struct"),
    (["--var", "rec.Y(3).Data"], "index 3 is outside 1..2"),
    (["--var", "rec..x"], "is not a variable path"),
    (["--var", "rec.acc.sig", "--fs-var", "rec.acc.sig"], "--fs-var rec.acc.sig is not a number"),
    (["--var", "rec.acc.sig", "--rpm-var", "rec.acc.fs", "--shaft-hz-var", "rec.acc.fs"], "choose one"),
    ([], "choose the signal with --var NAME (a.b.c for struct fields)"),
])
def test_struct_path_errors_are_one_line(argv: list[str], message: str, tmp_path: Path,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    channels = np.zeros((1, 2), dtype=[("Data", object)])
    channels[0, 0] = (sine(0.5, 10.0, 1.0),)
    channels[0, 1] = (sine(0.5, 20.0, 1.0),)
    path = tmp_path / "bad.mat"
    scipy.io.savemat(path, {"rec": {"acc": {"sig": sine(0.5, 50.0, 1.0), "fs": FS}, "Y": channels}})
    code, out, err = run(["analyze", str(path), *argv], capsys)
    assert code == 2 and out == "" and err.count("\n") == 1, err
    assert message in err, err


# ------------------------------------------------------------------------------------------- CSV layouts


def test_csv_header_and_time_column(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # a time column first: never taken as the signal; the acceleration column is (named in "signal")
    x = sine(1.0, 80.0, 0.5)
    path = tmp_path / "m101.csv"
    path.write_text("time_s;accel_g\n" + "\n".join(f"{i / FS:.6f};{v:.9f}" for i, v in enumerate(x)) + "\n")
    doc, _ = analyze_json([str(path), "--fs", str(FS)], capsys)
    assert doc["signal"] == "column 1 'accel_g' of 2"
    assert doc["acceleration_peak_g"] == pytest.approx(0.5, rel=1e-3)
    doc, _ = analyze_json([str(path), "--fs", str(FS), "--column", "accel_g"], capsys)
    assert doc["signal"] == "column 1 'accel_g' of 2"


def test_a_time_column_alone_is_refused_with_the_columns_listed(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "t.csv"
    path.write_text("t,count\n" + "\n".join(f"{i / FS},{i}" for i in range(2000)) + "\n")
    code, out, err = run(["analyze", str(path), "--fs", str(FS)], capsys)
    assert code == 2 and out == "" and err.count("\n") == 1
    assert "no column looks like a signal" in err and "0 't' (monotonic), 1 'count' (monotonic)" in err
    code, _, err = run(["analyze", str(path), "--fs", str(FS), "--column", "speed"], capsys)
    assert code == 2 and "has no column 'speed'; columns: 0 't' (monotonic)" in err


def test_an_explicit_monotonic_column_is_analysed_with_a_one_line_warning(tmp_path: Path,
                                                                         capsys: pytest.CaptureFixture[str]) -> None:
    # a time column chosen with --column is analysed as asked, but never silently (issue 15 §5)
    x = sine(1.0, 80.0, 0.5)
    path = tmp_path / "m101.csv"
    path.write_text("time_s;accel_g\n" + "\n".join(f"{i / FS:.6f};{v:.9f}" for i, v in enumerate(x)) + "\n")
    code, out, err = run(["analyze", str(path), "--fs", str(FS), "--column", "0"], capsys)
    assert code == 0 and out
    lines = [ln for ln in err.splitlines() if "warning" in ln]
    assert len(lines) == 1 and "column 0 'time_s'" in lines[0] and "monotonic" in lines[0], err
    doc, err = analyze_json([str(path), "--fs", str(FS), "--column", "accel_g"], capsys)
    assert doc["warnings"] == [] and "monotonic" not in err  # the signal column: no warning


def test_femto_snapshots_analyse_without_error(femto_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # datasets README: PRONOSTIA snapshots, 2560 samples (0.1 s) at 25.6 kHz, columns hour, minute, second,
    # microsecond, horizontal and vertical acceleration (g), no header; condition 1 at 1800 r/min.  Every snapshot
    # analyses: the clock fields are skipped (constant or monotonic), column 4 is the signal; what 10 Hz lines
    # cannot carry (0.5×, FTF) is left out with a note
    files = sorted(femto_dir.glob("acc_*.csv"))
    assert len(files) == 110
    for path in files[:: 11] + files[-1:]:
        doc, _ = analyze_json([str(path), "--fs", "25600", "--rpm", "1800", "--bearing", FEMTO_BEARING], capsys)
        assert doc["signal"] == "column 4 of 6" and doc["n_samples"] == 2560
        assert doc["acceleration_rms_g"] > 0 and math.isfinite(doc["kurtosis"])  # type: ignore[arg-type]
        assert doc["orders"]["0.5x"] is None and doc["orders"]["1x"] is not None  # type: ignore[index]
        assert "ftf" not in doc["envelope"]  # type: ignore[operator]
        notes = doc["notes"]
        assert any(n.startswith("orders 0.5x:") for n in notes)  # type: ignore[union-attr]
        assert any(n.startswith("envelope FTF:") for n in notes)  # type: ignore[union-attr]


def test_a_cut_last_line_is_dropped_with_a_warning(femto_dir: Path, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    # a FEMTO snapshot (2560 rows of hour, minute, second, microsecond, horizontal, vertical; datasets README) cut
    # in its last line while copied: the partial row is dropped with one warning, the other 2559 rows analysed —
    # r.m.s. from numpy on those rows; a short row that ends with a line break is malformed, not cut: refused
    src = femto_dir / "acc_00001.csv"
    text = src.read_text()
    path = tmp_path / "acc_00001.csv"
    path.write_text(text[: text.rstrip("\n").rfind("\n") + 14])  # the last line cut after "8,47,5,2.9687"
    doc, err = analyze_json([str(path), "--fs", "25600", "--column", "4"], capsys)
    assert doc["n_samples"] == 2559
    x = np.loadtxt(src, delimiter=",")[:2559, 4]
    assert doc["acceleration_rms_g"] == pytest.approx(float(np.std(x)), rel=1e-6)
    assert doc["warnings"] == ["acc_00001.csv: its last line (line 2560) is cut short: 4 of 6 fields and no line "
                               "break; dropped"]
    assert "edgevib analyze: warning: acc_00001.csv: its last line (line 2560) is cut short" in err
    path.write_text(text[: text.rstrip("\n").rfind("\n") + 14] + "\n")
    code, _, err = run(["analyze", str(path), "--fs", "25600", "--column", "4"], capsys)
    assert code == 2 and "row 2560 has 4 columns, the first has 6" in err


def test_short_records_give_time_domain_indicators(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # 100 samples at 25.6 kHz (3.9 ms): r.m.s. of a sine A/√2 (handbook); nothing else, with the reasons
    path = tmp_path / "burst.npy"
    np.save(path, 2.0 * np.sin(2 * np.pi * 2560.0 * np.arange(100) / 25600.0))
    doc, _ = analyze_json([str(path), "--fs", "25600", "--rpm", "1500", "--bearing", CWRU_BEARING], capsys)
    assert doc["acceleration_rms_g"] == pytest.approx(2.0 / math.sqrt(2), rel=1e-3)
    assert doc["velocity_rms_mm_s"] is None
    assert all(v is None for v in doc["orders"].values())  # type: ignore[union-attr]
    assert doc["envelope"]["detected"] == []  # type: ignore[index]
    assert {n.split(":")[0] for n in doc["notes"]} >= {"velocity", "orders 0.5x, 1x, 2x, 3x"}  # type: ignore[union-attr]


def test_a_record_too_short_to_check_a_known_speed_says_so(femto_dir: Path, cwru_dir: Path, tmp_path: Path,
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    # With the speed known the record is not asked for it: the note says the spectrum cannot check it and how
    # many samples the record has and checking needs — 2 lines below the slowest speed of the ±3 % order tolerance
    # (edgevib.common.bands.min_frame_samples: ⌈2·fs / (0.97·shaft)⌉, common practice for resolving a line).
    rows = np.loadtxt(femto_dir / "acc_00001.csv", delimiter=",")[:200, 4]  # 200 of 2560 rows (datasets README)
    path = tmp_path / "femto_200.npy"
    np.save(path, rows)
    doc, _ = analyze_json([str(path), "--fs", "25600", "--rpm", "1800"], capsys)
    need = math.ceil(2 * 25600 / (0.97 * 30.0))
    assert need == 1760
    speed = [n for n in doc["notes"] if n.startswith("speed")]  # type: ignore[union-attr]
    assert speed == ["speed: 1800 r/min from option --rpm, not checked against the spectrum: the record's 200 "
                     "samples (0.00781 s at 25600 Hz) are too few (checking needs ≥ 1760 samples, 0.0688 s)"]
    assert not any("give" in n for n in doc["notes"])  # type: ignore[union-attr]
    # the file's own speed (CWRU 130.mat stores X130RPM = 1796; 12 kHz, datasets README), 600 samples kept
    mat = scipy.io.loadmat(cwru_dir / "cwru_12k_de_outer_007_0hp.mat")
    short = tmp_path / "x130_short.mat"
    scipy.io.savemat(short, {"X130_DE_time": mat["X130_DE_time"][:600], "X130RPM": mat["X130RPM"]})
    doc, _ = analyze_json([str(short), "--fs", "12000"], capsys)
    need = math.ceil(2 * 12000 / (0.97 * 1796 / 60))
    speed = [n for n in doc["notes"] if n.startswith("speed")]  # type: ignore[union-attr]
    assert speed == [f"speed: 1796 r/min from file variable X130RPM, not checked against the spectrum: the "
                     f"record's 600 samples (0.05 s at 12000 Hz) are too few (checking needs ≥ {need} samples, "
                     f"{need / 12000:.3g} s)"]


# ------------------------------------------------------------------------------------------- speed and verdicts


def test_two_speed_variables_in_a_mat_file(cwru_dir: Path, tmp_path: Path,
                                            capsys: pytest.CaptureFixture[str]) -> None:
    # CWRU 130.mat (12 kHz, outer race 0.007 in, 0 hp) stores X130RPM = 1796; the data set's table gives 1797 for
    # 0 hp and 131.mat (1 hp) stores 1773 (datasets README, trap 6).  A copy holding a second speed variable:
    # 1797 agrees with 1796 within 0.1 % (the source says which was used and that the other agrees); 1773 does
    # not (1.3 % off): no silent choice — the speed is asked for, or --rpm is used with a warning naming both.
    mat = scipy.io.loadmat(cwru_dir / "cwru_12k_de_outer_007_0hp.mat")
    signal = {"X130_DE_time": mat["X130_DE_time"], "X130RPM": mat["X130RPM"]}
    agree, disagree = tmp_path / "agree.mat", tmp_path / "disagree.mat"
    scipy.io.savemat(agree, {**signal, "X130TableRPM": 1797.0})
    scipy.io.savemat(disagree, {**signal, "X131RPM": mat["X130RPM"] * 0 + 1773})
    doc, err = analyze_json([str(agree), "--fs", "12000"], capsys)
    assert doc["shaft_hz"] == pytest.approx(1796 / 60) and doc["shaft_hz_source"] == "file"
    assert doc["shaft_source"] == "file variable X130RPM; X130TableRPM (1797 r/min) agrees within 0.1 %"
    assert err == ""
    code, out, err = run(["analyze", str(disagree), "--fs", "12000"], capsys)
    assert code == 2 and out == ""
    assert err == ("edgevib analyze: disagree.mat holds 2 speed variables that disagree: X130RPM (1796 r/min) and "
                   "X131RPM (1773 r/min): give the speed with --rpm R or choose one with --rpm-var NAME\n")
    doc, err = analyze_json([str(disagree), "--fs", "12000", "--rpm", "1796"], capsys)
    assert doc["shaft_hz_source"] == "given" and doc["warnings"] == [
        "disagree.mat holds 2 speed variables that disagree: X130RPM (1796 r/min) and X131RPM (1773 r/min); using "
        "--rpm 1796"]
    doc, err = analyze_json([str(disagree), "--fs", "12000", "--rpm-var", "X131RPM"], capsys)
    assert doc["shaft_hz"] == pytest.approx(1773 / 60) and doc["shaft_source"] == "file variable X131RPM"
    # replay: the file is skipped with the same line (it asks for --rpm), and replayed with it
    folder = tmp_path / "snaps"
    folder.mkdir()
    for k in range(3):
        scipy.io.savemat(folder / f"x_{k}.mat", {**signal, "X131RPM": mat["X130RPM"] * 0 + 1773})
    code, _, err = run(["replay", str(folder), "--fs", "12000", "--interval", "10", "--json"], capsys)
    assert code == 2
    assert "skipped x_0.mat: x_0.mat holds 2 speed variables that disagree: X130RPM (1796 r/min) and X131RPM " \
           "(1773 r/min): give the speed with --rpm R" in err
    code, out, _ = run(["replay", str(folder), "--fs", "12000", "--interval", "10", "--rpm", "1796", "--json"],
                       capsys)
    assert code == 0 and len(out.splitlines()) == 3



def test_rpm_disagreeing_with_the_file_warns_in_one_line(cwru_dir: Path, tmp_path: Path,
                                                          capsys: pytest.CaptureFixture[str]) -> None:
    # the file stores 1796 r/min (datasets README, trap 6) and its spectrum agrees; --rpm 1700 is 5.3 % off
    path = cwru_dir / "cwru_12k_de_outer_007_0hp.mat"
    doc, err = analyze_json([str(path), "--fs", "12000", "--rpm", "1700", "--bearing", CWRU_BEARING], capsys)
    # one warning naming the three speeds: given, stored in the file, shown by the spectrum (1796 r/min, whose
    # lines the datasets README's check values place within 0.3 % of the stored speed's kinematic frequencies)
    (line,) = [ln for ln in err.splitlines() if "warning" in ln]
    assert line == ("edgevib analyze: warning: --rpm 1700 differs from the file's 1796 r/min (file variable "
                    "X130RPM) by 5.3 % and from the 1796 r/min the spectrum shows by 5.3 %, more than the 3 % order "
                    "tolerance; using --rpm")
    assert doc["shaft_hz"] == pytest.approx(1700 / 60) and doc["shaft_hz_source"] == "given"
    assert doc["warnings"] == [line.removeprefix("edgevib analyze: warning: ")]
    # the spectrum alone disagreeing (a file without a stored speed): one warning naming the two
    x = scipy.io.loadmat(path)["X130_DE_time"].ravel()
    bare = tmp_path / "x130_de.npy"
    np.save(bare, x)
    doc, err = analyze_json([str(bare), "--fs", "12000", "--rpm", "1700", "--bearing", CWRU_BEARING], capsys)
    assert doc["warnings"] == ["--rpm 1700 differs from the 1796 r/min the spectrum shows by 5.3 %, more than the "
                               "3 % order tolerance; using --rpm"]
    # within the tolerance: silent
    _, err = analyze_json([str(path), "--fs", "12000", "--rpm", "1797"], capsys)
    assert err == ""


@pytest.mark.parametrize("name, label", [
    ("cwru_48k_de_normal_0hp.mat", []), ("cwru_12k_de_outer_007_0hp.mat", ["bpfo"]),
    ("cwru_12k_de_inner_007_0hp.mat", ["bpfi"]), ("cwru_12k_de_ball_007_0hp.mat", []),
    ("cwru_12k_de_outer_007_1hp.mat", ["bpfo"]), ("cwru_12k_de_inner_007_1hp.mat", ["bpfi"]),
    ("cwru_48k_de_outer_007_0hp.mat", ["bpfo"]),
])
def test_cwru_verdicts_through_the_command(name: str, label: list[str], cwru_dir: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    # the acceptance on every CWRU file (datasets README): the labelled family and no other; the
    # baseline and the ball file (no clean 2×BSF) none — in the default band and the automatic one
    fs = "48000" if "48k" in name else "12000"
    for band in ([], ["--band", "auto"]):
        doc, _ = analyze_json([str(cwru_dir / name), "--fs", fs, "--bearing", CWRU_BEARING, *band], capsys)
        env = doc["envelope"]
        assert env["detected"] == label, (band, env)  # type: ignore[index]
        assert env["band_source"] in (("auto", "default") if band else ("default",))  # type: ignore[index]
        assert doc["shaft_hz_source"] == "file"


def test_text_verdicts_say_why_a_found_line_is_not_detected(cwru_dir: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    # the CWRU ball-fault record (datasets README: its lines are weak): every family with a line is "not
    # detected", and the text names the test it failed — SNR under the threshold, or depth under the minimum 0.3
    code, out, _ = run(["analyze", str(cwru_dir / "cwru_12k_de_ball_007_0hp.mat"), "--fs", "12000", "--bearing",
                        CWRU_BEARING], capsys)
    assert code == 0
    rows = [ln for ln in out.splitlines() if " found " in ln and "not detected" in ln]
    assert len(rows) >= 3, out
    reasons = set()
    for row in rows:
        snr = float(row.split("SNR")[1].split("dB")[0])
        needs = float(row.split("(needs")[1].split(")")[0])
        depth = float(row.split("depth")[1].split()[0])
        reason = row.split("not detected")[1].strip()
        if snr < needs:
            assert reason == "(SNR below its threshold)", row
        else:
            assert depth < 0.3 and reason == "(depth below 0.3)", row
        reasons.add(reason)
    assert reasons == {"(SNR below its threshold)", "(depth below 0.3)"}  # both tests show up in this record


def test_ambiguous_speed_skips_orders_and_verdicts(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # a 2× line stronger than 1× over the whole 300–6000 r/min range: a misaligned machine at 30 Hz or a loose one
    # at 60 Hz — the estimate says so instead of guessing
    fs = 25600.0
    t = np.arange(int(fs)) / fs
    x = 0.2 * np.sin(2 * np.pi * 30 * t) + 0.5 * np.sin(4 * np.pi * 30 * t) + 0.1 * np.sin(6 * np.pi * 30 * t)
    path = tmp_path / "ambiguous.wav"
    scipy.io.wavfile.write(path, int(fs), (x + np.random.default_rng(2).normal(0, 0.02, t.size)).astype(np.float32))
    doc, _ = analyze_json([str(path), "--bearing", CWRU_BEARING], capsys)
    assert doc["shaft_hz"] is None and doc["shaft_hz_source"] is None
    assert all(v is None for v in doc["orders"].values())  # type: ignore[union-attr]
    assert doc["envelope"]["detected"] == []  # type: ignore[index]
    assert any(n.startswith("speed: the spectrum is ambiguous") for n in doc["notes"])  # type: ignore[union-attr]


def test_cage_fault_wav_speed(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # the case: the simulator's cage-fault WAV at 2960 r/min (FTF lines stronger than 1×).  With the
    # bearing the estimate is right; without it, it is unknown rather than a confident 1167 r/min
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario("bearings"), seed=0, t0_ns=0)
    x = sim.record("B-404-DE-H", 4)  # 4 blocks of 8192 at 25.6 kHz
    path = tmp_path / "b404.wav"
    scipy.io.wavfile.write(path, 25600, x.astype(np.float32))
    doc, _ = analyze_json([str(path), "--bearing", "9,7.94,39.04,0"], capsys)
    assert doc["shaft_hz"] == pytest.approx(2960 / 60, rel=0.03) and doc["shaft_hz_source"] == "estimated"
    assert 0.5 <= doc["shaft_hz_quality"] <= 1.0  # type: ignore[operator]
    doc, _ = analyze_json([str(path)], capsys)
    assert doc["shaft_hz"] is None or doc["shaft_hz"] == pytest.approx(2960 / 60, rel=0.03)
