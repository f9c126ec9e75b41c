"""The daemon's trend layer (edgevib.daemon.trendwatch): frames judged by the alarm layer enter the history with
their machine state, projections reach the Prometheus gauges, the retained state message and alarm events, with
watch / plan / act advice; nothing is projected while the machine stands or from too little history."""

from __future__ import annotations

import asyncio
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from framekit import Tracked, frame_indicators
from prometheus_client import CollectorRegistry

from edgevib.daemon.app import wire_alarms
from edgevib.daemon.config import parse_config
from edgevib.daemon.history import HistoryReader, HistoryRecorder, HistorySettings
from edgevib.daemon.interfaces import ConfigError, FrameResult
from edgevib.daemon.trendwatch import (
    HISTORY_INDICATORS,
    TrendSettings,
    advice,
    create_trend_watch,
    evaluate,
    iso_next_boundary,
    running_state,
    trend_settings,
)

D = 86400.0
T0 = 1_780_000_000.0
POINT, MACHINE = "P-101-DE-H", "P-101"


def _config(state_dir: Path, **tables: Any) -> Any:
    """Pump P-101 (ISO 20816-3 group 2, rigid: B/C 2.8, C/D 4.5 mm/s) with one point."""
    doc: dict[str, Any] = {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": 8192, "overlap": 0.0},
        "sources": [{"name": "sim", "type": "simulated", "scenario": "demo"}],
        "machines": [{"id": MACHINE, "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": POINT, "machine": MACHINE, "axis": "horizontal", "source": "sim", "sensor": "QL-P101-DE-H",
                    "fs_hz": 12800.0, "block_samples": 4096}],
        # one frame an hour: no run/stop dwell (the default 3 frames would tell the standing days 2 h late)
        "alarms": {"startup_grace_s": 0.0, "run_dwell_frames": 1, "run_dwell_s": 0.0},
        "trend": {"evaluate_s": 3600.0, "min_span_h": 24.0},
        **tables,
    }
    return parse_config(doc, state_dir)


def _frame(t_s: float, v_mm_s: float, seed: int) -> FrameResult:
    rng = np.random.default_rng(seed)
    n, fs = 8192, 12800.0
    x = 0.2 * np.sin(2 * np.pi * 24.75 * np.arange(n) / fs) + 0.01 * rng.standard_normal(n)
    ind = frame_indicators(acceleration_rms_g=0.1, acceleration_peak_g=0.3, acceleration_peak_to_peak_g=0.6,
                           crest_factor=3.0, kurtosis=3.0, skewness=0.0, mean_g=0.0, velocity_rms_mm_s=v_mm_s,
                           velocity_peak_mm_s=1.414 * v_mm_s, displacement_pp_um=10.0, shaft_hz=24.75,
                           shaft_estimated=False, orders_mm_s={"1x": 0.9 * v_mm_s, "2x": 0.1, "0.5x": 0.05})
    return FrameResult(point_id=POINT, machine_id=MACHINE, t_end_ns=round(t_s * 1e9), received_ns=round(t_s * 1e9),
                       fs_hz=fs, indicators=ind, iso_zone=None, samples=x.astype(np.float32), axis="horizontal")


def _law(day: np.ndarray) -> np.ndarray:
    """Healthy 1.0 mm/s, then +0.05 mm/s per day from day 10: zone C (2.8) on day 46, zone D (4.5) on day 80."""
    return np.where(day < 10, 1.0, 1.0 + 0.05 * (day - 10))


def _sample(registry: CollectorRegistry, name: str, **labels: str) -> float | None:
    return registry.get_sample_value(name, labels)


