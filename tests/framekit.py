"""One factory for hand-made :class:`~edgevib.pipelines.types.FrameIndicators` in the tests, and :class:`Tracked`,
which gives hand-made frames their machine's state as the daemon attaches it.

A test names the indicators it cares about; every other field is filled from the dataclass's own field list
(``dataclasses.fields``): its default when it has one, else ``None`` for an optional value, NaN for a float (the
daemon's "unavailable"), ``False`` for a flag.  A field added to FrameIndicators (a new indicator) therefore needs
no edit in the tests that build frames by hand.  Importable from every test package (``tests/`` is on ``sys.path``,
see ``tests/conftest.py``).
"""

from __future__ import annotations

import dataclasses
import math
import typing
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from edgevib.daemon.machine_state import MachineTracker
from edgevib.pipelines.types import FrameIndicators

if TYPE_CHECKING:
    from edgevib.daemon.config import Config
    from edgevib.daemon.interfaces import FrameResult

__all__ = ["Tracked", "filler", "frame_indicators"]


def filler(name: str, hint: Any) -> Any:
    """The value a field of type ``hint`` gets when a test does not name it."""
    if type(None) in typing.get_args(hint):  # float | None, …
        return None
    if hint is float:
        return math.nan
    if hint is bool:
        return False
    raise TypeError(f"FrameIndicators.{name}: no filler for type {hint!r}; give it a default or extend "
                    "tests/framekit.filler")


def frame_indicators(**given: Any) -> FrameIndicators:
    """FrameIndicators with the fields in ``given``; the others filled as the module docstring says."""
    hints = typing.get_type_hints(FrameIndicators)
    values = dict(given)
    for f in dataclasses.fields(FrameIndicators):
        has_default = f.default is not dataclasses.MISSING or f.default_factory is not dataclasses.MISSING
        if f.name not in values and not has_default:
            values[f.name] = filler(f.name, hints[f.name])
    return FrameIndicators(**values)


class Tracked:
    """Frames given their machine's state as the daemon's tracker judges it (``edgevib.daemon.app``: each frame's
    measured speed — a speed tag's, not a fixed or estimated one — and level; a frame with a sensor fault, or a
    point with one where ``healthy`` says so, does not vote)."""

    def __init__(self, cfg: Config, healthy: Callable[[str], bool] | None = None) -> None:
        self.cfg = cfg
        self.machines = MachineTracker(cfg, healthy=healthy)

    def __call__(self, frames: list[FrameResult]) -> list[FrameResult]:
        out = []
        for r in frames:
            ind, m = r.indicators, self.cfg.machine(r.machine_id)
            measured = ind.shaft_hz if m.speed_tag is not None and not ind.shaft_estimated else None
            ms = self.machines.observe(m.id, r.point_id, r.t_end_ns / 1e9, speed_hz=measured,
                                       velocity_rms_mm_s=ind.velocity_rms_mm_s,
                                       frame_healthy=r.health is None or r.health.ok)
            out.append(dataclasses.replace(r, machine_state=ms))
        return out
