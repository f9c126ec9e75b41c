"""Operator commands: the control socket (mode 0600), validation of requests, and ``edgevib alarms``."""

from __future__ import annotations

import asyncio
import json
import re
import stat
from pathlib import Path
from typing import Any

import pytest
from alarmkit import alarm_layer, frame_result, small_config, started_layer

from edgevib.daemon.alarms.control import CommandError, handle_payload, request, validate_request
from edgevib.daemon.cli import main


@pytest.mark.parametrize(("req", "problem"), [
    ({"cmd": "trip"}, "unknown command"),
    ({"cmd": "ack"}, "missing point"),
    ({"cmd": "ack", "point": "P", "extra": 1}, "unknown key"),
    ({"cmd": "shelve", "point": "P", "reason": "work", "duration_s": -5}, "duration_s"),
    ({"cmd": "shelve", "point": "P", "reason": "work", "duration_s": float("nan")}, "duration_s"),
    ({"cmd": "shelve", "point": "P", "reason": " ", "duration_s": 60}, "non-empty"),
    ({"cmd": "ack", "point": 7}, "non-empty string"),
    ([1, 2], "JSON object"),
])
def test_invalid_requests_are_rejected(req: Any, problem: str) -> None:
    with pytest.raises(CommandError, match=problem):
        validate_request(req)


def test_garbage_gets_an_error_response() -> None:
    def never(req: dict[str, Any]) -> Any:
        raise AssertionError("must not be called")
    assert json.loads(handle_payload(b"\xff\xfe", never))["ok"] is False
    assert "exceeds" in json.loads(handle_payload(b"{" * 20000, never))["error"]


async def test_control_socket_commands(short_tmp: Path) -> None:
    cfg = small_config(short_tmp)
    layer, events = await started_layer(cfg)
    try:
        sock = Path(cfg.alarms.socket)
        assert stat.S_ISSOCK(sock.stat().st_mode) and stat.S_IMODE(sock.stat().st_mode) == 0o600
        for i, v in enumerate([5.0, 5.0]):
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1000.0 + i, v)])

        def ask(req: dict[str, Any]) -> dict[str, Any]:
            return request(sock, req)

        listing = await asyncio.to_thread(ask, {"cmd": "list", "id": 4})
        assert listing["ok"] and listing["id"] == 4
        assert listing["result"]["alarms"][0]["state"] == "unacknowledged"
        bad = await asyncio.to_thread(ask, {"cmd": "ack", "point": "NOPE"})
        assert bad == {"ok": False, "error": "unknown point 'NOPE'"}
        bad = await asyncio.to_thread(ask, {"cmd": "shelve", "point": "P-101-DE-H", "reason": "x",
                                            "duration_s": 1e9})
        assert not bad["ok"] and "exceeds the maximum" in bad["error"]
        ok = await asyncio.to_thread(ask, {"cmd": "shelve", "point": "P-101-DE-H", "reason": "bearing change",
                                           "duration_s": 10.0, "by": "tech"})
        assert ok == {"ok": True, "result": {"changed": 1, "events": 1}}
        assert layer.state_text("P-101-DE-H") == "DANGER velocity_rms_mm_s"  # shelving hides events, not facts
        assert events[-1]["data"]["transition"] == "shelved" and events[-1]["data"]["reason"] == "bearing change"
        # The shelf expires on the frames' timeline: 10 s after the action (the last frame, t = 1001 s, advanced
        # by the moments since it arrived).
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1005.0, 5.0)])
        assert events[-1]["data"]["transition"] == "shelved"
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1012.0, 5.0)])
        assert events[-1]["data"]["transition"] == "unshelved"
        assert events[-1]["data"]["alarm_state"] == "unacknowledged"
        # edgevib alarms …, in a thread so the daemon's loop keeps answering.
        rc = await asyncio.to_thread(main, ["alarms", "--socket", str(sock), "ack", "P-101-DE-H"])
        assert rc == 0 and events[-1]["data"]["transition"] == "acknowledged"
        rc = await asyncio.to_thread(main, ["alarms", "--state-dir", str(short_tmp), "ack", "NOPE"])
        assert rc == 2  # bad input, refused by the daemon: exit status 2 as every command
        rc = await asyncio.to_thread(main, ["alarms", "--state-dir", str(short_tmp), "shelve", "P-101-DE-H",
                                            "--reason", "overhaul", "--hours", "500"])
        assert rc == 2
        rc = await asyncio.to_thread(main, ["alarms", "--state-dir", str(short_tmp), "list"])
        assert rc == 0
    finally:
        await layer.stop()
    assert not Path(cfg.alarms.socket).exists()
    assert main(["alarms", "--state-dir", str(short_tmp), "list"]) == 2  # nobody listening


def test_alarms_cli_prints_the_table(short_tmp: Path, capsys: pytest.CaptureFixture[str]) -> None:
    async def scenario() -> None:
        cfg = small_config(short_tmp)
        layer = alarm_layer(cfg)
        await layer.start()
        try:
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1.0, 3.0)])
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 2.0, 3.0)])
            assert await asyncio.to_thread(main, ["alarms", "--state-dir", str(short_tmp), "list"]) == 0
        finally:
            await layer.stop()

    asyncio.run(scenario())
    out = capsys.readouterr().out
    assert "P-101-DE-H" in out and "velocity_rms_mm_s" in out and "unacknowledged" in out and "alert" in out


