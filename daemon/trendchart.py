"""``edgevib trend``: the severity history of a point and indicator as a terminal chart, with limits and projection.

Reads the daemon's history file read-only (safe while the daemon runs)::

    edgevib trend                                  # every trended series: level, slope, next limit
    edgevib trend P-101-DE-H                       # that point's series
    edgevib trend P-101-DE-H velocity_rms_mm_s     # the chart (80 columns), projections and advice
    edgevib trend P-101-DE-H velocity_rms_mm_s --json

The chart plots the median of each roll-up bucket (``*``), its range where it is wider than a row (``:``), the
limits as dashed lines labelled on the right, the fitted growth curve carried forward to the projection
(``.``), the present time (``|``) and, on the row under the time axis, the periods the machine was not
running (``s``).  Exit codes: 0 done, 2 bad arguments or no history.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import textwrap
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from edgevib.daemon.errors import EdgevibError
from edgevib.daemon.history import HistoryReader, HistorySeries

__all__ = ["configure_trend", "render_chart", "run_trend"]

_PLOT_ROWS = 14


def _fmt_value(v: float | None) -> str:
    if v is None or not math.isfinite(v):
        return "n/a"
    return f"{v:.3g}"


def _fmt_eta(s: float | None) -> str:
    if s is None:
        return "—"
    d = s / 86400.0
    if d >= 60:
        return f"{d / 30.4:.1f} mo"
    if d >= 2:
        return f"{d:.1f} d"
    if s >= 7200:
        return f"{s / 3600:.1f} h"
    return f"{s / 60:.0f} min"


def _date(t_s: float, span_s: float) -> str:
    dt = datetime.fromtimestamp(t_s, UTC)
    if span_s >= 3 * 86400:
        return dt.strftime("%Y-%m-%d")
    return dt.strftime("%m-%d %H:%M")


def _curve(doc: dict[str, Any], t: np.ndarray) -> np.ndarray | None:
    """The fitted growth curve of a projection document at times ``t`` (None when not rising)."""
    fit = doc.get("fit")
    if not doc.get("rising") or not isinstance(fit, dict):
        return None
    z = np.asarray(float(fit["intercept"]) + float(fit["slope"]) * (t - float(fit["t_ref_s"])), dtype=np.float64)
    return curve_values(fit, z)


def curve_values(fit: dict[str, Any], z: np.ndarray) -> np.ndarray:
    """A trend document's fitted curve from its straight-line scale ``z`` (:func:`curve_from_line`)."""
    from edgevib.pipelines.trend import curve_from_line  # scipy loads only when a curve is drawn

    return curve_from_line(str(fit["model"]), z, float(fit.get("shape") or 1.0))


def _unit(unit: str) -> str:
    return "" if unit in ("", "1") else unit


@dataclass
class _Plot:
    """The character grid of a chart and its scales: time to column, value to row."""

    t0: float
    tspan: float
    ymin: float
    ymax: float
    width: int
    rows: int = _PLOT_ROWS
    cells: list[list[str]] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.cells = [[" "] * self.width for _ in range(self.rows)]

    def col(self, tt: float) -> int:
        return min(self.width - 1, max(0, round((tt - self.t0) / self.tspan * (self.width - 1))))

    def row(self, v: float) -> int:
        return min(self.rows - 1, max(0, round((self.ymax - v) / (self.ymax - self.ymin) * (self.rows - 1))))


def _chart_head(series: HistorySeries, doc: dict[str, Any] | None, width: int) -> str:
    unit = (doc or {}).get("unit", "")
    head = f"{series.point}  {series.indicator}"
    if doc is not None:
        state = doc.get("machine_state")
        head += f"  ({series.level} roll-ups{', ' + _unit(unit) if _unit(unit) else ''}" \
                f"{', machine ' + state if state else ''})"
    return head[:width]


def _value_range(series: HistorySeries, y: np.ndarray, limits: list[dict[str, Any]]) -> tuple[float, float]:
    """The value axis: from 0 (or below) to the highest value or limit, with 5 % headroom."""
    lo_v = [float(np.nanmin(series.vmin if series.vmin is not None else y)), float(np.nanmin(y))]
    hi_v = [float(np.nanmax(series.vmax if series.vmax is not None else y)), float(np.nanmax(y))]
    for lim in limits:
        lo_v.append(float(lim["value"]))
        hi_v.append(float(lim["value"]))
    ymin, ymax = min([*lo_v, 0.0]), max(hi_v)
    if ymax <= ymin:
        ymax = ymin + 1.0
    ymax += 0.05 * (ymax - ymin)
    return ymin, ymax


