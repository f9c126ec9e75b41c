"""Independent signal checks for the simulator tests: plain numpy/scipy, nothing from edgevib."""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
from scipy import signal

G0 = 9.80665  # standard gravity, m/s² (3rd CGPM 1901; scipy.constants.g)


def velocity_rms_mm_s(x: np.ndarray, fs: float, band: tuple[float, float]) -> float:
    """Band r.m.s. velocity by frequency-domain integration of a long record (Parseval, rectangular window)."""
    x = np.asarray(x, dtype=np.float64) - np.mean(x)
    n = x.size
    spec = np.fft.rfft(x)
    f = np.fft.rfftfreq(n, 1 / fs)
    p = 2 * np.abs(spec) ** 2 / n**2          # one-sided power per line, g²
    p[0] = 0.0
    sel = (f >= band[0]) & (f <= band[1])
    return float(np.sqrt(np.sum(p[sel] / (2 * np.pi * f[sel]) ** 2)) * G0 * 1e3)


def acceleration_rms_g(x: np.ndarray) -> float:
    x = np.asarray(x, dtype=np.float64)
    return float(np.std(x))


def line_power_g2(x: np.ndarray, fs: float, f0: float, half_width_hz: float = 1.0) -> float:
    """Power (g²) of the components within f0 ± half_width, Hann-windowed (Parseval with the window's power)."""
    x = np.asarray(x, dtype=np.float64) - np.mean(x)
    w = np.hanning(x.size)
    spec = np.fft.rfft(x * w)
    f = np.fft.rfftfreq(x.size, 1 / fs)
    p = 2 * np.abs(spec) ** 2 / (x.size * np.sum(w**2))
    sel = np.abs(f - f0) <= half_width_hz
    return float(np.sum(p[sel]))


def line_velocity_mm_s(x: np.ndarray, fs: float, f0: float, half_width_hz: float = 1.0) -> float:
    return float(np.sqrt(line_power_g2(x, fs, f0, half_width_hz)) / (2 * np.pi * f0) * G0 * 1e3)


def squared_envelope_spectrum(x: np.ndarray, fs: float, band: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """Squared-envelope spectrum (Randall & Antoni 2011): band-pass, analytic signal, |·|², spectrum."""
    sos = signal.butter(4, band, btype="bandpass", fs=fs, output="sos")
    y = signal.sosfiltfilt(sos, x)
    env = np.abs(signal.hilbert(y)) ** 2
    env -= env.mean()
    spec = np.abs(np.fft.rfft(env * np.hanning(env.size))) / env.size
    return np.fft.rfftfreq(env.size, 1 / fs), spec


def peak_near(f: np.ndarray, s: np.ndarray, f0: float, rel: float) -> tuple[float, float]:
    """(frequency, value) of the largest spectral value within f0·(1 ± rel), refined by parabolic interpolation."""
    sel = np.flatnonzero(np.abs(f - f0) <= rel * f0)
    i = sel[np.argmax(s[sel])]
    a, b, c = s[i - 1], s[i], s[i + 1]
    d = 0.5 * (a - c) / (a - 2 * b + c)
    return float(f[i] + d * (f[1] - f[0])), float(b)


BASE: dict[str, Any] = {
    "scenario": {"name": "test", "description": "test scenario"},
    "site": {"name": "quarry-lane"},
}


def scenario_doc(machines: list[dict[str, Any]], points: list[dict[str, Any]]) -> dict[str, Any]:
    doc = copy.deepcopy(BASE)
    doc["machines"] = machines
    doc["points"] = points
    return doc


def point(pid: str, machine: str, **kw: Any) -> dict[str, Any]:
    d = {"id": pid, "machine": machine, "axis": "horizontal", "sensor_type": "piezo", "fs_hz": 5120.0,
         "block_samples": 2048}
    d.update(kw)
    return d


def machine(mid: str, **kw: Any) -> dict[str, Any]:
    d = {"id": mid, "group": 2, "support": "rigid", "speed": {"rpm": 1480.0}, "residual_mm_s": 0.0,
         "process_noise_ug_rthz": 0.0}
    d.update(kw)
    return d
