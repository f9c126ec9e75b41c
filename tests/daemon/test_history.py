"""The durable severity history (edgevib.daemon.history): roll-ups against numpy, running-only severity, stopped
periods, restart and SIGKILL, the disk budget under a long compressed-time run, write errors."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from edgevib.daemon.history import HistoryError, HistoryReader, HistoryRecorder, HistorySettings

T0 = 1_780_000_000  # an arbitrary UTC time, s


def _settings(tmp_path: Path, **kw: float) -> HistorySettings:
    path = str(tmp_path / "history.sqlite")
    return HistorySettings(file=path, path=path, **kw)  # type: ignore[arg-type]


def test_rollups_are_the_statistics_of_running_frames(tmp_path: Path) -> None:
    s = _settings(tmp_path)
    rec = HistoryRecorder(s, ("a", "b"))
    rng = np.random.default_rng(5)
    n = 3 * 3600
    t = T0 + np.arange(n) * 1.0
    a = rng.lognormal(0.0, 0.3, n)
    b = np.where(np.arange(n) % 3 == 0, np.nan, rng.normal(5.0, 1.0, n))
    state = np.where((np.arange(n) >= 4000) & (np.arange(n) < 4900), "stopped", "running")
    for i in range(n):
        rec.record("P-1", int(t[i] * 1e9), [a[i], b[i]], str(state[i]))
        if i % 997 == 0:
            rec.flush()
    rec.flush()
    run = state == "running"
    with HistoryReader(s.path) as r:
        minute = r.series("P-1", "a", level="minute")
        hour = r.series("P-1", "a", level="hour")
        hour_b = r.series("P-1", "b", level="hour")
        # every closed minute: exact statistics of its running values (numpy reference)
        for k, start in enumerate(minute.t_s[:-1]):
            sel = run & (t >= start) & (t < start + 60)
            v = a[sel]
            assert minute.count is not None and minute.count[k] == v.size
            assert_allclose([minute.vmin[k], minute.mean[k], minute.vmax[k], minute.value[k], minute.p_high[k]],
                            [v.min(), v.mean(), v.max(), np.percentile(v, 50), np.percentile(v, 95)], rtol=1e-6)
        # hours: count, min, max, mean exact; median and 95th percentile within the sketch's 1 %
        for k, start in enumerate(hour.t_s[:-1]):
            sel = run & (t >= start) & (t < start + 3600)
            v = a[sel]
            assert hour.count is not None and hour.count[k] == v.size
            assert_allclose([hour.vmin[k], hour.mean[k], hour.vmax[k]], [v.min(), v.mean(), v.max()], rtol=1e-6)
            assert abs(hour.value[k] - np.quantile(v, 0.5, method="lower")) <= 0.011 * hour.value[k]
            assert abs(hour.p_high[k] - np.quantile(v, 0.95, method="lower")) <= 0.011 * hour.p_high[k]
            vb = b[sel & np.isfinite(b)]
            assert hour_b.count is not None and hour_b.count[k] == vb.size
        # the stopped quarter-hour is a marked period, not averaged in
        assert hour.periods == (("stopped", T0 + 4000.0, T0 + 4900.0),)
        # the open hour holds the closed minutes; the open minute (the last row) joins it when it closes
        assert minute.count is not None
        assert sum(hour.count) + minute.count[-1] == run.sum()  # type: ignore[arg-type]
        frames = r.series("P-1", "a", level="frames")
        assert frames.state.count("stopped") == 900
        assert r.latest_state("P-1") == "running"
    rec.close()


def test_open_buckets_continue_after_a_restart(tmp_path: Path) -> None:
    s = _settings(tmp_path)
    t = T0 + np.arange(7200) * 1.0
    v = 1.0 + (np.arange(7200) % 97) / 97.0
    whole = HistoryRecorder(_settings(tmp_path / "whole"), ("a",))
    for i in range(7200):
        whole.record("P-1", int(t[i] * 1e9), [v[i]], "running")
    whole.close()
    first = HistoryRecorder(s, ("a",))
    for i in range(4321):  # stop mid-minute and mid-hour
        first.record("P-1", int(t[i] * 1e9), [v[i]], "running")
    first.close()
    second = HistoryRecorder(s, ("a",))
    for i in range(4321, 7200):
        second.record("P-1", int(t[i] * 1e9), [v[i]], "running")
    second.close()
    with HistoryReader(s.path) as r, HistoryReader(whole.settings.path) as w:
        for level in ("minute", "hour", "day"):
            got, ref = r.series("P-1", "a", level=level), w.series("P-1", "a", level=level)
            assert_allclose(got.t_s, ref.t_s)
            for f in ("count", "vmin", "mean", "vmax", "value", "p_high"):
                assert_allclose(getattr(got, f), getattr(ref, f), rtol=1e-6, err_msg=f"{level} {f}")


_WRITER = textwrap.dedent("""
    import sys, time
    from edgevib.daemon.history import HistoryRecorder, HistorySettings
    path = sys.argv[1]
    rec = HistoryRecorder(HistorySettings(file=path, path=path, flush_s=0.05), ("a", "b"))
    t0, i = 1_780_000_000, 0
    while True:
        for _ in range(50):
            rec.record("P-1", (t0 + i) * 10**9, [1.0 + i * 1e-3, 2.0], "running")
            i += 1
        rec.flush()
        print(i, flush=True)
