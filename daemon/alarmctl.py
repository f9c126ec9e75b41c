"""``edgevib alarms``: list, acknowledge, shelve, unshelve or re-learn alarms of a running daemon.

Talks to the daemon's control socket (``<state_dir>/alarms.sock`` unless ``[alarms] socket`` says otherwise)::

    edgevib alarms --state-dir /var/lib/edgevib list
    edgevib alarms ack P-101-DE-H [--indicator velocity_rms_mm_s]
    edgevib alarms shelve P-101-DE-H --reason "coupling work, permit 4711" --hours 8
    edgevib alarms unshelve P-101-DE-H
    edgevib alarms relearn P-101-DE-H        # after a repair: learn new baselines

Exit codes: 0 done, 1 the daemon refused the command, 2 bad arguments or no daemon listening.
"""

from __future__ import annotations

import argparse
import contextlib
import getpass
import json
import os
import sys
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
    p = sub.add_parser("list", help="show every alarm and sensor state")
    p.add_argument("point", nargs="?", help="only this point")
    for name, text in (("ack", "acknowledge (and reset latched) alarms of a point"),
                       ("unshelve", "return shelved alarms of a point to service")):
        p = sub.add_parser(name, help=text)
        p.add_argument("point")
        p.add_argument("--indicator", help="only this indicator (default: all of the point)")
    p = sub.add_parser("shelve", help="hide alarms of a point for a while, with a reason")
    p.add_argument("point")
    p.add_argument("--indicator", help="only this indicator (default: all of the point)")
    p.add_argument("--reason", required=True, help="why (recorded in the event)")
    dur = p.add_mutually_exclusive_group(required=True)
    dur.add_argument("--hours", type=float)
    dur.add_argument("--minutes", type=float)
    p = sub.add_parser("relearn", help="forget a point's baselines and learn them again (after a repair)")
    p.add_argument("point")


def _socket_path(args: argparse.Namespace) -> Path:
    if args.socket:
        return Path(args.socket)
    if args.config:
        from edgevib.daemon.config import load_config

        return Path(load_config(args.config, plans=False).alarms.socket)  # no plan checks: a quick look-up
    state = args.state_dir or os.environ.get("EDGEVIB_STATE_DIR") or "/var/lib/edgevib"
    return Path(state) / "alarms.sock"


def _request(args: argparse.Namespace) -> dict[str, Any]:
    cmd = args.alarm_cmd
    req: dict[str, Any] = {"cmd": cmd}
    if getattr(args, "point", None):
        req["point"] = args.point
    if getattr(args, "indicator", None):
        req["indicator"] = args.indicator
    if cmd == "shelve":
        req["reason"] = args.reason
        req["duration_s"] = 3600.0 * args.hours if args.hours is not None else 60.0 * args.minutes
    if cmd != "list":
        with contextlib.suppress(KeyError, OSError):
            req["by"] = getpass.getuser()[:64]
    return req


def _fmt(v: Any) -> str:
    if v is None:
        return "–"
    if isinstance(v, float):
        return f"{v:.3g}"
    return str(v)


def _print_list(result: dict[str, Any]) -> None:
    rows = [("POINT", "INDICATOR", "STATE", "SEVERITY", "VALUE", "ALERT", "DANGER", "NOTE")]
    for a in result.get("alarms", []):
        note = a.get("suppressed") or (f"shelved: {a['shelve_reason']}" if a.get("shelve_reason") else "")
        b = a.get("baseline")
        if b is not None and not b.get("learned"):
            note = (note + "; " if note else "") + f"learning baseline ({b.get('frames', 0)} frames)"
        rows.append((a["point"], a["indicator"], a["state"], a["severity"], _fmt(a.get("value")),
                     _fmt(a.get("alert")), _fmt(a.get("danger")), note))
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]) - 1)]
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r[:-1], widths, strict=True)) + "  " + r[-1])
    faults = {p: s for p, s in result.get("sensors", {}).items() if s.get("fault")}
    for p, s in sorted(faults.items()):
        print(f"sensor fault  {p}: {s['fault']} — {s.get('detail', '')}")
    print(f"outbox: {result.get('outbox_pending', 0)} event(s) pending")


def run_alarms(args: argparse.Namespace) -> int:
    from edgevib.daemon.alarms.control import CommandError, request
    from edgevib.daemon.errors import ConfigError

    try:
        path = _socket_path(args)
    except (ConfigError, OSError) as exc:
        print(f"edgevib alarms: {exc}", file=sys.stderr)
        return 2
    req = _request(args)
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
    else:
        r = resp["result"]
        print(f"{args.alarm_cmd}: {r.get('changed', 0)} alarm(s) changed, {r.get('events', 0)} event(s)")
    return 0 if resp.get("ok") else 1