async def test_projection_reaches_gauges_state_message_and_events(tmp_path: Path) -> None:
    cfg = _config(tmp_path / "state")
    registry = CollectorRegistry()
    layer = wire_alarms(cfg)
    assert layer is not None
    watch = create_trend_watch(cfg, layer, registry=registry)
    assert watch is not None
    events: list[dict[str, Any]] = []
    layer.subscribe(events.append)
    await layer.start()
    await watch.start()
    tracked = Tracked(cfg, layer.point_healthy)  # each frame's machine state, as the daemon attaches it
    try:
        rng = np.random.default_rng(1)
        hours = np.arange(0, 40 * 24)  # 40 days, one frame an hour
        days = hours / 24.0
        values = _law(days) * np.exp(0.05 * rng.standard_normal(days.size))
        values[(days >= 20) & (days < 22)] = 0.05        # two days standing: below the run threshold
        for k in range(0, hours.size, 48):
            batch = [_frame(T0 + days[i] * D, float(values[i]), i) for i in range(k, min(k + 48, hours.size))]
            await layer.on_frames(tracked(batch))
        assert await asyncio.to_thread(watch.evaluate_all) >= 1
        doc = watch.latest[(POINT, "velocity_rms_mm_s")]
        now_day = days[-1]
        assert doc["status"] == "ok" and doc["rising"] and doc["model"] == "linear"
        assert doc["slope_per_day"] == pytest.approx(0.05, rel=0.15)
        lims = {lim["label"]: lim for lim in doc["limits"]}
        # limits: the alarm layer's alert (ISO B/C 2.8) and danger (C/D 4.5); the next ISO boundary is B/C too
        assert set(lims) == {"alert", "danger"}
        for label, crossing_day in (("alert", 46.0), ("danger", 80.0)):
            lim = lims[label]
            assert lim["status"] == "rising"
            assert lim["eta_low_s"] <= lim["eta_s"] <= lim["eta_high_s"]
            assert lim["eta_s"] / D == pytest.approx(crossing_day - now_day, rel=0.15)
        assert doc["advice"] == "plan" and "alert level (2.8 mm/s)" in doc["advice_text"]
        assert "qualified vibration analyst" in doc["advice_text"]
        # Prometheus: seconds to each limit with the interval ends, slope per day
        lab = {"site": "quarry-lane", "machine": MACHINE, "point": POINT, "indicator": "velocity_rms_mm_s"}
        assert _sample(registry, "edgevib_trend_slope_per_day", **lab) == pytest.approx(doc["slope_per_day"])
        assert _sample(registry, "edgevib_trend_limit_eta_seconds", **lab, limit="alert", bound="estimate") == \
            pytest.approx(lims["alert"]["eta_s"])
        assert _sample(registry, "edgevib_trend_limit_eta_seconds", **lab, limit="danger", bound="high") == \
            pytest.approx(lims["danger"]["eta_high_s"])
        assert _sample(registry, "edgevib_trend_rising", **lab) == 1.0
        # the retained state message carries the trend
        msg = json.loads(layer.state_messages()[POINT][1])
        assert msg["trend"]["velocity_rms_mm_s"]["advice"] == "plan"
        # the standing days are a marked period and did not enter the roll-ups
        with HistoryReader(cfg.history.file) as r:
            hourly = r.series(POINT, "velocity_rms_mm_s", level="hour")
            assert any(s == "stopped" and a <= T0 + 20 * D + 3600 and b >= T0 + 21.9 * D
                       for s, a, b in hourly.periods)
            assert np.all(hourly.value > 0.5)
        # an alarm raised now carries the trend and its advice
        await layer.on_frames(tracked([_frame(T0 + (now_day + 0.1 + 0.01 * i) * D, 3.0, 9000 + i) for i in range(3)]))
        raised = [e for e in events if e["data"].get("transition") == "raised"]
        assert raised and raised[-1]["data"]["trend"]["advice"] == "plan"
        assert "Trend: Plan:" in raised[-1]["data"]["advice"]
        assert raised[-1]["data"]["advice"].count("edgevib monitors and advises") == 1
    finally:
        await watch.stop()
        await layer.stop()


