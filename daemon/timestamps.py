"""The one time-stamp format on every wire edgevib writes (indicator documents, CloudEvents, state messages, API).

RFC 3339 in UTC with a ``Z`` and millisecond precision, e.g. ``2026-12-02T04:37:23.123Z``: sortable as text,
parsed by every RFC 3339 / ISO 8601 reader, and fine enough for frames that last a tenth of a second or more.
The time is truncated (not rounded) to the millisecond, so a stamp never lies in the future of the instant.
"""

from __future__ import annotations

import time

__all__ = ["rfc3339_utc", "rfc3339_utc_s"]


def rfc3339_utc(t_ns: int) -> str:
    """``t_ns`` (nanoseconds since the Unix epoch) as ``YYYY-MM-DDTHH:MM:SS.mmmZ``."""
    s, ns = divmod(int(t_ns), 1_000_000_000)
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(s)) + f".{ns // 1_000_000:03d}Z"


def rfc3339_utc_s(t_s: float) -> str:
    """The same for a time in seconds since the Unix epoch."""
    return rfc3339_utc(round(t_s * 1e9))
