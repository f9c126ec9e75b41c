"""The alarm layer's configuration: ``[alarms]``, ``[alarms.health]``, ``[feed]``, ``[feed.webhook]``, ``[capture]``
and each point's ``limits`` table (schema annotated in ``config/example-plant.toml``).

:func:`parse_alarm_config` is called by :func:`edgevib.daemon.config.parse_config` with the whole TOML document
and the already parsed daemon configuration; every problem is a ConfigError naming the key path.

A limit names an indicator of :data:`INDICATORS` and gives each level (``alert``, ``danger``) as

* a number — an absolute set point in the indicator's unit;
* ``"iso"`` — the ISO 20816-3 boundary of the machine's group and support (alert B/C, danger C/D), velocity
  r.m.s. only;
* ``"iso-baseline"`` (alert only) — the ISO 10816-3/20816-3 guidance: learned baseline + 0.25 × B/C, at most
  1.25 × B/C (B/C until a baseline is learned);
* ``{ factor = F }`` — F × the learned baseline mean; ``{ sigma = K }`` — baseline mean + K standard deviations.

``rule = "iso"`` / ``rule = "iso-baseline"`` is shorthand for the velocity limit (danger at C/D).  Following the
same guidance, a danger level on velocity r.m.s. is never set from the baseline.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

from edgevib.daemon.interfaces import ConfigError
from edgevib.pipelines.alarm import Delay
from edgevib.pipelines.health import HealthSpec
from edgevib.pipelines.severity import zone_boundaries_mm_s
from edgevib.pipelines.types import FrameIndicators

__all__ = [
    "INDICATORS",
    "AlarmSettings",
    "CaptureConfig",
    "FeedConfig",
    "IndicatorDef",
    "LevelRule",
    "LimitConfig",
    "WebhookConfig",
    "default_settings",
    "parse_alarm_config",
]

def iso_boundaries(group: int, support: str) -> tuple[float, float, float]:
    """ISO 20816-3 zone boundaries (A/B, B/C, C/D) in mm/s r.m.s. for a machine group and support."""
    return zone_boundaries_mm_s(group, support)


# --------------------------------------------------------------------------------------------- indicators


def _order(key: str) -> Callable[[FrameIndicators], float | None]:
    return lambda ind: ind.orders_mm_s.get(key)


def _looseness(ind: FrameIndicators) -> float | None:
    vals = [v for k, v in ind.orders_mm_s.items() if k not in ("1x", "2x") and v is not None and math.isfinite(v)]
    return max(vals) if vals else None


def _family(name: str, attr: str) -> Callable[[FrameIndicators], float | None]:
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
    extract: Callable[[FrameIndicators], float | None] = field(repr=False, compare=False)


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


# --------------------------------------------------------------------------------------------- settings


@dataclass(frozen=True, slots=True)
class LevelRule:
    """How one level's set point is obtained (see the module docstring)."""

    kind: Literal["absolute", "iso", "iso-baseline", "factor", "sigma"]
    value: float = 0.0

    @property
    def needs_baseline(self) -> bool:
        return self.kind in ("iso-baseline", "factor", "sigma")


@dataclass(frozen=True, slots=True)
class LimitConfig:
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
    def key(self) -> tuple[str, str]:
        return (self.point, self.indicator)

    @property
    def needs_baseline(self) -> bool:
        return any(r is not None and r.needs_baseline for r in (self.alert, self.danger))


@dataclass(frozen=True, slots=True)
class WebhookConfig:
    url: str
    timeout_s: float = 10.0
    retry_min_s: float = 1.0
    retry_max_s: float = 300.0
    token: Any = None  # edgevib.daemon.config.Secret: sent as "Authorization: Bearer …"


_TOPIC = "edgevib/{site}/alarms/{machine}/{point}"
_STATE_TOPIC = "edgevib/{site}/alarm-state/{machine}/{point}"
_COMMAND_TOPIC = "edgevib/{site}/alarms/command"
_RESPONSE_TOPIC = "edgevib/{site}/alarms/response"
_EVENT_SOURCE = "edgevib/{site}"