async def test_no_projection_while_stopped_or_from_too_little_history(tmp_path: Path) -> None:
    cfg = _config(tmp_path / "state")
    registry = CollectorRegistry()
    watch = create_trend_watch(cfg, None, registry=registry)  # no alarm layer: the rule of thumb judges state
    assert watch is not None
    await watch.start()
    try:
        await watch.on_frames([_frame(T0 + i * 3600.0, 1.0 + 0.1 * i, i) for i in range(6)])
        await asyncio.to_thread(watch.evaluate_all)
        doc = watch.latest[(POINT, "velocity_rms_mm_s")]
        assert doc["status"] == "insufficient-history"
        assert doc["need"] == "needs at least 12 running values over 24.0 h; has 6 over 5.0 h"
        assert doc["limits"] == [] and doc["advice"] is None
        frames = [_frame(T0 + i * 3600.0, 1.0 + 0.05 * i, i) for i in range(6, 80)]
        frames += [_frame(T0 + i * 3600.0, 0.02, i) for i in range(80, 84)]  # the machine stops
        await watch.on_frames(frames)
        await asyncio.to_thread(watch.evaluate_all)
        doc = watch.latest[(POINT, "velocity_rms_mm_s")]
        assert doc["machine_state"] == "stopped" and doc["status"] == "machine-not-running"
        assert all(lim["eta_s"] is None for lim in doc["limits"])
        lab = {"site": "quarry-lane", "machine": MACHINE, "point": POINT, "indicator": "velocity_rms_mm_s"}
        assert _sample(registry, "edgevib_trend_limit_eta_seconds", **lab, limit="danger", bound="estimate") is None
    finally:
        await watch.stop()


def test_advice_kinds_and_wording() -> None:
    base = {"status": "ok", "unit": "mm/s", "coverage": 0.8, "rising": True, "slope_per_day": 0.05, "step": None,
            "level": 3.0}

    def lim(label: str, value: float, eta_days: float | None, status: str = "rising") -> dict[str, Any]:
        eta = None if eta_days is None else eta_days * D
        date = None if eta is None else "2027-03-01T00:00:00.000Z"
        return {"label": label, "value": value, "status": status, "eta_s": eta, "eta_low_s": eta and 0.8 * eta,
                "eta_high_s": eta and 1.3 * eta, "date": date, "date_low": date, "date_high": date}

    kind, text = advice({**base, "limits": [lim("alert", 2.8, 40.0), lim("danger", 4.5, 120.0)]})
    assert kind == "plan" and text is not None and "about 40 days, around 2027-03-01 (80 % interval" in text
    kind, text = advice({**base, "limits": [lim("danger", 4.5, 5.0)]})
    assert kind == "act" and text is not None and text.startswith("Act: rising 1.5 mm/s per month;")
    kind, text = advice({**base, "limits": [lim("danger", 4.5, 0.0, "reached")]})
    assert kind == "act" and text is not None and "is reached" in text
    kind, text = advice({**base, "limits": [lim("alert", 2.8, 200.0)]})
    assert kind == "watch" and text is not None and "kept under observation" in text
    kind, _ = advice({**base, "rising": False, "limits": [lim("alert", 2.8, None, "not-rising")],
                      "step": {"significant": True, "change": 0.9, "baseline": 1.0, "threshold": 0.7}})
    assert kind == "watch"
    assert advice({**base, "rising": False, "limits": [lim("alert", 2.8, None, "not-rising")]}) == (None, None)
    assert advice({"status": "insufficient-history"}) == (None, None)
    # a limit minutes away: said in minutes, dates with their time of day (the FEMTO bearing's last snapshot, 173 s
    # before the 20 g limit)
    soon = {"label": "limit", "value": 20.0, "status": "rising", "eta_s": 173.0, "eta_low_s": 120.0,
            "eta_high_s": 260.0, "date": "2012-03-01T11:15:00.000Z", "date_low": "2012-03-01T11:14:07.000Z",
            "date_high": "2012-03-01T11:16:27.000Z"}
    kind, text = advice({**base, "unit": "g", "slope_per_day": 500.0, "level": 18.0, "limits": [soon]})
    assert kind == "act" and text is not None  # a user limit counts as danger-class
    assert "in about 3 minutes, around 2012-03-01 11:15 UTC (80 % interval 2012-03-01 11:14 UTC to " \
        "2012-03-01 11:16 UTC)" in text


