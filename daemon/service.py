"""The ``edgevib run``, ``edgevib demo`` and ``edgevib check-config`` subcommands.

``run`` loads and validates the configuration, sets up logging and runs the daemon until SIGINT/SIGTERM (exit 0
within a bounded time); SIGHUP reloads the configuration (an invalid file is rejected with a logged reason and the
running configuration stays).  Under systemd (``$NOTIFY_SOCKET``) it reports READY/STATUS/STOPPING and pings the
watchdog from the event loop.

``run`` refuses to start (one line, exit status 2) when the configuration names secret files that are missing or
a state directory it cannot create or write (``/var/lib/edgevib`` by default outside systemd: give ``--state-dir``).

``demo`` runs the daemon on the simulator's ``demo`` scenario in-process (no broker, no configuration file),
serves metrics on loopback and shows a live table refreshed every second (plain lines when stdout is not a
terminal).  Its state (alarm database, captures) lives in a temporary directory removed when it stops; it never
writes to the default state directory.  edgevib monitors and advises; it is not a machinery protection system.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import os
import signal
import socket
import sys
import tempfile
import time
from collections.abc import Callable, Collection
from pathlib import Path
from typing import Any, TextIO

from edgevib.daemon.config import (
    Config,
    config_to_document,
    deferred_warnings,
    dump_toml,
    load_config,
    parse_config,
    parse_listen,
    verify_for_run,
)
from edgevib.daemon.indicators import REGISTRY
from edgevib.daemon.interfaces import ConfigError, FrameResult
from edgevib.daemon.logs import configure_logging, get_logger
from edgevib.daemon.systemd import Notifier, watchdog_interval_s, watchdog_loop

__all__ = [
    "configure_check_config",
    "configure_demo",
    "configure_run",
    "demo_config",
    "render_table",
    "run_check_config",
    "run_demo",
    "run_run",
    "state_dir_problem",
]

log = get_logger("edgevib.service")
STOP_TIMEOUT_S = 10.0


def _listen_arg(value: str) -> tuple[str, int]:
    try:
        return parse_listen(value, "--metrics-listen")
    except ConfigError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


# ---------------------------------------------------------------------------------------------- check-config


def configure_check_config(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", type=Path, help="configuration file (TOML)")


def run_check_config(args: argparse.Namespace) -> int:
    try:
        cfg = load_config(args.file)
    except ConfigError as exc:
        print(f"edgevib check-config: {args.file}: {exc}", file=sys.stderr)
        return 2
    print(f"# {args.file}: valid (sha256 {cfg.digest}); resolved configuration, defaults filled in, secrets "
          "shown by the file or variable that holds them; this output loads back as the same configuration")
    for line in deferred_warnings(cfg):
        print(f"# warning: {line}")
    if cfg.view.enabled and cfg.view.actions and cfg.view.token is not None:
        from edgevib.daemon.web.actions import token_warnings

        for line in token_warnings(cfg.view):
            print(f"# warning: {line}")
    for p in cfg.points:
        if p.envelope_note:
            print(f"# warning: point {p.id}: {p.envelope_note}")
    if cfg.skipped_points:
        print(f"# shard: {len(cfg.skipped_points)} point(s) belong to other instances: "
              f"{', '.join(cfg.skipped_points)}")
    try:
        print(dump_toml(config_to_document(cfg)), end="", flush=True)
    except BrokenPipeError:  # `edgevib check-config FILE | head`
        with contextlib.suppress(OSError):
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - keeps the interpreter's final flush quiet
    return 0


# ---------------------------------------------------------------------------------------------- run


def configure_run(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", "-c", type=Path, required=True, help="configuration file (TOML)")
    parser.add_argument("--metrics-listen", type=_listen_arg, metavar="HOST:PORT",
                        help="override [metrics] listen (default 127.0.0.1:9851)")
    parser.add_argument("--state-dir", type=Path, help="override [site] state_dir")
    parser.add_argument("--log-level", choices=("debug", "info", "warning", "error"),
                        help="override [logging] level")


def _overrides(args: argparse.Namespace) -> dict[str, Any]:
    """The command line's replacements of configuration keys (applied before validation)."""
    out: dict[str, Any] = {}
    if getattr(args, "state_dir", None) is not None:
        out["site.state_dir"] = str(args.state_dir.resolve())
    if getattr(args, "log_level", None) is not None:
        out["logging.level"] = args.log_level
    return out


