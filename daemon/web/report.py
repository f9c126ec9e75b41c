"""Offline analysis reports: one self-contained HTML file (every script, style and number inlined) with the
spectrum, envelope, waveform and indicator panels of a recording, and the trend with its projection when given.

The file opens in any current browser without a network or a server, so an analyst can attach it to a work
order.  Its charts are drawn by the same script as the live view (``static/view.js``, report mode) with the
vendored uPlot; the data sit in a ``<script type="application/json">`` block.

Used by ``edgevib analyze FILE --report OUT.html``; ``edgevib replay … --report OUT.html`` passes ``trend`` too
(:func:`build_report`'s ``trend`` takes the API's trend document: ``indicator``, ``unit``, ``t_s``, ``values``,
``limits`` {alert, danger}, ``projection`` {``t_s``, ``values``, …} or None, ``source``).
"""

from __future__ import annotations

import html
import json
import math
import os
import tempfile
import time
from collections.abc import Iterable, Mapping
from importlib import resources
from pathlib import Path
from typing import Any

from edgevib.daemon import __version__
from edgevib.daemon.web.api import jsonable

__all__ = ["build_report", "write_report"]

_STATIC = resources.files("edgevib.daemon.web") / "static"
ADVISORY = ("edgevib monitors and advises; it is not a machinery protection system. Judge findings with a "
            "qualified analyst and the site's procedures.")


def _asset(*parts: str) -> str:
    node = _STATIC
    for p in parts:
        node = node / p
    return node.read_text(encoding="utf-8")


def _script_text(js: str) -> str:
    return js.replace("</script", "<\\/script")


