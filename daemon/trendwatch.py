"""The daemon's trend layer: severity history, periodic trend and projection, gauges, advice.

* Every analysed frame goes into the history (:mod:`edgevib.daemon.history`) with the machine state of that
  frame — as the alarm layer judged it (its ``frame_listeners`` hook; ``sensor-fault`` while the sensor is
  faulty), or, without an alarm layer, the state the daemon attached to the frame, else a rule of thumb
  (velocity r.m.s. above 0.2 mm/s and a measured speed above the machine's run threshold).  Only running frames
  enter the roll-ups; stopped, starting, coasting and unknown periods are marked.
* Every ``evaluate_s`` (in a worker thread) each tracked series — ``[trend] indicators`` plus every indicator with
  an alarm limit or a ``[[trend.limits]]`` entry — is read back from the history over the trend window and judged
  by :func:`edgevib.pipelines.trend.assess`: :func:`evaluate` builds the document that the Prometheus gauges, the
  retained state message, alarm events, ``edgevib trend``, ``edgevib replay`` and the HTTP API all show.
* Limits of a series: the alarm layer's alert and danger set points, user-given absolute limits and, for
  velocity r.m.s. of machines with group and support, the ISO 20816-3 zone C and zone D boundaries — the next one
  above the present level and the highest one the level is at or beyond.  Zone B is acceptable for unrestricted
  long-term operation (ISO 20816-1/-3), so its boundary is drawn but asks for nothing.  One level estimate (the
  trend's :attr:`~edgevib.pipelines.trend.TrendResult.level`) decides whether a limit is reached, and a series
  without significant growth is never projected to cross one.
* No projection while the machine is not running, or from too little history (the document says what is
  needed); the trend never raises an alarm by itself.

Advice, in plain words, always deferring to the site's procedures and a qualified analyst:

* **act** — a danger-class limit (danger, the zone D boundary, a user limit) is reached or projected within
  ``act_days``;
* **plan** — any limit is projected within ``plan_days``, or an alert-class limit is reached;
* **watch** — rising, but no limit within ``plan_days``; or a significant step change from the baseline;
* none — not rising and no significant change.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from edgevib.daemon.config import TREND_INDICATORS, Config, TrendConfig
from edgevib.daemon.history import (
    HistoryError,
    HistoryReader,
    HistoryRecorder,
    HistorySeries,
    HistorySettings,
    history_settings,
)
from edgevib.daemon.indicators import INDICATORS, LIMITABLE
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.logs import RateLimitedLogger, get_logger
from edgevib.daemon.timestamps import rfc3339_utc_s
from edgevib.pipelines.trend import SECONDS_PER_DAY, Projection, TrendResult, TrendSpec, assess

if TYPE_CHECKING:
    from prometheus_client import CollectorRegistry

    from edgevib.daemon.alarms.engine import AlarmLayer

__all__ = [
    "TrendSettings",
    "TrendWatch",
    "advice",
    "evaluate",
    "frame_values",
    "iso_next_boundary",
    "learn_baseline",
    "limit_lines",
    "running_state",
    "trend_settings",
]

log = get_logger("edgevib.trend")

HISTORY_INDICATORS: tuple[str, ...] = tuple(LIMITABLE)
"""Indicators recorded in the history (every scalar indicator an alarm limit can watch), in this order."""
_DANGER_CLASS = ("danger", "zone D", "limit")
_DISCLAIMER = "edgevib monitors and advises; it is not a protection system."
# The ISO 20816-3 zone boundaries a trend is judged against, as (label, index in (A/B, B/C, C/D)): zone B is
# acceptable for unrestricted long-term operation, zone C only for a limited period until remedial action, zone D
# severe enough to cause damage (ISO 20816-1/-3 zone descriptions; FIELD_NOTES §1) — so entering zone B asks for
# nothing, reaching zone C for a planned inspection and zone D for action.
_ISO_ACTION_ZONES: tuple[tuple[str, int], ...] = (("zone C", 1), ("zone D", 2))
_STATE_OF_REASON = {None: "running", "machine-stopped": "stopped", "start-up-grace": "starting",
                    "sensor-fault": "sensor-fault"}


# --------------------------------------------------------------------------------------------- settings


@dataclass(frozen=True, slots=True)
class TrendSettings:
    """``[trend]`` resolved (see README, configuration reference)."""

    enabled: bool = True
    indicators: tuple[str, ...] = TREND_INDICATORS  # broadband velocity and the fault-pattern indicators
    window_s: float = 90 * SECONDS_PER_DAY
    min_points: int = 12
    min_span_s: float = SECONDS_PER_DAY
    coverage: float = 0.8
    rise_alpha: float = 0.01
    evaluate_s: float = 600.0
    horizon_s: float = 730 * SECONDS_PER_DAY
    horizon_factor: float = 4.0
    max_points: int = 500
    plan_days: float = 90.0
    act_days: float = 14.0
    limits: tuple[tuple[str, str, float], ...] = ()  # [[trend.limits]]: (point, indicator, value)

    def limit_for(self, point: str, indicator: str) -> float | None:
        return next((v for p, i, v in self.limits if p == point and i == indicator), None)

    def spec(self) -> TrendSpec:
        return TrendSpec(coverage=self.coverage, rise_alpha=self.rise_alpha, min_points=self.min_points,
                         min_span_s=self.min_span_s, horizon_factor=self.horizon_factor, horizon_s=self.horizon_s)


def trend_settings(table: TrendConfig) -> TrendSettings:
    """The settings of a loaded ``[trend]`` table (:class:`edgevib.daemon.config.TrendConfig`)."""
    return TrendSettings(
        enabled=table.enabled, indicators=tuple(dict.fromkeys(table.indicators)),
        window_s=SECONDS_PER_DAY * table.window_days, min_points=table.min_points,
        min_span_s=3600.0 * table.min_span_h, coverage=table.coverage, rise_alpha=table.rise_significance,
        evaluate_s=table.evaluate_s, horizon_s=SECONDS_PER_DAY * table.horizon_days,
        horizon_factor=table.horizon_factor, max_points=table.max_points, plan_days=table.plan_days,
        act_days=table.act_days, limits=tuple((lim.point, lim.indicator, lim.value) for lim in table.limits))


# --------------------------------------------------------------------------------------------- helpers


def _readers(names: Sequence[str]) -> tuple[Callable[[FrameResult], float | None], ...]:
    """The value readers of scalar indicators ``names``, in order (:meth:`Indicator.reader`)."""
    return tuple(LIMITABLE[name].reader() for name in names)


_HISTORY_READERS = _readers(HISTORY_INDICATORS)  # frame_values of the history layout: read per frame


def frame_values(result: FrameResult, names: Sequence[str] = HISTORY_INDICATORS) -> np.ndarray:
    """The frame's values of ``names`` (NaN where an indicator is unavailable)."""
    readers = _HISTORY_READERS if names is HISTORY_INDICATORS else _readers(names)
    nan, isfinite = math.nan, math.isfinite
    return np.array([nan if (v := read(result)) is None or not isfinite(v) else v for read in readers],
                    dtype=np.float64)


