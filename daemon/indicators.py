"""The indicators an alarm limit can watch: name, unit, the kind of fault it points to, and how to read it from a
frame's :class:`~edgevib.pipelines.types.FrameIndicators`.

This module imports nothing from the numerical core at run time (the extractors only read attributes), so the
configuration models can check limit names without loading it.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from edgevib.pipelines.types import FrameIndicators

__all__ = ["INDICATORS", "IndicatorDef"]

Extractor = Callable[["FrameIndicators"], float | None]


def _order(key: str) -> Extractor:
    return lambda ind: ind.orders_mm_s.get(key)


def _looseness(ind: FrameIndicators) -> float | None:
    vals = [v for k, v in ind.orders_mm_s.items() if k not in ("1x", "2x") and v is not None and math.isfinite(v)]
    return max(vals) if vals else None


def _family(name: str, attr: str) -> Extractor:
    def get(ind: FrameIndicators) -> float | None:
        fam = ind.envelope.get(name)
        return None if fam is None else float(getattr(fam, attr))
    return get


@dataclass(frozen=True, slots=True)
class IndicatorDef:
    """An indicator the alarm layer can watch: how to read it, its unit, and what kind of fault it points to."""

    name: str
    unit: str
    fault: str
    extract: Extractor = field(repr=False, compare=False)


def _defs() -> dict[str, IndicatorDef]:
    d = [
        IndicatorDef("velocity_rms_mm_s", "mm/s", "overall", lambda i: i.velocity_rms_mm_s),
        IndicatorDef("velocity_peak_mm_s", "mm/s", "overall", lambda i: i.velocity_peak_mm_s),
        IndicatorDef("acceleration_rms_g", "g", "overall", lambda i: i.acceleration_rms_g),
        IndicatorDef("acceleration_peak_g", "g", "impacting", lambda i: i.acceleration_peak_g),
        IndicatorDef("crest_factor", "1", "impacting", lambda i: i.crest_factor),
        IndicatorDef("kurtosis", "1", "impacting", lambda i: i.kurtosis),
        IndicatorDef("displacement_pp_um", "µm", "overall", lambda i: i.displacement_pp_um),
        IndicatorDef("imbalance_1x_mm_s", "mm/s", "imbalance", _order("1x")),
        IndicatorDef("misalignment_2x_mm_s", "mm/s", "misalignment", _order("2x")),
        IndicatorDef("looseness_mm_s", "mm/s", "looseness", _looseness),
    ]
    for fam, what in (("bpfo", "outer race"), ("bpfi", "inner race"), ("bsf", "rolling element"),
                      ("ftf", "cage")):
        kind = f"bearing {what}"
        d.append(IndicatorDef(f"bearing_{fam}_g", "g", kind, _family(fam, "amplitude_g")))
        d.append(IndicatorDef(f"bearing_{fam}_snr_db", "dB", kind, _family(fam, "snr_db")))
    return {x.name: x for x in d}


INDICATORS: dict[str, IndicatorDef] = _defs()
