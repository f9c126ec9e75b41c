"""Sensor health of analysed frames, batched over the frames that share a health specification.

Runs in the analysis workers right after the indicators (numerical work stays off the event loop), so every
:class:`~edgevib.daemon.interfaces.FrameResult` carries its frame's verdict: the machine-state judgement then knows
at once not to count a faulty sensor's level, and the alarm layer judges without a second pass over the samples.
The checks themselves are :func:`edgevib.pipelines.health.check_health`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.pipelines.health import HealthSpec, SensorHealth, check_health
from edgevib.pipelines.types import PipelineError

__all__ = ["HealthError", "batch_health", "judged_running"]


def judged_running(machine_running: bool, velocity_rms_mm_s: float | None, run_level_mm_s: float) -> bool:
    """Whether a frame's health is judged against a running machine: its machine was running before the frame
    *and* the frame itself still shows a running machine's level (velocity r.m.s. ≥ ``run_level_mm_s``).  A frame
    taken as the machine stops (a trip, a fast coast-down the speed trend has not caught yet) is judged against a
    standing machine at once, so a quiet signal a few converter steps wide is not taken for a flatline."""
    if not machine_running:
        return False
    if velocity_rms_mm_s is None or not math.isfinite(velocity_rms_mm_s):
        return True
    return velocity_rms_mm_s >= run_level_mm_s


class HealthError(Exception):
    """A group of frames whose checks failed (``points`` names them); the other groups are still checked."""

    def __init__(self, points: Sequence[str], problem: str) -> None:
        super().__init__(f"sensor health check failed for {', '.join(points)}: {problem}")
        self.points = tuple(points)
        self.problem = problem


def batch_health(frames: npt.NDArray[np.floating[Any]], fs_hz: float, specs: Sequence[HealthSpec | None],
                 rms_g: Sequence[float], running: Sequence[bool], points: Sequence[str],
                 errors: list[HealthError] | None = None) -> list[SensorHealth | None]:
    """Health of each row of ``frames`` (channels, samples) in g at ``fs_hz``.

    ``specs[i]`` is row i's specification (``None``: not checked); rows sharing one are checked together.
    ``rms_g`` are the rows' r.m.s. about their means (the indicators'), ``running`` whether each row's machine
    runs.  A group whose check fails gets ``None`` and its :class:`HealthError` is appended to ``errors``.
    """
    out: list[SensorHealth | None] = [None] * len(specs)
    groups: dict[HealthSpec, list[int]] = {}
    for i, spec in enumerate(specs):
        if spec is not None:
            groups.setdefault(spec, []).append(i)
    for spec, idx in groups.items():
        rms = np.array([rms_g[i] for i in idx], dtype=np.float64)
        try:
            rows = frames if len(idx) == len(specs) else frames[idx]  # one group: the batch itself, no copy
            res = check_health(rows, fs_hz, spec, rms_g=rms if np.all(np.isfinite(rms)) else None,
                               running=[running[i] for i in idx])
        except PipelineError as exc:
            if errors is not None:
                errors.append(HealthError([points[i] for i in idx], str(exc)))
            continue
        for i, h in zip(idx, res, strict=True):
            out[i] = h
    return out