""")


def test_history_survives_sigkill_and_continues(tmp_path: Path) -> None:
    path = str(tmp_path / "history.sqlite")
    proc = subprocess.Popen([sys.executable, "-c", _WRITER, path], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None
        written = 0
        deadline = time.monotonic() + 60
        while written < 3000 and time.monotonic() < deadline:
            written = int(proc.stdout.readline())
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    assert written >= 3000
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()
    with HistoryReader(path) as r:
        minutes = r.series("P-1", "a", level="minute")
        frames = r.series("P-1", "a", level="frames")
        committed = int(frames.t_s[-1] - T0) + 1
        assert committed >= written                  # every flushed frame is there
        assert np.all(np.diff(minutes.t_s) == 60.0)  # and every minute up to them
    rec = HistoryRecorder(HistorySettings(file=path, path=path), ("a", "b"))
    for i in range(committed, committed + 240):
        rec.record("P-1", (T0 + i) * 10**9, [5.0, 2.0], "running")
    rec.close()
    with HistoryReader(path) as r:
        minutes = r.series("P-1", "a", level="minute")
        assert minutes.count is not None
        # a restart continues the open minute: every full minute holds 60 frames
        assert np.all(minutes.count[1:-1] == 60)
        assert minutes.t_s[-1] >= T0 + committed + 180


def test_disk_budget_holds_over_a_long_compressed_run(tmp_path: Path) -> None:
    # Three years of four frames per simulated day on three points with a 448 KiB budget: the file never exceeds
    # it, frame-rate values and minute and hour roll-ups are pruned first (counted) and the daily roll-ups keep at
    # least 18 months (the default retention, 1100 days, would not fit).
    budget = 448 * 1024
    s = _settings(tmp_path, max_bytes=budget, flush_s=1.0)
    rec = HistoryRecorder(s, ("v", "a", "k", "p"))
    rng = np.random.default_rng(0)
    steps = 3 * 365 * 4
    wal = Path(s.path + "-wal")
    sizes = []
    for h in range(steps):
        for p in range(3):
            rec.record(f"P-{p}", (T0 + 6 * 3600 * h) * 10**9, rng.lognormal(0, 0.2, 4), "running")
        if h % 8 == 7:
            rec.flush()
            sizes.append(Path(s.path).stat().st_size + (wal.stat().st_size if wal.exists() else 0))
    rec.close()
    assert max(sizes) <= budget
    assert rec.stats.pruned["hour"] > 0 and rec.stats.pruned["day"] > 0
    assert rec.stats.written == steps * 3 and rec.stats.dropped == 0
    with HistoryReader(s.path) as r:
        days = r.series("P-0", "v", level="day")
        assert days.t_s[-1] - days.t_s[0] >= 548 * 86400  # at least 18 months of daily roll-ups
        assert np.all(np.diff(days.t_s) == 86400)          # pruned from the oldest end, no holes


def test_a_write_error_keeps_the_batch_for_the_next_flush(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    s = _settings(tmp_path)
    rec = HistoryRecorder(s, ("a",))
    for i in range(100):
        rec.record("P-1", (T0 + i) * 10**9, [1.0], "running")
    real = rec._write
    calls = {"n": 0}

    def failing(batch: list, pace: object = None) -> int:  # type: ignore[type-arg]
        calls["n"] += 1
        if calls["n"] == 1:
            raise sqlite3.OperationalError("disk I/O error")
        return real(batch, pace)  # type: ignore[arg-type]

    monkeypatch.setattr(rec, "_write", failing)
    assert rec.flush() == 0 and rec.stats.write_errors == 1 and rec.pending == 100
    assert rec.flush() == 100
    rec.close()
    with HistoryReader(s.path) as r:
        assert r.series("P-1", "a", level="frames").t_s.size == 100


def test_a_budget_too_small_for_the_daily_rollups_prunes_them_and_recording_goes_on(tmp_path: Path) -> None:
    # 160 KiB cannot hold two years of daily roll-ups of four points: after the frame, minute and hour rows, the
    # oldest daily roll-ups go too (counted); every frame is still accepted and written, the newest days stay.
    budget = 160 * 1024
    s = _settings(tmp_path, max_bytes=budget, flush_s=1.0)
    rec = HistoryRecorder(s, ("v", "a", "k", "p", "c", "d"))
    rng = np.random.default_rng(1)
    days = 2 * 365
    for d in range(days):
        for p in range(4):
            rec.record(f"P-{p}", (T0 + 86400 * d) * 10**9, rng.lognormal(0, 0.2, 6), "running")
        if d % 30 == 29:
            rec.flush()
    rec.close()
    assert rec.stats.written == days * 4 and rec.stats.dropped == 0 and rec.stats.write_errors == 0
    assert rec.stats.pruned["day"] > 0
    wal = Path(s.path + "-wal")
    assert Path(s.path).stat().st_size + (wal.stat().st_size if wal.exists() else 0) <= budget
    with HistoryReader(s.path) as r:
        for p in range(4):
            kept = r.series(f"P-{p}", "v", level="day")
            assert kept.t_s[-1] // 86400 == (T0 + 86400 * (days - 1)) // 86400  # the newest day is there
            assert kept.t_s.size < days                                          # the oldest are gone
            assert np.all(np.diff(kept.t_s) == 86400)                            # from the oldest end


_DAEMON_CONFIG = """
[site]
name = "quarry-lane"
state_dir = "{state}"

