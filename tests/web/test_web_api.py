"""The JSON API on the daemon's listener, fed by the simulated demo station in-process: values against the
simulator's analytic truth, bounds, rate limits, the event stream, and actions refused without credentials."""

from __future__ import annotations

import asyncio
import dataclasses
import itertools
import json
import math
from collections.abc import AsyncIterator
from functools import partial
from pathlib import Path
from typing import Any

import aiohttp
import pytest

from edgevib.daemon.app import Daemon
from edgevib.daemon.config import ViewConfig
from edgevib.daemon.indicators import G_M_S2
from edgevib.daemon.service import demo_config
from edgevib.daemon.web.actions import Actions
from edgevib.simulator.engine import Simulation, load_scenario

pytestmark = pytest.mark.network
TOKEN = "ql-operator-4f8a2c9e7b1d"


@dataclasses.dataclass
class Running:
    daemon: Daemon
    base: str
    session: aiohttp.ClientSession

    async def get(self, path: str, **kw: Any) -> tuple[int, Any]:
        async with self.session.get(self.base + path, **kw) as r:
            text = await r.text()
            try:
                return r.status, json.loads(text)
            except ValueError:
                return r.status, text

    async def post(self, path: str, body: Any = None, **kw: Any) -> tuple[int, Any]:
        async with self.session.post(self.base + path, json=body if body is not None else {}, **kw) as r:
            return r.status, await r.json(content_type=None)


async def _wait(pred: Any, timeout_s: float = 40.0) -> None:
    async with asyncio.timeout(timeout_s):
        while not pred():
            await asyncio.sleep(0.05)


def _unacknowledged(view: Any, point: str, indicator: str | None = None) -> bool:
    """An unacknowledged alarm of ``point`` (of ``indicator``) in the alarm layer's snapshot."""
    return any(a["state"] == "unacknowledged" and indicator in (None, a["indicator"])
               for a in view.snapshot(point)["alarms"])


async def _start(tmp_path: Path, view: dict[str, Any] | None = None) -> AsyncIterator[Running]:
    cfg = demo_config(rate=2.0, seed=0, state_dir=str(tmp_path / "state"), view=view)
    d = Daemon(cfg, metrics_listen=("127.0.0.1", 0))
    await d.start()
    try:
        await _wait(lambda: all(p.id in d.latest for p in cfg.points))
        async with aiohttp.ClientSession(cookie_jar=aiohttp.CookieJar(unsafe=True)) as s:  # cookies of 127.0.0.1
            yield Running(d, d.http.base_url, s)
    finally:
        await d.stop(timeout_s=10.0)


@pytest.fixture
async def demo(tmp_path: Path) -> AsyncIterator[Running]:
    async for r in _start(tmp_path):
        yield r


@pytest.fixture
async def demo_with_actions(tmp_path: Path) -> AsyncIterator[Running]:
    token_file = tmp_path / "view-token"
    token_file.write_text(f"kim:{TOKEN}\n")
    async for r in _start(tmp_path, {"actions": True, "token_file": str(token_file)}):
        yield r


async def test_points_list_every_point_with_state_and_units(demo: Running) -> None:
    await _wait(partial(_unacknowledged, demo.daemon.alarm_view, "P-101-DE-H", "velocity_rms_mm_s"))
    code, doc = await demo.get("/api/v1/points")
    assert code == 200 and doc["api"] == "v1"
    assert [p["id"] for p in doc["points"]] == [p.id for p in demo.daemon.config.points]
    p101 = next(p for p in doc["points"] if p["id"] == "P-101-DE-H")
    units = {i["name"]: i["unit"] for i in p101["indicators"]}
    assert units["velocity_rms_mm_s"] == "mm/s" and units["acceleration_rms_g"] == "g" and units["kurtosis"] == "1"
    assert p101["speed"]["source"] == "fixed" and p101["speed"]["rpm"] == pytest.approx(1480.0)
    assert p101["iso_zone"] == "D" and p101["iso"]["boundaries_mm_s"] == [1.4, 2.8, 4.5]  # ISO 20816-3 G2 rigid
    assert p101["frame_end"].endswith("Z") and p101["stale"] is False
    assert p101["data_gap"] is None and p101["source_state"] == "up"  # the alarm layer: data flows
    assert "DANGER" in p101["alarm_state"] and {a["indicator"] for a in p101["alarms"]} >= {"velocity_rms_mm_s"}
    b301 = next(p for p in doc["points"] if p["id"] == "B-301-DE-H")
    assert b301["envelope_band_hz"] == [2200.0, 4200.0] and b301["envelope_band_source"] == "configured"
    mems = next(p for p in doc["points"] if p["id"] == "F-201-NDE-V")
    assert mems["envelope_band_hz"] is None and mems["envelope_note"]