def test_helpers_and_configuration_errors(tmp_path: Path) -> None:
    # ISO 20816-3 group 2 rigid boundaries (FIELD_NOTES §1)
    assert iso_next_boundary(1.0, (1.4, 2.8, 4.5)) == ("zone B", 1.4)
    assert iso_next_boundary(3.0, (1.4, 2.8, 4.5)) == ("zone D", 4.5)
    assert iso_next_boundary(5.0, (1.4, 2.8, 4.5)) is None
    assert running_state(1.0, 24.75, False) == "running"
    assert running_state(0.1, 24.75, False) == "stopped"
    assert running_state(1.0, 0.5, False) == "stopped"       # measured speed below 60 r/min
    assert running_state(1.0, 0.5, True) == "running"        # an estimate does not decide
    assert running_state(math.nan, None, False) == "stopped"
    # a speed recorded with the data decides alone, as a speed tag does in the alarm layer (pipelines/machine_state)
    assert running_state(0.1, 29.95, False, speed_measured=True) == "running"
    assert running_state(1.0, 0.5, False, speed_measured=True) == "stopped"
    assert running_state(0.1, 29.95, True, speed_measured=True) == "stopped"  # an estimate is never measured
    with pytest.raises(ConfigError, match=r"trend.indicators\[0\]: unknown indicator 'velocity_rms'"):
        _config(tmp_path, trend={"indicators": ["velocity_rms"]})
    with pytest.raises(ConfigError, match=r"trend.limits\[0\].point: unknown point 'P-999'"):
        _config(tmp_path, trend={"limits": [{"point": "P-999", "indicator": "kurtosis", "value": 6.0}]})
    with pytest.raises(ConfigError, match=r"history\.hour_days"):
        _config(tmp_path, history={"minute_days": 5.0, "hour_days": 2.0})
    with pytest.raises(ConfigError, match=r"trend\.act_days"):
        _config(tmp_path, trend={"act_days": 100.0, "plan_days": 30.0})
    cfg = _config(tmp_path, history={"file": "h/severity.sqlite", "max_mb": 64.0},
                  trend={"limits": [{"point": POINT, "indicator": "acceleration_peak_g", "value": 20.0}]})
    assert cfg.history.file == str(tmp_path / "h" / "severity.sqlite")
    assert trend_settings(cfg.trend).limit_for(POINT, "acceleration_peak_g") == 20.0
    assert create_trend_watch(_config(tmp_path, history={"enabled": False})) is None


async def test_read_only_views_for_the_http_api(tmp_path: Path) -> None:
    cfg = _config(tmp_path / "state")
    watch = create_trend_watch(cfg, None)
    assert watch is not None
    await watch.start()
    try:
        await watch.on_frames([_frame(T0 + i * 3600.0, 1.0 + 0.05 * i, i) for i in range(48)])
        await asyncio.to_thread(watch.evaluate_all)
        series = await asyncio.to_thread(watch.history, POINT, "velocity_rms_mm_s")
        assert series.level == "minute" and series.t_s.size == 48  # 48 minute buckets hold them (≤ 500)
        np.testing.assert_allclose(series.value, 1.0 + 0.05 * np.arange(48), rtol=1e-6)  # float32 storage
        frames = await asyncio.to_thread(watch.history, POINT, "velocity_rms_mm_s", None, 500, "frames")
        # frame-rate values are kept for recent_s (15 min) back from the newest frame: here the last one only
        assert frames.t_s.tolist() == [T0 + 47 * 3600.0] and frames.state == ("running",)
        doc = watch.projection(POINT, "velocity_rms_mm_s")
        assert doc is not None and doc["rising"] and watch.projection(POINT, "kurtosis") is None
        assert set(watch.projections(POINT)) >= {"velocity_rms_mm_s", "imbalance_1x_mm_s"}
        await watch.reconfigure(cfg)  # unchanged settings: no restart needed
    finally:
        await watch.stop()


async def test_only_running_frames_enter_the_rollups(tmp_path: Path) -> None:
    # The alarm layer's judged state decides: coasting, starting and unknown frames are marked, not averaged in.
    from dataclasses import replace

    from edgevib.pipelines.machine_state import MachineState

    cfg = _config(tmp_path / "state")
    watch = create_trend_watch(cfg, None)
    assert watch is not None
    await watch.start()
    try:
        states = ["running"] * 10 + ["coasting"] * 5 + ["stopped"] * 5 + ["starting"] * 5 + ["running"] * 10
        for i, st in enumerate(states):
            frame = replace(_frame(T0 + 60.0 * i, 5.0 if st != "running" else 1.0, i),
                            machine_state=MachineState(state=st))  # type: ignore[arg-type]
            reason = {"stopped": "machine-stopped", "starting": "start-up-grace"}.get(st)
            watch.on_judged_frame(frame, reason)
        watch.on_judged_frame(_frame(T0 + 60.0 * len(states), 9.0, 99), "sensor-fault")
        await asyncio.to_thread(watch.recorder.flush)  # type: ignore[union-attr]
        series = await asyncio.to_thread(watch.history, POINT, "velocity_rms_mm_s", None, 500, "minute")
        assert series.count is not None and series.count.sum() == 20 and np.all(series.vmax == 1.0)
        assert [p[0] for p in series.periods] == ["coasting", "stopped", "starting", "sensor-fault"]
        await asyncio.to_thread(watch.evaluate_all)
        doc = watch.latest[(POINT, "velocity_rms_mm_s")]  # the latest frame came from a faulty sensor
        assert doc["status"] == "machine-not-running" and doc["need"] == "no projection while the sensor is faulty"
        assert all(lim["eta_s"] is None for lim in doc["limits"])
    finally:
        await watch.stop()