[analysis]
frame_samples = 8192
overlap = 0.0

[[sources]]
name = "sim"
type = "simulated"
scenario = "demo"

[[machines]]
id = "P-101"
group = 2
support = "rigid"
speed_rpm = 1485.0

[[points]]
id = "P-101-DE-H"
machine = "P-101"
axis = "horizontal"
source = "sim"
sensor = "QL-P101-DE-H"
fs_hz = 12800.0
block_samples = 4096

[alarms]
startup_grace_s = 0.0

[history]
flush_s = 0.2
"""


def _frames_in(path: Path) -> np.ndarray:
    if not path.exists():
        return np.zeros(0)
    try:
        with HistoryReader(path) as r:
            return r.series("P-101-DE-H", "velocity_rms_mm_s", level="frames").t_s
    except (HistoryError, sqlite3.Error):  # not created yet, or no frames of the point yet
        return np.zeros(0)


def _wait_frames(path: Path, n: int, proc: subprocess.Popen[bytes], log: Path) -> np.ndarray:
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        t = _frames_in(path)
        if t.size >= n:
            return t
        assert proc.poll() is None, log.read_text()[-3000:]
        time.sleep(0.2)
    raise AssertionError(f"fewer than {n} frames in the history:\n{log.read_text()[-3000:]}")


@pytest.mark.slow
def test_the_daemons_history_survives_sigkill_and_restart(tmp_path: Path) -> None:
    # The running daemon (simulated demo source) killed with SIGKILL: the file is intact, every committed frame is
    # there, and the restarted daemon continues the same history; the minute roll-ups hold exactly the running
    # frames (no frame counted twice or lost across the restart).
    state = tmp_path / "state"
    cfg = tmp_path / "edgevib.toml"
    cfg.write_text(_DAEMON_CONFIG.format(state=state))
    path = state / "history.sqlite"
    log = tmp_path / "daemon.log"
    cmd = [sys.executable, "-m", "edgevib.daemon", "run", "--config", str(cfg), "--metrics-listen", "127.0.0.1:0"]
    with log.open("ab") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=out)
        try:
            before = _wait_frames(path, 6, proc, log)
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(30)
    assert proc.returncode == -signal.SIGKILL
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()
    committed = _frames_in(path)
    assert committed.size >= before.size and np.all(np.isin(before, committed))
    with log.open("ab") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=out)
        try:
            _wait_frames(path, committed.size + 6, proc, log)
        finally:
            proc.send_signal(signal.SIGTERM)
            proc.wait(60)
    assert proc.returncode == 0, log.read_text()[-3000:]
    with HistoryReader(path) as r:
        frames = r.series("P-101-DE-H", "velocity_rms_mm_s", level="frames")
        minutes = r.series("P-101-DE-H", "velocity_rms_mm_s", level="minute")
    assert np.all(np.isin(committed, frames.t_s)) and frames.t_s.size >= committed.size + 6
    running = sum(s == "running" for s in frames.state)
    assert minutes.count is not None and int(minutes.count.sum()) == running


def _intermittent(days: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Frame times (s), values (n, 2) and states of a machine that runs 00:00–00:20 and 07:10–07:15 UTC each day
    (a frame every 30 s, stopped frames every 10 min in between); indicator "b" is missing in every third frame."""
    day0 = T0 // 86400 * 86400
    t, state = [], []
    for d in range(days):
        base = day0 + d * 86400
        run = [base + s for s in range(0, 1200, 30)] + [base + 25800 + s for s in range(0, 300, 30)]
        stop = [base + s for s in range(1800, 86400, 600) if not 25800 <= s < 26100]
        for x in sorted(run + stop):
            t.append(float(x))
            state.append("running" if x in run else "stopped")
    tt = np.asarray(t)
    rng = np.random.default_rng(8)
    v = np.stack([rng.lognormal(0.0, 0.1, tt.size), rng.lognormal(1.0, 0.1, tt.size)], axis=1)
    v[::3, 1] = np.nan
    return tt, v, np.asarray(state)