async def test_a_point_without_recent_frames_is_stale_with_its_age(demo: Running) -> None:
    view = demo.daemon.view
    assert view is not None
    code, doc = await demo.get("/api/v1/points/P-101-DE-H")
    assert code == 200 and doc["stale"] is False and 0 <= doc["age_s"] < 10
    # 60 s later by the view's clock without a newer frame: stale (older than max(10 s, 5 frame periods)), with
    # its age and the time of its last frame
    real = view.clock_ns
    view.clock_ns = lambda: real() + 60_000_000_000
    try:
        code, doc = await demo.get("/api/v1/points")
    finally:
        view.clock_ns = real
    p101 = next(p for p in doc["points"] if p["id"] == "P-101-DE-H")
    assert p101["stale"] is True and p101["age_s"] >= 60 and p101["frame_end"].endswith("Z")


async def test_spectrum_lines_match_the_simulators_truth(demo: Running) -> None:
    truth = Simulation(load_scenario("demo"), seed=0).truth(10.0)["points"]["P-101-DE-H"]
    code, doc = await demo.get("/api/v1/points/P-101-DE-H/spectrum")
    assert code == 200
    one = next(m for m in doc["markers"] if m["key"] == "1x")
    f1 = truth["speed_hz"]
    assert one["frequency_hz"] == pytest.approx(f1)
    # the simulator's 1× line: velocity r.m.s. in mm/s (analytic, from its model parameters)
    v_truth = truth["orders_mm_s"]["1"]
    assert one["velocity_mm_s"] == pytest.approx(v_truth, rel=0.03)
    # acceleration r.m.s. of the same line: a = v·2πf (FIELD_NOTES §5)
    assert one["acceleration_g"] == pytest.approx(v_truth * 2 * math.pi * f1 / (G_M_S2 * 1000), rel=0.03)
    # the spectrum's own line at 1× carries it too (within the Hann window's scalloping loss, < 1.5 dB)
    f = doc["frequency_hz"]
    k = min(range(len(f)), key=lambda i: abs(f[i] - f1))
    peak = max(doc["velocity_mm_s"][k - 1 : k + 2])
    assert 0.84 * v_truth <= peak <= 1.03 * v_truth
    # and it is the daemon's own order indicator for that frame
    r = demo.daemon.latest["P-101-DE-H"]
    if doc["frame_end"] == _rfc(r.t_end_ns):
        assert one["velocity_mm_s"] == pytest.approx(r.indicators.orders_mm_s["1x"], rel=1e-6)
    assert "r.m.s." in doc["scaling"]["velocity_mm_s"]


async def test_every_simulated_order_line_reads_the_simulators_truth(demo: Running) -> None:
    # every shaft-order line the simulator puts into a point (analytic velocity r.m.s., from its model parameters)
    # is read by the API's order marker at that order, in the stated r.m.s. scaling, velocity and acceleration
    truth = Simulation(load_scenario("demo"), seed=0).truth(10.0)["points"]
    checked = 0
    for pid, t in truth.items():
        code, doc = await demo.get(f"/api/v1/points/{pid}/spectrum")
        assert code == 200, doc
        markers = {m["key"]: m for m in doc["markers"] if m["kind"] == "order"}
        for order, v_truth in t["orders_mm_s"].items():
            if v_truth < 0.5:  # lines this small sit within the demo's broadband noise
                continue
            m = markers[f"{order}x"]
            f = float(order) * t["speed_hz"]
            assert m["frequency_hz"] == pytest.approx(f, rel=0.01), (pid, order)  # estimated speeds within 1 %
            assert m["velocity_mm_s"] == pytest.approx(v_truth, rel=0.04), (pid, order)
            # a = v·2πf (FIELD_NOTES §5), in g
            assert m["acceleration_g"] == pytest.approx(v_truth * 2 * math.pi * f / (G_M_S2 * 1000), rel=0.04), \
                (pid, order)
            checked += 1
    assert checked >= 7