def _draw(plot: _Plot, series: HistorySeries, doc: dict[str, Any] | None, limits: list[dict[str, Any]],
          t: np.ndarray, now: float, t_end: float) -> None:
    """Limits (``-``), the fitted curve (``.``), the buckets (``:`` and ``*``) and the present (``|``)."""
    grid = plot.cells
    for lim in limits:
        r = plot.row(float(lim["value"]))
        for c in range(plot.width):
            if grid[r][c] == " " and c % 2 == 0:
                grid[r][c] = "-"
    curve_t = np.linspace(now, t_end, max(2, plot.col(t_end) - plot.col(now) + 1))
    fitted = _curve(doc or {}, curve_t)
    if fitted is not None:
        for tt, v in zip(curve_t, fitted, strict=True):
            if math.isfinite(float(v)) and plot.ymin <= v <= plot.ymax:
                grid[plot.row(float(v))][plot.col(float(tt))] = "."
    y = series.value
    cols = np.array([plot.col(float(x)) for x in t])
    for c in np.unique(cols):
        sel = cols == c
        med = float(np.median(y[sel]))
        if series.vmin is not None and series.vmax is not None:
            a, b = plot.row(float(np.max(series.vmax[sel]))), plot.row(float(np.min(series.vmin[sel])))
            for r in range(a, b + 1):
                if grid[r][c] in (" ", "-", "."):
                    grid[r][c] = ":"
        grid[plot.row(med)][c] = "*"
    now_c = plot.col(now)
    for r in range(plot.rows):
        if grid[r][now_c] in (" ", "-"):
            grid[r][now_c] = "|"


def _grid_lines(plot: _Plot, limits: list[dict[str, Any]], axis_w: int) -> list[str]:
    """The grid's rows with the value ticks on the left and the limit labels on the right, then the time axis."""
    lines = []
    row_labels: dict[int, str] = {}
    for lim in limits:
        row_labels.setdefault(plot.row(float(lim["value"])), f"{lim['label']} {lim['value']:.3g}")
    ymin, ymax, rows = plot.ymin, plot.ymax, plot.rows
    for r in range(rows):
        tick = ymax - r * (ymax - ymin) / (rows - 1)
        if abs(tick) < 1e-9 * (ymax - ymin):
            tick = 0.0
        left = f"{tick:>{axis_w}.3g}" if r % 3 == 0 or r == rows - 1 else " " * axis_w
        lines.append(f"{left} +{''.join(plot.cells[r])} {row_labels.get(r, '')}".rstrip())
    lines.append(" " * axis_w + " +" + "-" * plot.width)
    return lines


def _time_lines(plot: _Plot, series: HistorySeries, now: float, t_end: float, axis_w: int) -> list[str]:
    """The not-running row (``s``), the dates under the plot and the legend for ``s``."""
    lines = []
    t0, tspan, plot_w = plot.t0, plot.tspan, plot.width
    stop_row = [" "] * plot_w
    for _state, p0, p1 in series.periods:
        if p1 < t0 or p0 > t_end:
            continue
        for c in range(plot.col(max(p0, t0)), plot.col(min(p1, t_end)) + 1):
            stop_row[c] = "s"
    stopped = any(c != " " for c in stop_row)
    if stopped:
        lines.append((" " * axis_w + "  " + "".join(stop_row)).rstrip())
    left_date, right_date = _date(t0, tspan), _date(t_end, tspan)
    mid = f"now {_date(now, tspan)}" if t_end > now else ""
    gap = plot_w - len(left_date) - len(right_date)
    axis = left_date + (mid.center(gap) if mid and gap > len(mid) + 2 else " " * max(gap, 1)) + right_date
    lines.append(" " * (axis_w + 2) + axis)
    if stopped:
        lines.append(" " * (axis_w + 2) + "s: machine not running (not in the roll-ups)")
    return lines


def render_chart(series: HistorySeries, doc: dict[str, Any] | None, width: int = 80) -> str:
    """The chart of one series (and its projection document, if any) in ``width`` columns."""
    lines: list[str] = [_chart_head(series, doc, width)]
    if series.t_s.size == 0:
        lines.append("no running values in the history yet")
        return "\n".join(lines)
    t = series.stamp_s  # a bucket stands for the mean time of its values, as the projection fits it
    now = float((doc or {}).get("t_s") or t[-1])
    limits = [lim for lim in (doc or {}).get("limits", []) if lim.get("value") is not None]
    t_end = now
    etas = [lim["eta_high_s"] or lim["eta_s"] for lim in limits if lim.get("status") == "rising" and lim.get("eta_s")]
    span = max(now - float(t[0]), 1.0)
    if etas:
        t_end = now + min(max(etas), 1.5 * span)
    label_w = max([len(f"{lim['label']} {lim['value']:.3g}") for lim in limits] + [6])
    axis_w = 8
    plot_w = max(20, width - axis_w - 2 - label_w - 1)
    ymin, ymax = _value_range(series, series.value, limits)
    t0 = float(t[0])
    plot = _Plot(t0=t0, tspan=max(t_end - t0, 1e-9), ymin=ymin, ymax=ymax, width=plot_w)
    _draw(plot, series, doc, limits, t, now, t_end)
    lines += _grid_lines(plot, limits, axis_w)
    lines += _time_lines(plot, series, now, t_end, axis_w)
    if doc is not None:
        lines += _summary(doc, width)
    else:
        lines.append("no trend evaluated yet (the daemon evaluates every [trend] evaluate_s)")
    return "\n".join(lines)


