"""The view's panels of one frame against numpy and closed forms: spectrum lines and their stated scaling, order
markers, envelope family markers and verdicts, waveform reduction, and clear errors for bad input."""

from __future__ import annotations

import math

import numpy as np
import pytest

from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.conditioning import STANDARD_GRAVITY_M_S2
from edgevib.pipelines.panels import PanelError, envelope_panel, spectrum_panel, waveform_panel
from edgevib.pipelines.types import BearingGeometry

FS, N = 12800.0, 8192
T = np.arange(N) / FS
G_MM_S2 = STANDARD_GRAVITY_M_S2 * 1000.0
BEARING = BearingGeometry(9, 7.94, 39.04, 0.0)
MAX = 16384


def numpy_rms_lines(x: np.ndarray) -> np.ndarray:
    # reference: numpy's rfft of the mean-removed frame times a periodic Hann window, scaled so that a sine centred
    # on a line reads its r.m.s.: |X_w| · 2/Σw / √2 (common practice; Heinzel, Rüdiger & Schilling 2002, mem)
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(x.size) / x.size)
    return np.abs(np.fft.rfft((x - x.mean()) * w)) * 2.0 / w.sum() / math.sqrt(2.0)


def test_spectrum_lines_equal_numpy_for_a_known_frame() -> None:
    rng = np.random.default_rng(3)
    x = 0.3 * np.sin(2 * np.pi * 97.3 * T) + 0.05 * rng.standard_normal(N) + 1.0  # a DC offset, removed
    plan = make_plan(FS, N)
    doc = spectrum_panel(x, FS, plan, None, fmax_hz=FS / 2 - 1, max_lines=8192)
    ref = numpy_rms_lines(x)[: N // 2]
    got = np.asarray(doc["acceleration_g"])
    np.testing.assert_allclose(got, ref[: got.size], rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(doc["frequency_hz"], np.fft.rfftfreq(N, 1 / FS)[: got.size], rtol=0, atol=1e-9)
    assert doc["scaling"]["reduction"] == "none" and "r.m.s." in doc["scaling"]["acceleration_g"]


def test_a_sine_on_a_line_reads_its_rms_in_acceleration_and_velocity() -> None:
    k = 40
    f = k * FS / N  # 62.5 Hz, exactly on line 40
    a_peak = 0.5
    x = a_peak * np.sin(2 * np.pi * f * T)
    doc = spectrum_panel(x, FS, make_plan(FS, N), None)
    assert doc["acceleration_g"][k] == pytest.approx(a_peak / math.sqrt(2), rel=1e-9)
    # FIELD_NOTES §5: velocity amplitude a/(2πf); r.m.s. = peak/√2
    assert doc["velocity_mm_s"][k] == pytest.approx(a_peak * G_MM_S2 / (2 * math.pi * f) / math.sqrt(2), rel=1e-9)
    lo = doc["velocity_band_hz"][0]
    assert all(math.isnan(v) for f_, v in zip(doc["frequency_hz"], doc["velocity_mm_s"], strict=True) if f_ < lo)


def test_order_markers_read_the_pipeline_and_the_closed_form() -> None:
    shaft = 24.7  # between lines (resolution 1.5625 Hz)
    a1, a2 = 0.09, 0.03  # peak g at 1× and 2×
    x = a1 * np.sin(2 * np.pi * shaft * T) + a2 * np.sin(2 * np.pi * 2 * shaft * T + 0.4)
    plan = make_plan(FS, N, bearing=BEARING, envelope_band_hz=(2000.0, 5000.0))
    ind = analyze_frames(x, plan, [shaft])[0]
    doc = spectrum_panel(x, FS, plan, shaft)
    m = {mk["key"]: mk for mk in doc["markers"]}
    # the marker is the daemon's own order indicator of this frame (the pipeline works in single precision)
    assert m["1x"]["velocity_mm_s"] == pytest.approx(ind.orders_mm_s["1x"], rel=1e-6)
    assert m["2x"]["velocity_mm_s"] == pytest.approx(ind.orders_mm_s["2x"], rel=1e-6)
    # … and the closed form within 1 % (three-line power sum: no scalloping loss for a tone between lines)
    for key, a, f in (("1x", a1, shaft), ("2x", a2, 2 * shaft)):
        assert m[key]["velocity_mm_s"] == pytest.approx(a * G_MM_S2 / (2 * math.pi * f) / math.sqrt(2), rel=0.01)
        assert m[key]["acceleration_g"] == pytest.approx(a / math.sqrt(2), rel=0.01)
    # defect markers at the kinematic frequencies: BPFO = n·fr/2·(1 − d/D cos φ) (FIELD_NOTES §2)
    bpfo = 9 * shaft / 2 * (1 - 7.94 / 39.04)
    assert m["bpfo"]["frequency_hz"] == pytest.approx(bpfo, rel=1e-12) and m["bpfo"]["kind"] == "defect"


def test_spectrum_panel_is_the_numerical_cores_spectrum_view() -> None:
    from edgevib.pipelines.spectrum_views import spectrum_view

    rng = np.random.default_rng(11)
    shaft = 29.6
    x = 0.12 * np.sin(2 * np.pi * shaft * T) + 0.04 * np.sin(2 * np.pi * 3 * shaft * T) + 0.02 * rng.standard_normal(N)
    plan = make_plan(FS, N, bearing=BEARING, envelope_band_hz=(2000.0, 5000.0))
    doc = spectrum_panel(x, FS, plan, shaft, fmax_hz=FS / 2, max_lines=MAX)
    acc = spectrum_view(x, plan, shaft, quantity="acceleration")
    vel = spectrum_view(x, plan, shaft, quantity="velocity")
    np.testing.assert_allclose(doc["acceleration_g"], acc.amplitude, rtol=1e-12)
    above = vel.freqs_hz >= plan.velocity_band_hz[0]
    np.testing.assert_allclose(np.asarray(doc["velocity_mm_s"])[above], vel.amplitude[above], rtol=1e-12)
    orders = {m["key"]: m for m in doc["markers"] if m["kind"] == "order"}
    assert set(orders) == {o.key for o in vel.orders}
    for o in vel.orders:
        assert orders[o.key]["velocity_mm_s"] == o.velocity_rms_mm_s
        assert orders[o.key]["peak_frequency_hz"] == o.found_hz and orders[o.key]["window_hz"] == list(o.window_hz)
    # further shaft harmonics are marked by position only
    assert {m["key"] for m in doc["markers"] if m["kind"] == "harmonic"} >= {"4x", "5x"}


def test_peak_hold_keeps_every_peak() -> None:
    x = 0.2 * np.sin(2 * np.pi * 1234.5 * T)
    full = spectrum_panel(x, FS, make_plan(FS, N), None, max_lines=8192)
    small = spectrum_panel(x, FS, make_plan(FS, N), None, max_lines=256)
    assert len(small["frequency_hz"]) <= 256 and "peak hold" in small["scaling"]["reduction"]
    assert np.nanmax(small["acceleration_g"]) == pytest.approx(np.nanmax(full["acceleration_g"]), rel=1e-12)


def impacts(shaft_hz: float, rate_order: float, seed: int = 0) -> np.ndarray:
    """Decaying 3.5 kHz ring-downs repeating at rate_order × shaft, plus 1× and noise (a bearing defect's model,
    Randall & Antoni 2011)."""
    rng = np.random.default_rng(seed)
    rate = rate_order * shaft_hz
    phase = (T * rate) % 1.0 / rate
    x = 0.6 * np.exp(-phase * 900.0) * np.sin(2 * np.pi * 3500.0 * phase)
    return x + 0.2 * np.sin(2 * np.pi * shaft_hz * T) + 0.03 * rng.standard_normal(N)


def test_envelope_panel_marks_bpfo_with_harmonics_and_a_verdict() -> None:
    shaft = 24.7
    k = 7.94 / 39.04
    bpfo = 9 * shaft / 2 * (1 - k)  # FIELD_NOTES §2
    x = impacts(shaft, bpfo / shaft)
    plan = make_plan(FS, N, bearing=BEARING, envelope_band_hz=(2000.0, 5000.0), speed_range_hz=(12.0, 37.0))
    ind = analyze_frames(x, plan, [shaft])[0]
    doc = envelope_panel(x, FS, plan, shaft)
    fams = {f["key"]: f for f in doc["families"]}
    b = fams["bpfo"]
    assert b["verdict"] == "detected" and b["label"] == "BPFO"
    # the panel shows the daemon's own verdicts for the frame
    assert doc["detected"] == list(ind.envelope_detected)
    assert {k for k, f in fams.items() if f["verdict"] == "detected"} == set(ind.envelope_detected)
    assert b["harmonics"][0]["expected_hz"] == pytest.approx(bpfo)
    # the found fundamental lies within the slip tolerance (Randall & Antoni 2011: 1–2 % slip)
    assert abs(b["harmonics"][0]["frequency_hz"] - bpfo) <= max(0.02 * bpfo, doc["resolution_hz"])
    assert [h["harmonic"] for h in b["harmonics"]] == [1, 2, 3]
    assert fams["bpfi"]["verdict"] == "not detected"
    assert fams["bpfi"]["sideband_spacing_hz"] == pytest.approx(shaft, rel=0.02)  # inner race: ±1× shaft sidebands
    sides = fams["bpfi"]["harmonics"][0]["sidebands"]
    assert {s_["side"] for s_ in sides} == {"-", "+"} and len(sides) >= 2
    assert doc["band_hz"] == [2000.0, 5000.0]
    # the line at BPFO stands out of the envelope spectrum itself (not only in the marker)
    f = np.asarray(doc["frequency_hz"])
    a = np.asarray(doc["amplitude_g"])
    near = np.abs(f - bpfo) < 2
    assert a[near].max() > 5 * np.median(a)


def test_envelope_panel_without_band_says_why() -> None:
    doc = envelope_panel(np.sin(T), FS, make_plan(FS, N), 25.0)
    assert doc["available"] is False and "band" in doc["reason"]


def test_waveform_reduction_keeps_the_extremes() -> None:
    x = 0.01 * np.sin(2 * np.pi * 50 * T)
    x[5000] = 3.0  # one impact
    x[6001] = -2.0
    full = waveform_panel(x, FS, max_points=N)
    red = waveform_panel(x, FS, max_points=512)
    assert len(full["t_s"]) == N and full["reduction"] == "none"
    assert len(red["t_s"]) <= 512 and "min and max" in red["reduction"]
    assert max(red["acceleration_g"]) == pytest.approx(3.0 - x.mean())
    assert min(red["acceleration_g"]) == pytest.approx(-2.0 - x.mean())
    assert red["t_s"][int(np.argmax(red["acceleration_g"]))] == pytest.approx(5000 / FS)
    assert np.all(np.diff(red["t_s"]) > 0)


@pytest.mark.parametrize("call, message", [
    (lambda: spectrum_panel(np.full(N, np.nan), FS, make_plan(FS, N), None), "NaN"),
    (lambda: spectrum_panel(np.zeros(N), FS, make_plan(FS, N), None, fmax_hz=FS), "Nyquist"),
    (lambda: spectrum_panel(np.zeros(N), FS, make_plan(FS, N), None, max_lines=10**6), "max_lines"),
    (lambda: waveform_panel(np.zeros(10), FS), "64 samples"),
    (lambda: waveform_panel(np.zeros(N), -1.0), "sample rate"),
])
def test_bad_requests_name_the_problem(call: object, message: str) -> None:
    with pytest.raises(PanelError, match=message):
        call()  # type: ignore[operator]


def test_the_envelope_panel_uses_the_band_the_frame_was_demodulated_in() -> None:
    # an automatic band re-selected after a frame was analysed: the panel of that frame shows the frame's band,
    # and its families are the numerical core's for that band (the same verdicts as the frame's indicators)
    from edgevib.daemon.band_auto import plan_with_band
    from edgevib.daemon.config import parse_config
    from edgevib.daemon.interfaces import FrameResult
    from edgevib.daemon.web.api import plan_for_frame

    cfg = parse_config({
        "site": {"name": "fern-basin", "state_dir": "/nonexistent/edgevib-test"},
        "analysis": {"frame_samples": N, "overlap": 0.0},
        "sources": [{"name": "sim", "type": "simulated", "scenario": "demo"}],
        "machines": [{"id": "K-410", "speed_rpm": 1485.0}],
        "points": [{"id": "K-410-DE-H", "machine": "K-410", "axis": "horizontal", "source": "sim",
                    "sensor": "FB-K410-DE-H", "fs_hz": FS, "block_samples": 4096, "envelope_band_hz": "auto",
                    "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04,
                                "contact_angle_deg": 0.0}}],
    })
    point, machine = cfg.point("K-410-DE-H"), cfg.machine("K-410")
    present = plan_with_band(point, machine, (1500.0, 3500.0))
    frame_band = (2500.0, 4500.0)
    x = 0.01 * np.random.default_rng(5).standard_normal(N)
    used = plan_with_band(point, machine, frame_band)
    ind = analyze_frames(x, used, [24.75])[0]
    assert ind.envelope_band_hz == frame_band
    r = FrameResult(point_id="K-410-DE-H", machine_id="K-410", t_end_ns=0, received_ns=0, fs_hz=FS, indicators=ind,
                    iso_zone=None, samples=x.astype(np.float32), envelope_band_source="auto")
    plan = plan_for_frame(point, machine, present, r)
    assert plan.envelope_band_hz == frame_band
    doc = envelope_panel(x, FS, plan, 24.75)
    assert doc["band_hz"] == list(frame_band)
    assert doc["detected"] == list(ind.envelope_detected)
    # a frame analysed with the present plan keeps it
    same = FrameResult(point_id="K-410-DE-H", machine_id="K-410", t_end_ns=0, received_ns=0, fs_hz=FS,
                       indicators=analyze_frames(x, present, [24.75])[0], iso_zone=None,
                       samples=x.astype(np.float32))
    assert plan_for_frame(point, machine, present, same) is present
