"""``edgevib replay`` and ``edgevib trend``: the FEMTO run-to-failure snapshots (../shared/datasets/femto), the
simulator's months of snapshots against their analytic crossing times, bad input, the terminal chart."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.io

from edgevib.daemon.cli import main

FEMTO = Path(__file__).resolve().parents[2] / "shared" / "datasets" / "femto" / "Bearing1_2"
# PHM 2012 challenge documentation (datasets README): one 0.1 s snapshot at 25.6 kHz every 10 s; columns hour,
# minute, second, microsecond, horizontal and vertical acceleration (g); Bearing1_2's record runs from 08:47:05
# to 11:12:05 (871 snapshots); the test ended when the amplitude exceeded 20 g.
FEMTO_ARGS = ["--fs", "25600", "--column", "4", "--limit", "acceleration_peak_g=20"]


def _lines(capsys: pytest.CaptureFixture[str]) -> list[dict[str, Any]]:
    return [json.loads(line) for line in capsys.readouterr().out.splitlines() if line.strip()]


@pytest.mark.slow
def test_femto_replay_times_indicators_and_projection(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["replay", str(FEMTO), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01",
                 "--json"]) == 0
    rows = _lines(capsys)
    assert len(rows) == 110  # every 8th snapshot and the last (datasets README)
    first, last = rows[0]["time"], rows[-1]["time"]
    assert first.startswith("2012-03-01T08:47:05.") and last.startswith("2012-03-01T11:12:05.")
    for r in rows:
        assert r["state"] == "running"
        assert set(r["indicators"]) >= {"velocity_rms_mm_s", "acceleration_peak_g", "kurtosis"}
        (lim,) = r["limits"] if r["limits"] else [None]
        if lim is not None:
            assert lim["indicator"] == "acceleration_peak_g" and lim["value"] == 20.0
            assert set(lim) >= {"eta_s", "eta_low_s", "eta_high_s"}
            if lim["status"] != "rising":
                assert lim["eta_s"] is lim["eta_low_s"] is lim["eta_high_s"] is None
    # the horizontal peak of the last snapshot (the file's own numbers, mean removed)
    x = np.loadtxt(FEMTO / "acc_00871.csv", delimiter=",")[:, 4]
    assert rows[-1]["indicators"]["acceleration_peak_g"] == pytest.approx(np.abs(x - x.mean()).max(), rel=1e-4)
    # too little history at first; degradation is abrupt near the end (datasets README): no projection at 70 %,
    # 80 % or 90 % of the life, a rising trend on the last snapshot
    assert rows[0]["trend"]["acceleration_peak_g"]["status"] == "insufficient-history"
    t0, end = rows[0]["t_s"], rows[-1]["t_s"]
    for frac in (0.7, 0.8, 0.9):
        r = max((r for r in rows if r["t_s"] - t0 <= frac * (end - t0)), key=lambda r: r["t_s"])
        assert r["limits"][0]["status"] == "not-rising" and r["limits"][0]["eta_s"] is None
    assert rows[-1]["trend"]["acceleration_peak_g"]["rising"]


def test_interval_times_follow_the_numbers_in_the_names(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Snapshot k of FEMTO starts about 10·(k−1) s after the first (datasets README): the thinned-out set keeps its
    # spacing when times come from the numbers in the names.
    files = sorted(FEMTO.glob("acc_*.csv"))[:3] + sorted(FEMTO.glob("acc_*.csv"))[-1:]
    for f in files:
        (tmp_path / f.name).write_bytes(f.read_bytes())
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--interval", "10", "--json"]) == 0
    rows = _lines(capsys)
    assert [r["t_s"] for r in rows] == [0.0, 80.0, 160.0, 8700.0]
    assert rows[0]["time"] == "1970-01-01T00:00:00.000Z"


def test_a_clock_without_a_date_goes_on_the_files_date(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # FEMTO's files carry hour, minute, second, microsecond and no date (datasets README); without --start the
    # clock goes on the date of the first file's modification time (UTC), a day later after midnight — not 1970.
    import os

    files = sorted(FEMTO.glob("acc_*.csv"))[:2]
    for f in files:
        (tmp_path / f.name).write_bytes(f.read_bytes())
    recorded = datetime(2026, 11, 20, 23, 59, 0, tzinfo=UTC).timestamp()
    os.utime(tmp_path / files[0].name, (recorded, recorded))
    os.utime(tmp_path / files[1].name, (recorded + 80, recorded + 80))
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--json"]) == 0
    rows = _lines(capsys)
    assert rows[0]["time"].startswith("2026-11-20T08:47:05.") and rows[1]["time"].startswith("2026-11-20T08:48:")
    # a clock that goes back is the next day; the phrase on stderr names the date and where it came from
    for name, clock in (("acc_00017.csv", ["23", "0", "0", "0"]), ("acc_00025.csv", ["0", "15", "2", "0"])):
        (tmp_path / name).write_text("\n".join(",".join(clock + line.split(",")[4:])
                                               for line in files[0].read_text().splitlines()))
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3"]) == 0
    err = capsys.readouterr().err
    assert "from 2026-11-20 (the date of the modification time of acc_00001.csv)" in err
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--json"]) == 0
    assert _lines(capsys)[-1]["time"].startswith("2026-11-21T00:15:02.")
    # --start still sets the date
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01",
                 "--json"]) == 0
    assert _lines(capsys)[0]["time"].startswith("2012-03-01T08:47:05.")


@pytest.mark.slow
def test_simulated_months_replayed_against_the_analytic_crossing(tmp_path: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    # Snapshots of the exponential progression up to 70 % of its way to the ISO zone D boundary (4.5 mm/s, group 2
    # rigid), written by the simulator and replayed: the projection stands near the analytic crossing in
    # truth.json, from an exponential fit.
    from edgevib.simulator.engine import load_scenario
    from edgevib.simulator.longrun import LongRun

    law = LongRun(load_scenario("trend-exponential"), seed=2).laws["P-302-DE-H"]
    t70 = law.crossing_s(law.v0 + 0.7 * (4.5 - law.v0))
    assert t70 is not None
    out = tmp_path / "snaps"
    assert main(["simulate", "--scenario", "trend-exponential", "--seed", "2", "--snapshots", str(out),
                 "--duration", str(t70)]) == 0
    truth = json.loads((out / "truth.json").read_text())
    crossing = {c["label"]: c for c in truth["points"]["P-302-DE-H"]["crossings"]}["zone D"]
    capsys.readouterr()
    history = tmp_path / "h.sqlite"
    assert main(["replay", str(out / "P-302-DE-H"), "--fs", "5120", "--rpm", "2960", "--group", "2", "--support",
                 "rigid", "--min-span", "86400", "--history", str(history), "--json"]) == 0
    rows = _lines(capsys)
    last = rows[-1]
    assert datetime.fromisoformat(last["time"].replace("Z", "+00:00")) == \
        datetime.fromtimestamp(truth["t0_ns"] / 1e9 + (len(rows) - 1) * truth["interval_s"], UTC)
    assert last["trend"]["velocity_rms_mm_s"]["model"] == "exponential"
    (lim,) = [x for x in last["limits"] if x["label"] == "zone D"]
    true_left = crossing["t_ns"] / 1e9 - last["t_s"]
    assert lim["eta_low_s"] <= lim["eta_s"] <= lim["eta_high_s"]
    assert lim["eta_s"] == pytest.approx(true_left, rel=0.1)
    # the kept history feeds `edgevib trend`: a chart within 80 columns with the limit and the projection
    assert main(["trend", "--history", str(history), "--width", "80", "P-302-DE-H", "velocity_rms_mm_s"]) == 0
    chart = capsys.readouterr().out
    assert "zone D" in chart and "rising (exponential growth" in chart and "Plan:" in chart
    assert max(len(line) for line in chart.splitlines()) <= 80
    assert main(["trend", "--history", str(history)]) == 0
    listing = capsys.readouterr().out
    assert "P-302-DE-H" in listing and "zone D in" in listing
    assert main(["trend", "--history", str(history), "P-302-DE-H", "velocity_rms_mm_s", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["projection"]["limits"][0]["label"] == "zone D" and len(doc["series"]["t_s"]) > 12


def test_bad_input_is_one_line_and_skipped_files_are_counted(tmp_path: Path,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["replay", str(tmp_path / "none"), "--fs", "1000"]) == 2
    assert "no such directory" in capsys.readouterr().err
    rng = np.random.default_rng(0)
    fs, n = 2560.0, 1024
    t = np.arange(n) / fs
    for k in range(20):
        x = (0.05 + 0.001 * k) * np.sin(2 * np.pi * 25.0 * t) + 0.01 * rng.standard_normal(n)
        np.save(tmp_path / f"snap_{k:03d}.npy", x)
    np.save(tmp_path / "snap_020.npy", np.full(n, np.nan))
    assert main(["replay", str(tmp_path), "--fs", "2560", "--limit", "velocity_rms=3"]) == 2
    assert "--limit 'velocity_rms' is not an indicator" in capsys.readouterr().err
    assert main(["replay", str(tmp_path), "--fs", "2560", "--interval", "3600", "--json"]) == 0
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    assert len(rows) == 20
    assert "skipped snap_020.npy: snap_020.npy: 1024 of 1024 samples are NaN or infinite" in captured.err
    assert main(["trend", "--history", str(tmp_path / "missing.sqlite")]) == 2
    assert "no history database" in capsys.readouterr().err


def test_side_channel_files_are_left_out_with_a_note(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # A PRONOSTIA recording directory holds acc_NNNNN.csv vibration snapshots and, for most bearings,
    # temp_NNNNN.csv temperature files (PHM 2012 challenge documentation, datasets README: the files named by
    # what they hold): the vibration series (the larger one) is replayed, the temperature files are named.
    files = sorted(FEMTO.glob("acc_*.csv"))[:6]
    for f in files:
        (tmp_path / f.name).write_bytes(f.read_bytes())
    for k in (1, 2):  # hour, minute, second, tenth of a second, temperature (°C): not a vibration snapshot
        (tmp_path / f"temp_{k:05d}.csv").write_text("".join(f"8,47,{s},{d},45.1\n" for s in range(5, 11)
                                                            for d in range(10)))
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--interval", "10", "--json"]) == 0
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    assert [r["file"] for r in rows] == [f.name for f in files]
    assert "replaying the 6 acc_N.csv files, leaving out 2 temp_N.csv" in captured.err
    # a glob pattern chooses explicitly; files of unrelated names are all taken
    assert main(["replay", str(tmp_path / "acc_0000*.csv"), *FEMTO_ARGS, "--interval", "10", "--json"]) == 0
    assert [r["file"] for r in _lines(capsys)] == ["acc_00001.csv", "acc_00009.csv"]


def _sine_snapshots(folder: Path, names: list[str], fs: float = 2560.0, n: int = 1024) -> None:
    rng = np.random.default_rng(4)
    t = np.arange(n) / fs
    folder.mkdir(parents=True, exist_ok=True)
    for k, name in enumerate(names):
        x = (0.05 + 0.002 * k) * np.sin(2 * np.pi * 25.0 * t) + 0.01 * rng.standard_normal(n)
        np.save(folder / name, x)


def test_times_from_names_and_modification_times(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import os

    names = [f"P-7_2026120{d}T0{h}0000Z.npy" for d in (1, 2) for h in (0, 6)]
    _sine_snapshots(tmp_path / "named", names)
    assert main(["replay", str(tmp_path / "named"), "--fs", "2560", "--json"]) == 0
    rows = _lines(capsys)
    # RFC 3339 (the simulator's and edgevib's capture names): the date and time written in each name
    assert [r["time"] for r in rows] == ["2026-12-01T00:00:00.000Z", "2026-12-01T06:00:00.000Z",
                                         "2026-12-02T00:00:00.000Z", "2026-12-02T06:00:00.000Z"]
    _sine_snapshots(tmp_path / "plain", ["b.npy", "a.npy", "c.npy"])
    for k, name in enumerate(["b.npy", "a.npy", "c.npy"]):
        os.utime(tmp_path / "plain" / name, (1_800_000_000 + 3600 * k, 1_800_000_000 + 3600 * k))
    assert main(["replay", str(tmp_path / "plain"), "--fs", "2560", "--mtime", "--json"]) == 0
    rows = _lines(capsys)
    # modification times order the snapshots, whatever their names
    assert [(r["file"], r["t_s"]) for r in rows] == [("b.npy", 1_800_000_000.0), ("a.npy", 1_800_003_600.0),
                                                     ("c.npy", 1_800_007_200.0)]
    assert main(["replay", str(tmp_path / "plain"), "--fs", "2560", "--time-from-name"]) == 2
    assert "no date and time in the file name" in capsys.readouterr().err
    # files copied in one go (the modification times of a fresh copy): no silent projection from copy times
    copied = tmp_path / "copied"
    copied.mkdir()
    for f in sorted(FEMTO.glob("acc_*.csv"))[:5]:
        (copied / f.name).write_bytes(f.read_bytes())
        os.utime(copied / f.name, (1_800_000_000.0, 1_800_000_000.0))
    assert main(["replay", str(copied), *FEMTO_ARGS]) == 2
    err = capsys.readouterr().err
    assert "modification times lie within 0 s" in err and "--time-column" in err and "--interval" in err
    assert main(["replay", str(copied), *FEMTO_ARGS, "--mtime", "--json"]) == 0  # asked for explicitly
    assert len(_lines(capsys)) == 5


def test_analysis_options_as_analyze(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # --rpm and --bearing as in `edgevib analyze`: the shaft speed is the given one and the bearing families are
    # searched; FEMTO bearing: 13 rolling elements of 3.5 mm on a 25.6 mm pitch (datasets README), 1800 r/min.
    files = sorted(FEMTO.glob("acc_*.csv"))[-3:]
    for f in files:
        (tmp_path / f.name).write_bytes(f.read_bytes())
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--interval", "10", "--rpm", "1800", "--bearing",
                 "13,3.5,25.6,0", "--json"]) == 0
    rows = _lines(capsys)
    assert all(r["indicators"]["shaft_hz"] == pytest.approx(30.0) for r in rows)
    assert all(r["indicators"]["bearing_bpfi_g"] is not None for r in rows)
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--interval", "10", "--json"]) == 0
    assert all(r["indicators"]["bearing_bpfi_g"] is None for r in _lines(capsys))  # no bearing given
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--bearing", "13,3.5"]) == 2
    assert "--bearing '13,3.5' must be ELEMENTS,BALL_D,PITCH_D" in capsys.readouterr().err


def test_progress_bar_on_a_terminal_only(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    import sys

    _sine_snapshots(tmp_path, [f"s_{k:03d}.npy" for k in range(20)])
    assert main(["replay", str(tmp_path), "--fs", "2560", "--interval", "60", "--json"]) == 0
    assert "[" not in capsys.readouterr().err  # not a terminal: no bar
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    assert main(["replay", str(tmp_path), "--fs", "2560", "--interval", "60", "--json"]) == 0
    err = capsys.readouterr().err
    last = err.split("\r")[-1]
    assert last.startswith("replay     20/20 [" + "#" * 30 + "] 100.0 %")


def test_trend_listing_and_chart_stay_within_the_width() -> None:
    # `edgevib trend` must be readable in an 80-column terminal whatever the names and messages: long point names,
    # the longest status words, long limit labels and the "need" text wrap instead of running past the edge.
    from edgevib.daemon.history import HistorySeries
    from edgevib.daemon.trendchart import _listing, render_chart

    doc: dict[str, Any] = {"status": "insufficient-history", "rising": False, "level": 1.2, "slope_per_day": None,
                           "need": "needs at least 12 running values over 24.0 h; has 6 over 5.0 h", "limits": [],
                           "unit": "mm/s", "coverage": 0.8}
    rising = {**doc, "status": "ok", "rising": True, "slope_per_day": 0.0123, "slope_low_per_day": 0.01,
              "slope_high_per_day": 0.015, "model": "exponential", "model_weight": 0.93, "onset": "2026-01-20T00:00Z",
              "need": None, "t_s": 1.0e9 + 40 * 86400.0,
              "limits": [{"label": "zone D", "value": 4.5, "status": "rising", "eta_s": 31 * 86400.0,
                          "eta_low_s": 20 * 86400.0, "eta_high_s": 45 * 86400.0, "date": "2026-05-04T00:00:00Z"}],
              "step": {"significant": True, "change": 2.73, "baseline": 0.422, "threshold": 0.7},
              "advice_text": "Plan: rising 0.37 mm/s per month; " * 4}
    rows = [("P-301-DE-H", "velocity_rms_mm_s", rising),
            ("COMPRESSOR-TRAIN-7-GEARBOX-HSS-NDE-AXIAL", "misalignment_2x_mm_s", doc),
            ("F-1", "bearing_bpfi_snr_db", {**doc, "status": "machine-not-running"})]
    for width in (60, 80):
        listing = _listing(rows, width)
        assert max(len(line) for line in listing) <= width
        assert any("insufficient-history" in line for line in listing)
        assert any("zone D in 31" in line for line in listing)
    days = np.arange(40.0)
    series = HistorySeries(point="P-301-DE-H", indicator="velocity_rms_mm_s", level="day",
                           t_s=1.0e9 + days * 86400.0, value=1.0 + 0.05 * days)
    for d in (doc, rising, None):
        chart = render_chart(series, d, width=80)
        assert max(len(line) for line in chart.splitlines()) <= 80
    assert "needs at least 12 running values" in render_chart(series, doc, width=80).replace("\n", " ")
    assert "no trend evaluated yet" in render_chart(series, None, width=80)


def test_time_named_text_files_without_a_suffix(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # A logger that names each snapshot by its time only, as a tab-separated text table of channels
    # (``2004.02.12.10.32.39``: year, month, day, hour, minute, second): read as text, times from the names.
    rng = np.random.default_rng(8)
    fs, n = 20480.0, 4096
    t = np.arange(n) / fs
    names = ["2004.02.12.10.32.39", "2004.02.12.10.42.39", "2004.02.12.10.52.39", "2004.02.12.11.02.39"]
    for k, name in enumerate(names):
        x = np.stack([(0.1 + 0.01 * k) * np.sin(2 * np.pi * 33.3 * t) + 0.02 * rng.standard_normal(n),
                      0.05 * rng.standard_normal(n)], axis=1)
        np.savetxt(tmp_path / name, x, delimiter="\t", fmt="%.6f")
    (tmp_path / "NOTES").write_text("not a snapshot\n")
    assert main(["replay", str(tmp_path), "--fs", "20480", "--column", "1", "--json"]) == 0
    rows = _lines(capsys)
    assert [r["time"] for r in rows] == ["2004-02-12T10:32:39.000Z", "2004-02-12T10:42:39.000Z",
                                         "2004-02-12T10:52:39.000Z", "2004-02-12T11:02:39.000Z"]
    # column 1 (0-based) is the noise channel: its r.m.s. is 0.05 g (numpy on the written values)
    x1 = np.loadtxt(tmp_path / names[0], delimiter="\t")[:, 1]
    assert rows[0]["indicators"]["acceleration_rms_g"] == pytest.approx(np.std(x1), rel=1e-3)


def test_trend_finds_the_history_file_the_configuration_names(tmp_path: Path) -> None:
    import argparse

    from edgevib.daemon.trendchart import _history_path

    example = Path(__file__).resolve().parents[1] / "config" / "example-plant.toml"
    cfg = tmp_path / "plant.toml"
    text = example.read_text().replace('state_dir = "/var/lib/edgevib"', f'state_dir = "{tmp_path}"', 1)
    cfg.write_text(text.replace('file = "history.sqlite"', 'file = "severity/history-ql.sqlite"', 1))
    args = argparse.Namespace(history=None, config=str(cfg), state_dir=None)
    assert _history_path(args) == tmp_path / "severity" / "history-ql.sqlite"  # [history] file, under state_dir


def _femto_copy(folder: Path, count: int) -> list[Path]:
    files = sorted(FEMTO.glob("acc_*.csv"))[:count]
    folder.mkdir(parents=True, exist_ok=True)
    for f in files:
        (folder / f.name).write_bytes(f.read_bytes())
    return [folder / f.name for f in files]


def test_a_file_without_a_time_in_its_columns_is_skipped_and_counted(tmp_path: Path,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    # FEMTO snapshots carry hour, minute, second, microsecond in columns 0–3 (datasets README).  Files that give no
    # time there — empty, a header only, text in the clock columns, too few columns, a clock field out of range,
    # not a CSV file — are named on stderr, skipped and counted; the good ones are replayed.
    good = _femto_copy(tmp_path, 6)
    first = good[0].read_text().splitlines()
    (tmp_path / "acc_00002.csv").write_text("")
    (tmp_path / "acc_00003.csv").write_text("hour,minute,second,microsecond,horizontal,vertical\n")
    (tmp_path / "acc_00004.csv").write_text("".join(f"08h,47m,5s,{ln.split(',', 3)[3]}\n" for ln in first))
    (tmp_path / "acc_00005.csv").write_text("".join(",".join(ln.split(",")[4:]) + "\n" for ln in first))
    (tmp_path / "acc_00006.csv").write_text("".join("31," + ln.split(",", 1)[1] + "\n" for ln in first))
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01",
                 "--json"]) == 0
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    assert [r["file"] for r in rows] == [f.name for f in good]
    assert rows[0]["time"].startswith("2012-03-01T08:47:05.")  # the first snapshot's own clock (datasets README)
    skipped = [ln for ln in captured.err.splitlines() if ln.startswith("edgevib replay: skipped ")]
    assert [ln.split()[3].rstrip(":") for ln in skipped] == [f"acc_0000{k}.csv" for k in range(2, 7)]
    assert "acc_00002.csv holds no numeric row" in skipped[0] and "acc_00003.csv holds no numeric row" in skipped[1]
    assert "acc_00004.csv holds no numeric row" in skipped[2]
    assert "needs 4 columns; the first row of acc_00005.csv has 2" in skipped[3]
    assert "column 0 holds 31, not a clock hour" in skipped[4]
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01"]) == 0
    assert "6 snapshots replayed, 5 skipped" in capsys.readouterr().out
    # a glob that also takes a file of another format: that one is named and skipped
    np.save(tmp_path / "acc_00007.npy", np.loadtxt(good[0], delimiter=",")[:, 4])
    assert main(["replay", str(tmp_path / "acc_0000[17].*"), *FEMTO_ARGS, "--time-column", "0,1,2,3",
                 "--json"]) == 0
    captured = capsys.readouterr()
    assert [json.loads(line)["file"] for line in captured.out.splitlines()] == ["acc_00001.csv"]
    assert "skipped acc_00007.npy: --time-column reads CSV files; acc_00007.npy is not one" in captured.err
    # a column of seconds that is not a finite number: skipped too
    (tmp_path / "acc_00002.csv").write_text("".join("nan," + ln.split(",", 1)[1] + "\n" for ln in first))
    assert main(["replay", str(tmp_path / "acc_0000[12].csv"), *FEMTO_ARGS, "--time-column", "0", "--json"]) == 0
    captured = capsys.readouterr()
    assert [json.loads(line)["file"] for line in captured.out.splitlines()] == ["acc_00001.csv"]
    assert "acc_00002.csv: time column 0 holds nan, not a finite number" in captured.err
    # no file gives a time: one clear error, exit 2
    assert main(["replay", str(tmp_path / "acc_0000[2-5].csv"), *FEMTO_ARGS, "--time-column", "0,1,2,3"]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err[-1].startswith("edgevib replay: none of the 4 files gives a time in --time-column 0,1,2,3 (the "
                              "first: acc_00002.csv: time column 0 holds nan")


def test_cut_and_partial_snapshots_are_never_mixed_in_silently(tmp_path: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    # Every FEMTO snapshot holds 2560 rows (0.1 s at 25.6 kHz, datasets README) and ends with a line break.  A copy
    # or a recording cut short: a file of half the rows is reported and skipped; a last line cut in the middle
    # (no line break, fewer fields) or inside its last number (no line break) is dropped with a note and the
    # other 2559 rows are analysed — the peak is the file's own, from numpy on those rows.
    files = _femto_copy(tmp_path, 8)
    text = {f.name: f.read_text() for f in files}
    assert all(t.endswith("\n") and t.count("\n") == 2560 for t in text.values())
    half = files[2]
    half.write_text("".join(text[half.name].splitlines(keepends=True)[:1280]))
    mid = files[4]
    mid.write_text(text[mid.name][: text[mid.name].rstrip("\n").rfind("\n") + 12])  # "8,52,25,2.9"
    last = files[7]  # the latest snapshot of the run: the one a logger stopped by a failure would cut
    last.write_text(text[last.name][:-3])  # "…,-0.5" of "…,-0.508"
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01",
                 "--json"]) == 0
    captured = capsys.readouterr()
    rows = {r["file"]: r for r in (json.loads(line) for line in captured.out.splitlines())}
    assert half.name not in rows and len(rows) == 7
    assert (f"skipped {half.name}: 1280 rows where the run's snapshots have 2560 (the most common length)"
            in captured.err)
    assert f"note: {mid.name}: its last line (line 2560) is cut short: 4 of 6 fields and no line break; dropped " \
           "(2559 of 2560 rows analysed)" in captured.err
    assert f"note: {last.name}: ends without a line break, unlike the run's other snapshots: its last line may " \
           "be cut; dropped (2559 of 2560 rows analysed)" in captured.err
    for f in (mid, last):
        x = np.loadtxt(FEMTO / f.name, delimiter=",")[:2559, 4]
        assert rows[f.name]["indicators"]["acceleration_peak_g"] == pytest.approx(np.abs(x - x.mean()).max(),
                                                                                  rel=1e-4)
    whole = np.loadtxt(FEMTO / files[0].name, delimiter=",")[:, 4]
    assert rows[files[0].name]["indicators"]["acceleration_peak_g"] == pytest.approx(
        np.abs(whole - whole.mean()).max(), rel=1e-4)
    # in the text summary the cut-short file counts as skipped
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01"]) == 0
    assert "7 snapshots replayed, 1 skipped" in capsys.readouterr().out


def test_a_limit_crossing_within_two_days_gives_the_time_of_day(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    # The last 30 FEMTO Bearing1_2 snapshots (datasets README: the test ran to 11:12:05 and ended when the
    # amplitude exceeded 20 g): the horizontal peak rises towards the 20 g limit within minutes, so the chart's
    # limit line gives the crossing's date and time of day (UTC), as the JSON's eta_s from the last snapshot says.
    for f in sorted(FEMTO.glob("acc_*.csv"))[-30:]:
        (tmp_path / f.name).write_bytes(f.read_bytes())
    history = tmp_path / "h.sqlite"
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--time-column", "0,1,2,3", "--start", "2012-03-01",
                 "--history", str(history), "--point", "B1_2", "--json"]) == 0
    last = _lines(capsys)[-1]
    (lim,) = last["limits"]
    assert lim["status"] == "rising" and lim["eta_s"] < 2 * 86400.0
    crossing = datetime.fromtimestamp(last["t_s"] + lim["eta_s"], UTC)
    assert main(["trend", "--history", str(history), "--width", "80", "B1_2", "acceleration_peak_g"]) == 0
    chart = " ".join(capsys.readouterr().out.split())  # the limit line, unwrapped
    assert f"limit 20 g: in {round(lim['eta_s'] / 60)} min" in chart
    assert f"around {crossing:%Y-%m-%d %H:%M} UTC" in chart
    # two days or more ahead: the date alone
    from edgevib.daemon.trendchart import _crossing_date

    far = {"eta_s": 2 * 86400.0, "date": "2026-05-04T07:30:00.000Z"}
    assert _crossing_date(far) == "2026-05-04"
    assert _crossing_date({**far, "eta_s": 2 * 86400.0 - 60}) == "2026-05-04 07:30 UTC"


def test_short_snapshots_with_a_given_speed_are_analysed_in_part(tmp_path: Path,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    # The first 600 rows (23 ms) of FEMTO snapshots at 25.6 kHz, 1800 r/min (datasets README): 42.7 Hz lines
    # cannot resolve the 30 Hz shaft (2 lines needed, make_plan's rule), but the record still carries its
    # time-domain indicators — trended with a note, as `analyze` gives them, not skipped; the peak from numpy.
    files = sorted(FEMTO.glob("acc_*.csv"))[:3]
    for f in files:
        (tmp_path / f.name).write_text("".join(f.read_text().splitlines(keepends=True)[:600]))
    assert main(["replay", str(tmp_path), *FEMTO_ARGS, "--rpm", "1800", "--interval", "10", "--json"]) == 0
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    assert [r["file"] for r in rows] == [f.name for f in files]
    for f, r in zip(files, rows, strict=True):
        x = np.loadtxt(f, delimiter=",")[:600, 4]
        assert r["indicators"]["acceleration_peak_g"] == pytest.approx(np.abs(x - x.mean()).max(), rel=1e-4)
        assert r["indicators"]["shaft_hz"] == pytest.approx(30.0) and r["state"] == "running"
    assert "record of 600 samples at 25600 Hz is too short" in captured.err
    assert "analysed in part: what the record resolves" in captured.err
    assert "give the speed" not in captured.err and "skipped" not in captured.err


def test_whole_recordings_of_different_lengths_are_all_replayed(tmp_path: Path,
                                                                 capsys: pytest.CaptureFixture[str]) -> None:
    # The CWRU drive-end recordings at 12 kHz differ in length (121,265 to 122,571 samples per channel; datasets
    # README) and each records the motor speed measured during the test (1797 r/min at 0 hp, 1772 at 1 hp).  A
    # folder of whole recordings is not a logger's fixed-length snapshots: none is skipped for its length, and the
    # recorded speed marks each as running although the test rig's velocity r.m.s. stays below 0.2 mm/s.
    cwru = FEMTO.parents[1] / "cwru"
    sources = sorted(cwru.glob("cwru_12k_de_*.mat"))
    lengths = set()
    for k, f in enumerate(sources, start=1):
        (tmp_path / f"rec_{k:03d}.mat").write_bytes(f.read_bytes())
        lengths.add(next(v.shape[0] for n, v in scipy.io.loadmat(f).items() if n.endswith("_DE_time")))
    assert len(lengths) > 1
    assert main(["replay", str(tmp_path / "rec_*.mat"), "--fs", "12000", "--interval", "3600", "--start",
                 "2026-01-01", "--json"]) == 0
    captured = capsys.readouterr()
    rows = [json.loads(line) for line in captured.out.splitlines()]
    assert len(rows) == len(sources) and "skipped" not in captured.err
    assert [r["state"] for r in rows] == ["running"] * len(sources)
    assert min(r["indicators"]["velocity_rms_mm_s"] for r in rows) < 0.2