def running_state(velocity_rms_mm_s: float | None, shaft_hz: float | None, shaft_estimated: bool,
                  run_threshold_rpm: float = 60.0, run_threshold_velocity_mm_s: float = 0.2, *,
                  speed_measured: bool = False) -> str:
    """``running`` or ``stopped`` by the alarm layer's rule of thumb (used where no alarm layer judges state):
    stopped below the velocity threshold, or below the run threshold of a given (not estimated) speed.  A
    ``speed_measured`` speed (recorded with the data, as a speed tag is) decides alone, as in the alarm layer: a
    small or well-balanced machine can turn below the velocity threshold."""
    if speed_measured and shaft_hz is not None and not shaft_estimated and math.isfinite(shaft_hz):
        return "running" if shaft_hz * 60.0 >= run_threshold_rpm else "stopped"
    if velocity_rms_mm_s is None or not (math.isfinite(velocity_rms_mm_s)
                                         and velocity_rms_mm_s >= run_threshold_velocity_mm_s):
        return "stopped"
    if shaft_hz is not None and not shaft_estimated and math.isfinite(shaft_hz):
        return "running" if shaft_hz * 60.0 >= run_threshold_rpm else "stopped"
    return "running"


def iso_next_boundary(level: float, boundaries: tuple[float, float, float]) -> tuple[str, float] | None:
    """The next ISO 20816-3 zone boundary above ``level`` as ``("zone B"|"zone C"|"zone D", value)``."""
    for name, b in zip(("zone B", "zone C", "zone D"), boundaries, strict=True):
        if level < b:
            return name, b
    return None


def limit_lines(unit: str, *, alarm: tuple[float | None, float | None] = (None, None),
                iso: tuple[float, float, float] | None = None, user: float | None = None) -> list[dict[str, Any]]:
    """The limit lines of a series as ``{label, value, unit, kind}``: the alarm layer's ``alert`` and ``danger``
    set points (kind ``alarm``), the ISO 20816-3 zone boundaries (kind ``iso``; labels ``A/B``, ``B/C``,
    ``C/D``) and a user-given limit (kind ``user``, label ``limit``)."""
    out = [{"label": label, "value": float(value), "unit": unit, "kind": "alarm"}
           for label, value in zip(("alert", "danger"), alarm, strict=True) if value is not None]
    if iso is not None:
        out += [{"label": label, "value": value, "unit": unit, "kind": "iso"}
                for label, value in zip(("A/B", "B/C", "C/D"), iso, strict=True)]
    if user is not None:
        out.append({"label": "limit", "value": user, "unit": unit, "kind": "user"})
    return out