@dataclass(frozen=True, slots=True)
class FeedConfig:
    """The alarm feed.  Topic templates use ``{site}``, ``{machine}``, ``{point}``; the command and response
    topics and the CloudEvents ``source`` are resolved for the site (an empty command topic: no MQTT commands)."""

    enabled: bool = False
    connection: Any = None  # edgevib.daemon.config.MqttConnection
    topic: str = _TOPIC
    state_topic: str = _STATE_TOPIC
    command_topic: str = _COMMAND_TOPIC
    response_topic: str = _RESPONSE_TOPIC
    event_source: str = _EVENT_SOURCE
    webhook: WebhookConfig | None = None


@dataclass(frozen=True, slots=True)
class CaptureConfig:
    enabled: bool = True
    dir: str = "captures"
    max_bytes: int = 256 * 1024 * 1024
    max_files: int = 2000


@dataclass(frozen=True, slots=True)
class AlarmSettings:
    """Everything the alarm layer needs, resolved per point."""

    enabled: bool = True
    state_dir: str = "."
    site: str = "edgevib"
    limits: tuple[LimitConfig, ...] = ()
    health: Mapping[str, HealthSpec] = field(default_factory=dict)
    health_enabled: bool = True
    startup_grace_s: float = 30.0
    run_threshold_velocity_mm_s: float = 0.2
    no_data_frames: int = 5
    sensor_recover_frames: int = 3
    baseline_frames: int = 100
    trend_frames: int = 30
    max_shelve_s: float = 7 * 86400.0
    socket_path: str = "alarms.sock"
    socket_mode: int = 0o600
    feed: FeedConfig = field(default_factory=FeedConfig)
    capture: CaptureConfig = field(default_factory=CaptureConfig)
    config_digest: str = ""


# --------------------------------------------------------------------------------------------- parsing


def _tables() -> tuple[Any, Any, Any]:
    from edgevib.daemon import config as dc

    return dc._Table, dc._parse_mqtt_connection, dc._resolve_path


def _delay(t: Any, name: str, default: Delay) -> Delay:
    frames, seconds = t.int(f"{name}_frames", None, lo=1, hi=10000), t.float(f"{name}_s", None, lo=0.0, hi=86400.0)
    if frames is not None and seconds is not None:
        raise ConfigError(t.key(f"{name}_s"), f"give either {name}_frames or {name}_s, not both")
    if frames is not None:
        return Delay(frames=frames)
    if seconds is not None:
        return Delay(seconds=seconds)
    return default


def _level(t: Any, name: str, indicator: str, iso: tuple[float, float, float] | None,
           machine_hint: str) -> LevelRule | None:
    raw = t.raw(name)
    path = t.key(name)
    if raw is None:
        return None
    if isinstance(raw, bool):
        raise ConfigError(path, "must be a number, \"iso\", \"iso-baseline\", { factor = F } or { sigma = K }")
    if isinstance(raw, int | float):
        v = float(raw)
        if not math.isfinite(v):
            raise ConfigError(path, f"must be finite, got {raw!r}")
        return LevelRule("absolute", v)
    if isinstance(raw, str):
        if raw not in ("iso", "iso-baseline"):
            raise ConfigError(path, f"{raw!r} is not \"iso\" or \"iso-baseline\"")
        if indicator != "velocity_rms_mm_s":
            raise ConfigError(path, f"ISO 20816-3 zones apply to velocity_rms_mm_s only, not {indicator}")
        if iso is None:
            raise ConfigError(path, f"ISO 20816-3 zones need the machine's group and support ({machine_hint})")
        if raw == "iso-baseline" and name != "alert":
            raise ConfigError(path, "\"iso-baseline\" is an alert rule; danger stays at the ISO C/D boundary "
                              "(ISO 20816-3 guidance: trip-like values are never set from the baseline)")
        return LevelRule(raw)  # type: ignore[arg-type]
    if isinstance(raw, dict):
        if set(raw) == {"factor"} or set(raw) == {"sigma"}:
            (kind, v), = raw.items()
            if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v) or v <= 0:
                raise ConfigError(f"{path}.{kind}", f"must be a number > 0, got {v!r}")
            if kind == "factor" and v <= 1.0:
                raise ConfigError(f"{path}.factor", f"{v:g} must be above 1 (a limit above the baseline)")
            if name == "danger" and indicator == "velocity_rms_mm_s":
                raise ConfigError(path, "a danger level on velocity r.m.s. is never set from the baseline "
                                  "(ISO 20816-3 guidance); give a number or \"iso\"")
            return LevelRule(kind, float(v))
        raise ConfigError(path, f"a relative level is {{ factor = F }} or {{ sigma = K }}, got keys {sorted(raw)}")
    raise ConfigError(path, f"must be a number, a string or a table, got {type(raw).__name__}")


