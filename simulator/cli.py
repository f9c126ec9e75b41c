"""``edgevib simulate``: stream a simulated plant over MQTT and/or OPC UA, or write WAV files, truth and a
daemon configuration.

Files alone (``--wav``, ``--truth``) are written as fast as the CPU allows (``--rate`` only paces streaming), with
a progress line on a terminal.  Exit codes: 0 done; 1 the run failed part-way (the MQTT broker was lost); 2 bad
options, unusable outputs or no output requested — each with one line on stderr."""

from __future__ import annotations

import argparse
import asyncio
import json
import math
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from edgevib.simulator.engine import Simulation, list_scenarios, load_scenario
from edgevib.simulator.publishers import (
    MqttPublisher,
    OpcUaPublisher,
    PublishError,
    WavWriter,
    parse_listen,
    parse_mqtt_url,
    stream,
)
from edgevib.simulator.scenario import ScenarioError

__all__ = ["configure_simulate", "run_simulate"]


class _Fail(Exception):
    pass


def configure_simulate(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--scenario", default="demo", help="built-in scenario name or a scenario TOML path "
                        "(default: demo)")
    parser.add_argument("--list", action="store_true", help="list the built-in scenarios and exit")
    parser.add_argument("--mqtt", metavar="URL", help="publish blocks to this broker, mqtt://host:port")
    parser.add_argument("--qos", type=int, default=0, help="MQTT QoS, 0 or 1 (default 0)")
    parser.add_argument("--encoding", default="json", help="block payload: json or binary (default json)")
    parser.add_argument("--connect-timeout", type=float, default=10.0, metavar="S",
                        help="keep retrying an unreachable broker this long (default 10 s)")
    parser.add_argument("--opcua-listen", metavar="HOST:PORT", help="serve the blocks from an OPC UA server")
    parser.add_argument("--rate", type=float, default=1.0, help="time acceleration: 1 = real time, "
                        "large = as fast as possible (default 1)")
    parser.add_argument("--duration", type=float, metavar="S", help="seconds of simulated time (default: until "
                        "interrupted; for --wav alone the scenario's duration)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0): same seed, same samples")
    parser.add_argument("--t0-ns", type=int, metavar="NS", help="timestamp of the first sample in ns since the epoch "
                        "(default: when streaming starts); block times then advance at the simulated pace")
    parser.add_argument("--truth", metavar="PATH", help="write the analytic truth as JSON")
    parser.add_argument("--truth-at", type=float, metavar="S", help="simulated time of the truth (default: end of "
                        "--duration, else 0)")
    parser.add_argument("--emit-config", metavar="PATH", help="write a daemon configuration for the scenario "
                        "and these outputs")
    parser.add_argument("--wav", metavar="DIR", help="write one float32 WAV per point (in g) into DIR")
    parser.add_argument("--snapshots", metavar="DIR", help="long-run scenarios ([longrun]): write months of "
                        "snapshots in compressed time into DIR/<point>/ and the truth (with analytic crossing times) "
                        "into DIR/truth.json; --duration limits the simulated seconds")
    parser.add_argument("--snapshot-format", default="npy", metavar="npy|wav|csv",
                        help="file format of --snapshots (default npy)")


def _check(args: argparse.Namespace) -> None:
    if args.qos not in (0, 1):
        raise _Fail(f"--qos {args.qos}: must be 0 or 1")
    if args.encoding not in ("json", "binary"):
        raise _Fail(f"--encoding {args.encoding!r}: must be json or binary")
    for name in ("rate", "duration", "connect_timeout"):
        v = getattr(args, name)
        if v is not None and (not math.isfinite(v) or v <= 0):
            raise _Fail(f"--{name.replace('_', '-')} {v:g}: must be a positive number")
    if args.truth_at is not None and (not math.isfinite(args.truth_at) or args.truth_at < 0):
        raise _Fail(f"--truth-at {args.truth_at:g}: must be >= 0")
    if args.seed < 0:
        raise _Fail(f"--seed {args.seed}: must be >= 0")
    if args.mqtt is not None:
        try:
            parse_mqtt_url(args.mqtt)
        except ValueError as exc:
            raise _Fail(f"--mqtt: {exc}") from exc
    if args.opcua_listen is not None:
        try:
            parse_listen(args.opcua_listen)
        except ValueError as exc:
            raise _Fail(f"--opcua-listen: {exc}") from exc


