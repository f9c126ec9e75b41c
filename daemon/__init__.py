"""edgevib daemon: ingest, rolling analysis, alarms and publishing (all I/O lives here)."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("edgevib")
except PackageNotFoundError:  # pragma: no cover - running from a source tree without installing
    __version__ = "0.0.0+unknown"