async def test_spectrum_of_the_frame_it_names_equals_numpy(demo: Running) -> None:
    import numpy as np

    # reference: numpy's rfft of the daemon's own latest frame (mean removed) with a periodic Hann window, scaled
    # so that a sine centred on a line reads its r.m.s. (|X_w|·2/Σw/√2; Heinzel, Rüdiger & Schilling 2002, mem)
    for _ in range(50):
        r = demo.daemon.latest["P-102-DE-A"]
        code, doc = await demo.get("/api/v1/points/P-102-DE-A/spectrum?max_lines=16384")
        assert code == 200
        if doc["frame_end"] == _rfc(r.t_end_ns):
            break
    else:
        pytest.fail("the API never answered for the daemon's latest frame")
    x = np.asarray(r.samples, dtype=np.float64)
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(x.size) / x.size)
    ref = np.abs(np.fft.rfft((x - x.mean()) * w)) * 2.0 / w.sum() / math.sqrt(2.0)
    got = np.asarray(doc["acceleration_g"], dtype=np.float64)
    assert doc["scaling"]["reduction"] == "none" and got.size == int(doc["max_frequency_hz"] / doc["resolution_hz"]) + 1
    # the answer is rounded to 6 significant digits: at most half a unit of the 6th, 5e-6 relative
    np.testing.assert_allclose(got, ref[: got.size], rtol=5.5e-6, atol=1e-12)
    np.testing.assert_allclose(doc["frequency_hz"], np.fft.rfftfreq(x.size, 1 / r.fs_hz)[: got.size], rtol=5.5e-6)


def _rfc(t_ns: int) -> str:
    from edgevib.daemon.web.api import rfc3339

    out = rfc3339(t_ns)
    assert out is not None
    return out


