"""``edgevib alarms``: list, acknowledge, shelve, unshelve, re-learn alarms of a running daemon, read back their
history, or have it select automatic envelope bands now.

Talks to the daemon's control socket (``<state_dir>/alarms.sock`` unless ``[alarms] socket`` says otherwise)::

    edgevib alarms --state-dir /var/lib/edgevib list
    edgevib alarms ack P-101-DE-H [--indicator velocity_rms_mm_s] [--by "J. Operator"]
    edgevib alarms shelve P-101-DE-H --reason "coupling work, permit 4711" --hours 8
    edgevib alarms unshelve P-101-DE-H
    edgevib alarms relearn P-101-DE-H        # after a repair: learn new baselines
    edgevib alarms history [P-101-DE-H] [--since 7d | --since 2026-12-01T06:00Z] [--limit N] [--json]
    edgevib alarms select-band [P-101-DE-H]  # envelope_band_hz = "auto": select the band from the next frames

Exit codes: 0 done, 2 bad arguments, a command the daemon refused (one line naming the problem) or no daemon
listening.
"""

from __future__ import annotations

import argparse
import contextlib
import getpass
import json
import math
import os
import re
import sys
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

__all__ = ["configure_alarms", "run_alarms"]


def configure_alarms(parser: argparse.ArgumentParser) -> None:
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--state-dir", default=None,
                       help="the daemon's state directory (default: $EDGEVIB_STATE_DIR or /var/lib/edgevib)")
    where.add_argument("--socket", default=None, help="the control socket path (overrides --state-dir)")
    where.add_argument("--config", default=None,
                       help="the daemon's configuration file (its [alarms] socket and state_dir are used)")
    parser.add_argument("--json", action="store_true", help="print the daemon's JSON response")
    parser.add_argument("--timeout", type=float, default=10.0, help="seconds to wait for the daemon")
    sub = parser.add_subparsers(dest="alarm_cmd", metavar="ACTION", required=True)
    p = sub.add_parser("list", help="show every alarm with machine state, start-up grace and sensor state")
    p.add_argument("point", nargs="?", help="only this point")
    by_help = "operator name recorded in the event (default: the local user name)"
    for name, text in (("ack", "acknowledge (and reset latched) alarms of a point"),
                       ("unshelve", "return shelved alarms of a point to service")):
        p = sub.add_parser(name, help=text)
        p.add_argument("point")
        p.add_argument("--indicator", help="only this indicator (default: all of the point)")
        p.add_argument("--by", help=by_help)
    p = sub.add_parser("shelve", help="hide alarms of a point for a while, with a reason")
    p.add_argument("point")
    p.add_argument("--indicator", help="only this indicator (default: all of the point)")
    p.add_argument("--reason", required=True, help="why (recorded in the event)")
    p.add_argument("--by", help=by_help)
    dur = p.add_mutually_exclusive_group(required=True)
    dur.add_argument("--hours", type=float)
    dur.add_argument("--minutes", type=float)
    p = sub.add_parser("relearn", help="forget a point's baselines and learn them again (after a repair)")
    p.add_argument("point")
    p.add_argument("--by", help=by_help)
    p = sub.add_parser("history", help="recorded transitions (alarms, sensor faults, sources), newest first")
    p.add_argument("point", nargs="?", help="only this point")
    p.add_argument("--since", help="a duration back from now (90s, 30m, 8h, 7d, 2w) or a UTC time "
                   "(2026-12-01T06:00Z, 2026-12-01)")
    p.add_argument("--limit", type=int, default=200, help="at most this many rows, 1..1000 (default 200)")
    p = sub.add_parser("select-band", help='select the automatic envelope band (envelope_band_hz = "auto") of a '
                       "point, or of every such point, as soon as it has frames")
    p.add_argument("point", nargs="?", help="only this point")
    p.add_argument("--by", help=by_help)
    for action in sub.choices.values():  # --json before or after the action (SUPPRESS keeps one given before)
        action.add_argument("--json", action="store_true", default=argparse.SUPPRESS,
                            help="print the daemon's JSON response")


def _socket_path(args: argparse.Namespace) -> Path:
    if args.socket:
        return Path(args.socket)
    if args.config:
        from edgevib.daemon.config import load_config

        return Path(load_config(args.config, plans=False).alarms.socket)  # no plan checks: a quick look-up
    state = args.state_dir or os.environ.get("EDGEVIB_STATE_DIR") or "/var/lib/edgevib"
    return Path(state) / "alarms.sock"


