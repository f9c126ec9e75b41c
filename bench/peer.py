"""The straightforward per-block scipy implementation of the pipeline's work: the peer the benchmark compares with.

What a practitioner would write with numpy and scipy for one block of acceleration in g, one block at a time:
the mean removed; r.m.s., peak, peak-to-peak, crest factor, kurtosis and skewness (``scipy.stats``); velocity and
displacement by FFT integration (the spectrum divided by jω inside the ISO band, zero outside, transformed back)
for velocity r.m.s. and peak and displacement peak-to-peak; a Hann-windowed amplitude spectrum of the velocity for
the shaft speed (the strongest line in the speed range) and the order lines; and envelope analysis with a band-pass
filter (4th-order Butterworth, ``sosfiltfilt``), ``hilbert``, the Hann-windowed amplitude spectrum of the envelope,
and for each bearing defect family the largest line within the slip window of each harmonic over the median of
its neighbourhood.  The filter, the window and the frequency axis are made once (in its favour: they are the same
for every block).

It computes the same indicators as the pipeline, by the textbook route, so the two can be timed on the same blocks
(``python -m edgevib.bench``) and its values checked against the pipeline's (tests/test_bench_peer.py).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import scipy.fft
import scipy.signal
import scipy.stats

__all__ = ["PeerDesign", "PeerPlan", "peer_analyze", "peer_block"]

FloatArray = npt.NDArray[np.float64]
G_MM_S2 = 9.80665 * 1000.0  # 1 g in mm/s² (standard gravity, exact)
FAMILIES = ("ftf", "bpfo", "bpfi", "bsf")


@dataclass(frozen=True)
class PeerPlan:
    """Settings of the peer (the same quantities as an ``AnalysisPlan``) and its band-pass filter."""

    fs_hz: float
    n_samples: int
    velocity_band_hz: tuple[float, float]
    envelope_band_hz: tuple[float, float]
    speed_range_hz: tuple[float, float]
    orders: tuple[float, ...]
    defect_multiples: tuple[float, float, float, float]  # FTF, BPFO, BPFI, 2×BSF per shaft Hz
    slip: float = 0.02
    harmonics: int = 3

    def design(self) -> PeerDesign:
        """The filter, window and frequency axis shared by every block."""
        sos = scipy.signal.butter(4, self.envelope_band_hz, btype="bandpass", fs=self.fs_hz, output="sos")
        return PeerDesign(sos=sos, window=scipy.signal.get_window("hann", self.n_samples),
                          freqs_hz=scipy.fft.rfftfreq(self.n_samples, 1.0 / self.fs_hz))


@dataclass(frozen=True)
class PeerDesign:
    sos: FloatArray
    window: FloatArray
    freqs_hz: FloatArray


def peer_block(x: FloatArray, plan: PeerPlan, design: PeerDesign) -> dict[str, Any]:
    """The indicators of one block ``x`` (samples,) in g, computed the straightforward way."""
    fs, n = plan.fs_hz, x.shape[0]
    if n != plan.n_samples:
        raise ValueError(f"block of {n} samples, the peer plan expects {plan.n_samples}")
    mean = float(np.mean(x))
    xc = x - mean
    rms = float(np.sqrt(np.mean(xc**2)))
    peak = float(np.max(np.abs(xc)))
    out: dict[str, Any] = {
        "mean_g": mean, "acceleration_rms_g": rms, "acceleration_peak_g": peak,
        "acceleration_peak_to_peak_g": float(np.ptp(xc)), "crest_factor": peak / rms,
        "kurtosis": float(scipy.stats.kurtosis(xc, fisher=False)), "skewness": float(scipy.stats.skew(xc)),
    }
    # velocity and displacement: integrate in the frequency domain inside the band
    freqs = design.freqs_hz
    spec = scipy.fft.rfft(xc)
    band = (freqs >= plan.velocity_band_hz[0]) & (freqs <= plan.velocity_band_hz[1])
    jw = np.where(band, 2j * np.pi * freqs, 1.0)
    vel_spec = np.where(band, spec * G_MM_S2 / jw, 0.0)
    vel = scipy.fft.irfft(vel_spec, n)
    disp = scipy.fft.irfft(np.where(band, vel_spec * 1000.0 / jw, 0.0), n)
    out["velocity_rms_mm_s"] = float(np.sqrt(np.mean(vel**2)))
    out["velocity_peak_mm_s"] = float(np.max(np.abs(vel)))
    out["displacement_pp_um"] = float(np.ptp(disp))
    # velocity amplitude spectrum (Hann, r.m.s. reading): speed and orders
    w = design.window
    vamp = np.abs(scipy.fft.rfft(vel * w)) * 2.0 / w.sum() / np.sqrt(2.0)
    df = fs / n
    lo, hi = (int(np.ceil(f / df)) for f in plan.speed_range_hz)
    shaft = (lo + int(np.argmax(vamp[lo : hi + 1]))) * df
    out["shaft_hz"] = shaft
    orders = {}
    for o in plan.orders:
        k = o * shaft / df
        a, b = int(np.floor(k * 0.97)), int(np.ceil(k * 1.03)) + 1
        orders[f"{o:g}x"] = float(np.max(vamp[a:b]))
    out["orders_mm_s"] = orders
    # envelope: band-pass, analytic signal, envelope spectrum, defect families
    env = np.abs(scipy.signal.hilbert(scipy.signal.sosfiltfilt(design.sos, xc)))
    env -= env.mean()
    eamp = np.abs(scipy.fft.rfft(env * w)) * 2.0 / w.sum()
    families = {}
    for name, mult in zip(FAMILIES, plan.defect_multiples, strict=True):
        found = 0
        first: tuple[float, float, float] | None = None
        for h in range(1, plan.harmonics + 1):
            k = h * mult * shaft / df
            half = max(1.0, plan.slip * k)
            a, b = int(np.ceil(k - half)), int(np.floor(k + half)) + 1
            i = a + int(np.argmax(eamp[a:b]))
            span = max(int(0.2 * k), int(half) + 9)
            neighbours = np.concatenate([eamp[max(1, a - span) : a - 1], eamp[b + 1 : b + span]])
            snr = 20.0 * np.log10(eamp[i] / np.median(neighbours))
            found += int(snr >= 10.0)
            if h == 1:
                first = (i * df, float(eamp[i]), float(snr))
        assert first is not None
        families[name] = {"frequency_hz": first[0], "amplitude_g": first[1], "snr_db": first[2],
                          "harmonics_found": found}
    out["envelope"] = families
    return out


def peer_analyze(x_g: FloatArray, plan: PeerPlan, design: PeerDesign) -> list[dict[str, Any]]:
    """:func:`peer_block` of every row of ``x_g`` (channels, samples), one block after another."""
    return [peer_block(row, plan, design) for row in x_g]
