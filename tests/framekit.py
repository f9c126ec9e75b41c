"""One factory for hand-made :class:`~edgevib.pipelines.types.FrameIndicators` in the tests.

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
from typing import Any

from edgevib.pipelines.types import FrameIndicators

__all__ = ["filler", "frame_indicators"]


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
