"""Every configuration file shipped in config/ loads through the daemon's validator."""

from __future__ import annotations

from pathlib import Path

import pytest

from edgevib.daemon.config import load_config

CONFIG_DIR = Path(__file__).resolve().parent.parent / "config"
FILES = sorted(CONFIG_DIR.glob("*.toml"))


def test_config_dir_has_files() -> None:
    assert FILES, f"no *.toml in {CONFIG_DIR}"


@pytest.mark.parametrize("path", FILES, ids=[p.name for p in FILES])
def test_config_file_loads(path: Path) -> None:
    cfg = load_config(path)
    assert cfg.points, f"{path.name} configures no points"
    machine_ids = {m.id for m in cfg.machines}
    assert all(p.machine in machine_ids for p in cfg.points)