def run_run(args: argparse.Namespace) -> int:
    try:
        cfg = load_config(args.config, _overrides(args))
        verify_for_run(cfg)
    except ConfigError as exc:
        print(f"edgevib run: {args.config}: {exc}", file=sys.stderr)
        return 2
    problem = state_dir_problem(cfg.site.state_dir)
    if problem is not None:
        how = "" if getattr(args, "state_dir", None) is not None else \
            "; give --state-dir DIR or set [site] state_dir (under systemd, StateDirectory= provides it)"
        print(f"edgevib run: {problem}{how}", file=sys.stderr)
        return 2
    configure_logging(cfg.logging.level, cfg.logging.format)
    try:
        return asyncio.run(serve(cfg, config_path=args.config, metrics_listen=args.metrics_listen, args=args))
    except ConfigError as exc:
        print(f"edgevib run: {args.config}: {exc}", file=sys.stderr)
        return 2


def state_dir_problem(path: str) -> str | None:
    """Why the daemon could not keep its state in ``path`` (created if missing), or ``None`` when it can."""
    p = Path(path)
    try:
        p.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryFile(dir=p, prefix=".edgevib-probe-"):
            pass
    except OSError as exc:
        return f"state directory {p} is not writable ({exc.strerror or type(exc).__name__})"
    return None


async def serve(cfg: Config, *, config_path: Path | None = None, metrics_listen: tuple[str, int] | None = None,
                args: argparse.Namespace | None = None, stop: asyncio.Event | None = None,
                on_started: Callable[[Any], None] | None = None, **daemon_kwargs: Any) -> int:
    """Run the daemon until ``stop`` or SIGINT/SIGTERM; SIGHUP reloads ``config_path``.  Returns the exit code."""
    from edgevib.daemon.app import Daemon

    loop = asyncio.get_running_loop()
    stop = stop or asyncio.Event()
    daemon = Daemon(cfg, metrics_listen=metrics_listen, **daemon_kwargs)
    notifier = Notifier.from_env()  # a no-op outside systemd
    tasks: list[asyncio.Task[Any]] = []

    def status() -> str:
        _ok, detail = daemon.readiness()
        return f"{len(daemon.points)} points, {sum(daemon.stats.frames_analysed.values())} frames; {detail}"

    async def reload() -> None:
        if config_path is None:  # the demo: a hang-up of its terminal ends it
            stop.set()
            return
        notifier.reloading("reloading configuration")
        try:
            new = await asyncio.to_thread(load_config, config_path, _overrides(args) if args is not None else None)
            verify_for_run(new)
            await daemon.reload(new)
        except ConfigError as exc:
            log.error("configuration reload rejected; the running configuration stays", path=str(config_path),
                      error=str(exc))
        except Exception as exc:
            log.error("configuration reload failed; the running configuration stays", error=repr(exc))
        notifier.ready(status())

    installed: list[int] = []
    for sig in (signal.SIGINT, signal.SIGTERM):
        with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
            loop.add_signal_handler(sig, stop.set)
            installed.append(sig)
    with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
        loop.add_signal_handler(signal.SIGHUP, lambda: tasks.append(loop.create_task(reload())))
        installed.append(signal.SIGHUP)
    try:
        try:
            await daemon.start()
        except OSError as exc:
            log.error("daemon cannot start", error=str(exc))
            print(f"edgevib: cannot start: {exc}", file=sys.stderr)
            return 1
        notifier.ready(status())
        if notifier.enabled:
            tasks.append(loop.create_task(watchdog_loop(notifier, watchdog_interval_s())))

            async def status_loop() -> None:
                while True:
                    await asyncio.sleep(10.0)
                    notifier.status(status())

            tasks.append(loop.create_task(status_loop()))
        if on_started is not None:
            on_started(daemon)
        await stop.wait()
        log.info("stopping")
        notifier.stopping("stopping")
        await daemon.stop(timeout_s=STOP_TIMEOUT_S)
        return 0
    finally:
        for t in tasks:
            t.cancel()
        await asyncio.gather(*tasks, return_exceptions=True)
        for signum in installed:
            with contextlib.suppress(Exception):
                loop.remove_signal_handler(signum)
        with contextlib.suppress(Exception):
            notifier.close()