def learn_baseline(reader: HistoryReader, point: str, indicator: str, *, min_points: int,
                   max_points: int) -> tuple[float, float, int] | None:
    """A series' baseline from its first ``min_points`` running values at the trend's resolution (``max_points``):
    ``(median, robust spread, count)``, the spread 1.4826 × the median absolute deviation (the normal
    distribution's σ, common practice); None with fewer values."""
    s = reader.series(point, indicator, max_points=max_points)
    if s.value.size < min_points:
        return None
    v = s.value[:min_points]
    med = float(np.median(v))
    return med, 1.4826 * float(np.median(np.abs(v - med))), min_points


def _clean(v: float | None) -> float | None:
    return None if v is None or not math.isfinite(v) else float(v)


# --------------------------------------------------------------------------------------------- evaluation


def evaluate(reader: HistoryReader, point: str, indicator: str, *, spec: TrendSpec, window_s: float | None,
             now_s: float | None = None, alert: float | None = None, danger: float | None = None,
             iso: tuple[float, float, float] | None = None, user_limit: float | None = None,
             baseline: tuple[float, float, int] | None = None, max_points: int = 500,
             plan_days: float = 90.0, act_days: float = 14.0) -> dict[str, Any]:
    """Trend and projections of one series read from the history: the document every view shows.

    ``now_s`` defaults to the point's latest frame time.  ``window_s`` None: all history.  ``iso``: the
    machine's (A/B, B/C, C/D) boundaries for velocity r.m.s.  ``baseline``: ``(mean, std, n)`` for the step test.
    """
    unit = INDICATORS[indicator].unit if indicator in INDICATORS else ""
    latest = reader.latest_time_s(point)
    now = now_s if now_s is not None else latest
    doc: dict[str, Any] = {"point": point, "indicator": indicator, "unit": unit, "coverage": spec.coverage,
                           "t_s": now, "time": None if now is None else rfc3339_utc_s(now), "status": "no-data",
                           "need": None, "machine_state": reader.latest_state(point), "limits": [],
                           "advice": None, "advice_text": None}
    if now is None:
        return doc
    since = None if window_s is None else now - window_s
    try:
        series = reader.series(point, indicator, since_s=since, until_s=now, max_points=max_points)
    except HistoryError:
        return doc
    doc["resolution"] = series.level
    t = series.stamp_s  # a bucket's value stands for the mean time of the values it holds
    y = series.value
    step_thr = 0.25 * iso[1] if (iso is not None and indicator == "velocity_rms_mm_s") else None
    labelled: list[tuple[str, float]] = []
    if alert is not None:
        labelled.append(("alert", alert))
    if danger is not None:
        labelled.append(("danger", danger))
    if user_limit is not None:
        labelled.append(("limit", user_limit))
    zones = _ISO_ACTION_ZONES if iso is not None and indicator == "velocity_rms_mm_s" else ()
    candidates = [(name, iso[i]) for name, i in zones] if iso is not None else []
    res = assess(t, y, now, labelled + candidates, spec, baseline=baseline, step_threshold=step_thr)
    if zones:
        res = replace(res, projections=_iso_shown(res.projections, len(labelled)))
    doc.update(_result_fields(res, now, unit))
    if doc["machine_state"] not in (None, "running"):
        doc["status"] = "machine-not-running"
        doc["need"] = ("no projection while the sensor is faulty" if doc["machine_state"] == "sensor-fault" else
                       f"no projection while the machine is {doc['machine_state']}")
        for lim in doc["limits"]:
            lim.update(status="machine-not-running", eta_s=None, eta_low_s=None, eta_high_s=None, date=None,
                       date_low=None, date_high=None)
    kind, text = advice(doc, plan_days=plan_days, act_days=act_days)
    doc["advice"], doc["advice_text"] = kind, text
    return doc


def _iso_shown(projections: Sequence[Projection], n_other: int) -> tuple[Projection, ...]:
    """The other limits' projections, then of the ISO zone boundaries (after the first ``n_other``, in rising
    order) the next one above the present level and the highest one it is at or beyond — each judged by
    :func:`~edgevib.pipelines.trend.assess` on its one level estimate — leaving out a boundary that an alarm set
    point or the user limit already stands for."""
    other, zones = list(projections[:n_other]), projections[n_other:]
    ahead = [p for p in zones if p.status != "reached"][:1]
    beyond = [p for p in zones if p.status == "reached"][-1:]
    return tuple(other + [p for p in ahead + beyond if all(abs(o.limit - p.limit) > 1e-9 for o in other)])


