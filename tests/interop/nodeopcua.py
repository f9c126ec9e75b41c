"""node-opcua (the Node.js OPC UA stack, from the npm registry) for the interoperability tests.

It is installed once into a cache directory: ``$EDGEVIB_NODE_OPCUA_DIR`` (``.ci/run`` prepares it before the
tests) or, when that is unset, ``~/.cache/edgevib/node-opcua``; the scripts in ``js/`` run with ``NODE_PATH``
pointing there.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

VERSION = "2.182.2"
JS = Path(__file__).parent / "js"


def node_opcua_dir() -> Path:
    """The cache directory holding ``node_modules/node-opcua`` (installed with npm when missing)."""
    root = Path(os.environ.get("EDGEVIB_NODE_OPCUA_DIR") or Path.home() / ".cache" / "edgevib" / "node-opcua")
    if not (root / "node_modules" / "node-opcua" / "package.json").exists():
        npm = shutil.which("npm")
        if npm is None or shutil.which("node") is None:
            raise RuntimeError("Node.js and npm are needed for the OPC UA interoperability tests")
        root.mkdir(parents=True, exist_ok=True)
        subprocess.run([npm, "install", "--no-audit", "--no-fund", "--loglevel=error", "--prefix", str(root),
                        f"node-opcua@{VERSION}"], check=True, timeout=600, capture_output=True)
    return root


def node_env() -> dict[str, str]:
    env = dict(os.environ)
    env["NODE_PATH"] = str(node_opcua_dir() / "node_modules")
    env["NODE_NO_WARNINGS"] = "1"
    return env
