"""The alarm layer's settings resolved per point from the configuration's ``[alarms]``, ``[feed]``, ``[capture]``
tables and each point's ``limits`` (declared in :mod:`edgevib.daemon.config`).

A limit names an indicator of :data:`~edgevib.daemon.indicators.LIMITABLE` and gives each level as a number, ``"iso"``
(the ISO 20816-3 boundary of the machine's group and support: alert B/C, danger C/D; velocity r.m.s. only),
``"iso-baseline"`` (alert only: learned baseline + 0.25 × B/C, at most 1.25 × B/C), ``{ factor = F }`` or
``{ sigma = K }``; a verdict limit (``bearing_<family>_detected``, a limit kind of its own) gives ``true`` for a
level: crossed while the envelope analysis detects that family.  A point without a ``velocity_rms_mm_s``
limit gets ``[alarms] default_velocity_rule`` where its machine has an ISO group and support.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from urllib.parse import quote

from edgevib.daemon.config import (
    AlarmsConfig,
    CaptureConfig,
    Config,
    FeedConfig,
    LevelRule,
    LimitConfigTable,
    PointConfig,
    WebhookConfig,
    _Findings,
    _HealthThresholds,
)
from edgevib.daemon.interfaces import ConfigError
from edgevib.pipelines.alarm import Delay
from edgevib.pipelines.health import HealthSpec
from edgevib.pipelines.severity import zone_boundaries_mm_s
from edgevib.pipelines.types import PipelineError

__all__ = [
    "AlarmSettings",
    "CaptureConfig",
    "FeedConfig",
    "LevelRule",
    "LimitConfig",
    "WebhookConfig",
    "alarm_settings",
]


@dataclass(frozen=True, slots=True)
class LimitConfig:
    """One limit of one point, resolved: levels, deadband, delays, latching and the machine's ISO boundaries."""

    point: str
    indicator: str
    alert: LevelRule | None
    danger: LevelRule | None
    deadband: float = 0.05
    on_delay: Delay = field(default_factory=Delay)
    off_delay: Delay = field(default_factory=Delay)
    latching: bool = False
    iso_mm_s: tuple[float, float, float] | None = None  # (A/B, B/C, C/D) of the point's machine

    @property
    def verdict(self) -> bool:
        """A verdict limit (``bearing_<family>_detected = { alert = true }``): crossed while the family is
        detected (the indicator reads 1 or 0, the level stands at 0.5, so the deadband plays no part)."""
        return self.indicator.endswith("_detected")

    @property
    def key(self) -> tuple[str, str]:
        return (self.point, self.indicator)

    @property
    def needs_baseline(self) -> bool:
        return any(r is not None and r.needs_baseline for r in (self.alert, self.danger))


@dataclass(frozen=True, slots=True)
class AlarmSettings:
    """Everything the alarm layer needs: the ``[alarms]``, ``[feed]`` and ``[capture]`` tables as loaded, and the
    limits and sensor-health specs of every point this instance owns."""

    table: AlarmsConfig
    feed: FeedConfig
    capture: CaptureConfig
    site: str = "edgevib"
    state_dir: str = "."
    limits: tuple[LimitConfig, ...] = ()
    health: Mapping[str, HealthSpec] = field(default_factory=dict)
    config_digest: str = ""


def _delay(frames: int | None, seconds: float | None, default: Delay) -> Delay:
    return Delay(frames=frames) if frames is not None else Delay(seconds=seconds) if seconds is not None else default


def _health(t: _HealthThresholds | None, base: HealthSpec, path: str) -> HealthSpec:
    if t is None:
        return base
    changes = {k: v for k, v in t.model_dump(exclude_none=True).items() if k != "enabled"}
    renames = {"gravity_g": "expected_mean_g", "noise_ug_rthz": "noise_density_ug_rthz"}
    changes = {renames.get(k, k): tuple(v) if isinstance(v, list) else v for k, v in changes.items()}
    try:
        return replace(base, **changes)
    except (ValueError, PipelineError) as exc:
        raise ConfigError(path, str(exc)) from None