def _limit(t: Any, point: str, indicator: str, iso: tuple[float, float, float] | None, machine_hint: str,
           defaults: dict[str, Any]) -> LimitConfig | None:
    enabled = t.bool("enabled", True)
    rule = t.str("rule", None, choices=("iso", "iso-baseline"))
    if rule is not None and (t.has("alert") or t.has("danger")):
        raise ConfigError(t.key("rule"), "give either rule or alert/danger levels, not both")
    if rule is not None and indicator != "velocity_rms_mm_s":
        raise ConfigError(t.key("rule"), f"ISO 20816-3 rules apply to velocity_rms_mm_s only, not {indicator}")
    if rule is not None:
        t.doc = {**t.doc, "alert": rule, "danger": "iso"}
    alert = _level(t, "alert", indicator, iso, machine_hint)
    danger = _level(t, "danger", indicator, iso, machine_hint)
    if enabled and alert is None and danger is None:
        raise ConfigError(t.path, "a limit needs an alert and/or a danger level (or enabled = false)")
    if alert is not None and danger is not None and alert.kind == danger.kind == "absolute" and \
            danger.value <= alert.value:
        raise ConfigError(t.key("danger"), f"danger {danger.value:g} must be above alert {alert.value:g}")
    lim = LimitConfig(
        point=point, indicator=indicator, alert=alert, danger=danger,
        deadband=t.float("deadband", defaults["deadband"], lo=0.001, hi=0.5),
        on_delay=_delay(t, "on_delay", defaults["on_delay"]), off_delay=_delay(t, "off_delay", defaults["off_delay"]),
        latching=t.bool("latching", defaults["latching"]), iso_mm_s=iso)
    t.done()
    return lim if enabled else None


_HEALTH_KEYS = ("flatline_std_g", "repeat_fraction", "clip_fraction", "mean_tolerance_g", "step_ratio",
                "step_floor_g", "spike_sigma", "noise_factor")


def _health(t: Any, base: HealthSpec, nyquist_hz: float | None = None) -> HealthSpec:
    changes: dict[str, Any] = {}
    for k in _HEALTH_KEYS:
        v = t.float(k, None, lo=0.0, lo_open=True)
        if v is not None:
            changes[k] = v
    if t.has("bias_window_v"):
        changes["bias_window_v"] = t.pair("bias_window_v")
    if nyquist_hz is not None:  # per point
        fs = t.float("full_scale_g", None, lo=0.0, lo_open=True)
        if fs is not None:
            changes["full_scale_g"] = fs
        gravity = t.float("gravity_g", None, lo=-1.0, hi=1.0)
        if gravity is not None:
            changes["expected_mean_g"] = gravity
        nd = t.float("noise_ug_rthz", None, lo=0.0, lo_open=True)
        if nd is not None:
            changes["noise_density_ug_rthz"] = nd
        band = t.pair("noise_band_hz", None)
        if band is not None:
            if band[1] > nyquist_hz:
                raise ConfigError(t.key("noise_band_hz"), f"high edge {band[1]:g} Hz is above Nyquist "
                                  f"{nyquist_hz:g} Hz")
            changes["noise_band_hz"] = band
    t.done()
    try:
        return replace(base, **changes)
    except ValueError as exc:
        raise ConfigError(t.path, str(exc)) from None


def _template(t: Any, name: str, default: str, allowed: tuple[str, ...]) -> str:
    v = str(t.str(name, default))
    if not v:
        return v
    try:
        v.format(**{k: "x" for k in allowed})
    except (KeyError, IndexError, ValueError) as exc:
        raise ConfigError(t.key(name), f"template {v!r} may only use {', '.join('{' + a + '}' for a in allowed)} "
                          f"({exc})") from None
    if "+" in v or "#" in v:
        raise ConfigError(t.key(name), f"a topic to publish on cannot contain wildcards: {v!r}")
    return v


