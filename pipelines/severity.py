"""ISO 20816-3 severity zones for broadband velocity r.m.s. on bearing housings.

Source: ISO 20816-3:2022 (which carries over ISO 10816-3:2009, Annex A, Tables A.1/A.2), as tabulated in the
project's FIELD_NOTES §1.  Band 10 Hz–1 kHz (2 Hz–1 kHz for machines below 600 r/min).  Group 1: machines
above 300 kW up to 50 MW; group 2: 15 kW to 300 kW.  Support is rigid when the lowest natural frequency of the
machine on its support is at least 1.25 × the main excitation frequency, otherwise flexible.

Zones: A newly commissioned; B acceptable for unrestricted long-term operation; C acceptable only for a limited
period; D severe enough to cause damage.  A value on a boundary belongs to the higher zone.  These zones advise;
alarm and trip settings follow site procedures and a qualified analyst.
"""

from __future__ import annotations

import math
from typing import Literal

from edgevib.pipelines.types import PlanError, Support

__all__ = ["ISO_20816_3_VELOCITY_MM_S", "Zone", "iso_zone", "zone_boundaries_mm_s"]

Zone = Literal["A", "B", "C", "D"]

# (group, support) -> (A/B, B/C, C/D) boundaries in mm/s r.m.s.; ISO 20816-3 (= ISO 10816-3:2009 Annex A).
# Note: group 2 rigid C/D is 4.5 mm/s (incorrect copies circulate giving 7.1).
ISO_20816_3_VELOCITY_MM_S: dict[tuple[int, Support], tuple[float, float, float]] = {
    (1, "rigid"): (2.3, 4.5, 7.1),
    (1, "flexible"): (3.5, 7.1, 11.0),
    (2, "rigid"): (1.4, 2.8, 4.5),
    (2, "flexible"): (2.3, 4.5, 7.1),
}


def zone_boundaries_mm_s(group: int, support: str) -> tuple[float, float, float]:
    """The (A/B, B/C, C/D) boundaries in mm/s r.m.s. for a machine group (1 or 2) and support."""
    key = (group, support)
    if isinstance(group, bool) or key not in ISO_20816_3_VELOCITY_MM_S:
        raise PlanError(f"no ISO 20816-3 zones for group {group!r} and support {support!r} "
                        "(group is 1 or 2, support is rigid or flexible)")
    return ISO_20816_3_VELOCITY_MM_S[key]


def iso_zone(velocity_rms_mm_s: float, group: int, support: str) -> Zone:
    """The ISO 20816-3 zone (``"A"`` … ``"D"``) of a broadband velocity r.m.s. in mm/s."""
    ab, bc, cd = zone_boundaries_mm_s(group, support)
    v = float(velocity_rms_mm_s)
    if not math.isfinite(v) or v < 0:
        raise PlanError(f"velocity r.m.s. {velocity_rms_mm_s!r} mm/s must be finite and ≥ 0")
    if v < ab:
        return "A"
    if v < bc:
        return "B"
    if v < cd:
        return "C"
    return "D"