async def test_healthy_months_are_not_rising_and_the_trend_raises_no_alarm(tmp_path: Path) -> None:
    # A healthy pump over five simulated months (8 % log-normal scatter, brief transients ×2.5, a three-day stop),
    # evaluated every 5 days on a 90-day window: "not rising" in at least 95 % of evaluations and no advice;
    # then a slow rise that stays below the alert level (ISO 20816-3 group 2 rigid B/C 2.8 mm/s, FIELD_NOTES §1):
    # the trend projects the crossing and advises, the alarm layer raises nothing — the trend only advises.
    cfg = _config(tmp_path / "state", trend={"evaluate_s": 3600.0, "min_span_h": 24.0, "window_days": 90.0})
    layer = wire_alarms(cfg)
    assert layer is not None
    watch = create_trend_watch(cfg, layer, registry=CollectorRegistry())
    assert watch is not None
    events: list[dict[str, Any]] = []
    layer.subscribe(events.append)
    await layer.start()
    await watch.start()
    tracked = Tracked(cfg, layer.point_healthy)  # each frame's machine state, as the daemon attaches it
    try:
        rng = np.random.default_rng(21)
        days = np.arange(0.0, 150.0, 0.25)
        v = 1.2 * np.exp(0.08 * rng.standard_normal(days.size))
        v[rng.random(days.size) < 0.02] *= 2.5
        v[(days >= 70) & (days < 73)] = 0.03  # standing
        evaluations = quiet = 0
        for d0 in range(0, 150, 5):
            sel = np.flatnonzero((days >= d0) & (days < d0 + 5))
            await layer.on_frames(tracked([_frame(T0 + days[i] * D, float(v[i]), int(i)) for i in sel]))
            await asyncio.to_thread(watch.evaluate_all)
            doc = watch.latest[(POINT, "velocity_rms_mm_s")]
            if doc["status"] == "ok":
                evaluations += 1
                quiet += (not doc["rising"]) and doc["advice"] is None
        assert evaluations >= 25 and quiet / evaluations >= 0.95
        # slow growth from day 150 on, 1.2 → 2.5 mm/s over 60 days (below the alert level)
        days2 = np.arange(150.0, 210.0, 0.25)
        v2 = (1.2 + 1.3 * (days2 - 150.0) / 60.0) * np.exp(0.05 * rng.standard_normal(days2.size))
        v2 = np.minimum(v2, 2.7)
        await layer.on_frames(tracked([_frame(T0 + d * D, float(x), 5000 + i)
                                       for i, (d, x) in enumerate(zip(days2, v2, strict=True))]))
        await asyncio.to_thread(watch.evaluate_all)
        doc = watch.latest[(POINT, "velocity_rms_mm_s")]
        assert doc["rising"] and doc["advice"] in ("watch", "plan")
        alert = {lim["label"]: lim for lim in doc["limits"]}["alert"]
        assert alert["status"] == "rising" and alert["eta_s"] > 0
        raised = [e for e in events if e["data"].get("transition") == "raised"]
        assert raised == []
    finally:
        await watch.stop()
        await layer.stop()