def _check_stamps(path: str, t: np.ndarray, v: np.ndarray, state: np.ndarray, atol_s: float,
                  legacy_until_s: float = -np.inf) -> int:
    """Every roll-up bucket's stamp against the mean time of the running values it holds (numpy reference);
    buckets that ended by ``legacy_until_s`` (closed before schema version 2) at their middle instead."""
    checked = 0
    with HistoryReader(path) as r:
        for j, name in enumerate(("a", "b")):
            for level, length in (("minute", 60), ("hour", 3600), ("day", 86400)):
                s = r.series("P-1", name, level=level)
                assert s.t_mean_s is not None and s.t_mean_s.shape == s.t_s.shape
                for start, stamp in zip(s.t_s, s.stamp_s, strict=True):
                    sel = (state == "running") & np.isfinite(v[:, j]) & (t >= start) & (t < start + length)
                    legacy = start + length <= legacy_until_s
                    want = start + length / 2.0 if legacy else float(np.mean(t[sel]))
                    assert stamp == pytest.approx(want, abs=atol_s), (name, level, start)
                    checked += 1
            frames = r.series("P-1", name, level="frames")
            assert_allclose(frames.stamp_s, frames.t_s)
    return checked


def test_bucket_stamps_are_the_mean_time_of_the_values_they_hold(tmp_path: Path) -> None:
    # A bucket's statistics stand for the mean time of its values, not its middle: here the machine runs 25 of
    # the day's 1440 minutes, so a day bucket's middle (12:00) is 9–12 h away from its values.  Checked for
    # every minute, hour and day bucket against numpy's mean of the recorded times, across a restart mid-minute,
    # mid-hour and mid-day, for an indicator missing in some frames; float32 offsets from the bucket start
    # (resolution 8 ms at a day) bound the tolerance.
    t, v, state = _intermittent(3)
    s = _settings(tmp_path)
    cut = int(np.searchsorted(t, t[0] + 2 * 86400 + 25800 + 95))  # 07:11:35 on the third day
    rec = HistoryRecorder(s, ("a", "b"))
    for i in range(cut):
        rec.record("P-1", int(t[i] * 1e9), v[i], str(state[i]))
        if i % 50 == 0:
            rec.flush()
    rec.close()
    rec = HistoryRecorder(s, ("a", "b"))
    for i in range(cut, t.size):
        rec.record("P-1", int(t[i] * 1e9), v[i], str(state[i]))
    rec.close()
    assert _check_stamps(s.path, t, v, state, atol_s=0.02) > 100
    # the open (still filling) bucket before the recorder closes: the closed minutes it holds so far
    rec = HistoryRecorder(_settings(tmp_path / "open"), ("a", "b"))
    first = t < t[0] + 86400 + 600  # up to 00:10 of the second day
    for i in np.flatnonzero(first):
        rec.record("P-1", int(t[i] * 1e9), v[i], str(state[i]))
    rec.flush()
    with HistoryReader(rec.settings.path) as r:
        day = r.series("P-1", "a", level="day")
        closed_minutes = (state == "running") & (t >= day.t_s[-1]) & (t < (t[first][-1] // 60) * 60)
        assert day.stamp_s[-1] == pytest.approx(float(np.mean(t[closed_minutes])), abs=0.02)
        assert day.stamp_s[-1] - day.t_s[-1] < 600  # not its middle, 12 h on
    rec.close()


def test_a_version_1_history_is_migrated_on_open(tmp_path: Path) -> None:
    # A file written before bucket mean times were kept (schema version 1: no rollups.t_mean, open buckets' state
    # without time sums) is read as it is (bucket middles), brought to version 2 by the first writer that opens
    # it, and goes on: its old rows stay at their middles, the open day continues from its minute roll-ups (each
    # at its middle: within 30 s, here 15 s — frames at :00 and :30 of each minute) and new rows are exact.
    from edgevib.daemon.history import SCHEMA_VERSION

    t, v, state = _intermittent(3)
    s = _settings(tmp_path)
    cut = int(np.searchsorted(t, t[0] + 86400 + 900))  # 00:15 on the second day: the open day has 30 frames
    rec = HistoryRecorder(s, ("a", "b"))
    for i in range(cut):
        rec.record("P-1", int(t[i] * 1e9), v[i], str(state[i]))
    rec.close()
    conn = sqlite3.connect(s.path)  # the layout and open-bucket state version 1 wrote
    conn.execute("ALTER TABLE rollups DROP COLUMN t_mean")
    for key, blob in conn.execute("SELECT rowid_key, sketch FROM (SELECT level || ',' || start_s || ',' || point "
                                  "AS rowid_key, sketch FROM rollups WHERE sketch IS NOT NULL)").fetchall():
        a = np.frombuffer(blob, dtype="<f8")
        level, start, point = (int(x) for x in key.split(","))
        conn.execute("UPDATE rollups SET sketch = ? WHERE level = ? AND start_s = ? AND point = ?",
                     (a[:a.size - int(a[0])].tobytes(), level, start, point))  # without the time sums
    conn.execute("UPDATE schema_version SET version = 1")
    conn.commit()
    conn.close()
    legacy_until = t[cut - 1]  # the buckets that ended by the last frame before the upgrade were closed then
    with HistoryReader(s.path) as r:  # read as it is: bucket middles
        day = r.series("P-1", "a", level="day")
        assert_allclose(day.stamp_s, day.t_s + 43200.0)
    rec = HistoryRecorder(s, ("a", "b"))
    for i in range(cut, t.size):
        rec.record("P-1", int(t[i] * 1e9), v[i], str(state[i]))
    rec.close()
    conn = sqlite3.connect(s.path)
    assert conn.execute("SELECT version FROM schema_version").fetchone()[0] == SCHEMA_VERSION == 2
    assert "t_mean" in [c[1] for c in conn.execute("PRAGMA table_info(rollups)")]
    conn.close()
    with HistoryReader(s.path) as r:
        day = r.series("P-1", "a", level="day")
        assert day.t_s.size == 3
        assert day.stamp_s[0] == day.t_s[0] + 43200.0                  # closed before the upgrade: its middle
        for k in (1, 2):                                                # continued across the upgrade; new
            sel = (state == "running") & (t >= day.t_s[k]) & (t < day.t_s[k] + 86400)
            assert day.stamp_s[k] == pytest.approx(float(np.mean(t[sel])), abs=15.5 if k == 1 else 0.02)
    # every bucket opened after the upgrade is exact, the older ones at their middles
    _check_stamps(s.path, t, v, state, atol_s=15.5, legacy_until_s=legacy_until)


def test_flush_pacer_sleeps_its_share_of_the_cpu_used_and_not_when_disabled() -> None:
    # the duty-cycle arithmetic (common practice): with a share s of one core, each slice of CPU time u is followed
    # by a pause of u·(1 − s)/s, so the flush uses s of the time it takes; a fake CPU clock and sleep, no timing
    from edgevib.daemon.history import FlushPacer

    cpu = [0.0]
    slept: list[float] = []
    on = [True]
    pace = FlushPacer(0.25, lambda: on[0], slice_s=0.01, cpu_s=lambda: cpu[0], sleep=slept.append)
    for used in (0.004, 0.004, 0.004, 0.02, 0.001):
        cpu[0] += used
        pace()
    assert slept == pytest.approx([0.012 * 3, 0.02 * 3])  # a slice gathered over three calls, then a whole one
    on[0] = False  # a stopping daemon: no more pauses
    cpu[0] += 0.05
    pace()
    assert len(slept) == 2
    with pytest.raises(ValueError, match="share"):
        FlushPacer(0.0, lambda: True)


async def test_only_a_running_recorders_flushes_are_paced(tmp_path: Path) -> None:
    # a replay's or a tool's flush runs at full speed; the daemon's periodic ones (start … stop) are paced, and the
    # same rows are written either way
    rec = HistoryRecorder(_settings(tmp_path), ("a",))
    paced: list[bool] = []
    write = rec._write
    rec._write = lambda batch, pace=None: paced.append(pace is not None) or write(batch, pace)  # type: ignore[method-assign]
    rec.record("P1", T0 * 10**9, [1.0], "running")
    rec.flush()
    await rec.start()
    rec.record("P1", (T0 + 1) * 10**9, [2.0], "running")
    rec.flush()
    await rec.stop()
    assert paced == [False, True]
    with HistoryReader(_settings(tmp_path).path) as reader:
        assert reader.latest_time_s("P1") == pytest.approx(T0 + 1)