def _result_fields(res: TrendResult, now: float, unit: str) -> dict[str, Any]:
    out: dict[str, Any] = {"status": res.status, "need": res.need, "n": res.n, "span_s": res.span_s,
                           "level": _clean(res.level), "slope_per_day": _clean(res.slope_per_day),
                           "slope_low_per_day": _clean(res.slope_low_per_day),
                           "slope_high_per_day": _clean(res.slope_high_per_day), "rising": res.rising,
                           "onset": None if res.onset_s is None else rfc3339_utc_s(res.onset_s),
                           "outliers": res.outliers, "model": None, "model_weight": None, "step": None,
                           "limits": []}
    if res.fit is not None and res.rising:
        out["model"] = res.fit.model
        out["model_weight"] = round(res.fit.weight, 3)
        out["doubling_days"] = (math.log(2) / res.fit.slope / SECONDS_PER_DAY
                                if res.fit.model == "exponential" and res.fit.slope > 0 else None)
        out["fit"] = {"model": res.fit.model, "t_ref_s": res.fit.t_ref_s, "intercept": res.fit.intercept,
                      "slope": res.fit.slope, "onset_s": res.fit.onset_s, "n": res.fit.n,
                      "autocorrelation": round(res.fit.autocorrelation, 3),
                      # for a confidence band of the fitted curve (the statistic of crossing_interval)
                      "cov": list(res.fit.cov), "sigma": res.fit.sigma, "dof": res.fit.dof,
                      # the scale on which the curve is straight in time; the power law's γ and failure time
                      "transform": res.fit.transform, "shape": res.fit.shape,
                      "singularity_s": res.fit.singularity_s}
    if res.step is not None:
        out["step"] = {"baseline": res.step.baseline, "level": res.step.level, "change": res.step.change,
                       "threshold": res.step.threshold, "significant": res.step.significant}
    for p in res.projections:
        out["limits"].append({
            "label": p.label, "value": p.limit, "unit": unit, "status": p.status, "eta_s": _clean(p.eta_s),
            "eta_low_s": _clean(p.eta_low_s), "eta_high_s": _clean(p.eta_high_s),
            "date": None if p.eta_s is None else rfc3339_utc_s(now + p.eta_s),
            "date_low": None if p.eta_low_s is None else rfc3339_utc_s(now + p.eta_low_s),
            "date_high": None if p.eta_high_s is None else rfc3339_utc_s(now + p.eta_high_s)})
    return out


def _rate(slope_per_day: float, unit: str, level: float | None) -> str:
    """A rate in the longest of hour, day, week, month over which it changes the level by at most half."""
    per = (("month", 30.0), ("week", 7.0), ("day", 1.0), ("hour", 1 / 24))
    if level is not None and math.isfinite(level) and level > 0:
        for name, days in per:
            if abs(slope_per_day * days) <= 0.5 * level:
                return f"{slope_per_day * days:.3g}{' ' + unit if unit else ''} per {name}"
        return f"{slope_per_day / 24:.3g}{' ' + unit if unit else ''} per hour"
    return f"{slope_per_day:.3g}{' ' + unit if unit else ''} per day"