async def test_step_change_against_the_learned_baseline(tmp_path: Path) -> None:
    # ISO 20816-3 (ISO 10816-3 alarm guidance, FIELD_NOTES §1): a change from the baseline larger than 0.25 × the
    # B/C boundary is significant even inside a zone; group 2 rigid B/C 2.8 mm/s, so 0.7 mm/s.
    for jump, significant in ((0.85, True), (0.5, False)):
        cfg = _config(tmp_path / f"state-{jump}")
        watch = create_trend_watch(cfg, None)
        assert watch is not None
        await watch.start()
        try:
            rng = np.random.default_rng(3)
            hours = np.arange(0, 20 * 24, 2)
            days = hours / 24.0
            v = np.where(days < 15, 1.0, 1.0 + jump) * np.exp(0.03 * rng.standard_normal(days.size))
            first = days < 3
            await watch.on_frames([_frame(T0 + d * D, float(x), i) for i, (d, x) in enumerate(zip(days[first],
                                                                                                 v[first],
                                                                                                 strict=True))])
            await asyncio.to_thread(watch.evaluate_all)  # learns the baseline from the first values
            await watch.on_frames([_frame(T0 + d * D, float(x), 1000 + i) for i, (d, x) in
                                   enumerate(zip(days[~first], v[~first], strict=True))])
            await asyncio.to_thread(watch.evaluate_all)
            doc = watch.latest[(POINT, "velocity_rms_mm_s")]
            step = doc["step"]
            assert step["threshold"] == pytest.approx(0.7)
            assert step["baseline"] == pytest.approx(1.0, abs=0.03)
            assert step["change"] == pytest.approx(jump, abs=0.06)
            assert step["significant"] is significant
            if significant:
                assert doc["advice"] == "watch"
        finally:
            await watch.stop()


def test_readme_configuration_reference_lists_every_history_and_trend_key() -> None:
    # README's configuration reference ([history], [trend], [[trend.limits]] tables) against the models that
    # parse the file: every key listed, with the model's default.
    from edgevib.daemon.config import HistoryConfig, TrendConfig, TrendLimit

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text()

    def table(heading: str) -> dict[str, str]:
        part = readme.split(f"\n{heading}\n", 1)[1]
        rows: dict[str, str] = {}
        for line in part.split("\n## ", 1)[0].split("\n#", 1)[0].splitlines():
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            if len(cells) >= 4 and cells[0].startswith("`"):
                rows[cells[0].strip("`")] = cells[2]
        return rows

    for heading, model in (("### `[history]`", HistoryConfig), ("### `[trend]`", TrendConfig),
                           ("#### `[[trend.limits]]`", TrendLimit)):
        rows = table(heading)
        fields = {k: f for k, f in model.model_fields.items() if k != "limits"}
        assert set(rows) == set(fields), heading
        for key, f in fields.items():
            if f.is_required():
                assert rows[key] == "**required**", key
                continue
            default = f.default
            shown = rows[key].strip("`")
            if isinstance(default, bool):
                assert shown == str(default).lower(), key
            elif isinstance(default, int | float):
                assert float(shown) == float(default), key
            elif isinstance(default, str):
                assert shown == f'"{default}"', key
            else:
                assert json.loads(shown) == list(default), key


async def test_projections_are_recomputed_periodically(tmp_path: Path) -> None:
    # The layer evaluates on its own every [trend] evaluate_s (here the least, 1 s), in a worker thread.
    cfg = _config(tmp_path / "state", trend={"evaluate_s": 1.0, "min_span_h": 24.0})
    watch = create_trend_watch(cfg, None)
    assert watch is not None
    await watch.start()
    try:
        await watch.on_frames([_frame(T0 + i * 3600.0, 1.0 + 0.05 * i, i) for i in range(48)])
        for _ in range(100):  # up to 10 s under load; normally about 1 s
            if watch.evaluations >= 1:
                break
            await asyncio.sleep(0.1)
        doc = watch.latest[(POINT, "velocity_rms_mm_s")]
        assert watch.evaluations >= 1 and doc["status"] == "ok" and doc["rising"]
    finally:
        await watch.stop()


