"""The page's assets ship in the package: the vendored chart library unmodified with its licence, and nothing
that would fetch from the network at run time."""

from __future__ import annotations

import hashlib
import re
from importlib import resources

STATIC = resources.files("edgevib.daemon.web") / "static"

# uPlot 1.6.32 from the npm registry (uplot@1.6.32: dist/uPlot.iife.min.js, dist/uPlot.min.css, LICENSE)
UPLOT_SHA256 = {
    "uPlot.iife.min.js": "19c8d4c6ad88929a79f4ae49d6f7161566dfd0ba3d15cc495e974f787eb78f1f",
    "uPlot.min.css": "df630c6a8d6f8eeaff264b50f73ce5b114f646ffd9a0bb74f049b0a00135fa04",
    "LICENSE": "8f989229699b4fe2f1a0432d0e9edc338a8a911e250e2d1b01ecd770a5f5b1bd",
}


def test_vendored_chart_library_is_unmodified_and_licensed() -> None:
    vendor = STATIC / "vendor" / "uplot"
    for name, digest in UPLOT_SHA256.items():
        assert hashlib.sha256((vendor / name).read_bytes()).hexdigest() == digest, name
    assert "MIT License" in (vendor / "LICENSE").read_text()


def test_page_assets_are_local() -> None:
    page = (STATIC / "index.html").read_text()
    for ref in re.findall(r'(?:src|href)="([^"]+)"', page):
        assert ref.startswith("/static/") or ref.startswith("data:"), ref
    script = (STATIC / "view.js").read_text()
    assert not re.search(r"https?://", script)