# ---------------------------------------------------------------------------------------------- demo


def configure_demo(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--duration", type=float, metavar="S", help="stop after S seconds (default: until Ctrl-C)")
    parser.add_argument("--metrics-listen", type=_listen_arg, metavar="HOST:PORT", default=None,
                        help="metrics listener (default 127.0.0.1:9851, or a free port when that one is taken; "
                        "port 0 picks a free one)")
    parser.add_argument("--rate", type=float, default=1.0, help="simulation speed relative to real time")
    parser.add_argument("--seed", type=int, default=0, help="simulator seed")
    parser.add_argument("--view-token-file", type=Path, metavar="FILE",
                        help="let holders of a token in FILE acknowledge and shelve alarms from the view "
                        "(NAME:TOKEN lines; default: the view is read-only)")


def demo_config(rate: float = 1.0, seed: int = 0, scenario: str = "demo", state_dir: str | None = None,
                view: dict[str, Any] | None = None) -> Config:
    """The daemon configuration of the simulator's demo scenario, fed in-process (state in ``state_dir``;
    ``view`` is its ``[view]`` table)."""
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario(scenario), seed=seed)
    doc = sim.daemon_config(source={"name": "simulator", "type": "simulated", "scenario": scenario, "seed": seed,
                                    "rate": rate}, limits=True)  # the limits of config/demo.toml
    if state_dir is not None:
        doc.setdefault("site", {})["state_dir"] = state_dir
    if view is not None:
        doc["view"] = dict(view)
    return parse_config(doc, ".")


def _leading_family(r: FrameResult) -> str:
    env = r.indicators.envelope
    if not env:
        return "-" if r.indicators.envelope_band_hz is not None else "n/a"
    found = [(name, res.snr_db) for name, res in env.items() if res.detected and res.snr_db is not None]
    if not found:
        return "-"
    fam, snr = max(found, key=lambda kv: kv[1])
    return f"{fam} {snr:.0f} dB"


def _machine_cell(cfg: Config, r: FrameResult) -> str:
    """The machine's state when the frame was judged, with the start-up grace still to run while ``starting``."""
    ms = r.machine_state
    if ms is None:
        return "-"
    if ms.state == "starting" and ms.started_s is not None and ms.last_s is not None:
        left = max(0.0, ms.started_s + cfg.alarms.startup_grace_s - ms.last_s)
        return f"starting {left:.0f} s" if left > 0 else "starting"
    return str(ms.state)


DEMO = sorted((i.demo for i in REGISTRY if i.demo is not None), key=lambda d: d.position)
"""The demo table's indicator columns (the registry's ``demo``), between the point's sensor and its envelope."""


