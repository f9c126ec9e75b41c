"""A small TOML writer for configuration and scenario documents: tables, arrays of tables, and small flat tables
inline (``bearing = { … }``, ``alert = { factor = 3.0 }``).  ``tomllib`` reads what it writes back unchanged."""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from typing import Any

__all__ = ["dump_toml"]


def _toml_key(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else json.dumps(k, ensure_ascii=False)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"cannot write non-finite number {v!r} to TOML")
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list | tuple | frozenset | set):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{_toml_key(str(k))} = {_toml_value(x)}" for k, x in v.items()) + " }" if v else "{}"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def _is_array_of_tables(v: Any) -> bool:
    return isinstance(v, list | tuple) and bool(v) and all(isinstance(x, Mapping) for x in v)


def _is_header(v: Any, depth: int, in_array: bool) -> bool:
    """A table gets a ``[header]`` unless it is small and flat and sits inside an array-of-tables entry or deeper
    (``bearing = { … }``, ``alert = { factor = 3.0 }``)."""
    if not isinstance(v, Mapping):
        return _is_array_of_tables(v)
    flat = all(not isinstance(x, Mapping) and not _is_array_of_tables(x) for x in v.values())
    return not flat or len(v) > 4 or depth == 0 or (depth == 1 and not in_array)


def _emit(lines: list[str], prefix: str, table: Mapping[str, Any], depth: int, array: bool = False) -> None:
    if prefix:
        lines.append(f"[[{prefix}]]" if array else f"[{prefix}]")
    in_array = array or depth > 1
    for k, v in table.items():
        if not _is_header(v, depth, in_array):
            lines.append(f"{_toml_key(str(k))} = {_toml_value(v)}")
    if prefix:
        lines.append("")
    for k, v in table.items():
        if _is_header(v, depth, in_array):
            name = f"{prefix}.{_toml_key(str(k))}" if prefix else _toml_key(str(k))
            if isinstance(v, Mapping):
                _emit(lines, name, v, depth + 1)
            else:
                for item in v:
                    _emit(lines, name, item, depth + 1, array=True)


def dump_toml(doc: Mapping[str, Any]) -> str:
    """TOML text of a document (non-finite numbers and values TOML cannot hold raise ValueError/TypeError)."""
    lines: list[str] = []
    _emit(lines, "", doc, 0)
    return "\n".join(lines).rstrip() + "\n"