async def test_a_shelf_expires_on_the_timer_without_frames(short_tmp: Path) -> None:
    # no-data detection kept out of the way (100000 frame periods) so only the shelf expiry acts
    cfg = small_config(short_tmp, alarms={"no_data_frames": 100000})
    mono = [500.0]
    layer, events = await started_layer(cfg, monotonic=lambda: mono[0])
    try:
        for i in range(2):
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1000.0 + i, 5.0)])
        res = await layer.command({"cmd": "shelve", "point": "P-101-DE-H", "reason": "pump on test run",
                                   "duration_s": 10.0})
        assert res["changed"] == 1 and events[-1]["data"]["transition"] == "shelved"
        mono[0] += 5.0  # 5 s after the last frame: still shelved
        await asyncio.sleep(1.5)
        assert events[-1]["data"]["transition"] == "shelved"
        mono[0] += 6.0  # 11 s after the last frame (t = 1001 s): the shelf set until 1011 s has expired
        for _ in range(50):  # the 1-s timer, bounded wait
            if events[-1]["data"]["transition"] != "shelved":
                break
            await asyncio.sleep(0.1)
        last = events[-1]["data"]
        assert last["transition"] == "unshelved" and last["alarm_state"] == "unacknowledged"
        assert layer.snapshot()["alarms"][0]["shelved_until_s"] is None
    finally:
        await layer.stop()


def test_human_durations() -> None:
    from edgevib.daemon.alarms.control import human_duration

    assert human_duration(500 * 3600.0) == "500 h"  # not "1.8e+06 s"
    assert human_duration(168 * 3600.0) == "168 h"
    assert human_duration(45.0) == "45 s"
    assert human_duration(12.5 * 60) == "12.5 min"
    assert human_duration(8 * 3600.0) == "8 h"
    assert human_duration(60 * 86400.0) == "60 d"


def test_since_accepts_durations_and_utc_times() -> None:
    from edgevib.daemon.alarmctl import parse_since

    now = 1_780_000_000.0
    assert parse_since("90s", now) == now - 90.0
    assert parse_since("8h", now) == now - 8 * 3600.0
    assert parse_since("7d", now) == now - 7 * 86400.0
    assert parse_since("2026-12-01T06:00Z", now) == 1_796_104_800.0  # 2026-12-01 06:00 UTC (Unix time)
    assert parse_since("2026-12-01", now) == 1_796_083_200.0
    with pytest.raises(ValueError, match="neither a duration"):
        parse_since("last tuesday", now)