def _source(args: argparse.Namespace, sim: Simulation) -> dict[str, Any]:
    if args.mqtt:
        return {"name": "sim", "type": "mqtt", "url": args.mqtt, "qos": args.qos,
                "topics": [f"{sim.scenario.topic_prefix}/+/+/block"], "sensor_from": "payload"}
    if args.opcua_listen:
        host, port = parse_listen(args.opcua_listen)
        return {"name": "sim", "type": "opcua", "endpoint": f"opc.tcp://{host}:{port}/", "mode": "subscribe",
                "security_policy": "None"}
    return {"name": "sim", "type": "simulated", "scenario": sim.scenario.name, "seed": args.seed,
            "rate": min(args.rate, 1000.0)}


def _write(path: str, text: str) -> None:
    try:
        p = Path(path)
        if p.parent and not p.parent.exists():
            p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise _Fail(f"cannot write {path}: {exc}") from exc


def _write_truth(args: argparse.Namespace, sim: Simulation, t_s: float) -> None:
    if args.truth:
        _write(args.truth, json.dumps(sim.truth(t_s), indent=1, allow_nan=False) + "\n")


def run_simulate(args: argparse.Namespace) -> int:
    try:
        return _run(args)
    except _Fail as exc:
        print(f"edgevib simulate: {exc}", file=sys.stderr)
        return 2
    except (ScenarioError, PublishError) as exc:
        print(f"edgevib simulate: {exc}", file=sys.stderr)
        return 2
    except _Lost as exc:
        print(f"edgevib simulate: {exc}", file=sys.stderr)
        return 1


class _Lost(Exception):
    pass


FILES_RATE = 1e12  # "as fast as possible": no pacing when nothing streams


def _progress(total_s: float | None, out: Any = None) -> Callable[[float, list[Any]], None] | None:
    """A progress printer for a terminal (``None`` when stderr is not one), at most 5 lines a second."""
    stream = out if out is not None else sys.stderr
    if not getattr(stream, "isatty", lambda: False)():
        return None
    last = [0.0]
    started = time.monotonic()

    def show(t_s: float, _blocks: list[Any]) -> None:
        now = time.monotonic()
        done = total_s is not None and t_s >= total_s
        if now - last[0] < 0.2 and not done:
            return
        last[0] = now
        speed = t_s / max(now - started, 1e-9)
        if total_s:
            text = f"\rsimulated {t_s:8.1f} of {total_s:g} s ({100 * t_s / total_s:5.1f} %), {speed:6.1f}x real time"
        else:
            text = f"\rsimulated {t_s:8.1f} s, {speed:6.1f}x real time"
        stream.write(text + ("\n" if done else ""))
        stream.flush()

    return show


def _run(args: argparse.Namespace) -> int:
    if args.list:
        scenarios = list_scenarios()
        width = max(len(n) for n in scenarios)
        for name, desc in scenarios.items():
            print(f"{name:<{width}}  {desc}")
        return 0
    _check(args)
    scenario = load_scenario(args.scenario)
    if args.snapshots:
        return _snapshots(args, scenario)
    sim = Simulation(scenario, seed=args.seed, t0_ns=args.t0_ns)
    if args.emit_config:
        _write(args.emit_config, sim.daemon_config_toml(source=_source(args, sim)))
        print(f"edgevib simulate: daemon configuration written to {args.emit_config}")
    streaming = bool(args.mqtt or args.opcua_listen)
    if not (streaming or args.wav or args.truth or args.emit_config):
        raise _Fail("no output requested: give --mqtt, --opcua-listen, --wav, --truth and/or --emit-config, or "
                    "--snapshots for a long-run scenario (--list shows the scenarios)")
    if not streaming and not args.wav:
        _write_truth(args, sim, args.truth_at if args.truth_at is not None else (args.duration or 0.0))
        return 0
    duration = args.duration if args.duration is not None else (None if streaming else scenario.duration_s)
    if duration is None:
        _write_truth(args, sim, args.truth_at or 0.0)
    return asyncio.run(_stream(args, sim, duration))


