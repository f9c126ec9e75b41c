"""The daemon's seam for the alarm layer: ``create_sink(config, registry)`` (called by ``edgevib.daemon.app``)."""

from __future__ import annotations

from prometheus_client import CollectorRegistry

from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.config import Config

__all__ = ["create_sink"]


def create_sink(config: Config, registry: CollectorRegistry | None = None) -> AlarmLayer | None:
    """The alarm layer for a configuration (``None`` when ``[alarms] enabled = false``); its Prometheus collector
    is registered on ``registry`` (the daemon's metrics registry) when the layer starts."""
    settings = config.alarm_settings
    if not settings.enabled:
        return None
    return AlarmLayer(config, settings, registry=registry)