def test_alarms_cli_history_ack_by_and_shelve_errors(short_tmp: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # ISO 20816-3 group 2 rigid: B/C 2.8 mm/s (FIELD_NOTES §1)
    t0 = 1_780_000_000.0

    async def scenario() -> list[int]:
        cfg = small_config(short_tmp, alarms={"max_shelve_h": 168.0})
        layer = alarm_layer(cfg)
        await layer.start()
        codes = []
        try:
            for i in range(2):
                await layer.on_frames([frame_result("P-101-DE-H", "P-101", t0 + i, 3.0)])
            base = ["alarms", "--state-dir", str(short_tmp)]
            codes.append(await asyncio.to_thread(main, [*base, "ack", "P-101-DE-H", "--by", "K. Shiftlead"]))
            codes.append(await asyncio.to_thread(main, [*base, "shelve", "P-101-DE-H", "--reason", "overhaul",
                                                        "--hours", "500"]))
            codes.append(await asyncio.to_thread(main, [*base, "history", "P-101-DE-H"]))
            codes.append(await asyncio.to_thread(main, [*base, "history", "--since", "2026-05-28", "--json"]))
            codes.append(await asyncio.to_thread(main, [*base, "history", "--since", "yesterday-ish"]))
            codes.append(await asyncio.to_thread(main, [*base, "history", "NOPE"]))
        finally:
            await layer.stop()
        return codes

    codes = asyncio.run(scenario())
    captured = capsys.readouterr()
    assert codes == [0, 2, 0, 0, 2, 2]
    assert "500 h exceeds the maximum 168 h" in captured.err
    table, raw = captured.out.split("\n{", 1)
    lines = [ln for ln in table.splitlines() if ln.startswith("2026-05-28T20:26:41Z  P-101-DE-H")]
    assert "acknowledged" in lines[0] and "K. Shiftlead at " in lines[0]  # newest first, the operator's name
    assert "raised" in lines[1] and "alert" in lines[1] and "2.8" in lines[1] and ".wav" in lines[1]
    rows = json.loads("{" + raw.split("\n}\n", 1)[0] + "\n}")["result"]
    assert [r["transition"] for r in rows] == ["acknowledged", "raised"] and rows[0]["by"] == "K. Shiftlead"


@pytest.mark.parametrize("argv", [["--json", "list"], ["list", "--json"], ["history", "--since", "3m", "--json"],
                                  ["--json", "history", "P-101-DE-H"], ["ack", "P-101-DE-H", "--json"]])
def test_json_is_accepted_before_and_after_the_action(argv: list[str]) -> None:
    import argparse

    from edgevib.daemon.alarmctl import configure_alarms

    parser = argparse.ArgumentParser()
    configure_alarms(parser)
    assert parser.parse_args(argv).json is True
    assert parser.parse_args([a for a in argv if a != "--json"]).json is False


def test_list_heads_the_machine_state_and_marks_it_unknown_while_the_source_is_down(
        capsys: pytest.CaptureFixture[str]) -> None:
    from edgevib.daemon.alarmctl import _print_list

    alarm = {"point": "P-101-DE-H", "indicator": "velocity_rms_mm_s", "state": "unacknowledged", "severity": "danger",
             "value": 5.0, "alert": 2.8, "danger": 4.5, "stale": "source-down"}  # ISO 20816-3 group 2 rigid
    point = {"machine": "P-101", "machine_state": "running", "source": "plant", "source_state": "down",
             "time": "2026-12-02T09:43:18Z", "alarm_text": "DANGER velocity_rms_mm_s (stale: source-down)"}
    _print_list({"alarms": [alarm], "points": {"P-101-DE-H": point}, "sensors": {},
                 "sources": {"plant": {"state": "down", "since_s": 1_796_204_601.0, "reason": "connection lost"}}})
    header, row = capsys.readouterr().out.splitlines()[:2]
    assert re.split(r"\s{2,}", header)[1] == "MACHINE STATE"
    assert "unknown (stale, last running)" in row and "stale: source-down" in row


def test_shelve_duration_errors_name_the_users_units(short_tmp: Path, capsys: pytest.CaptureFixture[str]) -> None:
    base = ["alarms", "--state-dir", str(short_tmp), "shelve", "P-101-DE-H", "--reason", "x"]
    assert main([*base, "--hours", "0"]) == 2
    assert main([*base, "--minutes", "-5"]) == 2
    err = capsys.readouterr().err
    assert "--hours 0 must be a duration > 0" in err and "--minutes -5 must be a duration > 0" in err
    assert "duration_s" not in err


async def test_a_shelved_alarm_is_acknowledged_only_after_unshelving(short_tmp: Path) -> None:
    # Two alarms in unacknowledged danger: velocity r.m.s. 5 mm/s over the ISO 20816-3 group 2 rigid C/D boundary
    # 4.5 mm/s (FIELD_NOTES §1) and kurtosis 12 over a danger limit of 10 (4 and more flags impulsive content,
    # common practice; a Gaussian signal has 3).  Shelving hides an alarm (ANSI/ISA-18.2: a shelved alarm is
    # removed from the operator's view), so an acknowledgement of it could be recorded nowhere visible.
    cfg = small_config(short_tmp, limits={"velocity_rms_mm_s": {"rule": "iso"},
                                          "kurtosis": {"alert": 5.0, "danger": 10.0}})
    layer, events = await started_layer(cfg)
    try:
        for i in range(2):
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1000.0 + i, 5.0, kurtosis=12.0)])
        await layer.command({"cmd": "shelve", "point": "P-101-DE-H", "indicator": "velocity_rms_mm_s",
                             "reason": "coupling work", "duration_s": 3600.0, "by": "night"})
        # a point-wide ack acknowledges the visible alarm only, with its event
        res = await layer.command({"cmd": "ack", "point": "P-101-DE-H", "by": "A. Operator"})
        assert res == {"changed": 1, "events": 1}
        assert events[-1]["data"]["indicator"] == "kurtosis" and events[-1]["data"]["transition"] == "acknowledged"
        # naming the shelved one is refused, nothing changes
        with pytest.raises(CommandError, match=r"velocity_rms_mm_s on P-101-DE-H is shelved .*unshelve it first"):
            await layer.command({"cmd": "ack", "point": "P-101-DE-H", "indicator": "velocity_rms_mm_s",
                                 "by": "A. Operator"})
        rc = await asyncio.to_thread(main, ["alarms", "--state-dir", str(short_tmp), "ack", "P-101-DE-H",
                                            "--indicator", "velocity_rms_mm_s"])
        assert rc == 2
        await layer.command({"cmd": "unshelve", "point": "P-101-DE-H", "by": "night"})
        assert events[-1]["data"]["transition"] == "unshelved"
        assert events[-1]["data"]["alarm_state"] == "unacknowledged"  # still waiting for someone
        res = await layer.command({"cmd": "ack", "point": "P-101-DE-H", "by": "A. Operator"})
        assert res == {"changed": 1, "events": 1}
        rows = await asyncio.to_thread(layer.history, "P-101-DE-H")
        velocity = [(r.transition, r.by) for r in rows if r.indicator == "velocity_rms_mm_s"]
        assert velocity[0] == ("acknowledged", "A. Operator") and ("unshelved", "night") in velocity
    finally:
        await layer.stop()