def _snapshots(args: argparse.Namespace, scenario: Any) -> int:
    from edgevib.simulator.longrun import LongRun

    if scenario.longrun is None:
        raise _Fail(f"--snapshots needs a long-run scenario (a [longrun] table); {scenario.name} has none")
    if args.snapshot_format not in ("npy", "wav", "csv"):
        raise _Fail(f"--snapshot-format {args.snapshot_format!r}: must be npy, wav or csv")
    run = LongRun(scenario, seed=args.seed, t0_ns=args.t0_ns)
    try:
        root = run.write(args.snapshots, args.snapshot_format, until_s=args.duration)
    except OSError as exc:
        raise _Fail(f"cannot write {args.snapshots}: {exc}") from exc
    n = min(run.count, run.count if args.duration is None else int(args.duration // run.spec.interval_s) + 1)
    print(f"edgevib simulate: {n} snapshots per point ({run.spec.interval_s / 3600:g} h apart) of scenario "
          f"{scenario.name}, seed {run.seed}, written to {root}/<point>/; truth in {root / 'truth.json'}")
    return 0


def _wav_writers(out: Path, sim: Simulation) -> dict[str, WavWriter]:
    """One WAV file per point in ``out`` (created if needed)."""
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _Fail(f"cannot create {out}: {exc}") from exc
    return {p.point_id: WavWriter(out / f"{p.point_id}.wav", p.fs_hz) for p in sim.points}


async def _flush_mqtt(mqtt: MqttPublisher, url: str, t_end: float) -> None:
    """Wait until the broker has every message (30 s at most); a lost broker is :class:`_Lost`."""
    if mqtt.lost is None:
        await asyncio.to_thread(mqtt.flush, 30.0)
    if mqtt.lost is not None:
        raise _Lost(f"lost the MQTT broker {url} after {t_end:.1f} s of simulated time ({mqtt.lost}); "
                    f"{mqtt.published} messages were published")
    print(f"edgevib simulate: {mqtt.published} messages published", flush=True)


async def _stream(args: argparse.Namespace, sim: Simulation, duration: float | None) -> int:
    mqtt = opcua = None
    wav: dict[str, WavWriter] | None = None
    try:
        if args.wav:
            wav = _wav_writers(Path(args.wav), sim)
        if args.mqtt:
            mqtt = MqttPublisher(args.mqtt, qos=args.qos, encoding=args.encoding,
                                 connect_timeout_s=args.connect_timeout)
            await asyncio.to_thread(mqtt.connect)
            print(f"edgevib simulate: publishing {len(sim.points)} points to {args.mqtt} "
                  f"({sim.scenario.topic_prefix}/<machine>/<point>/block, speeds on "
                  f"{sim.scenario.topic_prefix}/<machine>/speed in r/min)", flush=True)
        if args.opcua_listen:
            host, port = parse_listen(args.opcua_listen)
            opcua = OpcUaPublisher(sim, host, port)
            await opcua.start()
            print(f"edgevib simulate: OPC UA endpoint {opcua.endpoint}", flush=True)
            for key, node in opcua.node_ids().items():
                print(f"  {key}: {node}", flush=True)
        print(f"edgevib simulate: scenario {sim.scenario.name}, seed {sim.seed}, rate {args.rate:g}x, "
              f"duration {'unbounded' if duration is None else f'{duration:g} s'}", flush=True)
        if args.t0_ns is None:        # sample 0 is "now" when streaming starts (servers can take seconds to start)
            sim.t0_ns = time.time_ns()
        stop = asyncio.Event()
        if mqtt is not None:
            loop = asyncio.get_running_loop()

            def lost(_why: str) -> None:
                loop.call_soon_threadsafe(stop.set)

            mqtt.on_lost = lost
        streaming = mqtt is not None or opcua is not None
        t_end = await stream(sim, rate=args.rate if streaming else FILES_RATE, duration_s=duration, mqtt=mqtt,
                             opcua=opcua, wav=wav, stop=stop, on_blocks=_progress(duration))
        if mqtt is not None:
            await _flush_mqtt(mqtt, args.mqtt, t_end)
        if duration is not None:
            _write_truth(args, sim, args.truth_at if args.truth_at is not None else t_end)
        return 0
    finally:
        if mqtt is not None:
            mqtt.close()
        if opcua is not None:
            await opcua.stop()
        for w in (wav or {}).values():
            w.close()
