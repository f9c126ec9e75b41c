"""``edgevib simulate`` as a tool (issue 13 §6): files are written without pacing, progress shows on a terminal,
no output is an error (exit 2), a broker lost mid-run is a failure (exit 1), and the fault stages use our own
words."""

from __future__ import annotations

import io
import json
import threading
from pathlib import Path
from typing import Any

import pytest
from scipy.io import wavfile
from servers import Mosquitto

from edgevib.daemon.cli import main
from edgevib.simulator import cli as sim_cli
from edgevib.simulator import publishers
from edgevib.simulator.models import STAGES


def test_no_output_requested_is_an_error(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["simulate", "--scenario", "demo", "--duration", "5"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no output requested" in err[0]


def test_wav_alone_is_not_paced(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """With files only, the loop never waits for the clock (a paced run sleeps 20 ms between steps)."""
    waits: list[float] = []
    real_sleep = publishers.asyncio.sleep

    async def counting_sleep(delay: float, *a: Any) -> Any:
        if delay > 0:
            waits.append(delay)
        return await real_sleep(0)

    monkeypatch.setattr(publishers.asyncio, "sleep", counting_sleep)
    truth = tmp_path / "truth.json"
    rc = main(["simulate", "--scenario", "bearings", "--wav", str(tmp_path / "wav"), "--truth", str(truth),
               "--duration", "6"])  # default --rate 1: it paces streaming, not files
    assert rc == 0 and waits == []
    fs, x = wavfile.read(next((tmp_path / "wav").glob("*.wav")))
    assert x.shape[0] >= 5 * fs  # 6 s of samples (less whole blocks a dropped-blocks fault may remove)
    doc = json.loads(truth.read_text())
    stages = {f["stage"] for p in doc["points"].values() for f in p.get("faults", [])} | \
        {p.get("stage") for p in doc["points"].values()}
    assert stages - {None, "none"} <= set(STAGES)


def test_fault_stage_words_are_our_own() -> None:
    # words of general usage for how far a fault has progressed (not any product's severity grading)
    assert STAGES == ("incipient", "developing", "advanced", "critical")
    for name in ("bearings.toml", "demo.toml"):
        text = (Path(sim_cli.__file__).parent / "scenarios" / name).read_text()
        for old in ("slight", "moderate", "extreme"):
            assert f'stage = "{old}"' not in text


class _Tty(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_on_a_terminal_only() -> None:
    tty = _Tty()
    show = sim_cli._progress(10.0, out=tty)
    assert show is not None
    show(5.0, [])
    show(10.0, [])
    text = tty.getvalue()
    assert "\rsimulated" in text and "100.0 %" in text and text.endswith("\n")
    assert sim_cli._progress(10.0, out=io.StringIO()) is None  # a pipe or a file: no progress line


@pytest.mark.network
def test_broker_lost_mid_run_exits_1(capsys: pytest.CaptureFixture[str]) -> None:
    broker = Mosquitto().start()
    try:
        threading.Timer(1.5, broker.stop).start()
        rc = main(["simulate", "--scenario", "demo", "--mqtt", broker.url, "--duration", "30", "--rate", "2"])
    finally:
        broker.close()
    err = capsys.readouterr().err
    assert rc == 1 and "lost the MQTT broker" in err