def _point_limits(p: PointConfig, i: int, cfg: Config, defaults: LimitConfig, found: _Findings) -> list[LimitConfig]:
    """A point's limits; the problem of each limit table goes to ``found``."""
    m = cfg.machine(p.machine)
    iso = zone_boundaries_mm_s(m.group, m.support) if m.group is not None and m.support is not None else None
    mi = next(j for j, mm in enumerate(cfg.machines) if mm.id == p.machine)
    out: dict[str, LimitConfig | None] = {}
    tables = p.limits.indicators if p.limits is not None else {}
    for name, t in tables.items():
        key = f"points[{i}].limits.{name}"
        if name.startswith("bearing_") and p.envelope_band_hz is None:
            found.add(key, f"this point has no envelope indicators ({p.envelope_note or 'no band'})")
            continue
        if name.startswith("bearing_") and p.bearing is None:
            found.add(key, "bearing defect limits need the point's bearing geometry")
            continue
        alert, danger = t.levels
        if iso is None and any(r is not None and r.kind.startswith("iso") for r in (alert, danger)):
            level = "rule" if t.rule is not None else "alert" if alert is not None and alert.kind.startswith("iso") \
                else "danger"
            found.add(f"{key}.{level}", f"ISO 20816-3 zones need the machine's group and support "
                      f"(machines[{mi}] {p.machine!r})")
            continue
        out[name] = _limit(p.id, name, t, defaults, iso) if t.enabled else None
    rule = cfg.alarms.default_velocity_rule
    if "velocity_rms_mm_s" not in out and rule != "none" and iso is not None:
        out["velocity_rms_mm_s"] = replace(defaults, point=p.id, indicator="velocity_rms_mm_s",
                                           alert=LevelRule(rule), danger=LevelRule("iso"), iso_mm_s=iso)
    return [lim for lim in out.values() if lim is not None]


def _limit(point: str, name: str, t: LimitConfigTable, d: LimitConfig,
           iso: tuple[float, float, float] | None) -> LimitConfig:
    alert, danger = t.levels
    return LimitConfig(point=point, indicator=name, alert=alert, danger=danger,
                       deadband=d.deadband if t.deadband is None else t.deadband,
                       on_delay=_delay(t.on_delay_frames, t.on_delay_s, d.on_delay),
                       off_delay=_delay(t.off_delay_frames, t.off_delay_s, d.off_delay),
                       latching=d.latching if t.latching is None else t.latching, iso_mm_s=iso)


def alarm_settings(cfg: Config) -> AlarmSettings:
    """Resolve the alarm layer's settings of a loaded configuration; raises ConfigError naming the key of every
    problem found."""
    a = cfg.alarms
    defaults = LimitConfig(point="", indicator="", alert=None, danger=None, deadband=a.deadband,
                           on_delay=_delay(a.on_delay_frames, a.on_delay_s, Delay(frames=2)),
                           off_delay=_delay(a.off_delay_frames, a.off_delay_s, Delay(frames=2)), latching=a.latching)
    base = _health(a.health, HealthSpec(), "alarms.health")
    owned = {p.id for p in cfg.points}
    limits: list[LimitConfig] = []
    health: dict[str, HealthSpec] = {}
    found = _Findings()
    for i, p in enumerate(cfg.all_points):
        if p.id not in owned:
            continue
        limits += _point_limits(p, i, cfg, defaults, found)
        with found.check():
            spec = _health(p.limits.health if p.limits is not None else None,
                           replace(base, sensor_type=p.sensor_type), f"points[{i}].limits.health")
            band = spec.noise_band_hz
            if band is not None and band[1] > p.fs_hz / 2:
                raise ConfigError(f"points[{i}].limits.health.noise_band_hz", f"high edge {band[1]:g} Hz is above "
                                  f"Nyquist {p.fs_hz / 2:g} Hz")
            health[p.id] = spec
    found.raise_any()
    feed = cfg.feed or FeedConfig(enabled=False, command_topic="", response_topic="", availability_topic="",
                                  event_source="edgevib/" + quote(cfg.site.name, safe=""))
    return AlarmSettings(table=a, feed=feed, capture=cfg.capture, site=cfg.site.name,
                         state_dir=str(Path(cfg.site.state_dir)), limits=tuple(limits), health=health,
                         config_digest=cfg.digest)
