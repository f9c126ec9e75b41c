"""The former factory of the alarm layer: it is wired by :func:`edgevib.daemon.app.wire_alarms` now."""

from edgevib.daemon.app import wire_alarms as create_sink

__all__ = ["create_sink"]
