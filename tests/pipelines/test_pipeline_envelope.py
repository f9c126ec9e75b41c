"""Envelope analysis: the decimated band demodulation against a slow full-length scipy.signal.hilbert reference,
closed-form amplitude modulation, and defect-family search on synthetic bearing signals."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal

from edgevib.pipelines.analysis import analyze_frames, make_plan
from edgevib.pipelines.bearings import defect_multiples
from edgevib.pipelines.envelope import demodulate, envelope_amplitude_spectrum, envelope_spectrum, fast_length
from edgevib.pipelines.spectrum import band_lines
from edgevib.pipelines.types import BearingGeometry

FS, N = 25600.0, 16384
T = np.arange(N) / FS
RNG = np.random.default_rng(11)
B6205 = BearingGeometry(9, 0.3126, 1.537, 0.0)  # CWRU drive-end bearing (datasets README)


def reference_envelope(x: np.ndarray, fs: float, band: tuple[float, float]) -> np.ndarray:
    """Slow reference: ideal band-pass by masking the full spectrum, then scipy.signal.hilbert of the full record."""
    spec = np.fft.rfft(x - x.mean())
    f = np.fft.rfftfreq(x.size, 1 / fs)
    spec[(f < band[0]) | (f > band[1])] = 0.0
    return np.abs(scipy.signal.hilbert(np.fft.irfft(spec, x.size)))


def reference_envelope_spectrum(env: np.ndarray) -> np.ndarray:
    # method E1's last steps (datasets README): mean removed, Hann over the record, A = 2|FFT|/Σw
    w = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(env.size) / env.size)
    return 2 * np.abs(np.fft.rfft((env - env.mean()) * w)) / w.sum()


def impacts(f_defect: float, resonance_hz: float = 6000.0, decay: float = 600.0, n: int = N,
            fs: float = FS) -> np.ndarray:
    """A train of decaying resonance bursts at ``f_defect`` (a localized bearing defect, Randall & Antoni 2011)."""
    t = np.arange(n) / fs
    tau = (t * f_defect % 1.0) / f_defect
    return np.exp(-decay * tau) * np.sin(2 * np.pi * resonance_hz * tau)


def test_decimated_envelope_equals_hilbert_at_its_samples() -> None:
    # |z| at the M decimated times is the full-length |hilbert(bandpass(x))| at those times (float32 stage)
    x = impacts(107.0) + RNG.normal(0, 0.3, N)
    band = (4000.0, 9000.0)
    k_lo, k_hi = band_lines(FS, N, band)
    m = 4096  # divides N: sample j of the decimated envelope is sample 4j of the full one
    assert k_hi - k_lo + 1 <= m
    fast = demodulate(np.fft.rfft(x)[None, :], k_lo, k_hi, m)[0] * (2 * m / N)
    slow = reference_envelope(x, FS, band)[:: N // m]
    np.testing.assert_allclose(fast, slow, rtol=2e-5, atol=2e-5 * slow.max())


def test_envelope_spectrum_matches_the_slow_reference() -> None:
    x = impacts(107.0) + 0.5 * impacts(162.0, 7000.0) + RNG.normal(0, 0.3, N)
    band = (4000.0, 9000.0)
    freqs, fast = envelope_amplitude_spectrum(x, FS, band, max_frequency_hz=800.0)
    slow = reference_envelope_spectrum(reference_envelope(x, FS, band))[: fast.shape[-1]]
    assert freqs[1] == pytest.approx(FS / N)
    # the defect lines and their harmonics agree closely ...
    for f in (107.0, 214.0, 162.0, 324.0):
        k = int(np.argmax(slow[round(f / freqs[1]) - 3: round(f / freqs[1]) + 4])) + round(f / freqs[1]) - 3
        assert fast[0, k] == pytest.approx(slow[k], rel=0.01), f
    # ... while the noise floor differs a little: |z| is not band-limited, so its own high-frequency content
    # folds into the decimated spectrum (the squared envelope would be alias-free; the envelope keeps method E1's
    # scaling).  Medians over 20–800 Hz within 10 % (1 dB; observed 1 %).
    floor = slice(20, fast.shape[-1])
    assert np.median(fast[0, floor]) == pytest.approx(np.median(slow[floor]), rel=0.1)


def test_amplitude_modulation_reads_its_modulation_amplitude() -> None:
    # closed form: x = A(1 + μ cos 2πf_m t) sin 2πf_c t has envelope A(1 + μ cos 2πf_m t), so the envelope
    # spectrum (peak reading) shows A·μ at f_m
    f_m = 100 * FS / N  # on a line
    a, mu = 0.5, 0.4
    x = a * (1 + mu * np.cos(2 * np.pi * f_m * T)) * np.sin(2 * np.pi * 5000.0 * T)
    freqs, amp = envelope_amplitude_spectrum(x, FS, (3000.0, 7000.0))
    assert freqs[100] == pytest.approx(f_m)
    assert amp[0, 100] == pytest.approx(a * mu, rel=1e-4)
    assert amp[0, 200] < 1e-4  # no 2nd harmonic in this envelope


def test_envelope_spectrum_scale_factor() -> None:
    env = 1.0 + 0.25 * np.cos(2 * np.pi * 10 * np.arange(1000) / 1000)  # a 10-line cosine of amplitude 0.25
    m = 1000
    amp = envelope_spectrum(env[None, :].astype(np.float32) / (2 * m / 4000), 4000, 50)
    assert amp[0, 10] == pytest.approx(0.25, rel=1e-5)


def test_fast_length() -> None:
    assert [fast_length(n) for n in (1, 5, 17, 1000, 4657)] == [1, 6, 18, 1024, 4608 if 4608 >= 4657 else 5184]
    assert all(fast_length(n) >= n for n in range(1, 300))


def _bearing_frames(fault: str, shaft_hz: float = 29.93, n: int = N) -> np.ndarray:
    m = defect_multiples(B6205)
    f = {"bpfo": m.bpfo_hz, "bpfi": m.bpfi_hz, "bsf": 2 * m.bsf_hz}[fault] * shaft_hz
    t = np.arange(n) / FS
    x = 0.2 * np.sin(2 * np.pi * shaft_hz * t) + RNG.normal(0, 0.15, n)
    return x + 0.8 * impacts(f, n=n)


@pytest.mark.parametrize("fault", ["bpfo", "bpfi", "bsf"])
def test_families_single_out_the_defect(fault: str) -> None:
    shaft = 29.93
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    r = analyze_frames(_bearing_frames(fault, shaft), plan, shaft_hz=[shaft])[0]
    assert set(r.envelope) == {"ftf", "bpfo", "bpfi", "bsf"}
    found = r.envelope[fault]
    assert found.frequency_hz == pytest.approx(found.expected_hz, abs=1.5 * FS / N)
    assert found.snr_db > 20 and found.harmonics_found >= 2
    others = [r.envelope[k].snr_db for k in ("bpfo", "bpfi", "bsf") if k != fault]
    assert found.snr_db > max(others) + 10


def test_no_family_stands_out_in_noise() -> None:
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    r = analyze_frames(RNG.normal(0, 0.2, (4, N)), plan, shaft_hz=[29.93] * 4)
    for frame in r:
        for fam in frame.envelope.values():
            assert fam.snr_db < 15  # noise: the largest of a few Rayleigh lines over their median, ~5 dB


def test_slip_is_searched() -> None:
    # the defect line 1.5 % below kinematic (bearing slip, Randall & Antoni 2011) is found within ±2 %, not ±0.5 %
    n = 4 * N
    shaft = 29.93
    f_true = defect_multiples(B6205).bpfo_hz * shaft * 0.985
    x = 0.8 * impacts(f_true, n=n) + RNG.normal(0, 0.15, n)
    plan = make_plan(FS, n, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    found = analyze_frames(x, plan, shaft_hz=[shaft])[0].envelope["bpfo"]
    assert found.frequency_hz == pytest.approx(f_true, abs=FS / n)
    tight = make_plan(FS, n, envelope_band_hz=(4000.0, 9000.0), bearing=B6205, slip_tolerance=0.005)
    missed = analyze_frames(x, tight, shaft_hz=[shaft])[0].envelope["bpfo"]
    assert missed.amplitude_g < 0.2 * found.amplitude_g


def test_envelope_needs_speed_band_and_bearing() -> None:
    x = _bearing_frames("bpfo")
    no_bearing = analyze_frames(x, make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0)), shaft_hz=[29.93])[0]
    assert no_bearing.envelope == {} and no_bearing.envelope_band_hz == (4000.0, 9000.0)
    no_band = analyze_frames(x, make_plan(FS, N, bearing=B6205), shaft_hz=[29.93])[0]
    assert no_band.envelope == {} and no_band.envelope_band_hz is None


def test_snr_uses_the_local_floor() -> None:
    # a line 100 × its surroundings reads 40 dB whatever the overall level
    f_m = 300 * FS / N
    x = (1 + 0.1 * np.cos(2 * np.pi * f_m * T)) * np.sin(2 * np.pi * 6000 * T) + RNG.normal(0, 0.01, N)
    expected_hz = f_m / defect_multiples(B6205).bpfo_hz
    plan = make_plan(FS, N, envelope_band_hz=(4000.0, 9000.0), bearing=B6205)
    for scale in (1e-3, 1.0, 1e3):
        fam = analyze_frames(scale * x, plan, shaft_hz=[expected_hz])[0].envelope["bpfo"]
        assert fam.amplitude_g == pytest.approx(0.1 * scale, rel=0.02)
        assert fam.snr_db > 30
        assert math.isfinite(fam.snr_db)