def _feed(t: Any, config: Any, base: Path) -> FeedConfig:
    _, parse_conn, _ = _tables()
    enabled = t.bool("enabled", True)
    source = t.str("source", None)
    if source is not None and t.has("url"):
        raise ConfigError(t.key("url"), "give either source (reuse its broker settings) or url, not both")
    conn = None
    site = config.site.name
    if source is not None:
        src = next((s for s in config.sources if s.name == source), None)
        if src is None:
            raise ConfigError(t.key("source"), f"unknown source {source!r} (configured: "
                              f"{', '.join(s.name for s in config.sources) or 'none'})")
        if getattr(src, "type", None) != "mqtt":
            raise ConfigError(t.key("source"), f"source {source!r} is {src.type}, not mqtt")
        conn = replace(src.connection, client_id=src.connection.client_id + "-feed")
    elif t.has("url"):
        conn = parse_conn(t, base, f"edgevib-{site}-feed")
    wh_t = t.table("webhook")
    webhook = None
    if wh_t is not None:
        url = wh_t.str("url")
        if not url.startswith(("http://", "https://")):
            raise ConfigError(wh_t.key("url"), f"{url!r} is not an http:// or https:// URL")
        rmin = wh_t.float("retry_min_s", 1.0, lo=0.01, hi=3600.0)
        rmax = wh_t.float("retry_max_s", 300.0, lo=0.01, hi=86400.0)
        if rmax < rmin:
            raise ConfigError(wh_t.key("retry_max_s"), f"{rmax:g} s is below retry_min_s {rmin:g} s")
        webhook = WebhookConfig(url=url, timeout_s=wh_t.float("timeout_s", 10.0, lo=0.1, hi=300.0),
                                retry_min_s=rmin, retry_max_s=rmax, token=wh_t.secret("token", base))
        wh_t.done()
    if enabled and conn is None and webhook is None:
        raise ConfigError(t.key("url"), "the feed needs a broker (url or source) and/or [feed.webhook]")
    point_keys = ("site", "machine", "point")
    feed = FeedConfig(
        enabled=enabled, connection=conn,
        topic=_template(t, "topic", _TOPIC, point_keys),
        state_topic=_template(t, "state_topic", _STATE_TOPIC, point_keys),
        command_topic=_template(t, "command_topic", _COMMAND_TOPIC, ("site",)).format(site=site),
        response_topic=_template(t, "response_topic", _RESPONSE_TOPIC, ("site",)).format(site=site),
        event_source=str(t.str("event_source", _EVENT_SOURCE)).format(site=site), webhook=webhook)
    if not feed.event_source:
        raise ConfigError(t.key("event_source"), "must not be empty (CloudEvents requires a source)")
    t.done()
    return feed


def default_settings(config: Any) -> AlarmSettings:
    """The settings of a configuration without any alarm tables (ISO limits where the machine allows)."""
    return parse_alarm_config({}, config)


