"""The daemon's own exception hierarchy (library and OS errors are translated into these in one place each)."""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["ConfigError", "EdgevibError", "SourceError"]


class EdgevibError(Exception):
    """Base of the daemon's own exception hierarchy."""


class ConfigError(EdgevibError):
    """An invalid configuration.  ``path`` is the dotted key path (``points[2].bearing.elements``), ``problem`` what
    is wrong there; ``problems``: every ``(path, problem)`` found, the first being ``path`` and ``problem`` (a file
    with several mistakes reports them all, one a line)."""

    def __init__(self, path: str, problem: str, more: Sequence[tuple[str, str]] = ()) -> None:
        self.path = path
        self.problem = problem
        self.problems = ((path, problem), *more)
        lines = [f"{p}: {q}" if p else q for p, q in self.problems]
        super().__init__(lines[0] if not more else f"{len(lines)} problems:\n" + "\n".join(f"  {x}" for x in lines))

    @classmethod
    def all_of(cls, errors: Sequence[ConfigError]) -> ConfigError:
        """One error reporting every problem of ``errors`` (at least one), in order, each once."""
        problems = list(dict.fromkeys(p for e in errors for p in e.problems))
        return cls(*problems[0], more=problems[1:])


class SourceError(EdgevibError):
    """A source could not connect or lost its connection (library errors are translated into this)."""
