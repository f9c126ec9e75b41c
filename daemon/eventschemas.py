"""JSON Schemas (draft 2020-12) of the ``data`` each CloudEvents type of the alarm feed carries.

The schemas ship in the package (``edgevib/daemon/schemas/<type>.json``, one file per event type) and are what a
feed's ``dataschema`` attribute points at: host the files written by ``edgevib event-schemas DIR`` and set
``[feed] dataschema = "https://<host>/<path>/{type}.json"``.

Compatibility within a version (``v1``): the closed sets (transitions, severities, operator and machine states,
sensor faults) are enumerated, the open ones (indicator names, units, fault kinds, reasons) are strings, and every
schema admits fields it does not list, so an event a later edgevib adds a field to still validates against the
schema a consumer already has.  Removing or renaming a field, or a value outside an enumeration, makes a new type
version (``v2``).  The suite validates events the alarm layer really emits against these files and checks that
every field an event carries is listed (tests/alarms/test_event_schemas.py).
"""

from __future__ import annotations

import argparse
import json
import sys
from importlib import resources
from pathlib import Path
from typing import Any

__all__ = ["EVENT_TYPES", "configure_event_schemas", "run_event_schemas", "schema", "schema_text"]

_PACKAGE = "edgevib.daemon"
_DIR = "schemas"


def _names() -> tuple[str, ...]:
    files = resources.files(_PACKAGE).joinpath(_DIR)
    return tuple(sorted(f.name.removesuffix(".json") for f in files.iterdir() if f.name.endswith(".json")))


EVENT_TYPES: tuple[str, ...] = _names()


def schema_text(event_type: str) -> str:
    """The schema file of ``event_type`` as shipped (raises KeyError for a type without one)."""
    if event_type not in EVENT_TYPES:
        raise KeyError(f"no data schema for event type {event_type!r} (known: {', '.join(EVENT_TYPES)})")
    return resources.files(_PACKAGE).joinpath(_DIR, f"{event_type}.json").read_text(encoding="utf-8")


def schema(event_type: str) -> dict[str, Any]:
    """The parsed schema of ``event_type``'s data."""
    doc: dict[str, Any] = json.loads(schema_text(event_type))
    return doc


# --------------------------------------------------------------------------------------------- command


def configure_event_schemas(parser: argparse.ArgumentParser) -> None:
    parser.description = ("Write the JSON Schema of each event type's data as DIR/<type>.json, the files a feed's "
                          "[feed] dataschema (\"https://<host>/<path>/{type}.json\") should point at.")
    parser.add_argument("dir", type=Path, metavar="DIR", help="directory to write into (created if missing)")


def run_event_schemas(args: argparse.Namespace) -> int:
    out: Path = args.dir
    try:
        out.mkdir(parents=True, exist_ok=True)
        for name in EVENT_TYPES:
            (out / f"{name}.json").write_text(schema_text(name), encoding="utf-8")
    except OSError as exc:
        print(f"edgevib event-schemas: cannot write into {out}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    for name in EVENT_TYPES:
        print(out / f"{name}.json")
    return 0