def _crossing_date(lim: dict[str, Any]) -> str:
    """The projected crossing's date (RFC 3339 ``date`` of the limit): the day, and within two days the time of
    day too (UTC), where a date alone says little."""
    date = lim.get("date") or ""
    eta = lim.get("eta_s")
    if eta is not None and eta < 2 * 86400.0 and len(date) >= 16:
        return f"{date[:10]} {date[11:16]} UTC"
    return date[:10]


def _summary(doc: dict[str, Any], width: int) -> list[str]:
    unit = _unit(doc.get("unit", ""))

    def q(v: float | None) -> str:
        text = _fmt_value(v)
        return f"{text} {unit}" if unit and text != "n/a" else text

    out = []
    if doc.get("status") != "ok":
        out.append(f"status: {doc.get('status')}" + (f" — {doc['need']}" if doc.get("need") else ""))
    slope = doc.get("slope_per_day")
    if slope is not None:
        per = f"{unit}/day" if unit else "per day"
        out.append(f"level {q(doc.get('level'))}; slope {slope:+.3g} {per} ({_fmt_value(doc.get('slope_low_per_day'))} "
                   f"to {_fmt_value(doc.get('slope_high_per_day'))}, {round(100 * doc.get('coverage', 0.8))} %)")
        fit = "rising" if doc.get("rising") else "not rising"
        if doc.get("rising") and doc.get("model"):
            fit += f" ({doc['model']} growth, evidence weight {doc.get('model_weight', 1):.2f}"
            fit += f", since {doc['onset'][:10]})" if doc.get("onset") else ")"
        out.append(fit)
    cov = round(100 * float(doc.get("coverage", 0.8)))
    for lim in doc.get("limits", []):
        st = lim.get("status")
        head = f"  {lim['label']:<8} {q(lim['value']):>12}"
        if st == "rising":
            text = (f"{head}: in {_fmt_eta(lim['eta_s'])} ({_fmt_eta(lim['eta_low_s'])} to "
                    f"{_fmt_eta(lim['eta_high_s'])}, {cov} %), around {_crossing_date(lim)}")
        else:
            text = f"{head}: {st}"
        out.append(text)
    step = doc.get("step")
    if step and step.get("significant"):
        change = f"{step['change']:+.3g}" + (f" {unit}" if unit else "")
        out.append(f"step change {change} from baseline {q(step['baseline'])} (significant above "
                   f"{q(step['threshold'])})")
    wrapped = [w for line in out for w in textwrap.wrap(line, width, subsequent_indent="    ")]
    if doc.get("advice_text"):
        wrapped += textwrap.wrap(doc["advice_text"], width)
    return wrapped


# --------------------------------------------------------------------------------------------- command