def advice(doc: Mapping[str, Any], *, plan_days: float = 90.0, act_days: float = 14.0) -> tuple[str | None, str | None]:
    """``(kind, text)`` for a trend document: kind ``act``/``plan``/``watch`` or None (module docstring)."""
    if doc.get("status") != "ok":
        return None, None
    unit = doc.get("unit", "")
    unit = "" if unit == "1" else unit  # a ratio (crest factor, kurtosis): no unit to print

    def q(v: float) -> str:
        return f"{v:.3g} {unit}" if unit else f"{v:.3g}"

    cov = round(100 * float(doc.get("coverage", 0.8)))
    lims = list(doc.get("limits", []))
    reached = [lim for lim in lims if lim["status"] == "reached"]
    rising = [lim for lim in lims if lim["status"] == "rising" and lim["eta_s"] is not None]
    rising.sort(key=lambda lim: lim["eta_s"])

    def when(lim: Mapping[str, Any]) -> str:
        days = lim["eta_s"] / SECONDS_PER_DAY
        # within two days a date alone says little: the time of day too
        soon = (lim.get("eta_high_s") or lim["eta_s"]) < 2 * SECONDS_PER_DAY

        def date(key: str) -> str:
            return f"{lim[key][:10]} {lim[key][11:16]} UTC" if soon else lim[key][:10]
        return (f"the {lim['label']} level ({q(lim['value'])}) would be reached in about "
                f"{_days(days)}, around {date('date')} ({cov} % interval {date('date_low')} to "
                f"{date('date_high')})")

    tail = f"Follow the site's procedures; a qualified vibration analyst decides on any intervention. {_DISCLAIMER}"
    danger_reached = [lim for lim in reached if lim["label"] in _DANGER_CLASS]
    danger_soon = [lim for lim in rising
                   if lim["label"] in _DANGER_CLASS and lim["eta_s"] <= act_days * SECONDS_PER_DAY]
    if danger_reached:
        lim = danger_reached[0]
        return "act", (f"Act: the {lim['label']} level ({q(lim['value'])}) is reached. Take the action "
                       f"the site's procedures set for it and have a qualified vibration analyst confirm the "
                       f"finding before any intervention. {_DISCLAIMER}")
    if danger_soon:
        lim = danger_soon[0]
        rate = _rate(doc["slope_per_day"], unit, doc.get("level"))
        return "act", f"Act: rising {rate}; {when(lim)}. Arrange the inspection or repair now. {tail}"
    soon = [lim for lim in rising if lim["eta_s"] <= plan_days * SECONDS_PER_DAY]
    if soon:
        rate = _rate(doc["slope_per_day"], unit, doc.get("level"))
        return "plan", (f"Plan: rising {rate}; {when(soon[0])}. Plan an inspection or repair before then, for "
                        f"example at a scheduled stop. {tail}")
    if reached:
        lim = reached[0]
        return "plan", (f"Plan: the {lim['label']} level ({q(lim['value'])}) is reached"
                        f"{' and the values are not rising significantly' if not doc.get('rising') else ''}. "
                        f"Plan an inspection and keep trending. {tail}")
    if doc.get("rising"):
        nxt = f" {when(rising[0])[0].upper()}{when(rising[0])[1:]}." if rising else \
            " No limit is projected within the horizon."
        rate = _rate(doc["slope_per_day"], unit, doc.get("level"))
        return "watch", (f"Watch: rising {rate}.{nxt} Keep trending; an early change is usually kept under "
                         f"observation and repaired when its severity calls for it. {_DISCLAIMER}")
    step = doc.get("step")
    if step and step.get("significant"):
        change = f"{step['change']:+.3g}" + (f" {unit}" if unit else "")
        return "watch", (f"Watch: the level has changed by {change} from its baseline {q(step['baseline'])}, "
                         f"more than the significant change {q(step['threshold'])}, without a significant rise "
                         f"since. Look at the narrow-band indicators and keep "
                         f"trending. {_DISCLAIMER}")
    return None, None


def _days(days: float) -> str:
    if days * 24 < 1.5:
        minutes = max(1, round(days * 1440))
        return "a minute" if minutes == 1 else f"{minutes} minutes"
    if days < 2:
        return f"{days * 24:.0f} hours"
    if days < 60:
        return f"{days:.0f} days"
    return f"{days / 30.4:.0f} months"


# --------------------------------------------------------------------------------------------- the daemon layer


