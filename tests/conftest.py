from __future__ import annotations

import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

from servers import Mosquitto

REPO = Path(__file__).resolve().parent.parent
DATASETS = REPO.parent / "shared" / "datasets"


@pytest.fixture
def mosquitto() -> Iterator[Mosquitto]:
    """A private broker for one test, on 127.0.0.1 and a free port."""
    broker = Mosquitto().start()
    try:
        yield broker
    finally:
        broker.close()


@pytest.fixture(scope="session")
def cwru_dir() -> Path:
    """The CWRU recordings in ../shared/datasets/cwru (see its README)."""
    path = DATASETS / "cwru"
    if not path.is_dir():
        pytest.skip(f"dataset folder {path} not present")
    return path


@pytest.fixture(scope="session")
def femto_dir() -> Path:
    """The FEMTO PRONOSTIA bearing 1_2 snapshots in ../shared/datasets/femto (see its README)."""
    path = DATASETS / "femto" / "Bearing1_2"
    if not path.is_dir():
        pytest.skip(f"dataset folder {path} not present")
    return path