_UNITS_S = {"s": 1.0, "m": 60.0, "min": 60.0, "h": 3600.0, "d": 86400.0, "w": 7 * 86400.0}


class _BadArgument(ValueError):
    """A command-line value that cannot be used (the message names it)."""


def parse_since(text: str, now_s: float | None = None) -> float:
    """``--since``: a duration back from now (``90s``, ``30m``, ``8h``, ``7d``, ``2w``) or a UTC time (RFC 3339 /
    ISO 8601, a date alone meaning its midnight UTC) → Unix seconds."""
    now = time.time() if now_s is None else now_s
    m = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*(s|m|min|h|d|w)\s*", text)
    if m:
        return now - float(m.group(1)) * _UNITS_S[m.group(2)]
    try:
        t = datetime.fromisoformat(text.strip().replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError:
        raise _BadArgument(f"--since {text!r} is neither a duration (90s, 30m, 8h, 7d, 2w) nor a time "
                           f"(2026-12-01T06:00Z)") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=UTC)
    return t.timestamp()


_WIRE = {"select-band": "select_band"}  # sub-command → control command where the names differ


def _request(args: argparse.Namespace) -> dict[str, Any]:
    cmd = _WIRE.get(args.alarm_cmd, args.alarm_cmd)
    req: dict[str, Any] = {"cmd": cmd}
    if getattr(args, "point", None):
        req["point"] = args.point
    if getattr(args, "indicator", None):
        req["indicator"] = args.indicator
    if cmd == "shelve":
        req["reason"] = args.reason
        flag, amount, unit_s = ("--hours", args.hours, 3600.0) if args.hours is not None else \
            ("--minutes", args.minutes, 60.0)
        if not (math.isfinite(amount) and amount > 0):
            raise _BadArgument(f"{flag} {amount:g} must be a duration > 0")
        req["duration_s"] = unit_s * amount
    if cmd == "history":
        if not 1 <= args.limit <= 1000:
            raise _BadArgument(f"--limit {args.limit} must be 1..1000")
        req["limit"] = args.limit
        if args.since is not None:
            req["since_s"] = parse_since(args.since)
    if cmd not in ("list", "history"):
        if getattr(args, "by", None):
            req["by"] = args.by
        else:
            with contextlib.suppress(KeyError, OSError):
                req["by"] = getpass.getuser()[:64]
    return req


def _fmt(v: Any) -> str:
    if v is None:
        return "–"
    if isinstance(v, float):
        return f"{v:.3g}"
    return str(v)