class TrendWatch:
    """History recording, periodic projections and their views for one running daemon.

    ``config``: the daemon configuration (``config.history`` / ``config.trend`` settings when parsed, else the
    defaults); ``alarm_layer``: the alarm layer or None.  Call :meth:`start` / :meth:`stop` from the event loop.
    """

    def __init__(self, config: Config, history: HistorySettings, settings: TrendSettings, *,
                 alarm_layer: AlarmLayer | None = None, registry: CollectorRegistry | None = None,
                 clock: Callable[[], float] = time.time) -> None:
        self.config = config
        self.registry = registry
        self._collector: TrendCollector | None = None
        self.history_settings = history
        self.settings = settings
        self.alarm_layer = alarm_layer
        self.clock = clock
        self.points = {p.id: p for p in config.points}
        self.machines = {m.id: m for m in config.machines}
        self.recorder: HistoryRecorder | None = None
        self.latest: dict[tuple[str, str], dict[str, Any]] = {}
        self.evaluations = 0
        self.errors = 0
        self._task: asyncio.Task[None] | None = None
        self._rlog = RateLimitedLogger(log, interval_s=60.0)
        self._baselines: dict[tuple[str, str], tuple[float, float, int]] = {}
        self._evaluating = threading.Lock()  # held by a round; stop() waits for one in flight

    # ------------------------------------------------------------------ lifecycle

    async def start(self) -> None:
        self.recorder = await asyncio.to_thread(HistoryRecorder, self.history_settings, HISTORY_INDICATORS)
        with contextlib.suppress(HistoryError):
            await asyncio.to_thread(self._load_stored)
        await self.recorder.start()
        if self.alarm_layer is not None:
            self.alarm_layer.frame_listeners.append(self.on_judged_frame)
            self.alarm_layer.trend_info = self.event_info
            self.alarm_layer.trend_state = self.state_info
        if self.settings.enabled:
            self._task = asyncio.get_running_loop().create_task(self._run(), name="edgevib-trend")
        if self.registry is not None:
            self._collector = TrendCollector(self)
            with contextlib.suppress(ValueError):
                self.registry.register(self._collector)
        log.info("trend layer started", history=self.history_settings.path, tracked=len(self._tracked()))

    def _load_stored(self) -> None:
        with HistoryReader(self.history_settings.path, self.history_settings.high_percentile) as r:
            for key, doc in r.projections().items():
                if key[0] in self.points:
                    self.latest[key] = doc

    async def stop(self) -> None:
        if self._task is not None:
            self._task.cancel()
            await asyncio.gather(self._task, return_exceptions=True)
            self._task = None
        await asyncio.to_thread(self._wait_round)  # a round in its worker thread finishes before the file closes
        if self.alarm_layer is not None:
            with contextlib.suppress(ValueError):
                self.alarm_layer.frame_listeners.remove(self.on_judged_frame)
        if self.registry is not None and self._collector is not None:
            with contextlib.suppress(KeyError):
                self.registry.unregister(self._collector)
        if self.recorder is not None:
            await self.recorder.stop()

    async def reconfigure(self, config: Config) -> None:
        """A reload keeps the history and its settings (logged when they changed); points follow the file."""
        self.config = config
        self.points = {p.id: p for p in config.points}
        self.machines = {m.id: m for m in config.machines}
        if history_settings(config.history) != self.history_settings or \
                trend_settings(config.trend) != self.settings:
            log.warning("history or trend settings changed; restart edgevib to apply them")

    # ------------------------------------------------------------------ frames

    def on_judged_frame(self, result: FrameResult, reason: str | None) -> None:
        """The alarm layer's per-frame hook (its worker thread, in frame order): the frame's machine state as the
        layer judged it (``sensor-fault`` when its sensor is faulty)."""
        if reason == "sensor-fault":
            state = "sensor-fault"
        else:
            ms = result.machine_state
            if ms is None and self.alarm_layer is not None:
                ms = self.alarm_layer.machine_states.get(result.machine_id)
            state = ms.state if ms is not None else _STATE_OF_REASON.get(reason, "unknown")
        self._record(result, state)

    async def on_frames(self, results: list[FrameResult]) -> None:
        """Sink entry when there is no alarm layer: the frame's machine state when the daemon attached one, else
        :func:`running_state`."""
        if self.alarm_layer is not None:  # the alarm layer hands every judged frame over (on_judged_frame)
            return
        for r in results:
            state: str
            if r.machine_state is not None:
                state = r.machine_state.state
            else:
                m = self.machines.get(r.machine_id)
                ind = r.indicators
                state = running_state(ind.velocity_rms_mm_s, ind.shaft_hz, ind.shaft_estimated,
                                      60.0 if m is None else m.run_threshold_rpm)
            self._record(r, state)

    def _record(self, r: FrameResult, state: str) -> None:
        if self.recorder is None or r.point_id not in self.points:
            return
        try:
            self.recorder.record(r.point_id, r.t_end_ns, frame_values(r), state)
        except HistoryError as exc:
            self._rlog.warning(("record", r.point_id), "frame not recorded in the history", point=r.point_id,
                               error=str(exc))

    # ------------------------------------------------------------------ evaluation

    def _tracked(self) -> list[tuple[str, str]]:
        out: dict[tuple[str, str], None] = {}
        limited = {(lim.point, lim.indicator) for lim in
                   (self.alarm_layer.settings.limits if self.alarm_layer is not None else ())}
        for pid in self.points:
            for ind in self.settings.indicators:
                out[(pid, ind)] = None
            for key in limited:
                if key[0] == pid:
                    out[key] = None
        for point, ind, _ in self.settings.limits:
            if point in self.points:
                out[(point, ind)] = None
        return list(out)

    def _set_points(self, point: str, indicator: str) -> tuple[float | None, float | None,
                                                                tuple[float, float, int] | None]:
        layer = self.alarm_layer
        if layer is None:
            return None, None, None
        with contextlib.suppress(Exception):
            for row in layer.snapshot(point)["alarms"]:
                if row["indicator"] == indicator:
                    b = row.get("baseline")
                    base = (float(b["mean"]), float(b["std"]), int(b["frames"])) if b and b.get("learned") else None
                    return row.get("alert"), row.get("danger"), base
        return None, None, None

    def _iso(self, point: str, indicator: str) -> tuple[float, float, float] | None:
        if indicator != "velocity_rms_mm_s":
            return None
        m = self.machines.get(self.points[point].machine)
        if m is None or m.group is None or m.support is None:
            return None
        from edgevib.pipelines.severity import zone_boundaries_mm_s

        return zone_boundaries_mm_s(m.group, m.support)

    def _wait_round(self) -> None:
        with self._evaluating:
            pass

    def evaluate_all(self) -> int:
        """One round over every tracked series (a worker thread); returns how many were evaluated."""
        with self._evaluating:
            return self._round()

    def _round(self) -> int:
        if self.recorder is None:
            return 0
        self.recorder.flush()
        spec = self.settings.spec()
        n = 0
        try:
            reader = HistoryReader(self.history_settings.path, self.history_settings.high_percentile)
        except HistoryError as exc:
            self._rlog.error("reader", "cannot read the history", error=str(exc))
            return 0
        with reader:
            available = reader.points()
            for point, indicator in self._tracked():
                if indicator not in available.get(point, ()):
                    continue
                try:
                    doc = self._evaluate_one(reader, point, indicator, spec)
                except Exception as exc:  # one bad series never stops the others
                    self.errors += 1
                    self._rlog.error(("evaluate", point, indicator), "trend evaluation failed", point=point,
                                     indicator=indicator, error=repr(exc))
                    continue
                if doc is None:
                    continue
                self.latest[(point, indicator)] = doc
                if doc.get("t_s") is not None:
                    self.recorder.write_projection(point, indicator, round(doc["t_s"] * 1e9), doc)
                n += 1
        self.evaluations += n
        return n

    def _evaluate_one(self, reader: HistoryReader, point: str, indicator: str, spec: TrendSpec
                      ) -> dict[str, Any] | None:
        alert, danger, base = self._set_points(point, indicator)
        if base is None:
            base = self._baselines.get((point, indicator)) or reader.baseline(point, indicator)
        doc = evaluate(reader, point, indicator, spec=spec, window_s=self.settings.window_s, alert=alert,
                       danger=danger, iso=self._iso(point, indicator),
                       user_limit=self.settings.limit_for(point, indicator), baseline=base,
                       max_points=self.settings.max_points, plan_days=self.settings.plan_days,
                       act_days=self.settings.act_days)
        doc["machine"] = self.points[point].machine
        if base is None and doc.get("status") == "ok" and self.recorder is not None:
            learned = learn_baseline(reader, point, indicator, min_points=self.settings.min_points,
                                     max_points=self.settings.max_points)
            if learned is not None:
                self._baselines[(point, indicator)] = learned
                self.recorder.write_baseline(point, indicator, *learned, t_ns=time.time_ns())
        return doc

    async def _run(self) -> None:
        while True:
            await asyncio.sleep(self.settings.evaluate_s)
            try:
                await asyncio.to_thread(self.evaluate_all)
            except Exception as exc:  # the loop never dies
                self._rlog.error("round", "trend round failed", error=repr(exc))

    # ------------------------------------------------------------------ views

    def event_info(self, point: str, indicator: str) -> dict[str, Any] | None:
        """What an alarm event of (point, indicator) carries under ``trend`` (None when nothing is known)."""
        doc = self.latest.get((point, indicator))
        if doc is None:
            return None
        return _compact(doc)

    def state_info(self, point: str) -> dict[str, Any]:
        """Indicator → compact trend document, for the point's retained state message."""
        items = list(self.latest.items())  # one C-level copy: the evaluation thread may add entries meanwhile
        return {ind: _compact(doc) for (pid, ind), doc in sorted(items) if pid == point}

    def collector(self) -> TrendCollector:
        return TrendCollector(self)

    def history(self, point: str, indicator: str, since_s: float | None = None, max_points: int = 500,
                level: str = "auto") -> HistorySeries:
        """Read-only: the recorded series of a point's indicator (roll-up medians, or frame values with
        ``level="frames"``; the roll-ups' min/mean/max/high percentile and the not-running periods with it).
        Opens the history file read-only (safe from any thread, beside the writer); raises HistoryError."""
        with HistoryReader(self.history_settings.path, self.history_settings.high_percentile) as r:
            until = r.latest_time_s(point)
            return r.series(point, indicator, since_s=since_s, until_s=until, level=level, max_points=max_points)

    def projection(self, point: str, indicator: str) -> dict[str, Any] | None:
        """Read-only: the latest trend document of a series (see :func:`evaluate`), or None."""
        doc = self.latest.get((point, indicator))
        return None if doc is None else dict(doc)

    def limit_lines(self, point: str, indicator: str) -> list[dict[str, Any]]:
        """Read-only: every limit line of a series (:func:`limit_lines`): the alarm layer's alert and danger set
        points, all ISO 20816-3 zone boundaries for velocity r.m.s. of a machine with group and support and the
        ``[[trend.limits]]`` value.  Unknown point: an empty list."""
        if point not in self.points:
            return []
        alert, danger, _ = self._set_points(point, indicator)
        return limit_lines(INDICATORS[indicator].unit if indicator in INDICATORS else "", alarm=(alert, danger),
                           iso=self._iso(point, indicator), user=self.settings.limit_for(point, indicator))

    def projections(self, point: str | None = None) -> dict[str, dict[str, Any]]:
        """Read-only: indicator → latest trend document, of one point (or ``"point/indicator"`` keys for all)."""
        items = list(self.latest.items())
        if point is not None:
            return {ind: dict(doc) for (pid, ind), doc in items if pid == point}
        return {f"{pid}/{ind}": dict(doc) for (pid, ind), doc in items}