def parse_alarm_config(doc: Mapping[str, Any], config: Any) -> AlarmSettings:
    """Parse the alarm layer's tables of a whole TOML document against the parsed daemon configuration."""
    table_cls, _, resolve = _tables()
    base = Path(getattr(config, "base_dir", "."))
    state_dir = Path(config.site.state_dir)
    al = table_cls(dict(doc.get("alarms", {}) or {}), "alarms") if "alarms" in doc else table_cls({}, "alarms")
    enabled = al.bool("enabled", True)
    defaults = {
        "deadband": al.float("deadband", 0.05, lo=0.001, hi=0.5),
        "on_delay": _delay(al, "on_delay", Delay(frames=2)),
        "off_delay": _delay(al, "off_delay", Delay(frames=2)),
        "latching": al.bool("latching", False),
    }
    default_rule = al.str("default_velocity_rule", "iso", choices=("iso", "iso-baseline", "none"))
    socket_mode_s = al.str("socket_mode", "0600", choices=("0600", "0660"))
    socket = al.str("socket", "alarms.sock")
    health_t = al.table("health")
    health_enabled = True
    base_health = HealthSpec()
    if health_t is not None:
        health_enabled = health_t.bool("enabled", True)
        base_health = _health(health_t, base_health)
    settings_kw: dict[str, Any] = dict(
        startup_grace_s=al.float("startup_grace_s", 30.0, lo=0.0, hi=86400.0),
        run_threshold_velocity_mm_s=al.float("run_threshold_velocity_mm_s", 0.2, lo=0.0, hi=100.0),
        no_data_frames=al.int("no_data_frames", 5, lo=1, hi=100000),
        sensor_recover_frames=al.int("sensor_recover_frames", 3, lo=1, hi=10000),
        baseline_frames=al.int("baseline_frames", 100, lo=5, hi=10_000_000),
        trend_frames=al.int("trend_frames", 30, lo=3, hi=100000),
        max_shelve_s=3600.0 * al.float("max_shelve_h", 168.0, lo=0.01, hi=24 * 366.0),
    )
    al.done()

    machines = {m.id: m for m in config.machines}
    owned = {p.id: p for p in config.points}
    raw_points = doc.get("points", []) or []
    limits: list[LimitConfig] = []
    health: dict[str, HealthSpec] = {}
    for i, raw in enumerate(raw_points if isinstance(raw_points, list) else []):
        if not isinstance(raw, dict) or raw.get("id") not in owned:
            continue
        p = owned[raw["id"]]
        m = machines.get(p.machine)
        iso = None
        mi = next((j for j, mm in enumerate(config.machines) if mm.id == p.machine), 0)
        if m is not None and m.group is not None and m.support is not None:
            iso = iso_boundaries(m.group, m.support)
        hint = f"machines[{mi}] {p.machine!r}"
        spec = replace(base_health, sensor_type="mems" if p.sensor_type == "mems" else "piezo")
        point_limits: dict[str, LimitConfig | None] = {}
        lt_raw = raw.get("limits")
        if lt_raw is not None:
            lt = table_cls(lt_raw, f"points[{i}].limits")
            for name in list(lt.doc):
                if name == "health":
                    ht = lt.table("health")
                    spec = _health(ht, spec, nyquist_hz=p.fs_hz / 2)
                    continue
                if name not in INDICATORS:
                    raise ConfigError(lt.key(name), f"unknown indicator (known: health, {', '.join(INDICATORS)})")
                sub = lt.table(name)
                if name.startswith("bearing_") and p.envelope_band_hz is None:
                    raise ConfigError(lt.key(name), "this point has no envelope indicators "
                                      f"({p.envelope_note or 'no envelope band'})")
                if name.startswith("bearing_") and p.bearing is None:
                    raise ConfigError(lt.key(name), "bearing defect limits need the point's bearing geometry")
                point_limits[name] = _limit(sub, p.id, name, iso, hint, defaults)
            lt.done()
        if "velocity_rms_mm_s" not in point_limits and default_rule != "none" and iso is not None:
            point_limits["velocity_rms_mm_s"] = LimitConfig(
                point=p.id, indicator="velocity_rms_mm_s", alert=LevelRule(default_rule),
                danger=LevelRule("iso"), deadband=defaults["deadband"], on_delay=defaults["on_delay"],
                off_delay=defaults["off_delay"], latching=defaults["latching"], iso_mm_s=iso)
        limits += [lim for lim in point_limits.values() if lim is not None]
        health[p.id] = spec

    feed = FeedConfig(enabled=False, command_topic="", response_topic="",
                      event_source=_EVENT_SOURCE.format(site=config.site.name))
    if "feed" in doc:
        feed = _feed(table_cls(doc["feed"], "feed"), config, base)
    capture = CaptureConfig()
    if "capture" in doc:
        ct = table_cls(doc["capture"], "capture")
        capture = CaptureConfig(enabled=ct.bool("enabled", True), dir=resolve(ct.str("dir", "captures"), state_dir),
                                max_bytes=int(ct.float("max_mb", 256.0, lo=0.01, hi=1e6) * 1024 * 1024),
                                max_files=ct.int("max_files", 2000, lo=1, hi=10_000_000))
        ct.done()
    else:
        capture = replace(capture, dir=str(state_dir / capture.dir))
    return AlarmSettings(
        enabled=enabled, state_dir=str(state_dir), site=config.site.name, limits=tuple(limits), health=health,
        health_enabled=health_enabled, socket_path=resolve(socket, state_dir), socket_mode=int(socket_mode_s, 8),
        feed=feed, capture=capture, config_digest=getattr(config, "digest", ""), **settings_kw)