def _utc(t_s: float | None) -> str:
    if t_s is None:
        return "–"
    return datetime.fromtimestamp(t_s, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _machine_text(pt: dict[str, Any]) -> str:
    from edgevib.daemon.alarms.control import human_duration

    state = str(pt.get("machine_state") or "unknown")
    last = pt.get("last_machine_state")
    if last or pt.get("source_state") == "down":  # no data: the machine's state now is not known
        return f"unknown (stale, last {last or state})"
    left = pt.get("start_up_grace_left_s")
    if state == "starting" and isinstance(left, int | float):
        return f"starting (grace {human_duration(left)} left)"
    return state


def _note(a: dict[str, Any], last_s: float | None) -> str:
    from edgevib.daemon.alarms.control import human_duration

    parts = []
    if a.get("suppressed"):
        parts.append(f"suppressed: {a['suppressed']}")
    if a.get("stale"):
        parts.append(f"stale: {a['stale']}")
    if a.get("shelve_reason"):
        until = a.get("shelved_until_s")
        now_s = time.time() if a.get("stale") else last_s  # a shelf runs on the wall clock while data has stopped
        left = "" if until is None or now_s is None else f", {human_duration(max(0.0, until - now_s))} left"
        parts.append(f"shelved: {a['shelve_reason']}{left}")
    b = a.get("baseline")
    if b is not None and not b.get("learned"):
        parts.append(f"learning baseline ({b.get('frames', 0)} frames)")
    return "; ".join(parts)


_RANK = {"danger": 0, "alert": 1, "normal": 2}


def _print_table(rows: Sequence[tuple[str, ...]]) -> None:
    """Columns padded to their widest cell, the last one (free text) unpadded."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]) - 1)]
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r[:-1], widths, strict=True)) + "  " + r[-1])


def _print_list(result: dict[str, Any]) -> None:
    points = result.get("points", {})
    rows = [("POINT", "MACHINE STATE", "INDICATOR", "STATE", "SEVERITY", "VALUE", "ALERT", "DANGER", "NOTE")]
    alarms = sorted(result.get("alarms", []), key=lambda a: (a["point"], _RANK.get(a["severity"], 3)))
    for a in alarms:
        pt = points.get(a["point"], {})
        last = pt.get("time")
        last_s = datetime.fromisoformat(last.replace("Z", "+00:00")).timestamp() if last else None
        rows.append((a["point"], _machine_text(pt), a["indicator"], a["state"], a["severity"], _fmt(a.get("value")),
                     _fmt(a.get("alert")), _fmt(a.get("danger")), _note(a, last_s)))
    _print_table(rows)
    for pid, pt in sorted(points.items()):
        text = pt.get("alarm_text")
        if text and text != "normal":
            print(f"point {pid}: {text}")
    faults = {p: s for p, s in result.get("sensors", {}).items() if s.get("fault")}
    for p, s in sorted(faults.items()):
        print(f"sensor fault  {p}: {s['fault']} — {s.get('detail', '')}")
    for name, src in sorted(result.get("sources", {}).items()):
        if src.get("state") == "down":
            print(f"source down  {name} since {_utc(src.get('since_s'))}: {src.get('reason') or ''} "
                  "(its points' alarms are stale)")
    print(f"outbox: {result.get('outbox_pending', 0)} event(s) pending")


def _print_history(rows: list[dict[str, Any]]) -> None:
    table = [("TIME (UTC)", "POINT", "INDICATOR", "TRANSITION", "STATE", "ALARM STATE", "VALUE", "LIMIT", "BY",
              "REASON", "CAPTURE")]
    for r in rows:
        by = "" if not r.get("by") else f"{r['by']}" + (f" at {_utc(r['at_s'])}" if r.get("at_s") else "")
        state = str(r.get("state") or "") + (f" (stale: {r['stale']})" if r.get("stale") else "")
        table.append((_utc(r.get("t_s")), r.get("point") or f"[source {r.get('indicator')}]",
                      str(r.get("indicator") or ""), str(r.get("transition") or ""), state,
                      str(r.get("alarm_state") or ""), _fmt(r.get("value")), _fmt(r.get("limit")), by,
                      str(r.get("reason") or ""), str(r.get("capture") or "")))
    _print_table(table)
    if len(table) == 1:
        print("(no transitions recorded)")


def run_alarms(args: argparse.Namespace) -> int:
    from edgevib.daemon.alarms.control import CommandError, request
    from edgevib.daemon.errors import ConfigError

    try:
        path = _socket_path(args)
        req = _request(args)
    except (ConfigError, OSError, _BadArgument) as exc:
        print(f"edgevib alarms: {exc}", file=sys.stderr)
        return 2
    try:
        resp = request(path, req, timeout_s=args.timeout)
    except FileNotFoundError:
        print(f"edgevib alarms: no daemon socket at {path} (is edgevib running? see --state-dir/--socket/--config)",
              file=sys.stderr)
        return 2
    except (OSError, ValueError, CommandError) as exc:
        print(f"edgevib alarms: cannot talk to the daemon at {path}: {exc}", file=sys.stderr)
        return 2
    if args.json:
        print(json.dumps(resp, indent=1))
    elif not resp.get("ok"):
        print(f"edgevib alarms: {resp.get('error')}", file=sys.stderr)
    elif args.alarm_cmd == "list":
        _print_list(resp["result"])
    elif args.alarm_cmd == "history":
        _print_history(resp["result"])
    elif args.alarm_cmd == "select-band":
        ids = resp["result"].get("requested", [])
        print(f"select-band: requested for {', '.join(ids)} (the band is selected once the point has frames)" if ids
              else 'select-band: no point has an automatic envelope band (envelope_band_hz = "auto")')
    else:
        r = resp["result"]
        print(f"{args.alarm_cmd}: {r.get('changed', 0)} alarm(s) changed, {r.get('events', 0)} event(s)")
        for a in r.get("not_acknowledged") or ():  # hidden alarms a point-wide ack leaves (shown again later)
            print(f"  not acknowledged: {a.get('indicator')} is {a.get('state')} ({a.get('reason') or ''}); "
                  "acknowledge it when it shows again")
    return 0 if resp.get("ok") else 2
