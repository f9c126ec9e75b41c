"""Scale-out: which measurement points one daemon instance owns.

``[site] shard`` in the configuration takes one of two forms::

    shard = { count = 3, index = 0 }          # this instance keeps points whose stable hash % 3 == 0
    shard = { points = ["P-101-DE-H", ...] }  # ...or an explicit list of point ids

The hash is the first 8 bytes of the SHA-256 of the UTF-8 point id, read as a big-endian unsigned integer.  It is
the same on every machine, Python version and run (unlike the built-in ``hash()``, which is salted per process),
so N instances given the same point list and ``index = 0 .. N-1`` split it into disjoint parts that together
cover every point.  Adding or removing a point never moves any other point between instances; changing ``count``
re-deals them.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from edgevib.daemon.errors import ConfigError

__all__ = ["MAX_SHARDS", "Shard", "owns_point", "select_points", "shard_of", "validate_shard"]

MAX_SHARDS = 4096  # far beyond any plant; bounds a mistyped count


@dataclass(frozen=True, slots=True)
class Shard:
    """A validated shard: either ``count``/``index`` (hash split) or an explicit ``points`` set."""

    count: int | None = None
    index: int | None = None
    points: frozenset[str] | None = None

    def owns(self, point_id: str) -> bool:
        if self.points is not None:
            return point_id in self.points
        assert self.count is not None and self.index is not None
        return shard_of(point_id, self.count) == self.index

    def describe(self) -> str:
        """A short summary for logs and the service status line."""
        if self.points is not None:
            return f"explicit list of {len(self.points)} point(s)"
        return f"shard {self.index} of {self.count}"


def shard_of(point_id: str, count: int) -> int:
    """The instance index ``0 .. count-1`` that owns ``point_id`` in a ``count``-way hash split."""
    if count < 1:
        raise ValueError(f"shard count must be at least 1, got {count}")
    digest = hashlib.sha256(point_id.encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") % count


def owns_point(point_id: str, shard: Shard | Mapping[str, Any] | None) -> bool:
    """Whether this instance owns ``point_id``.  ``shard`` is a :class:`Shard`, a raw ``{"count", "index"}`` /
    ``{"points"}`` mapping (validated here), or ``None`` for an unsharded instance that owns every point."""
    if shard is None:
        return True
    if not isinstance(shard, Shard):
        shard = validate_shard(shard, "site.shard")
    return shard.owns(point_id)


def select_points(point_ids: Iterable[str], shard: Shard | Mapping[str, Any] | None) -> list[str]:
    """The ids this instance owns, in their original order."""
    if shard is not None and not isinstance(shard, Shard):
        shard = validate_shard(shard, "site.shard")
    return [p for p in point_ids if owns_point(p, shard)]


def _int(raw: Any, path: str) -> int:
    if isinstance(raw, bool) or not isinstance(raw, int):
        raise ConfigError(path, f"must be an integer, got {raw!r}")
    return raw


def validate_shard(raw: Any, path: str) -> Shard:
    """Validate the ``shard`` table found at ``path`` (e.g. ``"site.shard"``); raises :class:`ConfigError`."""
    if isinstance(raw, Shard):
        return raw
    if not isinstance(raw, Mapping):
        raise ConfigError(path, f"must be a table like {{ count = 2, index = 0 }} or {{ points = [...] }}, "
                                f"got {type(raw).__name__}")
    keys = set(raw)
    unknown = keys - {"count", "index", "points"}
    if unknown:
        raise ConfigError(path, f"unknown key(s) {', '.join(sorted(map(str, unknown)))}; "
                                "use count and index, or points")
    if "points" in keys:
        if keys & {"count", "index"}:
            raise ConfigError(path, "give either count and index, or points, not both")
        points = raw["points"]
        if not isinstance(points, list | tuple) or not points:
            raise ConfigError(f"{path}.points", f"must be a non-empty list of point ids, got {points!r}")
        seen: set[str] = set()
        for i, p in enumerate(points):
            if not isinstance(p, str) or not p:
                raise ConfigError(f"{path}.points[{i}]", f"must be a non-empty string, got {p!r}")
            if p in seen:
                raise ConfigError(f"{path}.points[{i}]", f"point {p!r} is listed twice")
            seen.add(p)
        return Shard(points=frozenset(seen))
    if keys != {"count", "index"}:
        missing = sorted({"count", "index"} - keys)
        raise ConfigError(path, f"missing {' and '.join(missing)}; a hash split needs both count and index")
    count = _int(raw["count"], f"{path}.count")
    index = _int(raw["index"], f"{path}.index")
    if not 1 <= count <= MAX_SHARDS:
        raise ConfigError(f"{path}.count", f"must be between 1 and {MAX_SHARDS}, got {count}")
    if not 0 <= index < count:
        raise ConfigError(f"{path}.index", f"must be between 0 and count - 1 = {count - 1}, got {index}")
    return Shard(count=count, index=index)
