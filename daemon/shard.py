"""Scale-out: which measurement points one daemon instance owns.

``[site] shard`` in the configuration takes one of two forms::

    shard = { count = 3, index = 0 }          # this instance keeps points whose stable hash % 3 == 0
    shard = { points = ["P-101-DE-H", ...] }  # ...or an explicit list of point ids

The hash is the first 8 bytes of the SHA-256 of the UTF-8 point id, read as a big-endian unsigned integer.  It is
the same on every machine, Python version and run (unlike the built-in ``hash()``, which is salted per process),
so N instances given the same point list and ``index = 0 .. N-1`` split it into disjoint parts that together
cover every point.  Adding or removing a point never moves any other point between instances; changing ``count``
re-deals them.  The table itself is :class:`edgevib.daemon.config.ShardConfig`.
"""

from __future__ import annotations

import hashlib

__all__ = ["MAX_SHARDS", "shard_of"]

MAX_SHARDS = 4096  # far beyond any plant; bounds a mistyped count


def shard_of(point_id: str, count: int) -> int:
    """The instance index ``0 .. count-1`` that owns ``point_id`` in a ``count``-way hash split."""
    if count < 1:
        raise ValueError(f"shard count must be at least 1, got {count}")
    digest = hashlib.sha256(point_id.encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") % count