def _num(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    if isinstance(v, float):
        return str(int(v)) if v.is_integer() and abs(v) < 1e12 else f"{v:.5g}"
    return html.escape(str(v))


def _rows(items: Iterable[tuple[str, Any, str]]) -> str:
    out = []
    for name, value, unit in items:
        out.append(f'<tr data-indicator="{html.escape(name)}"><td>{html.escape(name)}</td><td>{_num(value)}</td>'
                   f"<td>{html.escape(unit if unit != '1' else '')}</td></tr>")
    return "\n".join(out)


def build_report(*, title: str, meta: Mapping[str, Any], indicators: Iterable[tuple[str, Any, str]],
                 spectrum: Mapping[str, Any] | None, envelope: Mapping[str, Any] | None,
                 waveform: Mapping[str, Any] | None, trend: Mapping[str, Any] | None = None,
                 notes: Iterable[str] = ()) -> str:
    """The report's HTML text.

    Parameters
    ----------
    title : shown at the top (file or point name)
    meta : ``{label: value}`` lines of the header (sample rate, speed, band…)
    indicators : ``(name, value, unit)`` rows
    spectrum, envelope, waveform : documents of :mod:`edgevib.pipelines.panels` (None hides a panel)
    trend : the API's trend document (None hides the trend panel)
    """
    data = {"spectrum": spectrum, "envelope": envelope, "waveform": waveform, "trend": trend}
    payload = json.dumps(jsonable(data), separators=(",", ":"), allow_nan=False).replace("</", "<\\/")
    meta_html = "\n".join(f"<tr><th>{html.escape(str(k))}</th><td>{_num(v)}</td></tr>" for k, v in meta.items())
    notes_html = "".join(f"<li>{html.escape(n)}</li>" for n in notes)
    made = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    hidden = {k: " hidden" if v is None else "" for k, v in data.items()}
    return f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="edgevib {html.escape(__version__)}">
<title>edgevib report — {html.escape(title)}</title>
<style>{_asset("vendor", "uplot", "uPlot.min.css")}</style>
<style>{_asset("view.css")}
.report {{ max-width: 1150px; margin: 0 auto; padding: 14px; }}
.report table.meta th {{ text-align: left; font-weight: 400; color: var(--muted); padding-right: 12px; }}
.report table.meta, .report table.ind {{ font: 12px var(--mono); border-collapse: collapse; }}
.report table.ind td {{ padding: 1px 12px 1px 0; border-bottom: 1px dotted var(--rule); }}
.cols {{ display: grid; grid-template-columns: 1fr 1fr; gap: 14px; }}
@media print {{ .controls {{ display: none; }} }}
</style>
</head>
<body>
<header class="bar"><div class="brand"><span class="mark" aria-hidden="true"></span> edgevib report
  <span class="site">{html.escape(title)}</span></div><div class="status"><span class="who">made {made}</span></div></header>
<div class="report">
  <div class="cols">
    <section class="panel" id="panel-meta"><header><h3>Recording</h3></header><table class="meta">{meta_html}</table>
      <ul class="note">{notes_html}</ul></section>
    <section class="panel" id="panel-indicators"><header><h3>Indicators</h3></header>
      <table class="ind"><tbody>{_rows(indicators)}</tbody></table></section>
  </div>
  <article class="panel" id="panel-spectrum"{hidden["spectrum"]}>
    <header><h3>Spectrum</h3><div class="controls">
      <label>Quantity <select id="sp-qty"><option value="velocity_mm_s">velocity (mm/s r.m.s.)</option>
        <option value="acceleration_g">acceleration (g r.m.s.)</option></select></label>
      <label>Scale <select id="sp-scale"><option value="lin">linear</option><option value="log">log</option></select></label>
      <span class="hint">drag to zoom, double-click to reset</span></div></header>
    <div class="readout" id="sp-read">&nbsp;</div><div class="chart" id="sp-chart"></div>
    <table class="markers" id="sp-markers"><thead><tr><th>marker</th><th>frequency</th><th>velocity</th><th>acceleration</th></tr></thead><tbody></tbody></table>
  </article>
  <article class="panel" id="panel-envelope"{hidden["envelope"]}>
    <header><h3>Envelope spectrum</h3><div class="controls"><label>Scale <select id="en-scale"><option value="lin">linear</option>
      <option value="log">log</option></select></label><span id="en-band" class="hint"></span></div></header>
    <div class="readout" id="en-read">&nbsp;</div><div class="chart" id="en-chart"></div>
    <table class="markers" id="en-families"><thead><tr><th>family</th><th>expected</th><th>found</th><th>level</th><th>harmonics</th><th>verdict</th></tr></thead><tbody></tbody></table>
  </article>
  <article class="panel" id="panel-waveform"{hidden["waveform"]}>
    <header><h3>Waveform</h3><div class="controls"><span id="wf-info" class="hint"></span></div></header>
    <div class="readout" id="wf-read">&nbsp;</div><div class="chart" id="wf-chart"></div>
  </article>
  <article class="panel" id="panel-trend"{hidden["trend"]}>
    <header><h3>Trend</h3><div class="controls"><span id="tr-src" class="hint"></span></div></header>
    <div class="readout" id="tr-read">&nbsp;</div><div class="chart" id="tr-chart"></div>
    <table class="markers" id="tr-cross" hidden><thead><tr><th>limit</th><th>level</th><th>status</th><th>projected</th><th>interval</th></tr></thead><tbody></tbody></table>
  </article>
  <p class="note">{html.escape(ADVISORY)}</p>
</div>
<script type="application/json" id="report-data">{payload}</script>
<script>{_script_text(_asset("vendor", "uplot", "uPlot.iife.min.js"))}</script>
<script>{_script_text(_asset("view.js"))}</script>
</body>
</html>
"""


def _umask() -> int:
    """The process's file-creation mask (read by setting it and putting it straight back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_report(path: str | os.PathLike[str], text: str) -> Path:
    """Write ``text`` to ``path`` atomically (a temporary file in the same folder, then a rename).

    The file gets the mode any newly created file gets (0666 less the process umask, e.g. 0644 under umask 022):
    a report is meant to be shared, not the 0600 of a temporary file.
    """
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=".edgevib-report-", suffix=".html", dir=p.parent if str(p.parent) else ".")
    try:
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.replace(tmp, p)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return p
