"""Logging set-up (structlog) and a rate-limited logger for per-block warnings.

JSON lines on stdout when it is not a terminal (journald and log shippers read them), readable console lines on
a terminal.  :class:`RateLimitedLogger` lets a noisy condition (a stream of bad blocks) log once per interval per
key, reporting how many similar events were suppressed meanwhile.
"""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Callable, Hashable
from typing import Any

import structlog

__all__ = ["RateLimitedLogger", "configure_logging", "get_logger"]

_LEVELS = {"debug": logging.DEBUG, "info": logging.INFO, "warning": logging.WARNING, "error": logging.ERROR}


def configure_logging(level: str = "info", fmt: str = "auto", stream: Any = None) -> None:
    """Configure structlog for the process: ``fmt`` is ``auto`` | ``json`` | ``console``."""
    out = stream if stream is not None else sys.stdout
    if fmt == "auto":
        fmt = "console" if getattr(out, "isatty", lambda: False)() else "json"
    renderer: Any = (structlog.dev.ConsoleRenderer(colors=False) if fmt == "console"
                     else structlog.processors.JSONRenderer())
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            structlog.processors.format_exc_info,
            renderer,
        ],
        wrapper_class=structlog.make_filtering_bound_logger(_LEVELS.get(level, logging.INFO)),
        logger_factory=structlog.PrintLoggerFactory(file=out),
        cache_logger_on_first_use=False,
    )


def get_logger(name: str) -> Any:
    return structlog.get_logger(name)


class RateLimitedLogger:
    """Logs an event at most once per ``interval_s`` per key; the next one carries ``suppressed=N``."""

    def __init__(self, logger: Any, interval_s: float = 10.0, clock: Callable[[], float] = time.monotonic,
                 max_keys: int = 10_000) -> None:
        self.logger = logger
        self.interval_s = interval_s
        self.clock = clock
        self.max_keys = max_keys
        self._last: dict[Hashable, float] = {}
        self._suppressed: dict[Hashable, int] = {}

    def _allow(self, key: Hashable) -> int | None:
        now = self.clock()
        last = self._last.get(key)
        if last is not None and now - last < self.interval_s:
            self._suppressed[key] = self._suppressed.get(key, 0) + 1
            return None
        if len(self._last) >= self.max_keys:  # bounded memory under a flood of distinct keys
            self._last.clear()
            self._suppressed.clear()
        self._last[key] = now
        return self._suppressed.pop(key, 0)

    def _log(self, method: str, key: Hashable, event: str, **kw: Any) -> bool:
        suppressed = self._allow(key)
        if suppressed is None:
            return False
        if suppressed:
            kw["suppressed"] = suppressed
        getattr(self.logger, method)(event, **kw)
        return True

    def info(self, key: Hashable, event: str, **kw: Any) -> bool:
        return self._log("info", key, event, **kw)

    def warning(self, key: Hashable, event: str, **kw: Any) -> bool:
        return self._log("warning", key, event, **kw)

    def error(self, key: Hashable, event: str, **kw: Any) -> bool:
        return self._log("error", key, event, **kw)
