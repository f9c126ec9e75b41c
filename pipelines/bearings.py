"""Kinematic rolling-element bearing defect frequencies (outer ring stationary).

With shaft frequency fr, n rolling elements, element diameter d, pitch diameter D, contact angle φ and
k = (d/D)·cos φ (Randall & Antoni, "Rolling element bearing diagnostics — A tutorial", MSSP 25 (2011) 485–520):

* FTF  = fr/2 · (1 − k)               (cage, fundamental train)
* BPFO = n·fr/2 · (1 − k)             (outer race)
* BPFI = n·fr/2 · (1 + k)             (inner race)
* BSF  = fr·D/(2d) · (1 − k²)         (ball spin)

A defect on a rolling element strikes both races once per spin revolution, so it appears at **2 × BSF**
(modulated at FTF); the envelope analysis searches the ``"bsf"`` family there.  Real bearings slip: observed lines
deviate by about 1–2 % from these values.
"""

from __future__ import annotations

import math

from edgevib.pipelines.types import BearingGeometry, DefectFrequencies, GeometryError, PlanError

__all__ = ["defect_frequencies", "defect_multiples", "validate_geometry"]


def validate_geometry(geometry: BearingGeometry) -> BearingGeometry:
    """Check that ``geometry`` describes a possible bearing; return it unchanged.

    Raises
    ------
    GeometryError
        no or too few elements, non-positive or non-finite diameters, ball ≥ pitch diameter, contact angle
        outside 0–90°, more elements than fit side by side on the pitch circle.
    """
    n = geometry.elements
    if isinstance(n, bool) or not isinstance(n, int):
        raise GeometryError(f"element count {n!r} must be an integer")
    if n < 3:
        raise GeometryError(f"element count {n} is impossible: a rolling-element bearing has at least 3 elements")
    d, big_d, phi = geometry.ball_diameter, geometry.pitch_diameter, geometry.contact_angle_deg
    for name, value in (("ball diameter", d), ("pitch diameter", big_d)):
        if not isinstance(value, int | float) or not math.isfinite(value) or value <= 0:
            raise GeometryError(f"{name} {value!r} must be finite and > 0")
    if d >= big_d:
        raise GeometryError(f"ball diameter {d:g} must be smaller than the pitch diameter {big_d:g}")
    if not isinstance(phi, int | float) or not math.isfinite(phi) or not 0.0 <= phi < 90.0:
        raise GeometryError(f"contact angle {phi!r}° must be in 0 ≤ angle < 90°")
    if n * d > math.pi * big_d:
        raise GeometryError(f"{n} elements of diameter {d:g} do not fit on a pitch circle of diameter {big_d:g} "
                            f"(circumference {math.pi * big_d:.4g})")
    return geometry


def defect_frequencies(geometry: BearingGeometry, shaft_hz: float) -> DefectFrequencies:
    """Defect frequencies in Hz at shaft frequency ``shaft_hz`` (≥ 0).

    ``bsf_hz`` is the ball spin frequency itself; a rolling-element defect shows at ``2 * bsf_hz``.

    Examples
    --------
    The CWRU drive-end 6205 bearing (9 balls, d = 0.3126 in, D = 1.537 in) at 1 Hz gives BPFO ≈ 3.5848,
    BPFI ≈ 5.4152, FTF ≈ 0.3983 and 2·BSF ≈ 4.7135.
    """
    validate_geometry(geometry)
    if isinstance(shaft_hz, bool) or not isinstance(shaft_hz, int | float) or not math.isfinite(shaft_hz) \
            or shaft_hz < 0:
        raise PlanError(f"shaft speed {shaft_hz!r} Hz must be finite and ≥ 0")
    fr = float(shaft_hz)
    ratio = geometry.ball_diameter / geometry.pitch_diameter
    k = ratio * math.cos(math.radians(geometry.contact_angle_deg))
    n = geometry.elements
    return DefectFrequencies(
        shaft_hz=fr,
        ftf_hz=fr / 2.0 * (1.0 - k),
        bpfo_hz=n * fr / 2.0 * (1.0 - k),
        bpfi_hz=n * fr / 2.0 * (1.0 + k),
        bsf_hz=fr / (2.0 * ratio) * (1.0 - k * k),
    )


def defect_multiples(geometry: BearingGeometry) -> DefectFrequencies:
    """Defect frequencies as multiples of shaft speed (``defect_frequencies`` at 1 Hz)."""
    return defect_frequencies(geometry, 1.0)
