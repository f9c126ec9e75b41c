"""``edgevib analyze`` and ``edgevib bearing``: outputs against the CWRU check values and closed forms, and every bad
input answered by one line on stderr with exit code 2."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.io
import scipy.io.wavfile

from edgevib.daemon.cli import main

CWRU_BEARING = "9,0.3126,1.537,0"  # drive-end 6205 (datasets README)
ONE_G_50HZ_MM_S = 22.07  # FIELD_NOTES §5


def run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse's own exits
        code = int(exc.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def analyze_json(argv: list[str], capsys: pytest.CaptureFixture[str]) -> dict[str, object]:
    code, out, err = run(["analyze", *argv, "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)
    assert isinstance(doc, dict)
    return doc


def sine(fs: float, seconds: float, f: float, amplitude: float) -> np.ndarray:
    return amplitude * np.sin(2 * np.pi * f * np.arange(int(fs * seconds)) / fs)


# ------------------------------------------------------------------------------------------- analyze


def test_cwru_mat_json(cwru_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = cwru_dir / "cwru_12k_de_outer_007_0hp.mat"
    doc = analyze_json([str(path), "--fs", "12000", "--bearing", CWRU_BEARING, "--band", "2000:5000",
                        "--group", "2", "--support", "rigid"], capsys)
    for key in ("fs_hz", "n_samples", "acceleration_rms_g", "acceleration_peak_g", "crest_factor", "kurtosis",
                "velocity_rms_mm_s", "velocity_band_hz", "shaft_hz", "orders", "envelope", "iso_zone"):
        assert key in doc, key
    checks = json.loads((cwru_dir / "check_values.json").read_text())[path.name]
    td = checks["time_domain_de"]
    # datasets README tables (X130_DE_time, 12 kHz, stored speed 1796 r/min)
    assert doc["fs_hz"] == 12000 and doc["n_samples"] == 121991 and doc["signal"] == "variable X130_DE_time"
    assert doc["acceleration_rms_g"] == pytest.approx(td["rms_mean_removed"], rel=2e-4)
    assert doc["acceleration_peak_g"] == pytest.approx(td["peak_abs_mean_removed"], rel=2e-4)
    assert doc["crest_factor"] == pytest.approx(td["crest_factor"], abs=6e-4)
    assert doc["kurtosis"] == pytest.approx(td["kurtosis_pearson"], abs=6e-4)
    assert doc["velocity_rms_mm_s"] == pytest.approx(td["velocity_rms_mm_s_10_1000Hz_assuming_g"], rel=0.05)
    assert doc["velocity_band_hz"] == [10.0, 1000.0]
    assert doc["shaft_hz"] == pytest.approx(1796 / 60) and doc["shaft_source"] == "file variable X130RPM"
    assert set(doc["orders"]) == {"0.5x", "1x", "2x", "3x"}  # type: ignore[arg-type]
    env = doc["envelope"]
    assert env["band_hz"] == [2000.0, 5000.0] and env["band_source"] == "configured"  # type: ignore[index]
    assert set(env) == {"band_hz", "band_source", "detected", "ftf", "bpfo", "bpfi", "bsf"}  # type: ignore[arg-type]
    for fam in ("ftf", "bpfo", "bpfi", "bsf"):
        assert set(env[fam]) >= {"frequency_hz", "amplitude_g", "snr_db", "detected"}  # type: ignore[index]
    # the outer-race record: BPFO detected, no other family (datasets README: OR007@6, 130.mat)
    assert env["detected"] == ["bpfo"] and env["bpfo"]["detected"] is True  # type: ignore[index]
    assert doc["shaft_hz_source"] == "file" and doc["shaft_hz_quality"] is None
    # E1 check value: 107.61 Hz, 0.6307 g (±0.5 Hz, ±20 %)
    assert env["bpfo"]["frequency_hz"] == pytest.approx(107.61, abs=0.5)  # type: ignore[index]
    assert env["bpfo"]["amplitude_g"] == pytest.approx(0.6307, rel=0.2)  # type: ignore[index]
    assert doc["iso_zone"] == "A"  # 0.18 mm/s, far below group 2 rigid A/B 1.4 mm/s (ISO 20816-3)


def test_cwru_rpm_option_overrides_the_file(cwru_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    doc = analyze_json([str(cwru_dir / "cwru_12k_de_inner_007_0hp.mat"), "--fs", "12000", "--rpm", "1797",
                        "--bearing", CWRU_BEARING], capsys)
    assert doc["shaft_hz"] == pytest.approx(29.95) and doc["shaft_source"] == "option --rpm"
    assert doc["iso_zone"] is None
    # default band from 12 kHz sampling; the inner-race line still stands out (README: BPFI 161.70 Hz)
    assert doc["envelope"]["bpfi"]["frequency_hz"] == pytest.approx(161.70, abs=0.5)  # type: ignore[index]
    assert doc["envelope"]["bpfi"]["snr_db"] > doc["envelope"]["bpfo"]["snr_db"] + 20  # type: ignore[index]


def test_cwru_text_report(cwru_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(["analyze", str(cwru_dir / "cwru_48k_de_normal_0hp.mat"), "--fs", "48000", "--bearing",
                        CWRU_BEARING, "--group", "1", "--support", "flexible"], capsys)
    assert code == 0
    for text in ("r.m.s.", "0.07269 g", "kurtosis", "mm/s", "µm", "ISO 20816-3 zone  A", "1796.0 r/min", "BPFO",
                 "2xBSF", "SNR", "qualified analyst"):
        assert text in out, text


def test_text_report_lists_a_registry_indicator_it_does_not_lay_out(tmp_path: Path,
                                                                     capsys: pytest.CaptureFixture[str],
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    from edgevib.daemon import offline
    from edgevib.daemon.indicators import Indicator

    path = tmp_path / "p101-de-h.wav"
    scipy.io.wavfile.write(path, 25600, sine(25600, 1.0, 50.0, 1.0).astype(np.float32))
    # a new registry entry with a report key reaches the text report without editing it
    extra = Indicator("clearance_factor", "1", "Acceleration clearance factor", read=lambda r: 4.0,
                      report="clearance_factor")
    monkeypatch.setattr(offline, "REGISTRY", (*offline.REGISTRY, extra))
    doc = analyze_json([str(path), "--rpm", "3000"], capsys)
    lines = offline._text_report({**doc, "clearance_factor": 4.0}).splitlines()
    assert "other indicators" in lines
    assert any(line.split()[:2] == ["clearance_factor", "4"] for line in lines), lines


def test_float_wav(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "p101-de-h.wav"
    scipy.io.wavfile.write(path, 25600, sine(25600, 1.0, 50.0, 1.0).astype(np.float32))
    doc = analyze_json([str(path), "--rpm", "3000"], capsys)
    assert doc["fs_hz"] == 25600 and doc["n_samples"] == 25600
    assert doc["velocity_rms_mm_s"] == pytest.approx(ONE_G_50HZ_MM_S, abs=0.01)
    assert doc["orders"]["1x"] == pytest.approx(ONE_G_50HZ_MM_S, rel=0.01)  # type: ignore[index]
    assert doc["acceleration_rms_g"] == pytest.approx(1 / math.sqrt(2), rel=1e-4)
    assert doc["envelope"] == {"band_hz": None, "band_source": None, "detected": []}
    assert doc["shaft_hz_source"] == "given" and doc["notes"] == [] and doc["warnings"] == []


def test_int16_multichannel_wav_full_scale_and_unit(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # channel 1 holds a 50 Hz sine of 9.80665 m/s² (1 g) peak, recorded with full scale = 20 m/s²
    fs = 12800
    ch1 = sine(fs, 1.0, 50.0, 9.80665 / 20.0)
    data = np.stack([np.zeros_like(ch1), ch1], axis=1)
    path = tmp_path / "two.wav"
    scipy.io.wavfile.write(path, fs, np.round(data * 32767).astype(np.int16))
    doc = analyze_json([str(path), "--channel", "1", "--unit", "m/s2", "--full-scale", "20"], capsys)
    assert doc["signal"] == "channel 1 of 2"
    assert doc["velocity_rms_mm_s"] == pytest.approx(ONE_G_50HZ_MM_S * 32767 / 32768, rel=2e-3)
    assert doc["shaft_hz"] == pytest.approx(50.0, rel=0.003) and doc["shaft_source"] == "estimated from the spectrum"


def test_csv_with_header(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    fs = 5120.0
    x = sine(fs, 2.0, 80.0, 0.5)
    path = tmp_path / "m101.csv"
    path.write_text("time_s,accel_g\n" + "\n".join(f"{i / fs:.6f},{v:.9f}" for i, v in enumerate(x)) + "\n")
    doc = analyze_json([str(path), "--fs", str(fs), "--channel", "1"], capsys)
    assert doc["n_samples"] == x.size
    # velocity of a sine a/(2πf)/√2 (handbook)
    assert doc["velocity_rms_mm_s"] == pytest.approx(0.5 * 9806.65 / (2 * math.pi * 80) / math.sqrt(2), rel=2e-3)


def test_npy_and_mat_variable_choice(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    x = sine(10000, 1.0, 100.0, 2.0)
    np.save(tmp_path / "x.npy", x)
    assert analyze_json([str(tmp_path / "x.npy"), "--fs", "10000"], capsys)["acceleration_peak_g"] == \
        pytest.approx(2.0, rel=1e-4)
    scipy.io.savemat(tmp_path / "two.mat", {"a": x, "b": 2 * x})
    code, _, err = run(["analyze", str(tmp_path / "two.mat"), "--fs", "10000"], capsys)
    assert code == 2 and "--var" in err and "a (1, 10000)" in err and "b (1, 10000)" in err
    doc = analyze_json([str(tmp_path / "two.mat"), "--fs", "10000", "--var", "b"], capsys)
    assert doc["acceleration_peak_g"] == pytest.approx(4.0, rel=1e-4)
    scipy.io.savemat(tmp_path / "rated.mat", {"sig": x, "fs": 10000.0})
    assert analyze_json([str(tmp_path / "rated.mat")], capsys)["fs_hz"] == 10000.0


def _bad_files(tmp: Path) -> dict[str, Path]:
    files = {
        "short": tmp / "short.npy", "nan": tmp / "nan.csv", "text": tmp / "text.csv", "empty": tmp / "empty.csv",
        "ragged": tmp / "ragged.csv", "wav": tmp / "bad.wav", "mat": tmp / "bad.mat", "npy_obj": tmp / "obj.npy",
        "unknown": tmp / "signal.xyz", "good": tmp / "good.npy", "mono": tmp / "mono.wav", "dir": tmp / "d.wav",
        "binary_csv": tmp / "bin.csv", "tiny": tmp / "tiny.npy", "cut_wav": tmp / "cut.wav",
    }
    np.save(files["short"], np.zeros(100))
    np.save(files["tiny"], np.ones(63))
    files["nan"].write_text("0.1\n0.2\nnan\n0.3\n")
    files["text"].write_text("a\n0.1\nhello\n")
    files["empty"].write_text("# only a comment\n")
    files["ragged"].write_text("1,2\n3\n")
    files["wav"].write_bytes(b"RIFF\x00\x00\x00\x00WAVEjunk")
    files["mat"].write_bytes(b"MATLAB 5.0 MAT-file" + bytes(200))
    np.save(files["npy_obj"], np.array([{"a": 1}], dtype=object), allow_pickle=True)
    files["unknown"].write_text("1\n2\n")
    np.save(files["good"], sine(25600, 1.0, 50.0, 1.0))
    scipy.io.wavfile.write(files["mono"], 25600, sine(25600, 1.0, 50.0, 1.0).astype(np.float32))
    files["cut_wav"].write_bytes(files["mono"].read_bytes()[:3000])  # a copy cut short: header says 25600 samples
    files["dir"].mkdir()
    files["binary_csv"].write_bytes(b"\xff\xfe\x00\x01")
    return files


BAD_CASES = [
    (["{tmp}/missing.wav"], "not found"),
    (["{dir}"], "is a directory"),
    (["{unknown}"], "unknown format '.xyz'"),
    (["{nan}", "--fs", "1000"], "1 of 4 samples are NaN or infinite"),
    (["{text}", "--fs", "1000"], "line 3 is not numeric"),
    (["{empty}", "--fs", "1000"], "holds no data"),
    (["{ragged}", "--fs", "1000"], "row 2 has 1 columns"),
    (["{binary_csv}", "--fs", "1000"], "not a UTF-8 text"),
    (["{wav}"], "cannot read"),
    (["{mat}", "--fs", "1000"], "cannot read"),
    (["{npy_obj}", "--fs", "1000"], "cannot read"),
    (["{good}"], "give --fs"),
    (["{good}", "--fs", "-5"], "--fs -5 must be > 0"),
    (["{good}", "--fs", "abc"], "--fs 'abc' is not a number"),
    (["{mono}", "--fs", "1000"], "contradicts the WAV header's 25600 Hz"),
    # a WAV cut short after its header (the RIFF/data chunk sizes announce more bytes than the file holds:
    # Microsoft RIFF WAVE format, common practice) is refused like a truncated .npy, not analysed silently as a
    # shorter record (acceptance re-check of issue 15: it exited 0 with scipy's two-line warning)
    (["{cut_wav}"], "is truncated"),
    (["{tiny}", "--fs", "25600"], "record of 63 samples is too short: need at least 64"),
    (["{good}", "--fs", "25600", "--band", "2000:20000", "--bearing", CWRU_BEARING],
     "envelope band high edge 20000 Hz is at or above Nyquist 12800 Hz"),
    # the same band without a bearing is refused too (README: "band above Nyquist" exits 2; Nyquist = fs/2,
    # common practice)
    (["{good}", "--fs", "25600", "--band", "2000:20000"], "envelope band high edge 20000 Hz is at or above Nyquist"),
    (["{good}", "--fs", "25600", "--velocity-band", "10:13000"], "velocity band high edge 13000 Hz"),
    (["{good}", "--fs", "25600", "--band", "2000"], "must be LO:HI"),
    (["{good}", "--fs", "25600", "--band", "5000:2000"], "need 0 < LO < HI"),
    (["{good}", "--fs", "25600", "--bearing", "9,2,1,0"], "ball diameter 2 must be smaller than the pitch diameter 1"),
    (["{good}", "--fs", "25600", "--bearing", "0,0.3,1.5,0"], "element count 0"),
    (["{good}", "--fs", "25600", "--bearing", "9,0.3"], "ELEMENTS,BALL_D,PITCH_D"),
    (["{good}", "--fs", "25600", "--bearing", "9,0.3,1.5,95"], "contact angle 95"),
    (["{good}", "--fs", "25600", "--rpm", "-100"], "--rpm -100 must be > 0"),
    (["{good}", "--fs", "25600", "--group", "3", "--support", "rigid"], "--group '3' must be 1 or 2"),
    (["{good}", "--fs", "25600", "--group", "1"], "--group and --support go together"),
    (["{good}", "--fs", "25600", "--group", "1", "--support", "soft"], "--support 'soft'"),
    (["{good}", "--fs", "25600", "--unit", "mm/s"], "--unit 'mm/s' must be g or m/s2"),
    (["{good}", "--fs", "25600", "--channel", "x"], "--channel 'x' is not an integer"),
    (["{mono}", "--channel", "3"], "--channel 3 does not exist"),
    (["{mono}", "--var", "X"], "--var applies to MATLAB .mat files only"),
    (["{mono}", "--full-scale", "0"], "--full-scale 0 must be > 0"),
    (["{good}", "--no-such-option"], "unrecognized arguments"),
    ([], "required: FILE"),
]


@pytest.mark.parametrize("argv, message", BAD_CASES)
def test_bad_input_is_one_line_and_exit_2(argv: list[str], message: str, tmp_path: Path,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    files = {k: str(v) for k, v in _bad_files(tmp_path).items()}
    args = [a.format(tmp=tmp_path, **files) for a in argv]
    code, out, err = run(["analyze", *args], capsys)
    assert code == 2
    assert out == ""
    assert err.endswith("\n") and err.count("\n") == 1, err
    assert err.startswith("edgevib analyze: ") and "Traceback" not in err
    assert message in err, err


def test_bad_input_through_the_console_script(tmp_path: Path) -> None:
    # the real process: exit status 2, one line, no traceback
    proc = subprocess.run([sys.executable, "-m", "edgevib.daemon", "analyze", str(tmp_path / "missing.mat")],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and "not found" in proc.stderr


# ------------------------------------------------------------------------------------------- bearing


def test_bearing_json_cwru_multiples(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(["bearing", "--elements", "9", "--ball-diameter", "0.3126", "--pitch-diameter", "1.537",
                          "--contact-angle", "0", "--rpm", "1797", "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)
    assert doc["shaft_hz"] == pytest.approx(29.95)
    # CWRU Bearing Data Center bearing specifications (datasets README): multiples of shaft speed
    assert doc["bpfi"]["order"] == pytest.approx(5.4152, rel=1e-4)
    assert doc["bpfo"]["order"] == pytest.approx(3.5848, rel=1e-4)
    assert doc["ftf"]["order"] == pytest.approx(0.39828, rel=2e-4)
    assert 2 * doc["bsf"]["order"] == pytest.approx(4.7135, rel=1e-4)
    assert doc["2xbsf"]["order"] == pytest.approx(4.7135, rel=1e-4)
    # datasets README, "at 1797 r/min": BPFO 107.36 Hz, BPFI 162.19 Hz, FTF 11.93 Hz, 2×BSF 141.17 Hz
    assert (doc["bpfo"]["hz"], doc["bpfi"]["hz"], doc["ftf"]["hz"], doc["2xbsf"]["hz"]) == \
        pytest.approx((107.36, 162.19, 11.93, 141.17), abs=0.01)


def test_bearing_text(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(["bearing", "--elements", "9", "--ball-diameter", "7.94", "--pitch-diameter", "39.04",
                        "--rpm", "1480"], capsys)
    assert code == 0 and "BPFO (outer race)" in out and "2×BSF" in out and "× shaft" in out


@pytest.mark.parametrize("argv, message", [
    (["--elements", "0", "--ball-diameter", "1", "--pitch-diameter", "5", "--rpm", "1000"], "element count 0"),
    (["--elements", "x", "--ball-diameter", "1", "--pitch-diameter", "5", "--rpm", "1000"], "not an integer"),
    (["--elements", "9", "--ball-diameter", "6", "--pitch-diameter", "5", "--rpm", "1000"], "smaller than the pitch"),
    (["--elements", "9", "--ball-diameter", "1", "--pitch-diameter", "5", "--rpm", "-1"], "--rpm -1 must be > 0"),
    (["--elements", "9", "--ball-diameter", "1", "--pitch-diameter", "5"], "required: --rpm"),
])
def test_bearing_bad_input(argv: list[str], message: str, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(["bearing", *argv], capsys)
    assert code == 2 and out == "" and err.count("\n") == 1 and err.startswith("edgevib bearing: ")
    assert message in err, err


def test_a_constant_record_is_named_and_leaks_no_numpy_warning(tmp_path: Path) -> None:
    # a dead channel (all zeros) is analysed without numpy's RuntimeWarnings and with one line saying the signal is
    # constant (common practice: a flat record is a wiring or channel question before it is a machine one)
    f = tmp_path / "dead.npy"
    np.save(f, np.zeros(12000))
    p = subprocess.run([sys.executable, "-W", "error::RuntimeWarning", "-m", "edgevib.daemon", "analyze", str(f),
                        "--fs", "12000"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    assert "RuntimeWarning" not in p.stderr
    assert "the signal is constant (0 g in every sample)" in p.stderr
