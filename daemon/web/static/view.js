/* edgevib view: the live page (data from /api/v1) and the offline report (data embedded in the file).
   Plain browser JavaScript, no build step; charts by the vendored uPlot. */
"use strict";

(function () {
  const API = "/api/v1";
  const COLORS = { line: "#1f2a2e", accent: "#136f63", order: "#136f63", harmonic: "#9fc7c0", defect: "#a4262c",
                   side: "#b86e00",
                   alert: "#b86e00", danger: "#a4262c", proj: "#6b4fa0", projBand: "#b9a8d6",
                   projFill: "rgba(107, 79, 160, 0.16)", iso: "#5d7378", user: "#2f5d8a",
                   window: "rgba(107, 79, 160, 0.55)", grid: "#e6e0d2" };
  const state = { points: [], selected: null, session: null, charts: {}, spectrum: null, envelope: null,
                  waveform: null, trend: null, zoom: {}, pointsAt: 0, connected: false,
                  everConnected: false, refreshTimer: null, listTimer: null, lastRefresh: 0, report: null,
                  listItems: new Map() };

  // ------------------------------------------------------------------ helpers
  function $(id) { return document.getElementById(id); }
  function el(tag, attrs, ...kids) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === null || v === undefined) continue;
      if (k === "class") e.className = v; else if (k === "text") e.textContent = v; else e.setAttribute(k, v);
    }
    for (const k of kids) e.append(k);
    return e;
  }
  function num(v, digits) {
    if (v === null || v === undefined || !isFinite(v)) return "n/a";
    const a = Math.abs(v);
    if (a !== 0 && (a < 1e-3 || a >= 1e5)) return v.toExponential((digits || 4) - 1);
    return Number(v.toPrecision(digits || 4)).toString();
  }
  async function getJSON(path) {
    const r = await fetch(path, { headers: { "Accept": "application/json" }, credentials: "same-origin" });
    const body = await r.json().catch(() => ({}));
    if (!r.ok) { const e = new Error(body.error || r.statusText); e.status = r.status; throw e; }
    return body;
  }
  function sevClass(p) {
    if (p.sensor_fault) return "sev-sensor";
    const t = (p.alarm_state || "").toLowerCase();
    if (t.startsWith("danger")) return "sev-danger";
    if (t.startsWith("alert")) return "sev-alert";
    if (p.machine_state === "stopped") return "sev-stopped";
    return "sev-ok";
  }

  // A point whose data is not current: no frame for a while (the API's `stale`) or its source is down.
  function isStale(p) { return Boolean(p && (p.stale || p.source_state === "down")); }
  // the machine's state; while every point of the machine is stale it is unknown, with the last known one
  function machineText(p) { return p.machine_state + (p.last_machine_state ? ` (last ${p.last_machine_state})` : ""); }
  // its age now: the API's age_s at the time of the answer plus the time since
  function ageText(p) {
    if (!p.frame_end || p.age_s === null || p.age_s === undefined) return "no data yet";
    const a = p.age_s + Math.max(0, Date.now() - state.pointsAt) / 1000;
    const t = a < 120 ? `${Math.round(a)} s` : a < 7200 ? `${Math.round(a / 60)} min` : `${num(a / 3600, 3)} h`;
    return `last data ${t} ago`;
  }
  // the header badge says "live" only while events flow and the chosen point's data (or any point's) is current
  function renderBadge() {
    const b = $("live");
    if (!state.connected) { b.textContent = state.everConnected ? "reconnecting" : "offline"; b.className = "live off"; return; }
    const p = state.points.find(x => x.id === state.selected);
    const stale = p ? isStale(p) : state.points.length > 0 && state.points.every(isStale);
    b.textContent = stale ? (p ? `stale: ${ageText(p)}` : "no current data") : "live";
    b.className = stale ? "live stale" : "live on";
  }

  // ------------------------------------------------------------------ charts
  function chartWidth(container) { return Math.max(320, container.clientWidth || 800); }

  function drawMarkers(u, marks) {
    // vertical lines with labels, drawn on the plot canvas after the series
    const ctx = u.ctx;
    const { left, top, width, height } = u.bbox;
    ctx.save();
    ctx.beginPath(); ctx.rect(left, top, width, height); ctx.clip();
    ctx.font = `${Math.round(11 * devicePixelRatio)}px sans-serif`;
    // labels never overlap: one that would run into a label already drawn goes to the next row down (at most
    // two rows lower); where all are taken (a wide span) it is left out: its line stays, zooming in shows it
    const ROWS = 6, pad = 4 * devicePixelRatio, taken = [];
    const drawn = [];
    let hidden = 0;
    for (const m of marks) {
      const x = Math.round(u.valToPos(m.x, "x", true));
      if (x < left || x > left + width) continue;
      ctx.strokeStyle = m.color; ctx.fillStyle = m.color;
      ctx.lineWidth = devicePixelRatio; ctx.setLineDash(m.dash || []);
      ctx.beginPath(); ctx.moveTo(x, top); ctx.lineTo(x, top + height); ctx.stroke();
      if (!m.label) continue;
      const x0 = x + 3 * devicePixelRatio, x1 = x0 + ctx.measureText(m.label).width;
      const first = m.row || 1;
      let row = 0;
      for (let r = first; r <= Math.min(ROWS, first + 2) && !row; r++)
        if (!taken.some(t => t.row === r && x0 < t.x1 + pad && t.x0 < x1 + pad)) row = r;
      if (!row) { hidden++; continue; }
      taken.push({ row, x0, x1 });
      drawn.push({ label: m.label, row, x0: x0 / devicePixelRatio, x1: x1 / devicePixelRatio });
      ctx.fillText(m.label, x0, top + row * 12 * devicePixelRatio);
    }
    ctx.restore();
    const panel = u.root.closest(".panel");
    if (panel) { panel.setAttribute("data-labels", JSON.stringify(drawn)); panel.setAttribute("data-labels-hidden", String(hidden)); }
  }

  // A chart is rebuilt for every new frame. The user's x range (a drag zoom) is kept per panel across these
  // rebuilds until a double-click resets it; `initial` is the panel's own opening range when not zoomed.
  // The panel element carries the shown range (data-x-min/-max) and whether it is the user's (data-zoomed).
  // A chart is not rebuilt under a gesture: while a button is held over a plot (a drag zoom) and for a moment
  // after its release (the second press of a double-click), a new frame's redraw waits, the latest one per chart.
  // Replacing the plot's element under the pointer would lose the gesture (the browser ends it with the element).
  const gesture = { down: false, until: 0, pending: new Map(), timer: null };
  const GESTURE_HOLD_MS = 600;
  document.addEventListener("pointerdown", ev => {
    if (ev.target instanceof Element && ev.target.closest(".u-over")) gesture.down = true;
  }, true);
  const gestureEnd = () => {
    if (!gesture.down) return;
    gesture.down = false;
    gesture.until = Date.now() + GESTURE_HOLD_MS;
    flushCharts();
  };
  for (const t of ["pointerup", "pointercancel", "blur"]) window.addEventListener(t, gestureEnd, true);
  function flushCharts() {
    if (gesture.timer || gesture.pending.size === 0) return;
    const wait = gesture.down ? GESTURE_HOLD_MS : gesture.until - Date.now();
    if (wait > 0) { gesture.timer = setTimeout(() => { gesture.timer = null; flushCharts(); }, wait); return; }
    const redraws = [...gesture.pending.values()];
    gesture.pending.clear();
    for (const redraw of redraws) redraw();
  }

  function makeChart(key, container, opts, data, initial) {
    if (gesture.down || Date.now() < gesture.until) {
      gesture.pending.set(key, () => makeChart(key, container, opts, data, initial));
      flushCharts();
      return;
    }
    const old = state.charts[key];
    if (old) old.destroy();
    container.textContent = "";
    const panel = container.closest(".panel") || container;
    const show = u => {
      const sx = u.scales.x;
      if (sx.min === null || sx.max === null || sx.min === undefined || sx.max === undefined) return;
      panel.setAttribute("data-x-min", String(sx.min));
      panel.setAttribute("data-x-max", String(sx.max));
      panel.setAttribute("data-zoomed", state.zoom[key] ? "true" : "false");
    };
    const hooks = Object.assign({}, opts.hooks || {});
    // a drag selects a range: that is the user's zoom (uPlot then sets the x scale to it)
    hooks.setSelect = (hooks.setSelect || []).concat([u => {
      const sel = u.select;
      if (!(sel.width > 0)) return;
      const lo = u.posToVal(sel.left, "x"), hi = u.posToVal(sel.left + sel.width, "x");
      if (isFinite(lo) && isFinite(hi) && hi > lo) state.zoom[key] = { min: lo, max: hi };
    }]);
    hooks.setScale = (hooks.setScale || []).concat([(u, sk) => { if (sk === "x") show(u); }]);
    const u = new uPlot(Object.assign({ width: chartWidth(container), height: 240 }, opts, { hooks }), data, container);
    const range = state.zoom[key] || initial;
    if (range) u.setScale("x", { min: range.min, max: range.max });
    show(u);
    // uPlot's own double-click handler autoscales x: forget the zoom, back to the opening range
    u.over.addEventListener("dblclick", () => {
      delete state.zoom[key];
      if (initial) u.setScale("x", { min: initial.min, max: initial.max });
      show(u);
    });
    state.charts[key] = u;
  }

  function logSafe(arr) { return arr.map(v => (v === null || !(v > 0)) ? null : v); }

  function spectrumChart(doc) {
    const qty = $("sp-qty").value, log = $("sp-scale").value === "log";
    const unit = qty === "velocity_mm_s" ? "mm/s" : "g";
    const y = log ? logSafe(doc[qty]) : doc[qty];
    const named = new Set(["0.5x", "1x", "2x", "3x"]);
    // the measured orders (labelled), further shaft harmonics (light, unlabelled), defect frequencies (dashed)
    const marks = doc.markers.map(m => m.kind === "defect"
      ? { x: m.frequency_hz, label: m.label, color: COLORS.defect, dash: [4, 3], row: 2 }
      : { x: m.frequency_hz, label: m.kind === "order" && named.has(m.key) ? m.label : "",
          color: m.kind === "order" ? COLORS.order : COLORS.harmonic, dash: [], row: 1 });
    // velocity: open on the velocity band (where its lines matter); acceleration: the whole range
    const xmax = qty === "velocity_mm_s" ? Math.min(doc.max_frequency_hz, doc.velocity_band_hz[1]) : doc.max_frequency_hz;
    const shaft = doc.shaft_hz;
    makeChart("spectrum", $("sp-chart"), {
      scales: { x: { time: false },
                y: log ? { distr: 3 } : { range: (u, lo, hi) => [0, hi > 0 ? hi * 1.05 : 1] } },
      axes: [{ label: "frequency (Hz)", grid: { stroke: COLORS.grid } },
             { label: `${unit} r.m.s.`, grid: { stroke: COLORS.grid }, size: 60 }],
      series: [{}, { label: qty === "velocity_mm_s" ? "velocity" : "acceleration", stroke: COLORS.line, width: 1,
                     points: { show: false } }],
      legend: { show: false },
      cursor: { drag: { x: true, y: false } },
      hooks: {
        draw: [u => drawMarkers(u, marks)],
        setCursor: [u => {
          const i = u.cursor.idx;
          if (i === null || i === undefined) return;
          const f = u.data[0][i], a = u.data[1][i];
          const order = shaft ? ` = ${num(f / shaft, 4)}×` : "";
          $("sp-read").textContent = `${num(f, 5)} Hz${order}   ${num(a, 4)} ${unit}`;
        }],
      },
    }, [doc.frequency_hz, y], { min: 0, max: xmax });
  }

  function spectrumTable(doc) {
    const body = $("sp-markers").tBodies[0];
    body.textContent = "";
    for (const m of doc.markers) {
      if (m.kind === "harmonic") continue;  // a position only: drawn, not listed
      const row = el("tr", { "data-marker": m.key, "data-kind": m.kind },
        el("td", { text: m.label + (m.meaning ? ` (${m.meaning})` : "") }),
        el("td", { text: `${num(m.frequency_hz, 5)} Hz` }),
        el("td", { class: "vel", "data-value": m.velocity_mm_s === undefined ? null : m.velocity_mm_s,
                   text: m.velocity_mm_s === undefined ? "" : `${num(m.velocity_mm_s, 4)} mm/s` }),
        el("td", { text: m.acceleration_g === undefined ? "" : `${num(m.acceleration_g, 4)} g` }));
      body.append(row);
    }
    $("panel-spectrum").setAttribute("data-frame-end", doc.frame_end || "");
  }

  function envelopeChart(doc) {
    const panel = $("panel-envelope");
    panel.setAttribute("data-frame-end", doc.frame_end || "");
    const body = $("en-families").tBodies[0];
    body.textContent = "";
    if (!doc.available) {
      $("en-band").textContent = doc.reason;
      if (state.charts.envelope) { state.charts.envelope.destroy(); delete state.charts.envelope; }
      $("en-chart").textContent = "";
      return;
    }
    $("en-band").textContent = `band ${num(doc.band_hz[0], 5)}–${num(doc.band_hz[1], 5)} Hz` +
      (doc.band_source ? ` (${doc.band_source === "auto" ? "selected automatically" : doc.band_source})` : "") +
      (doc.note ? ` · ${doc.note}` : "");
    const log = $("en-scale").value === "log";
    const marks = [];
    for (const fam of doc.families) {
      const strong = fam.verdict !== "not detected";
      for (const h of fam.harmonics) {
        const x = isFinite(h.frequency_hz) && h.frequency_hz !== null ? h.frequency_hz : h.expected_hz;
        marks.push({ x, label: strong || h.harmonic === 1 ? (h.harmonic === 1 ? fam.label : `${h.harmonic}×`) : "",
                     color: strong ? COLORS.defect : "#9aa5a8", dash: strong ? [] : [2, 4],
                     row: 1 + ["ftf", "bpfo", "bpfi", "bsf"].indexOf(fam.key) % 4 });
        if (strong) for (const sb of h.sidebands) if (sb.frequency_hz !== null)
          marks.push({ x: sb.frequency_hz, label: "", color: COLORS.side, dash: [2, 2] });
      }
      const cls = fam.verdict === "detected" ? "v-detected" : fam.verdict === "ambiguous" ? "v-possible" : "v-not";
      const first = fam.harmonics[0] || {};
      body.append(el("tr", { "data-family": fam.key, "data-verdict": fam.verdict },
        el("td", { text: `${fam.label} (${fam.meaning})` }),
        el("td", { text: `${num(fam.expected_hz, 5)} Hz` }),
        el("td", { text: first.frequency_hz === null || first.frequency_hz === undefined ? "n/a" : `${num(first.frequency_hz, 5)} Hz` }),
        el("td", { text: fam.snr_db === null ? "n/a" : `${num(first.amplitude_g, 3)} g, ${num(fam.snr_db, 3)} dB` +
                         (first.threshold_db !== null && first.threshold_db !== undefined ? ` (needs ${num(first.threshold_db, 3)})` : "") }),
        el("td", { text: `${fam.harmonics_found} of ${fam.harmonics.length}` +
                         (fam.sideband_spacing_hz ? `; sidebands ${fam.sidebands_found} (±${num(fam.sideband_spacing_hz, 4)} Hz)` : "") }),
        el("td", { class: cls, text: fam.verdict + (fam.ambiguous_with ? ` (with ${fam.ambiguous_with})` : "") })));
    }
    makeChart("envelope", $("en-chart"), {
      scales: { x: { time: false }, y: log ? { distr: 3 } : { range: (u, lo, hi) => [0, hi > 0 ? hi * 1.05 : 1] } },
      axes: [{ label: "envelope frequency (Hz)", grid: { stroke: COLORS.grid } },
             { label: "g (peak)", grid: { stroke: COLORS.grid }, size: 60 }],
      series: [{}, { label: "envelope", stroke: COLORS.line, width: 1, points: { show: false } }],
      legend: { show: false }, cursor: { drag: { x: true, y: false } },
      hooks: {
        draw: [u => drawMarkers(u, marks)],
        setCursor: [u => {
          const i = u.cursor.idx;
          if (i === null || i === undefined) return;
          const f = u.data[0][i];
          const order = doc.shaft_hz ? ` = ${num(f / doc.shaft_hz, 4)}×` : "";
          $("en-read").textContent = `${num(f, 5)} Hz${order}   ${num(u.data[1][i], 4)} g`;
        }],
      },
    }, [doc.frequency_hz, log ? logSafe(doc.amplitude_g) : doc.amplitude_g]);
  }

  function waveformChart(doc) {
    $("wf-info").textContent = `${num(doc.duration_s, 4)} s at ${num(doc.fs_hz, 5)} Hz; peak ${num(doc.peak_g, 4)} g, ` +
      `r.m.s. ${num(doc.rms_g, 4)} g (mean ${num(doc.mean_g, 3)} g removed)` +
      (doc.reduction !== "none" ? `; ${doc.reduction}` : "");
    $("panel-waveform").setAttribute("data-frame-end", doc.frame_end || "");
    makeChart("waveform", $("wf-chart"), {
      scales: { x: { time: false } },
      axes: [{ label: "time (s)", grid: { stroke: COLORS.grid } }, { label: "g", grid: { stroke: COLORS.grid }, size: 60 }],
      series: [{}, { label: "acceleration", stroke: COLORS.accent, width: 1, points: { show: false } }],
      legend: { show: false }, cursor: { drag: { x: true, y: false } },
      hooks: { setCursor: [u => {
        const i = u.cursor.idx;
        if (i === null || i === undefined) return;
        $("wf-read").textContent = `${num(u.data[0][i], 5)} s   ${num(u.data[1][i], 4)} g`;
      }] },
    }, [doc.t_s, doc.acceleration_g]);
  }

  // the limit lines of a trend document: the API's limit_lines, or the alert/danger pair of older documents
  function trendLines(doc) {
    if (Array.isArray(doc.limit_lines)) return doc.limit_lines;
    const lim = doc.limits || {}, out = [];
    for (const k of ["alert", "danger"]) if (lim[k] !== null && lim[k] !== undefined)
      out.push({ label: k, value: lim[k], unit: doc.unit, kind: "alarm" });
    return out;
  }
  function lineStyle(l) {
    if (l.kind === "alarm") return { stroke: l.label === "danger" ? COLORS.danger : COLORS.alert, dash: [6, 4], width: 1.2 };
    if (l.kind === "iso") return { stroke: COLORS.iso, dash: [1, 3], width: 1.2 };
    return { stroke: COLORS.user, dash: [8, 3, 2, 3], width: 1.2 };
  }
  function lineLabel(l) { return l.kind === "iso" ? `zone ${l.label}` : l.kind === "user" ? "user limit" : l.label; }

  // one sorted time axis for the measured values and the projection; each series null where it has no value
  function mergeTimes(t, pt) {
    const xs = Array.from(new Set(t.concat(pt))).sort((a, b) => a - b);
    const at = new Map(xs.map((x, i) => [x, i]));
    const spread = (times, vals) => { const out = new Array(xs.length).fill(null);
      times.forEach((x, i) => { out[at.get(x)] = vals[i]; }); return out; };
    return { xs, spread };
  }

  // a projected date: with its time of day when the crossing is less than two days away
  function when(l, iso) {
    const soon = (l.eta_high_s !== null && l.eta_high_s !== undefined ? l.eta_high_s : l.eta_s) < 2 * 86400;
    return soon ? `${iso.slice(0, 10)} ${iso.slice(11, 16)} UTC` : iso.slice(0, 10);
  }

  function trendChart(doc) {
    const t = doc.t_s, v = doc.values, unit = doc.unit || "";
    const proj = doc.projection && doc.projection.t_s && doc.projection.values ? doc.projection : null;
    const { xs, spread } = mergeTimes(t, proj ? proj.t_s : []);
    const series = [{}, { label: doc.indicator, stroke: COLORS.line, width: 1.5, points: { show: t.length < 60 },
                          spanGaps: false }];
    const data = [xs, spread(t, v)];
    const lines = trendLines(doc);
    for (const l of lines) {
      series.push(Object.assign({ label: lineLabel(l), points: { show: false } }, lineStyle(l)));
      data.push(xs.map(() => l.value));
    }
    const bands = [];
    if (proj) {
      series.push({ label: "projection", stroke: COLORS.proj, dash: [2, 3], width: 1.5, points: { show: false } });
      data.push(spread(proj.t_s, proj.values));
      if (proj.low && proj.high) {
        const pct = proj.coverage ? `${Math.round(proj.coverage * 100)} % ` : "";
        series.push({ label: `${pct}interval, upper`, stroke: COLORS.projBand, width: 1, points: { show: false } });
        data.push(spread(proj.t_s, proj.high));
        series.push({ label: `${pct}interval, lower`, stroke: COLORS.projBand, width: 1, points: { show: false } });
        data.push(spread(proj.t_s, proj.low));
        bands.push({ series: [data.length - 2, data.length - 1], fill: COLORS.projFill });
      }
    }
    // the projected crossing window of each limit (from the interval's ends), drawn on the limit's level
    const windows = [];
    if (proj && proj.now_s && Array.isArray(proj.limits)) {
      for (const l of proj.limits) if (isFinite(l.eta_low_s) && l.eta_low_s !== null && isFinite(l.eta_high_s) && l.eta_high_s !== null)
        windows.push({ y: l.value, x0: proj.now_s + l.eta_low_s, x1: proj.now_s + l.eta_high_s, label: l.label });
    }
    const advice = doc.trend && doc.trend.advice_text ? ` — ${doc.trend.advice_text}` : "";
    $("tr-src").textContent = (doc.source || "") + advice;
    // the y range holds the values, the limit lines and the projected curve; the interval band is clipped to it
    // (near the horizon its upper edge can run far above every limit and would flatten the history)
    // (the curve itself only up to the highest value or limit: past its last crossing it may grow without bound)
    const known = [...v, ...lines.map(l => l.value)].filter(y => y !== null && isFinite(y));
    const top = known.length ? Math.max(...known) : Infinity;
    const ys = [...known, ...(proj ? proj.values : []).filter(y => y !== null && isFinite(y) && y <= top)];
    const yLo = ys.length ? Math.min(...ys) : 0, yHi = ys.length ? Math.max(...ys) : 1;
    const pad = (yHi - yLo) * 0.05 || Math.abs(yHi) * 0.05 || 1;
    const panel = $("panel-trend");
    panel.setAttribute("data-y-range", `${yLo - pad} ${yHi + pad}`);
    panel.setAttribute("data-count", String(t.length));
    panel.setAttribute("data-lines", lines.map(lineLabel).join("|"));
    panel.setAttribute("data-projection", proj ? (proj.low ? "band" : "curve") : "none");
    const crossTable = $("tr-cross");
    if (crossTable) {
      const body = crossTable.tBodies[0];
      body.textContent = "";
      const lims = proj && Array.isArray(proj.limits) ? proj.limits : [];
      crossTable.hidden = lims.length === 0;
      for (const l of lims) body.append(el("tr", { "data-limit": l.label },
        el("td", { text: l.label }), el("td", { text: `${num(l.value, 4)} ${unit}` }), el("td", { text: l.status || "" }),
        el("td", { text: l.date ? when(l, l.date) : "n/a" }),
        el("td", { text: l.date_low && l.date_high ? `${when(l, l.date_low)} … ${when(l, l.date_high)}` : "n/a" })));
    }
    makeChart("trend", $("tr-chart"), {
      // a lone value (a history just begun) gets an hour around it rather than an arbitrary span
      scales: { x: { time: true, range: (u, lo, hi) => xs.length === 1 && !(hi > lo) ? [xs[0] - 1800, xs[0] + 1800] : [lo, hi] },
                y: { range: () => [yLo - pad, yHi + pad] } },
      axes: [{ grid: { stroke: COLORS.grid } }, { label: unit, grid: { stroke: COLORS.grid }, size: 60 }],
      series, bands, legend: { show: true }, cursor: { drag: { x: true, y: false } },
      hooks: {
        draw: [u => {
          const ctx = u.ctx, { left, top, width, height } = u.bbox;
          ctx.save(); ctx.beginPath(); ctx.rect(left, top, width, height); ctx.clip();
          // each limit line across the whole plot (also where the series has too few values to draw it)
          for (const l of lines) {
            const st = lineStyle(l), y = Math.round(u.valToPos(l.value, "y", true));
            ctx.strokeStyle = st.stroke; ctx.lineWidth = st.width * devicePixelRatio;
            ctx.setLineDash(st.dash.map(d => d * devicePixelRatio));
            ctx.beginPath(); ctx.moveTo(left, y); ctx.lineTo(left + width, y); ctx.stroke();
          }
          ctx.setLineDash([]);
          ctx.lineWidth = 5 * devicePixelRatio; ctx.strokeStyle = COLORS.window;
          for (const w of windows) {
            const y = u.valToPos(w.y, "y", true);
            ctx.beginPath(); ctx.moveTo(u.valToPos(w.x0, "x", true), y); ctx.lineTo(u.valToPos(w.x1, "x", true), y); ctx.stroke();
          }
          ctx.restore();
        }],
        setCursor: [u => {
          const i = u.cursor.idx;
          if (i === null || i === undefined) return;
          const val = u.data[1][i] !== null ? u.data[1][i] : (proj ? u.data[1 + lines.length + 1][i] : null);
          const what = u.data[1][i] !== null ? "" : " (projected)";
          $("tr-read").textContent = `${new Date(u.data[0][i] * 1000).toISOString()}   ${num(val, 4)} ${unit}${what}`;
        }],
      },
    }, data);
  }

  // ------------------------------------------------------------------ live page
  // The list is updated in place: one <li> per point, its parts built once and only their text and attributes
  // changed.  A browser fires no click when the element pressed is replaced before the button is released, and
  // the list follows the frames about once a second, so rebuilding it would lose the operator's clicks.
  function listItem(id) {
    const parts = { pid: el("span", { class: "pid", text: id }), zone: el("span"), what: el("span"), vel: el("span"),
                    state: el("div", { class: "state" }), age: el("div", { class: "age" }) };
    const li = el("li", { "data-point": id, tabindex: "0" },
      el("div", { class: "line" }, parts.pid, parts.zone), el("div", { class: "line" }, parts.what, parts.vel),
      parts.state, parts.age);
    li.addEventListener("click", () => select(id));
    li.addEventListener("keydown", ev => { if (ev.key === "Enter") select(id); });
    return { li, parts };
  }

  function renderPoints() {
    const list = $("point-list");
    const items = state.listItems;
    const ids = new Set(state.points.map(p => p.id));
    for (const [id, item] of items) if (!ids.has(id)) { item.li.remove(); items.delete(id); }
    let at = list.firstElementChild;
    for (const p of state.points) {
      let item = items.get(p.id);
      if (!item) { item = listItem(p.id); items.set(p.id, item); }
      const { li, parts } = item;
      if (li !== at) list.insertBefore(li, at); else at = at.nextElementSibling;
      const vel = (p.indicators.find(i => i.name === "velocity_rms_mm_s") || {}).value;
      const stale = isStale(p);
      // a zone from old data or from a faulty sensor's data is shown dimmed, with why in its title
      const zoneWhy = p.sensor_fault ? ` from a faulty sensor's data (${p.sensor_fault})` : stale ? `, ${ageText(p)}` : "";
      li.className = sevClass(p) + (stale ? " stale" : "");
      if (p.frame_end) li.setAttribute("data-frame-end", p.frame_end); else li.removeAttribute("data-frame-end");
      li.setAttribute("data-stale", stale ? "true" : "false");
      li.setAttribute("aria-current", p.id === state.selected ? "true" : "false");
      parts.zone.className = "zone" + (zoneWhy ? " dim" : "");
      parts.zone.title = `ISO 20816-3 zone${zoneWhy}`;
      if (zoneWhy) parts.zone.setAttribute("data-dim", "true"); else parts.zone.removeAttribute("data-dim");
      parts.zone.textContent = p.iso_zone || "–";
      parts.what.textContent = `${p.machine} · ${machineText(p)}`;
      parts.vel.textContent = vel === undefined ? "…" : `${num(vel, 3)} mm/s`;
      parts.state.textContent = p.alarm_state + (p.data_gap && !p.alarm_state.includes("stale") ? ` (no good data: ${p.data_gap})`
                                                 : p.stale && p.frame_end ? " (no recent frame)" : "");
      parts.age.hidden = !stale;
      parts.age.textContent = stale ? ageText(p) + (p.source_state === "down" ? " · source down" : "") : "";
    }
  }

  function renderHead(p) {
    $("point-title").textContent = `${p.id}`;
    const speed = p.speed && p.speed.rpm ? `${num(p.speed.rpm, 4)} r/min (${p.speed.source})` : "speed unknown";
    $("point-sub").textContent = `${p.machine}${p.machine_description ? " — " + p.machine_description : ""} · ` +
      `${p.axis}, ${p.sensor_type} sensor ${p.sensor} · ${machineText(p)}` +
      (p.start_up_grace_left_s ? ` (start-up grace ${num(p.start_up_grace_left_s, 3)} s left)` : "") +
      (p.source_state === "down" ? " · source down" : "") + ` · ${speed}`;
    const stale = isStale(p);
    $("detail").classList.toggle("stale", stale);
    $("detail").setAttribute("data-stale", stale ? "true" : "false");
    $("stale-note").hidden = !stale;
    $("stale-note").textContent = stale ? `Not current: ${ageText(p)}` +
      (p.frame_end ? ` (frame of ${p.frame_end})` : "") + (p.source_state === "down" ? "; its source is down" : "") +
      ". The values and panels below are from then." : "";
    renderBadge();
    const figs = $("figures");
    figs.textContent = "";
    figs.append(el("span", { class: "fig" }, el("b", { text: "zone " }), p.iso_zone || "n/a"));
    figs.append(el("span", { class: "fig", "data-alarm-state": p.alarm_state }, el("b", { text: "alarm " }), p.alarm_state));
    for (const i of p.indicators) {
      // per-family verdicts are in the envelope panel, the band's source beside its band there
      if (i.value === null || i.kind === "family" || i.kind === "band_source" || i.name === "iso_zone") continue;
      figs.append(el("span", { class: "fig", "data-indicator": i.name },
        el("b", { title: i.description || "", text: i.name.replace(/_(mm_s|g|um|hz|db)(?=$|\.)/, "") + " " }),
        typeof i.value === "number" ? `${num(i.value, 4)} ${i.unit === "1" ? "" : i.unit}` :
          typeof i.value === "boolean" ? (i.value ? "yes" : "no") : String(i.value)));
    }
    const sel = $("tr-ind"), current = sel.value;
    const names = p.indicators.map(i => i.name);
    if (sel.options.length !== names.length) {
      sel.textContent = "";
      for (const n of names) sel.append(el("option", { value: n, text: n }));
      // the order and family values are long lists: the overall ones first
      sel.value = names.includes(current) ? current : "velocity_rms_mm_s";
    }
  }

  async function loadPoints() {
    const doc = await getJSON(`${API}/points`);
    state.points = doc.points;
    state.pointsAt = Date.now();
    $("site").textContent = doc.site;
    renderPoints();
    const p = state.points.find(x => x.id === state.selected);
    if (p) renderHead(p);
    renderBadge();
  }

  async function loadPanels() {
    const id = state.selected;
    if (!id) return;
    const q = encodeURIComponent(id);
    // an answer that arrives after another point was chosen is dropped
    const mine = draw => d => { if (state.selected === id) draw(d); };
    const jobs = [
      getJSON(`${API}/points/${q}/spectrum`).then(mine(d => { state.spectrum = d; spectrumChart(d); spectrumTable(d); })),
      getJSON(`${API}/points/${q}/envelope`).then(mine(d => { state.envelope = d; envelopeChart(d); })),
      getJSON(`${API}/points/${q}/waveform`).then(mine(d => { state.waveform = d; waveformChart(d); })),
      getJSON(`${API}/points/${q}/trend?indicator=${encodeURIComponent($("tr-ind").value || "velocity_rms_mm_s")}`)
        .then(mine(d => { state.trend = d; trendChart(d); })),
      getJSON(`${API}/alarms/history?point=${q}&limit=50`).then(mine(historyTable)),
    ];
    const results = await Promise.allSettled(jobs);
    for (const r of results) if (r.status === "rejected" && r.reason && r.reason.status !== 404) console.warn(String(r.reason));
    if (state.selected !== id) return;
    state.lastRefresh = Date.now();
    $("detail").setAttribute("data-loaded", String(state.lastRefresh));
  }

  // one transition of the alarm layer's durable history, with why it happened
  function historyRow(e) {
    const sev = e.state === "danger" ? "sev-text-danger" : e.state === "alert" ? "sev-text-alert" :
      e.kind === "sensor" || e.kind === "source" ? "sev-text-sensor" : "";
    const what = e.kind === "sensor" ? `sensor: ${e.indicator}` : e.kind === "source" ? `source: ${e.indicator}` : e.indicator;
    const change = `${e.transition}` + (e.from_state && e.from_state !== e.state ? `: ${e.from_state} → ${e.state}` : e.state ? `: ${e.state}` : "") +
      (e.alarm_state ? ` (${e.alarm_state})` : "");
    const unit = e.unit && e.unit !== "1" ? ` ${e.unit}` : "";
    const value = (e.value === null || e.value === undefined ? "" : `${num(e.value, 4)}${unit}`) +
      (e.limit === null || e.limit === undefined ? "" : ` / limit ${num(e.limit, 4)}${unit}`);
    const who = e.by ? `${e.by}${e.at ? " at " + e.at : ""}` : "";
    const why = [e.reason, e.machine_state && e.machine_state !== "running" ? `machine ${e.machine_state}` : "",
                 e.stale ? `no good data: ${e.stale}` : "", e.capture ? `waveform ${e.capture}` : ""].filter(Boolean).join("; ");
    return el("tr", { class: sev, "data-kind": e.kind || "", "data-transition": e.transition || "", "data-state": e.state || "" },
      el("td", { text: e.time || "" }), el("td", { text: what || "" }), el("td", { text: change }),
      el("td", { text: value }), el("td", { text: who }), el("td", { text: why }));
  }

  function historyTable(doc) {
    const body = $("history").tBodies[0];
    body.textContent = "";
    $("history-src").textContent = doc.source || "";
    for (const e of doc.events) body.append(historyRow(e));
    $("panel-history").setAttribute("data-count", String(doc.events.length));
  }

  // a point's panels: nothing of the previously chosen point stays on the page while the new one loads
  function clearPanels() {
    gesture.pending.clear();  // a redraw held back for the previous point is dropped
    for (const [k, u] of Object.entries(state.charts)) { u.destroy(); delete state.charts[k]; }
    for (const id of ["sp-chart", "en-chart", "wf-chart", "tr-chart"]) $(id).textContent = "";
    for (const id of ["sp-markers", "en-families", "history", "tr-cross"]) { const t = $(id); if (t) t.tBodies[0].textContent = ""; }
    for (const id of ["panel-spectrum", "panel-envelope", "panel-waveform"]) $(id).removeAttribute("data-frame-end");
    for (const id of ["sp-read", "en-read", "wf-read", "tr-read"]) $(id).textContent = "\u00a0";
    for (const id of ["en-band", "wf-info", "tr-src"]) $(id).textContent = "";
    $("detail").removeAttribute("data-loaded");
    state.spectrum = state.envelope = state.waveform = state.trend = null;
    state.zoom = {};
  }

  function select(id) {
    if (id !== state.selected) clearPanels();
    state.selected = id;
    history.replaceState(null, "", `#${encodeURIComponent(id)}`);
    $("detail").hidden = false;
    $("empty").hidden = true;
    renderPoints();
    const p = state.points.find(x => x.id === id);
    if (p) renderHead(p);
    loadPanels().catch(e => console.warn(String(e)));
  }

  function scheduleRefresh() {
    if (state.refreshTimer) return;
    const wait = Math.max(0, 2000 - (Date.now() - state.lastRefresh));
    state.refreshTimer = setTimeout(() => {
      state.refreshTimer = null;
      loadPoints().then(loadPanels).catch(e => console.warn(String(e)));
    }, wait);
  }

  function connectEvents() {
    const es = new EventSource(`${API}/events`);
    es.addEventListener("hello", () => { state.connected = state.everConnected = true; renderBadge(); });
    es.addEventListener("frame", ev => {
      const d = JSON.parse(ev.data);
      const p = state.points.find(x => x.id === d.point);
      if (p && d.point !== state.selected) {
        p.iso_zone = d.iso_zone; p.alarm_state = d.state || p.alarm_state;
        const vel = p.indicators.find(i => i.name === "velocity_rms_mm_s");
        if (vel) vel.value = d.velocity_rms_mm_s; else p.indicators.push({ name: "velocity_rms_mm_s", value: d.velocity_rms_mm_s, unit: "mm/s" });
        p.frame_end = d.frame_end;
        if (!state.listTimer) state.listTimer = setTimeout(() => { state.listTimer = null; renderPoints(); }, 1000);
      }
      if (d.point === state.selected || !state.lastRefresh) scheduleRefresh();
    });
    es.addEventListener("alarm", () => scheduleRefresh());
    // a point's data stopped (no frame for a while) or resumed: grey or un-grey it now, not at the next list read
    es.addEventListener("stale", ev => {
      const d = JSON.parse(ev.data);
      const p = state.points.find(x => x.id === d.point);
      if (!p) return;
      p.stale = d.stale;
      if (d.frame_end) p.frame_end = d.frame_end;
      if (d.age_s !== null && d.age_s !== undefined) p.age_s = d.age_s - Math.max(0, Date.now() - state.pointsAt) / 1000;
      renderPoints();
      if (d.point === state.selected) renderHead(p); else renderBadge();
    });
    es.onerror = () => { state.connected = false; renderBadge(); };
  }

  // ------------------------------------------------------------------ actions
  async function loadSession() {
    try { state.session = await getJSON(`${API}/session`); } catch (e) { state.session = null; }
    const s = state.session;
    $("actions").hidden = !(s && s.actions);
    if (!s || !s.actions) return;
    $("who").textContent = s.who ? `signed in: ${s.who}` : "";
    $("signin").hidden = !!s.who || s.sign_in !== "token";
    for (const id of ["act-ack", "act-shelve", "act-unshelve"]) $(id).disabled = !s.who;
  }

  async function act(cmd, body) {
    const s = state.session || {};
    const headers = { "Content-Type": "application/json" };
    if (s.csrf) headers["X-CSRF-Token"] = s.csrf;
    const r = await fetch(`${API}/points/${encodeURIComponent(state.selected)}/${cmd}`,
      { method: "POST", headers, body: JSON.stringify(body || {}), credentials: "same-origin" });
    const doc = await r.json().catch(() => ({}));
    $("act-msg").textContent = r.ok ? `${cmd}: done by ${doc.by} (${doc.result.changed} changed)` : `${cmd} refused: ${doc.error}`;
    scheduleRefresh();
  }

  function wireActions() {
    $("act-ack").addEventListener("click", () => act("ack"));
    $("act-unshelve").addEventListener("click", () => act("unshelve"));
    $("act-shelve").addEventListener("click", () => {
      const reason = window.prompt("Reason for shelving (kept with the action):", "");
      if (reason) act("shelve", { reason, duration_s: 3600 });
    });
    $("signin").addEventListener("submit", async ev => {
      ev.preventDefault();
      const r = await fetch(`${API}/session`, { method: "POST", headers: { "Content-Type": "application/json" },
        body: JSON.stringify({ token: $("token").value }), credentials: "same-origin" });
      $("token").value = "";
      const doc = await r.json().catch(() => ({}));
      $("act-msg").textContent = r.ok ? "" : `sign-in refused: ${doc.error}`;
      await loadSession();
    });
  }

  // ------------------------------------------------------------------ report (offline, data embedded)
  function renderReport(data) {
    state.report = data;
    if (data.spectrum) { spectrumChart(data.spectrum); spectrumTable(data.spectrum); }
    if (data.envelope) envelopeChart(data.envelope);
    if (data.waveform) waveformChart(data.waveform);
    if (data.trend) trendChart(data.trend); else { const t = $("panel-trend"); if (t) t.hidden = true; }
    $("sp-qty").addEventListener("change", () => spectrumChart(data.spectrum));
    $("sp-scale").addEventListener("change", () => spectrumChart(data.spectrum));
    $("en-scale").addEventListener("change", () => envelopeChart(data.envelope));
    document.body.setAttribute("data-rendered", "true");
  }

  // ------------------------------------------------------------------ start
  function start() {
    const embedded = document.getElementById("report-data");
    if (embedded) { renderReport(JSON.parse(embedded.textContent)); return; }
    $("sp-qty").addEventListener("change", () => state.spectrum && spectrumChart(state.spectrum));
    $("sp-scale").addEventListener("change", () => state.spectrum && spectrumChart(state.spectrum));
    $("en-scale").addEventListener("change", () => state.envelope && envelopeChart(state.envelope));
    $("tr-ind").addEventListener("change", () => loadPanels());
    wireActions();
    loadSession();
    loadPoints().then(() => {
      const wanted = decodeURIComponent(location.hash.slice(1));
      if (wanted && state.points.some(p => p.id === wanted)) select(wanted);
      // the address names the point: typing another one, or going back, chooses it
      window.addEventListener("hashchange", () => {
        const id = decodeURIComponent(location.hash.slice(1));
        if (id !== state.selected && state.points.some(p => p.id === id)) select(id);
      });
      document.body.setAttribute("data-ready", "true");
      connectEvents();
      // the point list is also read every few seconds (ages, machine states; a stale point also comes as an event)
      setInterval(() => {
        if (Date.now() - state.pointsAt > 4500) loadPoints().catch(e => console.warn(String(e)));
      }, 5000);
    }).catch(e => console.warn(String(e)));
    window.addEventListener("resize", () => {
      for (const [k, u] of Object.entries(state.charts)) {
        const c = u.root.parentElement; if (c) u.setSize({ width: chartWidth(c), height: 240 });
      }
    });
  }
  if (document.readyState === "loading") document.addEventListener("DOMContentLoaded", start); else start();
})();