async def test_late_frames_and_failed_evaluations_are_counted_on_the_metrics(tmp_path: Path,
                                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    # Problems are counted and published, not only logged (the project's rule for bad input; Prometheus counters
    # carry the _total suffix in the text format: prometheus_client's exposition).
    cfg = _config(tmp_path / "state")
    registry = CollectorRegistry()
    watch = create_trend_watch(cfg, None, registry=registry)
    assert watch is not None and watch.recorder is None
    await watch.start()
    try:
        await watch.on_frames([_frame(T0 + i * 3600.0, 1.0, i) for i in range(3)])
        await watch.on_frames([_frame(T0 + 3600.0, 1.0, 1)])  # the second frame again: not newer than the third
        assert watch.recorder is not None
        await asyncio.to_thread(watch.recorder.flush)
        assert _sample(registry, "edgevib_history_frames_late_total") == 1.0
        assert _sample(registry, "edgevib_history_frames_written_total") == 3.0

        def failing(*_args: Any) -> None:
            raise ValueError("a series that cannot be evaluated")

        monkeypatch.setattr(watch, "_evaluate_one", failing)
        assert _sample(registry, "edgevib_trend_evaluation_errors_total") == 0.0
        await asyncio.to_thread(watch.evaluate_all)
        assert _sample(registry, "edgevib_trend_evaluation_errors_total") == len(watch.settings.indicators)
    finally:
        await watch.stop()


def _stationary_docs(path: Path, level_mm_s: float, seed: int, *, alarm: bool, days: float = 50.0,
                     every_h: float = 6.0) -> list[dict[str, Any]]:
    """A stationary velocity r.m.s. (8 % log-normal scatter, a frame every 30 min) recorded as the daemon records
    it, evaluated every ``every_h`` hours from day 10 on: ISO 20816-3 group 2 rigid (1.4 / 2.8 / 4.5 mm/s,
    FIELD_NOTES §1), with the alarm layer's alert and danger at the B/C and C/D boundaries when ``alarm``."""
    rec = HistoryRecorder(HistorySettings(file=str(path), path=str(path)), HISTORY_INDICATORS, durable=False)
    k = HISTORY_INDICATORS.index("velocity_rms_mm_s")
    rng = np.random.default_rng(seed)
    spec = TrendSettings(min_span_s=D).spec()
    docs: list[dict[str, Any]] = []
    t, next_eval, end = T0, T0 + 10 * D, T0 + (10 + days) * D
    while t < end:
        v = np.full(len(HISTORY_INDICATORS), math.nan)
        v[k] = level_mm_s * math.exp(0.08 * rng.standard_normal())
        rec.record(POINT, round(t * 1e9), v, "running")
        t += 1800.0
        if t >= next_eval:
            rec.flush()
            with HistoryReader(str(path)) as r:
                docs.append(evaluate(r, POINT, "velocity_rms_mm_s", spec=spec, window_s=90 * D,
                                     iso=(1.4, 2.8, 4.5), alert=2.8 if alarm else None,
                                     danger=4.5 if alarm else None))
            next_eval += every_h * 3600.0
    rec.close()
    return docs


@pytest.mark.slow
@pytest.mark.parametrize(("level", "alarm"), [(1.4, False), (1.4, True), (2.6, False), (2.6, True)])
def test_a_stationary_level_at_a_zone_boundary_or_near_the_limit_asks_for_no_inspection(
        tmp_path: Path, level: float, alarm: bool) -> None:
    # ISO 20816-3 (FIELD_NOTES §1): zone B is acceptable for unrestricted long-term operation, so a machine
    # whose level sits on the A/B boundary (1.4 mm/s) must not be asked for an inspection; nor one 7 % below the
    # B/C boundary (the alert level).  Before, the next boundary was chosen on the median of the latest five
    # roll-ups and "reached" judged on another median: the A/B boundary flipped into "zone B reached, plan an
    # inspection" in 55 of 721 evaluations.  Now one level estimate decides, and without significant growth no
    # crossing is projected.
    for seed in (1, 2):
        docs = _stationary_docs(tmp_path / f"h-{level}-{alarm}-{seed}.sqlite", level, seed, alarm=alarm)
        assert len(docs) == 201 and all(d["status"] == "ok" for d in docs)
        for d in docs:
            assert d["advice"] not in ("plan", "act"), (seed, d["advice_text"])
            labels = {lim["label"] for lim in d["limits"]}
            assert "zone B" not in labels and labels >= ({"alert", "danger"} if alarm else {"zone C"})
            for lim in d["limits"]:
                assert lim["status"] != "reached", (seed, lim, d["level"])
                assert d["rising"] or lim["eta_s"] is None
            assert d["level"] == pytest.approx(level, rel=0.05)
        # the rise test's one-sided level is 1 % per independent evaluation (TrendSpec.rise_alpha)
        assert sum(d["rising"] for d in docs) <= 0.03 * len(docs)


@pytest.mark.slow
def test_a_level_beyond_the_zone_c_boundary_asks_for_a_planned_inspection(tmp_path: Path) -> None:
    # ISO 20816-3: zone C is acceptable only for a limited period until remedial action (FIELD_NOTES §1) — a
    # stationary 3.4 mm/s on a group 2 rigid machine (B/C 2.8, C/D 4.5) is at zone C, with zone D still ahead.
    docs = _stationary_docs(tmp_path / "h.sqlite", 3.4, 3, alarm=False, days=20.0, every_h=24.0)
    for d in docs:
        lims = {lim["label"]: lim for lim in d["limits"]}
        assert lims["zone C"]["status"] == "reached" and lims["zone D"]["status"] != "reached"
        assert d["advice"] == "plan" and "zone C level (2.8 mm/s) is reached" in d["advice_text"]


@pytest.mark.parametrize("law", ["linear", "exponential"])
def test_a_projection_from_sparse_day_rollups_matches_the_one_from_the_raw_values(tmp_path: Path, law: str) -> None:
    # One running frame a day at 03:00 UTC (a machine measured once a day), 70 days, 3 % log-normal scatter,
    # read back at day resolution (max_points below the 70 hour buckets): each day bucket holds one value, so its
    # statistics are that value exactly and its stamp must be that value's time, 9 h before the bucket's middle —
    # the last bucket is still filling when the evaluation runs at 03:00.  The projection from the roll-ups then
    # equals the one from the raw values (tolerance 60 s: float32 storage of the values), and both stand near the
    # analytic crossing: linear v = v0 + b·t reaches L at t* = (L − v0)/b, exponential v = v0·exp(k·t) at
    # t* = ln(L/v0)/k (closed forms).  Stamped at the middles, the same roll-ups projected 9 h (0.375 d) late.
    from edgevib.pipelines.trend import assess

    day0 = T0 // D * D
    v0, limit, cross_day = 1.0, 2.8, 100.0
    days = np.arange(70) + 3.0 / 24.0
    if law == "linear":
        b = (limit - v0) / cross_day
        truth = v0 + b * days
    else:
        k = math.log(limit / v0) / cross_day
        truth = v0 * np.exp(k * days)
    rng = np.random.default_rng(17)
    values = truth * np.exp(0.03 * rng.standard_normal(days.size))
    path = str(tmp_path / "h.sqlite")
    rec = HistoryRecorder(HistorySettings(file=path, path=path), HISTORY_INDICATORS, durable=False)
    j = HISTORY_INDICATORS.index("velocity_rms_mm_s")
    t_raw = day0 + days * D
    for t, x in zip(t_raw, values, strict=True):
        v = np.full(len(HISTORY_INDICATORS), math.nan)
        v[j] = x
        rec.record(POINT, round(t * 1e9), v, "running")
    rec.close()  # the open day's row with its open minute (a running recorder writes it when the minute closes)
    spec = TrendSettings(min_span_s=D).spec()
    now = float(t_raw[-1])
    with HistoryReader(path) as r:
        doc = evaluate(r, POINT, "velocity_rms_mm_s", spec=spec, window_s=90 * D, alert=limit, max_points=60)
        series = r.series(POINT, "velocity_rms_mm_s", since_s=now - 90 * D, until_s=now, max_points=60)
    assert doc["resolution"] == "day" and doc["n"] == 70 and doc["rising"]
    (lim,) = doc["limits"]
    raw = assess(t_raw, values, now, [("alert", limit)], spec).projections[0]
    assert lim["status"] == raw.status == "rising" and raw.eta_s is not None
    assert lim["eta_s"] == pytest.approx(raw.eta_s, abs=60.0)
    true_left = (day0 + cross_day * D) - now
    assert lim["eta_low_s"] <= true_left <= lim["eta_high_s"]
    assert lim["eta_s"] == pytest.approx(true_left, rel=0.1)
    middle = assess(series.t_s + series.bucket_s / 2.0, series.value, now, [("alert", limit)], spec).projections[0]
    assert middle.eta_s is not None and (middle.eta_s - raw.eta_s) / D == pytest.approx(0.375, abs=0.02)
