"""The wire time stamp: RFC 3339 (section 5.6 grammar) in UTC, milliseconds, checked against the standard library's
datetime (a reference implementation of the same calendar arithmetic)."""

from __future__ import annotations

import datetime as dt
import re

from hypothesis import given
from hypothesis import strategies as st

from edgevib.daemon.timestamps import rfc3339_utc, rfc3339_utc_s

# RFC 3339 section 5.6: date-time = full-date "T" full-time; we always write time-offset "Z" and 3 fraction digits
FORM = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{3}Z$")


def test_known_instant() -> None:
    # 2026-12-02T04:37:23.123456789Z as nanoseconds: the CONTRACTS example
    t_ns = round(dt.datetime(2026, 12, 2, 4, 37, 23, tzinfo=dt.UTC).timestamp()) * 10**9 + 123_456_789
    assert rfc3339_utc(t_ns) == "2026-12-02T04:37:23.123Z"
    assert rfc3339_utc(0) == "1970-01-01T00:00:00.000Z"


@given(st.integers(min_value=0, max_value=4_102_444_800 * 10**9))  # up to 2100
def test_matches_datetime(t_ns: int) -> None:
    text = rfc3339_utc(t_ns)
    assert FORM.match(text)
    parsed = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    # truncated to the millisecond: never later than the instant, less than 1 ms before it
    ms = t_ns // 1_000_000
    assert round(parsed.timestamp() * 1000) == ms


def test_seconds_variant() -> None:
    assert rfc3339_utc_s(1.5) == "1970-01-01T00:00:01.500Z"