def configure_trend(parser: argparse.ArgumentParser) -> None:
    parser.description = ("Show the severity history of a point and indicator with its trend, limits and the "
                          "projected time to each limit (from the daemon's history file). edgevib advises; it is "
                          "not a machinery protection system.")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--state-dir", default=None,
                       help="the daemon's state directory (default: $EDGEVIB_STATE_DIR or /var/lib/edgevib)")
    where.add_argument("--history", default=None, help="the history file (default: STATE_DIR/history.sqlite)")
    where.add_argument("--config", default=None, help="the daemon's configuration file ([history] file is used)")
    parser.add_argument("point", nargs="?", help="measurement point (default: list every trended series)")
    parser.add_argument("indicator", nargs="?", help="indicator, e.g. velocity_rms_mm_s (default: list the point's)")
    parser.add_argument("--days", type=float, default=None, help="show this many days back (default: the trend "
                        "window of the stored projection, else everything)")
    parser.add_argument("--width", type=int, default=None, help="chart width in columns (default: the terminal's, "
                            "at most 120)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def _history_path(args: argparse.Namespace) -> Path:
    if args.history:
        return Path(args.history)
    if args.config:
        from edgevib.daemon.config import load_config

        return Path(load_config(args.config, plans=False).history.file)  # resolved against state_dir
    state = args.state_dir or os.environ.get("EDGEVIB_STATE_DIR") or "/var/lib/edgevib"
    return Path(state) / "history.sqlite"


def _fail(message: str) -> int:
    print(f"edgevib trend: {message}", file=sys.stderr)
    return 2


def run_trend(args: argparse.Namespace) -> int:
    try:
        path = _history_path(args)
        with HistoryReader(path) as reader:
            return _run(args, reader)
    except EdgevibError as exc:  # the history's and the configuration's errors: one line, exit 2
        return _fail(str(exc))


def _run(args: argparse.Namespace, reader: HistoryReader) -> int:
    width = args.width or min(120, max(60, terminal_width()))
    docs = reader.projections()
    if args.point is None or args.indicator is None:
        rows = [(p, i, d) for (p, i), d in docs.items() if args.point is None or p == args.point]
        if args.point is not None and args.point not in reader.points():
            return _fail(f"no history for point {args.point!r} (points: {', '.join(reader.points()) or 'none'})")
        if args.json:
            print(json.dumps([d for _, _, d in rows], allow_nan=False))
            return 0
        if not rows:
            pts = reader.points()
            names = ", ".join(pts) if args.point is None else ", ".join(pts.get(args.point, ()))
            print(f"no trend evaluated yet; recorded: {names or 'nothing'}")
            return 0
        print("\n".join(_listing(rows, width)))
        return 0
    doc = docs.get((args.point, args.indicator))
    latest = reader.latest_time_s(args.point)
    if latest is None:
        return _fail(f"no history for point {args.point!r} (points: {', '.join(reader.points()) or 'none'})")
    days = args.days
    since = None if days is None else latest - days * 86400.0
    if since is None and doc is not None and doc.get("span_s"):
        since = latest - float(doc["span_s"]) * 1.02
    series = reader.series(args.point, args.indicator, since_s=since, until_s=latest, max_points=2 * width)
    if args.indicator not in reader.points().get(args.point, ()):
        return _fail(f"point {args.point!r} records no {args.indicator!r} (indicators: "
                     f"{', '.join(reader.points().get(args.point, ()))})")
    if args.json:
        out = {"point": args.point, "indicator": args.indicator, "projection": doc,
               "series": {"level": series.level, "t_s": series.t_s.tolist(), "p50": _nan_list(series.value),
                          "min": _nan_list(series.vmin), "max": _nan_list(series.vmax),
                          "mean": _nan_list(series.mean), "p_high": _nan_list(series.p_high),
                          "count": _nan_list(series.count), "high_percentile": series.high_percentile},
               "periods": [{"state": s, "start_s": a, "end_s": b} for s, a, b in series.periods]}
        print(json.dumps(out, allow_nan=False))
        return 0
    print(render_chart(series, doc, width=width))
    return 0


def _listing(rows: list[tuple[str, str, dict[str, Any]]], width: int) -> list[str]:
    """One line per series — point, indicator, level, slope per day, status and the next limit's projected time —
    within ``width`` columns (what does not fit goes to indented continuation lines)."""
    pw = min(max([len("point")] + [len(p) for p, _, _ in rows]), max(8, width - 47))
    iw = max([len("indicator")] + [len(i) for _, i, _ in rows])
    out = textwrap.wrap(f"{'point':<{pw}} {'indicator':<{iw}} {'level':>8} {'slope/day':>10}  status, next limit",
                        width, subsequent_indent="    ")
    for p, i, d in rows:
        nxt = [lim for lim in d.get("limits", []) if lim.get("status") == "rising"]
        nxt.sort(key=lambda lim: lim["eta_s"])
        status = "rising" if d.get("rising") else (d.get("status") or "")
        status = "not rising" if status == "ok" else status
        if nxt:
            status += f", {nxt[0]['label']} in {_fmt_eta(nxt[0]['eta_s'])}"
        slope = d.get("slope_per_day")
        head = f"{p:<{pw}} {i:<{iw}} {_fmt_value(d.get('level')):>8} {'' if slope is None else f'{slope:+.3g}':>10}"
        if len(head) + 2 + len(status) <= width:
            out.append(f"{head}  {status}")
        else:
            out += textwrap.wrap(head, width, subsequent_indent="    ")
            out += textwrap.wrap(status, width, initial_indent="    ", subsequent_indent="    ")
    return out


def _nan_list(a: Any) -> list[float | None] | None:
    if a is None:
        return None
    return [None if not math.isfinite(float(v)) else float(v) for v in a]


def terminal_width() -> int:
    """The terminal's columns (80 when the output is not a terminal)."""
    try:
        return os.get_terminal_size(sys.stdout.fileno()).columns
    except OSError:
        return 80
