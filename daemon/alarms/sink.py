"""The daemon's seam for the alarm layer: ``create_sink(config, daemon)`` (called by ``edgevib.daemon.app``)."""

from __future__ import annotations

from typing import Any

from edgevib.daemon.alarms.config import AlarmSettings, parse_alarm_config
from edgevib.daemon.alarms.engine import AlarmLayer

__all__ = ["create_sink"]


def create_sink(config: Any, daemon: Any = None) -> AlarmLayer | None:
    """The alarm layer for a configuration (``None`` when ``[alarms] enabled = false``); its Prometheus collector
    is registered on the daemon's metrics registry when the layer starts."""
    settings = config.alarms
    if not isinstance(settings, AlarmSettings) or settings.state_dir != str(config.site.state_dir):
        # Not parsed yet, or the state directory was overridden after parsing (``edgevib run --state-dir``):
        # resolve the alarm tables again against the configuration as it is now.
        doc: dict[str, Any] = dict(getattr(config, "alarm_tables", {}) or {})
        doc["points"] = [{"id": p.id, **({"limits": dict(p.limits)} if p.limits else {})} for p in config.points]
        settings = parse_alarm_config(doc, config)
    if not settings.enabled:
        return None
    metrics = getattr(daemon, "metrics", None)
    return AlarmLayer(config, settings, registry=getattr(metrics, "registry", None))
