"""The frequency-band arithmetic of an analysis plan, shared by the numerical core (which validates and decides,
``make_plan``), the configuration (a point's default envelope band) and the simulator (sizing the frames of the
configuration it emits).  Pure arithmetic on values the caller has validated; nothing here raises.
"""

from __future__ import annotations

import math

__all__ = ["ANTI_ALIAS_RATIO", "LINES_BELOW_EDGE", "envelope_band", "min_frame_samples"]

ANTI_ALIAS_RATIO = 2.56  # usable bandwidth fs/2.56 of an anti-aliased acquisition (common practice)
LINES_BELOW_EDGE = 2.0
"""Lines a frame must resolve below the velocity band's low edge and within the lowest shaft speed: the edge two
lines above DC keeps the Hann window's leakage of the mean and of what lies below the band out of it, and two
lines per 1× spacing span two revolutions (common practice)."""


def min_frame_samples(fs_hz: float, velocity_low_hz: float, speed_low_hz: float) -> int:
    """The shortest frame, in samples, whose line spacing ``fs/n`` is at most 1/:data:`LINES_BELOW_EDGE` of both
    the velocity band's low edge and the lowest shaft speed (Hz)."""
    return max(math.ceil(LINES_BELOW_EDGE * fs_hz / velocity_low_hz),
               math.ceil(LINES_BELOW_EDGE * fs_hz / speed_low_hz))


def envelope_band(fs_hz: float, bandwidth_hz: tuple[float, float] | None,
                  shaft_hz_max: float | None = None) -> tuple[float, float] | None:
    """The default demodulation band, or None when the acquisition cannot carry envelope analysis.

    The top two octaves of what the acquisition carries: the high edge is the lower of fs/2.56 and the sensor's
    upper limit; the low edge the highest of a quarter of the high edge, 500 Hz, 20 × the highest shaft speed
    (clear of the shaft harmonics) and the sensor's lower limit.  Impacts excite structural resonances there, far
    above the shaft and mesh lines (common practice; a kurtogram or a known resonance chooses better).  Envelope
    analysis needs kHz bandwidth above the shaft and mesh components (FIELD_NOTES §6): None when the high edge is
    below 2 kHz or less than 1.5 × the low edge.  Edges rounded inwards to 10 Hz.

    Examples
    --------
    12 kHz sampling, no sensor limit: 1180–4680 Hz.  25.6 kHz with a 0.5 Hz–10 kHz piezo: 2500–10000 Hz.
    """
    hi = fs_hz / ANTI_ALIAS_RATIO
    lo = 500.0
    if bandwidth_hz is not None:
        hi = min(hi, bandwidth_hz[1])
        lo = max(lo, bandwidth_hz[0])
    lo = max(lo, hi / 4.0)
    if shaft_hz_max is not None:
        lo = max(lo, 20.0 * shaft_hz_max)
    lo = math.ceil(lo / 10.0) * 10.0
    hi = math.floor(hi / 10.0) * 10.0
    if hi < 2000.0 or hi < 1.5 * lo:
        return None
    return (lo, hi)