def render_table(cfg: Config, latest: dict[str, FrameResult], state_text: Callable[[str], str | None],
                 tty: bool, only: Collection[str] | None = None) -> str:
    """The demo's table (a tty) or one plain line per point (a pipe); ``only`` limits it to those points."""
    keys = ("point", "sensor", "machine", *(d.key for d in DEMO), "envelope", "alarm")
    rows = []
    for p in cfg.points:
        if only is not None and p.id not in only:
            continue
        r = latest.get(p.id)
        cells = ["…"] * (len(DEMO) + 2) if r is None else [_machine_cell(cfg, r), *(d.text(r) for d in DEMO),
                                                           _leading_family(r)]
        rows.append((p.id, p.sensor_type, *cells, state_text(p.id) or "-"))
    if not tty:
        stamp = time.strftime("%H:%M:%S")
        return "\n".join(stamp + "".join(f" {k}={v.replace(' ', '_' if k in ('alarm', 'machine') else '')}"
                                          for k, v in zip(keys, row, strict=True)) for row in rows)
    head = ("point", "sensor", "machine", *(d.heading for d in DEMO), "envelope", "alarm")
    widths = [max(len(str(x)) for x in col) for col in zip(head, *rows, strict=True)]
    line = "  ".join(h.ljust(w) for h, w in zip(head, widths, strict=True))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)) for r in rows]
    return "\n".join(out)


def run_demo(args: argparse.Namespace) -> int:
    configure_logging("warning", "auto", stream=sys.stderr)
    with tempfile.TemporaryDirectory(prefix="edgevib-demo-") as state_dir:  # the demo leaves no state behind
        token_file = getattr(args, "view_token_file", None)
        view = None if token_file is None else {"actions": True, "token_file": str(token_file.resolve())}
        try:
            cfg = demo_config(rate=args.rate, seed=args.seed, state_dir=state_dir, view=view)
        except ConfigError as exc:
            print(f"edgevib demo: {exc}", file=sys.stderr)
            return 2
        listen = args.metrics_listen or _free_or_default(DEMO_LISTEN)
        return asyncio.run(_demo(cfg, listen, args.duration, sys.stdout))


DEMO_LISTEN = ("127.0.0.1", 9851)


def _free_or_default(listen: tuple[str, int]) -> tuple[str, int]:
    """``listen`` if nothing else holds it (a second demo, another exporter), else a free port on the same host."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        try:
            probe.bind(listen)
        except OSError:
            return (listen[0], 0)
    return listen


async def _demo(cfg: Config, listen: tuple[str, int], duration_s: float | None, out: TextIO) -> int:
    stop = asyncio.Event()
    tty = out.isatty()
    shown: dict[str, int] = {}

    def started(daemon: Any) -> None:
        view = f"view at {daemon.http.base_url}/ ; " if daemon.view is not None else ""
        print(f"edgevib demo: simulated pump station '{cfg.site.name}', {len(cfg.points)} points; "
              f"{view}metrics at {daemon.metrics.url}  (Ctrl-C stops)", file=out, flush=True)
        print("edgevib monitors and advises; it is not a machinery protection system.", file=out, flush=True)
        asyncio.get_running_loop().create_task(table(daemon))

    def show(daemon: Any) -> None:
        if tty:
            title = (f"edgevib demo  {cfg.site.name}  {time.strftime('%H:%M:%S')}  view {daemon.http.base_url}/"
                     f"  metrics {daemon.metrics.url}  (Ctrl-C stops; advisory only, not a protection system)\n\n")
            out.write("\x1b[H\x1b[J" + title + render_table(cfg, daemon.latest, daemon.state_text, True) + "\n")
            out.flush()
        else:
            fresh = {pid: r for pid, r in daemon.latest.items() if shown.get(pid) != r.t_end_ns}
            if fresh:
                print(render_table(cfg, daemon.latest, daemon.state_text, False, only=fresh), file=out, flush=True)
                shown.update({pid: r.t_end_ns for pid, r in fresh.items()})

    async def table(daemon: Any) -> None:
        t_end = None if duration_s is None else time.monotonic() + duration_s
        with contextlib.suppress(asyncio.CancelledError):
            while not stop.is_set():
                if t_end is not None and time.monotonic() >= t_end:
                    stop.set()
                    break
                try:
                    show(daemon)
                except OSError:  # the terminal or pipe went away: nobody is watching, so stop
                    stop.set()
                    break
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(stop.wait(), 1.0)

    try:
        return await serve(cfg, metrics_listen=listen, stop=stop, on_started=started)
    finally:
        if tty:
            with contextlib.suppress(OSError):
                out.write("\n")