async def test_envelope_marks_bpfo_on_the_failing_bearing(demo: Running) -> None:
    truth = Simulation(load_scenario("demo"), seed=0).truth(10.0)["points"]["B-301-DE-H"]
    code, doc = await demo.get("/api/v1/points/B-301-DE-H/envelope")
    assert code == 200 and doc["available"] and doc["band_hz"] == [2200.0, 4200.0]
    assert doc["band_source"] == "configured"  # the demo's blower has its band in the configuration
    fams = {f["key"]: f for f in doc["families"]}
    # the simulator's kinematic BPFO (FIELD_NOTES §2: n·fr/2·(1 − d/D cos φ)) is where the marker stands …
    bpfo = truth["defect_frequencies_hz"]["bpfo"]
    assert fams["bpfo"]["expected_hz"] == pytest.approx(bpfo, rel=0.01)  # (on the frame's line grid)
    assert [h["harmonic"] for h in fams["bpfo"]["harmonics"]] == [1, 2, 3]
    # … and the simulated outer-race impacts put the envelope spectrum's strongest line there (within the 1–2 %
    # slip of Randall & Antoni 2011), far above the spectrum's median
    f, a = doc["frequency_hz"], doc["amplitude_g"]
    k = max(range(5, len(a)), key=lambda i: a[i] or 0.0)
    assert abs(f[k] - bpfo) <= max(0.02 * bpfo, doc["resolution_hz"])
    assert a[k] > 20 * sorted(x for x in a if x is not None)[len(a) // 2]
    # the verdicts are the daemon's own for this frame
    r = demo.daemon.latest["B-301-DE-H"]
    if doc["frame_end"] == _rfc(r.t_end_ns):
        assert doc["detected"] == list(r.indicators.envelope_detected)
    assert fams["bpfi"]["verdict"] == "not detected"
    # the failing bearing's outer-race defect is detected (simulated truth: an outer-race fault on B-301)
    assert fams["bpfo"]["verdict"] == "detected" and doc["detected"] == ["bpfo"]
    code, healthy = await demo.get("/api/v1/points/M-101-DE-H/envelope")
    assert code == 200 and all(f["verdict"] == "not detected" for f in healthy["families"])
    code, mems = await demo.get("/api/v1/points/F-201-NDE-V/envelope")
    assert code == 200 and mems["available"] is False


async def test_waveform_and_bounds(demo: Running) -> None:
    code, doc = await demo.get("/api/v1/points/B-301-DE-H/waveform?max_points=1000")
    assert code == 200 and len(doc["t_s"]) <= 1000 and doc["n_samples"] == 8192
    code, err = await demo.get("/api/v1/points/B-301-DE-H/waveform?max_points=100000000")
    assert code == 400 and "max_points" in err["error"]
    code, err = await demo.get("/api/v1/points/B-301-DE-H/spectrum?fmax=abc")
    assert code == 400 and "fmax" in err["error"]
    code, err = await demo.get("/api/v1/points/NOPE/spectrum")
    assert code == 404 and "NOPE" in err["error"]
    code, err = await demo.get("/api/v1/points/P-101-DE-H/trend?since=yesterday")
    assert code == 400 and "since" in err["error"]


async def test_trend_holds_recent_values_and_limits(demo: Running) -> None:
    code, doc = await demo.get("/api/v1/points/P-101-DE-H/trend?indicator=velocity_rms_mm_s&since=-1h")
    assert code == 200 and doc["unit"] == "mm/s" and len(doc["values"]) >= 1
    assert doc["limits"]["alert"] == pytest.approx(2.8) and doc["limits"]["danger"] == pytest.approx(4.5)
    assert all(t.endswith("Z") for t in doc["time"])
    # every limit line of the series: the alarm layer's set points and the ISO 20816-3 zone boundaries of the
    # pump (group 2, rigid: 1.4 / 2.8 / 4.5 mm/s; ISO 10816-3:2009 Annex A tables, FIELD_NOTES §1)
    lines = {(ln["kind"], ln["label"]): ln["value"] for ln in doc["limit_lines"]}
    assert lines[("alarm", "alert")] == pytest.approx(2.8) and lines[("alarm", "danger")] == pytest.approx(4.5)
    assert [lines[("iso", k)] for k in ("A/B", "B/C", "C/D")] == [1.4, 2.8, 4.5]
    assert all(ln["unit"] == "mm/s" for ln in doc["limit_lines"])
    code, doc = await demo.get("/api/v1/points/P-101-DE-H/trend?indicator=order_velocity_rms_mm_s.1x")
    assert code == 200 and doc["limits"]["indicator"] == "imbalance_1x_mm_s"


async def test_the_event_stream_says_when_a_point_goes_stale_and_fresh_again(demo: Running) -> None:
    # the page greys a point on this event instead of at its next /points read; the stale rule is the API's
    # (no frame for longer than max(10 s, 5 frame periods)), the clock the view's
    view = demo.daemon.view
    assert view is not None
    real = view.clock_ns
    pushed: list[dict[str, Any]] = []
    async with demo.session.get(demo.base + "/api/v1/events") as r:
        async with asyncio.timeout(30):
            kind, armed = "", False
            async for raw in r.content:
                line = raw.decode().strip()
                if line.startswith("event: "):
                    kind = line[7:]
                elif line.startswith("data: ") and kind == "stale":
                    pushed.append(json.loads(line[6:]))
                elif kind == "hello" and line == "" and not armed:
                    armed = True
                    view.check_staleness()  # the stream is open: record every point as fresh
                    view.clock_ns = lambda: real() + 60_000_000_000  # 60 s on without a newer frame
                    view.check_staleness()
                    view.clock_ns = real  # frames flow again: the next frame of a point makes it fresh
                if {d["point"] for d in pushed if not d["stale"]} >= {"P-101-DE-H"}:
                    break
    went_stale = {d["point"]: d for d in pushed if d["stale"]}
    assert set(went_stale) == {p.id for p in demo.daemon.config.points}
    assert went_stale["P-101-DE-H"]["age_s"] >= 60 and went_stale["P-101-DE-H"]["frame_end"].endswith("Z")
    fresh = next(d for d in pushed if d["point"] == "P-101-DE-H" and not d["stale"])
    assert fresh["age_s"] < 10 and pushed.index(fresh) > pushed.index(went_stale["P-101-DE-H"])
    code, doc = await demo.get("/api/v1/points/P-101-DE-H")
    assert code == 200 and doc["stale"] is False  # the API agrees


async def test_a_machine_whose_points_are_all_stale_is_unknown_with_its_last_state(demo: Running) -> None:
    # the alarm layer's judgement (README "Data gaps": every point of the machine stale → unknown, the last known
    # state kept), not the state of the last frame
    class StaleMachine:
        def __init__(self, real: Any) -> None:
            self.real = real

        def __getattr__(self, name: str) -> Any:
            return getattr(self.real, name)

        def machine_view(self, machine: str) -> dict[str, object]:
            if machine != "P-101":
                return dict(self.real.machine_view(machine))
            return {"state": "unknown", "since_s": None, "grace_left_s": None, "last_state": "running",
                    "last_since_s": 1_800_000_000.0}

    real = demo.daemon.alarm_view
    demo.daemon.alarm_view = StaleMachine(real)  # type: ignore[assignment]
    try:
        code, doc = await demo.get("/api/v1/points")
    finally:
        demo.daemon.alarm_view = real
    assert code == 200
    by_id = {p["id"]: p for p in doc["points"]}
    assert by_id["P-101-DE-H"]["machine_state"] == "unknown"
    assert by_id["P-101-DE-H"]["last_machine_state"] == "running"
    assert by_id["P-102-DE-A"]["machine_state"] != "unknown" and by_id["P-102-DE-A"]["last_machine_state"] is None


async def test_recent_values_are_the_indicator_rows_values(demo: Running) -> None:
    from edgevib.daemon.web.api import indicator_rows, indicator_values

    for r in demo.daemon.latest.values():
        rows = {row["name"]: row["value"] for row in indicator_rows(r) if row["kind"] != "limit"}
        assert indicator_values(r) == rows and "velocity_rms_mm_s" in rows


async def test_event_stream_sends_frames(demo: Running) -> None:
    seen: list[str] = []
    async with demo.session.get(demo.base + "/api/v1/events") as r:
        assert r.headers["Content-Type"].startswith("text/event-stream")
        async with asyncio.timeout(20):
            async for raw in r.content:
                line = raw.decode().strip()
                if line.startswith("event: "):
                    seen.append(line[7:])
                if seen.count("frame") >= 3:
                    break
    assert seen[0] == "hello" and "frame" in seen


async def test_rate_limit_refuses_a_flood(demo: Running) -> None:
    codes = [(await demo.get("/api/v1"))[0] for _ in range(150)]
    assert 429 in codes and codes[0] == 200


async def test_metrics_and_probes_still_on_the_listener(demo: Running) -> None:
    code, text = await demo.get("/metrics")
    assert code == 200 and "edgevib_velocity_rms_meters_per_second" in text
    assert (await demo.get("/healthz"))[0] == 200
    code, page = await demo.get("/")
    assert code == 200 and "uPlot.iife.min.js" in page


async def test_actions_are_off_by_default(demo: Running) -> None:
    code, doc = await demo.post("/api/v1/points/P-101-DE-H/ack")
    assert code == 403 and "off" in doc["error"]
    code, doc = await demo.get("/api/v1/session")
    assert code == 200 and doc["actions"] is False


async def test_actions_need_credentials_and_csrf(demo_with_actions: Running) -> None:
    r = demo_with_actions
    events: list[dict[str, Any]] = []  # what the alarm layer commits (its durable outbox and history)
    r.daemon.alarm_view.subscribe(events.append)  # type: ignore[union-attr]
    code, doc = await r.post("/api/v1/points/P-101-DE-H/ack")
    assert code == 401  # nobody
    code, doc = await r.post("/api/v1/session", {"token": "not-the-token-at-all"})
    assert code == 401
    # a bearer token works without a CSRF token (a browser never sends it by itself) and is recorded as who;
    # first the imbalanced pump's danger is raised (the limits' debounce runs on the first frames)
    await _wait(partial(_unacknowledged, r.daemon.alarm_view, "P-101-DE-H"))
    code, doc = await r.post("/api/v1/points/P-101-DE-H/ack", headers={"Authorization": f"Bearer {TOKEN}"})
    assert code == 200 and doc["by"] == "token:kim" and doc["result"]["changed"] >= 1, doc
    # a session cookie needs the CSRF token too
    code, doc = await r.post("/api/v1/session", {"token": TOKEN})
    assert code == 200 and doc["who"] == "token:kim"
    csrf = doc["csrf"]
    code, doc = await r.post("/api/v1/points/P-101-DE-H/shelve", {"reason": "impeller balancing booked",
                                                                  "duration_s": 600})
    assert code == 403 and "CSRF" in doc["error"]
    code, doc = await r.post("/api/v1/points/P-101-DE-H/shelve", {"reason": "impeller balancing booked",
                                                                  "duration_s": 600},
                             headers={"X-CSRF-Token": csrf, "Origin": "http://elsewhere.invalid"})
    assert code == 403 and "cross-origin" in doc["error"]
    code, doc = await r.post("/api/v1/points/P-101-DE-H/shelve", {"reason": "impeller balancing booked",
                                                                  "duration_s": 600}, headers={"X-CSRF-Token": csrf})
    assert code == 200, doc
    code, alarms = await r.get("/api/v1/alarms?point=P-101-DE-H")
    assert alarms["alarms"] and all(a["shelved_until_s"] is not None for a in alarms["alarms"]), alarms
    assert all(a["shelve_reason"] == "impeller balancing booked" for a in alarms["alarms"])
    # every action is recorded with who did it, and the shelve with its reason
    await _wait(lambda: any((e["data"].get("transition"), e["data"].get("by")) == ("shelved", "token:kim")
                            for e in events), 20)
    shelved = [e["data"] for e in events if e["data"].get("transition") == "shelved"]
    assert all(d["by"] == "token:kim" and d["reason"] == "impeller balancing booked" for d in shelved), shelved
    acked = [e["data"] for e in events if e["data"].get("transition") == "acknowledged"]
    assert acked and all(d["by"] == "token:kim" for d in acked), acked


def test_actions_config_needs_an_authentication_means(tmp_path: Path) -> None:
    from edgevib.daemon.config import parse_config
    from edgevib.daemon.interfaces import ConfigError

    doc = {"site": {"name": "ql", "state_dir": str(tmp_path)}, "view": {"actions": True}}
    with pytest.raises(ConfigError, match=r"view\.actions"):
        parse_config(doc)
    actions = Actions(ViewConfig(), client_certificates=False)
    assert actions.enabled is False


async def test_trend_comes_from_the_severity_history_once_it_holds_the_series(demo: Running) -> None:
    # the demo keeps a severity history (the trend layer's store); the panel reads it back when it holds the series
    doc: dict[str, Any] = {}
    async with asyncio.timeout(60):
        while "severity history" not in doc.get("source", ""):
            await asyncio.sleep(0.5)
            _code, doc = await demo.get("/api/v1/points/P-101-DE-H/trend?indicator=velocity_rms_mm_s")
    t = doc["t_s"]
    assert t and all(b > a for a, b in itertools.pairwise(t))
    v = [x for x in doc["values"] if x is not None]
    # the imbalanced pump's velocity (ISO 20816-3 zone D: above the 4.5 mm/s C/D boundary for group 2 rigid)
    assert v and min(v) > 4.5
    assert doc["limits"]["danger"] == pytest.approx(4.5)
    assert doc["trend"] is None or "status" in doc["trend"]


def test_projection_curve_follows_the_fitted_model() -> None:
    from edgevib.daemon.web.trend_source import projection_curve

    # closed forms: linear a + b(t − t_ref); exponential exp(a + b(t − t_ref)) (pipelines/trend.py's convention)
    now = 1.8e9
    lin = {"t_s": now, "rising": True, "limits": [{"eta_s": 10 * 86400.0}],
           "fit": {"model": "linear", "t_ref_s": now - 1000.0, "intercept": 2.0, "slope": 1e-5}}
    c = projection_curve(lin)
    assert c is not None and c["t_s"][0] == pytest.approx(now)
    assert c["values"][0] == pytest.approx(2.0 + 1e-5 * 1000.0)
    assert c["t_s"][-1] == pytest.approx(now + 11 * 86400.0)  # 10 % past the furthest crossing
    exp_fit = {**lin, "fit": {"model": "exponential", "t_ref_s": now, "intercept": math.log(1.5), "slope": 1e-6}}
    c = projection_curve(exp_fit)
    assert c is not None and c["values"][-1] == pytest.approx(1.5 * math.exp(1e-6 * (c["t_s"][-1] - now)))
    assert projection_curve({**lin, "rising": False}) is None


@dataclasses.dataclass(frozen=True)
class _Transition:
    """The fields of the alarm layer's history record the view reads (daemon/interfaces.py AlarmTransition)."""

    kind: str
    t_s: float
    point: str
    indicator: str
    unit: str
    transition: str
    from_state: str | None
    state: str
    value: float | None
    limit: float | None
    by: str | None
    at_s: float | None
    reason: str | None


class _HistoryView:
    """The daemon's AlarmView with a recorded history (the view reads only through ``history``)."""

    def __init__(self, real: Any, rows: list[_Transition]) -> None:
        self.real, self.rows = real, rows
        self.calls: list[tuple[str | None, float | None, int]] = []

    def state_text(self, point_id: str) -> str | None:
        return None if self.real is None else self.real.state_text(point_id)

    def machine_view(self, machine: str) -> dict[str, object]:
        return {} if self.real is None else dict(self.real.machine_view(machine))

    def history(self, point: str | None = None, *, since_s: float | None = None, limit: int = 200) -> list[Any]:
        self.calls.append((point, since_s, limit))
        if not 1 <= limit <= 1000:
            raise ValueError(f"limit {limit} must be between 1 and 1000")
        return [r for r in self.rows if point is None or r.point == point][:limit]


async def test_alarm_history_is_the_alarm_layers_durable_history(demo: Running) -> None:
    rows = [
        _Transition("alarm", 1_800_000_600.0, "P-101-DE-H", "velocity_rms_mm_s", "mm/s", "shelved", "danger", "danger",
                    6.1, 4.5, "token:kim", 1_800_000_610.5, "pump on standby until the coupling is aligned"),
        _Transition("alarm", 1_800_000_300.0, "P-101-DE-H", "velocity_rms_mm_s", "mm/s", "acknowledged", "danger",
                    "danger", 6.0, 4.5, "token:kim", 1_800_000_301.0, None),
        _Transition("alarm", 1_800_000_000.0, "P-101-DE-H", "velocity_rms_mm_s", "mm/s", "raised", "normal", "danger",
                    5.9, 4.5, None, None, None),
        _Transition("sensor", 1_799_999_000.0, "F-201-NDE-V", "flatline", "", "raised", "normal", "sensor-fault",
                    None, None, None, None, None),
    ]
    stub = _HistoryView(demo.daemon.alarm_view, rows)
    real = demo.daemon.alarm_view
    demo.daemon.alarm_view = stub
    try:
        code, doc = await demo.get("/api/v1/alarms/history?point=P-101-DE-H&limit=2&since=1799999999")
        assert code == 200 and doc["available"] is True and "durable" in doc["source"]
        assert stub.calls == [("P-101-DE-H", 1799999999.0, 2)]  # the query goes to the store, bounded
        assert [e["transition"] for e in doc["events"]] == ["shelved", "acknowledged"]  # newest first, as kept
        shelved = doc["events"][0]
        assert shelved["value"] == 6.1 and shelved["limit"] == 4.5 and shelved["state"] == "danger"
        assert shelved["by"] == "token:kim" and shelved["at"] == "2027-01-15T08:10:10.500Z"
        assert shelved["time"] == "2027-01-15T08:10:00.000Z"
        assert shelved["reason"] == "pump on standby until the coupling is aligned"
        code, doc = await demo.get("/api/v1/alarms/history")
        assert code == 200 and len(doc["events"]) == 4 and stub.calls[-1] == (None, None, 200)
        for bad in ("limit=0", "limit=1001", "since=yesterday"):
            code, err = await demo.get(f"/api/v1/alarms/history?{bad}")
            assert code == 400 and err["error"], bad
        code, err = await demo.get("/api/v1/alarms/history?point=X-999")
        assert code == 404 and "X-999" in err["error"]
    finally:
        demo.daemon.alarm_view = real


async def test_alarm_history_is_read_from_the_durable_store_with_why(tmp_path: Path) -> None:
    # the alarm history the view shows is the alarm layer's durable one: transitions with the value, the limit,
    # the state, who acknowledged or shelved and when, the reason — and still there after a restart
    token_file = tmp_path / "view-token"
    token_file.write_text(f"kim:{TOKEN}\n")
    view = {"actions": True, "token_file": str(token_file)}
    auth = {"Authorization": f"Bearer {TOKEN}"}
    async for r in _start(tmp_path, view):
        await _wait(partial(_unacknowledged, r.daemon.alarm_view, "P-101-DE-H", "velocity_rms_mm_s"))
        code, doc = await r.post("/api/v1/points/P-101-DE-H/ack", headers=auth)
        assert code == 200 and doc["result"]["changed"] >= 1, doc
        code, doc = await r.post("/api/v1/points/P-101-DE-H/shelve", {"reason": "impeller balancing booked",
                                                                      "duration_s": 600, "indicator":
                                                                      "velocity_rms_mm_s"}, headers=auth)
        assert code == 200, doc
        hist: dict[str, Any] = {}

        def has_all(doc: dict[str, Any]) -> bool:
            kinds = {e["transition"] for e in doc.get("events", []) if e["indicator"] == "velocity_rms_mm_s"}
            return {"raised", "acknowledged", "shelved"} <= kinds

        async with asyncio.timeout(30):
            while not has_all(hist):
                code, hist = await r.get("/api/v1/alarms/history?point=P-101-DE-H")
                assert code == 200 and hist["available"] is True, hist
                await asyncio.sleep(0.1)
        events = [e for e in hist["events"] if e["indicator"] == "velocity_rms_mm_s"]
        assert all(e["point"] == "P-101-DE-H" and e["kind"] == "alarm" for e in hist["events"])
        times = [e["t_s"] for e in hist["events"]]
        assert times == sorted(times, reverse=True)  # newest first
        raised = next(e for e in events if e["transition"] == "raised")
        # the imbalanced pump in ISO 20816-3 zone D: raised to danger above the C/D boundary of group 2 rigid
        # (4.5 mm/s; ISO 10816-3:2009 Annex A tables, FIELD_NOTES §1), the value that crossed it kept
        assert raised["state"] == "danger" and raised["limit"] == pytest.approx(4.5) and raised["value"] > 4.5
        assert raised["unit"] == "mm/s" and raised["time"].endswith("Z") and raised["by"] is None
        acked = next(e for e in events if e["transition"] == "acknowledged")
        assert acked["by"] == "token:kim" and acked["at"] is not None and acked["at"].endswith("Z")
        shelved = next(e for e in events if e["transition"] == "shelved")
        assert shelved["by"] == "token:kim" and shelved["reason"] == "impeller balancing booked"
        kept = {e["event_id"] for e in hist["events"]}
    # a restart on the same state directory reads the same transitions back from the store
    async for r in _start(tmp_path, view):
        code, again = await r.get("/api/v1/alarms/history?point=P-101-DE-H&limit=1000")
        assert code == 200 and kept <= {e["event_id"] for e in again["events"]}
