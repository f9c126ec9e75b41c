"""The daemon's own exception hierarchy (library and OS errors are translated into these in one place each)."""

from __future__ import annotations

__all__ = ["ConfigError", "EdgevibError", "SourceError"]


class EdgevibError(Exception):
    """Base of the daemon's own exception hierarchy."""


class ConfigError(EdgevibError):
    """An invalid configuration.  ``path`` is the dotted key path (``points[2].bearing.elements``)."""

    def __init__(self, path: str, problem: str) -> None:
        super().__init__(f"{path}: {problem}" if path else problem)
        self.path = path
        self.problem = problem


class SourceError(EdgevibError):
    """A source could not connect or lost its connection (library errors are translated into this)."""