def _compact(doc: Mapping[str, Any]) -> dict[str, Any]:
    keys = ("time", "status", "need", "level", "slope_per_day", "rising", "model", "coverage", "advice",
            "advice_text")
    out = {k: doc.get(k) for k in keys}
    out["limits"] = [{k: lim.get(k) for k in ("label", "value", "status", "eta_s", "eta_low_s", "eta_high_s",
                                               "date", "date_low", "date_high")} for lim in doc.get("limits", [])]
    return out


class TrendCollector:
    """Prometheus families of the trend layer, from its latest documents (fresh on each scrape)."""

    def __init__(self, watch: TrendWatch) -> None:
        self.watch = watch

    def describe(self) -> list[Any]:
        return []

    def collect(self) -> Iterable[Any]:
        w = self.watch
        site = w.config.site.name
        labels = ["site", "machine", "point", "indicator"]
        slope = GaugeMetricFamily("edgevib_trend_slope_per_day", "Robust (Theil-Sen) trend slope of a series since "
                                  "its growth began, in the indicator's unit per day.", labels=labels)
        eta = GaugeMetricFamily("edgevib_trend_limit_eta_seconds", "Projected time until the series reaches a "
                                "limit; bound estimate, or low/high ends of the stated-coverage interval. Absent "
                                "when not rising.", labels=[*labels, "limit", "bound"])
        rising = GaugeMetricFamily("edgevib_trend_rising", "1 while the series rises significantly, else 0.",
                                   labels=labels)
        for (point, ind), doc in list(w.latest.items()):
            p = w.points.get(point)
            if p is None:
                continue
            lab = [site, p.machine, point, ind]
            if doc.get("status") == "ok" and doc.get("slope_per_day") is not None:
                slope.add_metric(lab, float(doc["slope_per_day"]))
                rising.add_metric(lab, 1.0 if doc.get("rising") else 0.0)
            for lim in doc.get("limits", []):
                if lim.get("status") not in ("rising", "reached") or lim.get("eta_s") is None:
                    continue
                for bound, key in (("estimate", "eta_s"), ("low", "eta_low_s"), ("high", "eta_high_s")):
                    if lim.get(key) is not None:
                        eta.add_metric([*lab, lim["label"], bound], float(lim[key]))
        yield slope
        yield eta
        yield rising
        yield CounterMetricFamily("edgevib_trend_evaluation_errors", "Trend evaluations of a series that failed "
                                  "(logged; the other series go on).", value=w.errors)
        rec = w.recorder
        if rec is not None:
            st = rec.stats
            yield CounterMetricFamily("edgevib_history_frames_written", "Frames written to the severity history.",
                                      value=st.written)
            yield CounterMetricFamily("edgevib_history_frames_dropped", "Frames the history dropped because writing "
                                      "fell behind (oldest first).", value=st.dropped)
            yield CounterMetricFamily("edgevib_history_frames_late", "Frames the history skipped because they were "
                                      "not newer than the point's latest recorded frame.", value=st.late)
            yield CounterMetricFamily("edgevib_history_write_errors", "Failed history writes (the batch is retried).",
                                      value=st.write_errors)
            pruned = CounterMetricFamily("edgevib_history_pruned_rows", "Rows pruned to keep the history within "
                                         "its disk budget, by kind (frames, minute, hour, day).", labels=["kind"])
            for kind, n in st.pruned.items():
                pruned.add_metric([kind], float(n))
            yield pruned
            yield GaugeMetricFamily("edgevib_history_bytes", "Disk used by the history database and its WAL.",
                                    value=st.bytes)


def create_trend_watch(config: Config, alarm_layer: AlarmLayer | None = None,
                       registry: CollectorRegistry | None = None) -> TrendWatch | None:
    """The trend layer for a configuration (None when ``[history] enabled = false``); its Prometheus collector is
    registered on ``registry`` when it starts."""
    hist = history_settings(config.history)
    if not hist.enabled:
        return None
    return TrendWatch(config, hist, trend_settings(config.trend), alarm_layer=alarm_layer, registry=registry)
