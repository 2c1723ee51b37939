// roomcorr browser app: draws what the server's application layer returns.
// No signal processing here: every number comes from the same functions as the command line.
"use strict";

const params = new URLSearchParams(window.location.search);
const TOKEN = params.get("token") || sessionStorage.getItem("roomcorr-token") || "";
if (TOKEN) {
  sessionStorage.setItem("roomcorr-token", TOKEN);
  if (params.has("token")) history.replaceState(null, "", "/");
}

const COLORS = ["#1f7a74", "#b5532a", "#3f5fa8", "#8a6d1d", "#7b3f8c", "#2f8f3a", "#a33a5c", "#4b6a78"];
const plots = [];

function status(text, isError) {
  const el = document.getElementById("status");
  el.textContent = text;
  el.className = isError ? "error" : "";
}

async function api(path, body) {
  const init = { headers: { "x-roomcorr-token": TOKEN } };
  if (body !== undefined) {
    init.method = "POST";
    init.headers["content-type"] = "application/json";
    init.body = JSON.stringify(body);
  }
  const resp = await fetch(path, init);
  const data = await resp.json();
  if (!resp.ok) throw new Error(data.error || resp.statusText);
  return data;
}

function showTab(name) {
  document.querySelectorAll("nav button").forEach(b => b.classList.toggle("active", b.dataset.tab === name));
  document.querySelectorAll(".tab").forEach(t => t.classList.toggle("active", t.id === "tab-" + name));
  [...plots, ...designPlots].forEach(p => p.setSize(plotSize()));
  heatMaps.forEach(h => h.draw());
}

function plotSize() {
  const w = Math.max(360, Math.min(1200, document.querySelector("main").clientWidth - 24));
  return { width: w, height: Math.round(Math.min(380, w * 0.42)) };
}

function fmtDb(value, digits, signed) {
  // one way to write a dB figure (as fmt_db in roomcorr/deliver/figures.py): never "-0.0"
  let v = Number(Number(value).toFixed(digits));
  if (Object.is(v, -0) || v === 0) v = 0;
  const text = v.toFixed(digits);
  return (signed && v > 0 ? "+" : "") + text + " dB";
}

function describe(run) {
  const f = run.figures || {};
  if (run.kind === "measurement") {
    const parts = [];
    if (f.positions) parts.push(`${f.positions} positions`);
    if (f.channels) parts.push(`${f.channels} loudspeakers`);
    if (f.sample_rate) parts.push(`${f.sample_rate} Hz`);
    if (f.gates_warned && f.gates_warned.length) parts.push(`WARNING: ${f.gates_warned.join(", ")}`);
    if (f.timing_basis) parts.push(`timing: ${f.timing_basis.label}`);
    return parts.join(", ");
  }
  const parts = [];
  if (run.source) parts.push(`from ${run.source}`);
  if (f.target) parts.push(`target ${f.target}`);
  // the manifest's figures (history's JSON), written as roomcorr/deliver/figures.py fmt_db does
  if (f.pre_gain_db !== undefined && f.pre_gain_db !== null) parts.push(`pre-gain ${fmtDb(f.pre_gain_db, 2, true)}`);
  if (f.largest_boost_db !== undefined && f.largest_boost_db !== null) parts.push(`largest boost ${fmtDb(f.largest_boost_db, 1)}`);
  if (f.peak_gain_db !== undefined && f.peak_gain_db !== null) parts.push(`peak gain ${fmtDb(f.peak_gain_db, 2, true)}`);
  if (f.latency_ms) parts.push(`latency ${f.latency_ms} ms`);
  return parts.join(", ");
}

// The runs of the room, as the server last listed them (with their names and notes)
let lastRuns = [];

function runTitle(run) {
  const name = run.label && run.label.name;
  return name ? `${name} (${run.run_id})` : run.run_id;
}

function labelEditor(run, td) {
  // name and note of a run: stored in the room's one labels file, under the room lock
  td.innerHTML = "";
  const name = document.createElement("input");
  name.className = "l-name"; name.maxLength = 60; name.placeholder = "name"; name.value = (run.label && run.label.name) || "";
  const note = document.createElement("textarea");
  note.className = "l-note"; note.maxLength = 500; note.rows = 2; note.placeholder = "note"; note.value = (run.label && run.label.note) || "";
  const save = document.createElement("button");
  save.type = "button"; save.className = "quiet l-save"; save.textContent = "save";
  const cancel = document.createElement("button");
  cancel.type = "button"; cancel.className = "quiet"; cancel.textContent = "cancel";
  [name, note, save, cancel].forEach(x => { x.addEventListener("click", ev => ev.stopPropagation()); td.appendChild(x); });
  save.addEventListener("click", async () => {
    try {
      await api(`/api/label/${run.kind}/${encodeURIComponent(run.run_id)}`, { name: name.value, note: note.value });
      status(`named ${run.kind} ${run.run_id}`);
      await loadRoom(true);
    } catch (err) { status(String(err.message || err), true); }
  });
  cancel.addEventListener("click", () => loadRoom(true));
  name.focus();
}

async function loadRoom(quiet = false) {
  const room = await api("/api/room");
  lastRuns = room.runs;
  document.getElementById("room-name").textContent = room.name;
  const body = document.querySelector("#runs tbody");
  body.innerHTML = "";
  for (const run of room.runs) {
    const tr = document.createElement("tr");
    tr.dataset.run = `${run.kind}/${run.run_id}`;
    const cells = [run.kind, run.run_id, run.status, describe(run)];
    cells.forEach((text, i) => {
      const td = document.createElement("td");
      td.textContent = text;
      if (i === 2) td.className = "status-" + run.status;
      tr.appendChild(td);
    });
    const lab = document.createElement("td");
    lab.className = "label";
    const nm = document.createElement("strong");
    nm.textContent = (run.label && run.label.name) || "";
    const nt = document.createElement("span");
    nt.className = "note";
    nt.textContent = (run.label && run.label.note) || "";
    const edit = document.createElement("button");
    edit.type = "button"; edit.className = "quiet l-edit";
    edit.textContent = run.label ? "edit" : "name it";
    edit.addEventListener("click", ev => { ev.stopPropagation(); labelEditor(run, lab); });
    lab.append(nm, nt, edit);
    tr.appendChild(lab);
    const open = document.createElement("td");
    open.className = "open";
    if (run.status === "complete") {
      tr.className = "pick";
      tr.tabIndex = 0;
      tr.title = `Open ${run.kind} ${run.run_id}`;
      open.textContent = "open ›";
      tr.addEventListener("click", () => openRun(run));
      tr.addEventListener("keydown", ev => { if (ev.key === "Enter" && ev.target === tr) openRun(run); });
    }
    tr.appendChild(open);
    body.appendChild(tr);
  }
  if (!quiet) status(`${room.runs.length} runs in ${room.root}`);
  fillMeasurements(room.runs);
}

function clearPlots(where = "plots") {
  const box = document.getElementById(where);
  for (let i = plots.length - 1; i >= 0; i--) {
    if (box.contains(plots[i].root)) plots.splice(i, 1)[0].destroy();
  }
  box.innerHTML = "";
}

function hzLabel(v) {
  // label 1-2-5 steps only, so the log axis stays readable
  const m = v / Math.pow(10, Math.floor(Math.log10(v) + 1e-9));
  if (![1, 2, 5].some(k => Math.abs(m - k) < 1e-6)) return "";
  return v >= 1000 ? `${v / 1000}k` : `${v}`;
}

// The y-axis spans the curves inside the band that matters (the correction band, or 20 Hz to
// 20 kHz) with at most Y_PAD_DB plus one Y_STEP_DB step of empty margin on each side, so the
// curves fill the plot instead of sharing it with a roll-off nobody corrects. "whole range"
// zooms out to every point; a drag zooms in; a double-click goes back.
const Y_PAD_DB = 1.5, Y_STEP_DB = 2;
const FULL_BAND = [20, 20000];

function bandExtent(u, band) {
  const x = u.data[0];
  let lo = Infinity, hi = -Infinity;
  for (let s = 1; s < u.data.length; s++) {
    if (u.series[s] && u.series[s].show === false) continue;
    const y = u.data[s];
    for (let i = 0; i < x.length; i++) {
      if (band && (x[i] < band[0] || x[i] > band[1])) continue;
      const v = y[i];
      if (v == null || !Number.isFinite(v)) continue;
      if (v < lo) lo = v;
      if (v > hi) hi = v;
    }
  }
  return Number.isFinite(lo) ? [lo, hi] : null;
}

function yRange(ext, db) {
  if (!ext) return [-1, 1];
  let [lo, hi] = ext;
  if (db) return [Y_STEP_DB * Math.floor((lo - Y_PAD_DB) / Y_STEP_DB), Y_STEP_DB * Math.ceil((hi + Y_PAD_DB) / Y_STEP_DB)];
  const pad = Math.max(1e-6, 0.05 * (hi - lo));
  return [lo - pad, hi + pad];
}

function addZoomOut(box, u) {
  const b = document.createElement("button");
  b.type = "button";
  b.className = "quiet zoom-out";
  b.textContent = "whole range";
  b.title = "Show every point of every curve; press again to go back to the band that matters.";
  b.addEventListener("click", () => {
    u.rcFull = !u.rcFull;
    b.textContent = u.rcFull ? "back to the band" : "whole range";
    u.setData(u.data, true);
    if (u.rcFit) u.rcFit(u);
  });
  box.querySelector("h3").appendChild(b);
}

function addPlot(title, note, x, series, yLabel, logX = true, where = "plots", extra = {}) {
  const box = document.createElement("div");
  box.className = "plot";
  box.innerHTML = `<h3></h3><p></p>`;
  box.querySelector("h3").textContent = title;
  box.querySelector("p").textContent = note;
  document.getElementById(where).appendChild(box);
  const band = extra.yBand || (logX ? FULL_BAND : null);
  const db = extra.yDb !== undefined ? extra.yDb : /dB/.test(yLabel);
  const opts = {
    ...plotSize(),
    scales: { x: logX ? { time: false, distr: 3, log: 10, range: (u, lo, hi) => [lo, hi] } : { time: false },
      y: { range: u => yRange(bandExtent(u, u.rcFull ? null : (u.rcBand || band)), db) } },
    axes: [
      { label: "frequency (Hz)", stroke: "#5d6b76", grid: { stroke: "#eceff1" }, values: (u, ticks) => ticks.map(hzLabel) },
      { label: yLabel, stroke: "#5d6b76", grid: { stroke: "#eceff1" } },
    ],
    cursor: extra.drag === false ? { drag: { x: false, y: false } } : { drag: { x: true, y: true, uni: 30 } },
    hooks: extra.hooks || {},
    series: [{ label: "Hz", value: (u, v) => (v == null ? "-" : v.toFixed(0)) },
      ...series.map(s => ({ label: s.label, stroke: s.color, width: s.width || 1.5, show: s.show !== false, dash: s.dash,
        value: (u, v) => (v == null ? "-" : v.toFixed(1)) }))],
  };
  const plot = new uPlot(opts, [x, ...series.map(s => s.data)], box);
  plot.rcBand = band;
  addZoomOut(box, plot);
  plots.push(plot);
  return plot;
}

function controls(items, where = "explore-controls", keep = false) {
  const el = document.getElementById(where);
  if (!keep) el.innerHTML = "";
  for (const [label, options, onChange] of items) {
    const wrap = document.createElement("label");
    wrap.textContent = label + " ";
    const sel = document.createElement("select");
    options.forEach(([value, text]) => {
      const o = document.createElement("option");
      o.value = value; o.textContent = text; sel.appendChild(o);
    });
    sel.addEventListener("change", () => onChange(sel.value));
    wrap.appendChild(sel);
    el.appendChild(wrap);
  }
}

// another design drawn over the one shown (Explore): its target and predicted average
let overlay = null;

function drawDesign(view, chIndex, rate) {
  clearPlots();
  const ch = view.channels[chIndex];
  // causes of peaks and withheld dips, as stored in the manifest (roomcorr.placement.causes)
  const causes = ((view.manifest || {}).causes || []).find(e => e.channel === ch.name);
  document.getElementById("explore-text").textContent = causes && causes.causes.length
    ? "Why the peaks and dips are there: " + causes.causes.map(c => c.text).join(" ") : "";
  const x = view.freq_hz;
  const avgPred = ch.average_db.map((v, i) => (v == null || ch.correction_db[i] == null ? null : v + ch.correction_db[i]));
  const series = ch.measured_db.map((m, p) => ({ label: `position ${p + 1}`, data: m, color: "#b8c2c9", width: 1 }));
  series.push({ label: "average", data: ch.average_db, color: COLORS[1], width: 2 });
  series.push({ label: "target", data: ch.target_db, color: "#23303b", width: 1.5, dash: [6, 4] });
  series.push({ label: "predicted average", data: avgPred, color: COLORS[0], width: 2 });
  if (overlay && overlay.view.channels[chIndex] && overlay.view.freq_hz.length === x.length) {
    const o = overlay.view.channels[chIndex];
    series.push({ label: `target, ${overlay.runId}`, data: o.target_db, color: COLORS[4], width: 1.5, dash: [2, 3] });
    series.push({ label: `predicted average, ${overlay.runId}`, data: o.average_db.map((v, i) => (v == null || o.correction_db[i] == null ? null : v + o.correction_db[i])), color: COLORS[4], width: 2 });
  }
  const band = { yBand: ch.band_hz };
  addPlot("Measured and predicted", `Band ${ch.band_hz[0].toFixed(0)}–${ch.band_hz[1].toFixed(0)} Hz (the y-axis spans the curves inside it). Click a legend entry to hide or show it; drag to zoom, double-click to reset.` +
    (overlay ? ` Purple: design ${overlay.runId}, for comparison.` : ""),
    x, series, "level (dB)", true, "plots", band);
  addPlot("Predicted result at every position", "The correction applied to each measured position.", x,
    ch.predicted_db.map((m, p) => ({ label: `position ${p + 1}`, data: m, color: COLORS[p % COLORS.length], width: 1.2 })), "level (dB)", true, "plots", band);
  addPlot("Correction and where boost was withheld", "Boost is withheld in deep, narrow dips and where positions disagree.", x, [
    { label: "correction", data: ch.correction_db, color: COLORS[0], width: 2 },
    { label: "boost withheld", data: ch.boost_withheld_db, color: COLORS[1] },
    { label: "spread of positions", data: ch.spread_db, color: COLORS[2], show: false },
  ], "dB");
  const filt = (view.filters[rate] || [])[chIndex];
  if (filt) {
    addPlot(`Filter at ${rate} Hz: magnitude`, `Includes the common pre-gain of ${view.pre_gain_db.toFixed(2)} dB.`, filt.freq_hz,
      [{ label: "magnitude", data: filt.magnitude_db, color: COLORS[0], width: 2 }], "dB");
    addPlot(`Filter at ${rate} Hz: group delay`, "Minimum phase: the delay is largest where the correction changes fastest.", filt.freq_hz, [
      { label: "group delay (ms)", data: filt.group_delay_ms, color: COLORS[2], width: 1.5 },
    ], "ms");
    addPlot(`Filter at ${rate} Hz: phase`, "Wrapped to ±180 degrees.", filt.freq_hz, [
      { label: "phase (degrees)", data: filt.phase_deg, color: COLORS[3], width: 1.2 },
    ], "degrees");
  }
}

// several subwoofers: each one's delay, level, polarity and the seat-to-seat figures, read
// from the manifest (system.subwoofers), as the summary and report state them
function subwoofersText(manifest) {
  const sw = manifest && manifest.system && manifest.system.subwoofers;
  if (!sw) return "";
  const each = sw.each.map(e => `${e.name}: delay ${e.delay_ms.toFixed(2)} ms, level ${e.level_db.toFixed(1)} dB, ` +
    `polarity ${e.polarity > 0 ? "normal" : "inverted"}, own filter ${e.filter}` +
    (e.turned_down ? " (makes the seats differ more where it stands: turned down)" : ""));
  let txt = `Subwoofers: the measured positions differ by ${sw.spread_after_db.toFixed(1)} dB instead of ` +
    `${sw.spread_equal_db.toFixed(1)} dB fed equally. `;
  if (sw.predicted_spread_after_db !== null) {
    txt += `At seats you did not measure, expect the bass to vary by about ${sw.predicted_spread_after_db.toFixed(1)} dB ` +
      `instead of ${sw.predicted_spread_equal_db.toFixed(1)} dB. `;
  }
  if (sw.crossover_for_spread_hz) {
    txt += `The crossover frequency, ${Math.round(sw.crossover_for_spread_hz)} Hz, is the one at which the ` +
      "subwoofers, so fed, leave the measured positions most alike. ";
  }
  if (sw.feed_latency_ms) {
    txt += `Each subwoofer's own filter is a shaped feed that may act up to ${sw.feed_latency_ms} ms early: ` +
      "its filter is that much late and the mains wait with it. ";
  }
  return txt + each.join("; ") + ".";
}

async function openRun(run) {
  showTab("explore");
  clearPlots();
  clearDecay();
  document.getElementById("explore-text").textContent = "";
  document.getElementById("explore-title").textContent = `${run.kind} ${runTitle(run)}`;
  status(`loading ${run.kind} ${run.run_id} ...`);
  const t0 = performance.now();
  const decay = decayUrl(run, 1, 0, 0);
  const decayData = api(decay);  // fetched while the responses are drawn
  decayData.catch(() => {});
  const filesData = run.kind === "design" ? api(`/api/files/${encodeURIComponent(run.run_id)}`) : null;
  if (filesData) filesData.catch(() => {});
  try {
    if (run.kind === "design") {
      const view = await api(`/api/design/${encodeURIComponent(run.run_id)}`);
      const rates = Object.keys(view.filters);
      let ch = 0, rate = rates.includes("48000") ? "48000" : rates[0];
      overlay = null;
      const others = (lastRuns || []).filter(r => r.kind === "design" && r.status === "complete" && r.run_id !== run.run_id);
      controls([
        ["loudspeaker", view.channels.map((c, i) => [i, c.name]), v => { ch = Number(v); drawDesign(view, ch, rate); }],
        ["sample rate", rates.map(r => [r, `${r} Hz`]), v => { rate = v; drawDesign(view, ch, rate); }],
        ["overlay design", [["", "none"], ...others.map(r => [r.run_id, runTitle(r)])], async v => {
          try {
            overlay = v ? { runId: v, view: await api(`/api/design/${encodeURIComponent(v)}`) } : null;
            drawDesign(view, ch, rate);
          } catch (err) { status(String(err.message || err), true); }
        }],
      ]);
      const sel = document.querySelectorAll("#explore-controls select");
      if (sel[1]) sel[1].value = rate;
      drawDesign(view, ch, rate);
      document.getElementById("explore-text").textContent = subwoofersText(view.manifest);
      await loadFiles(run.run_id, filesData);
    } else {
      const view = await api(`/api/measurement/${encodeURIComponent(run.run_id)}`);
      const draw = c => {
        clearPlots();
        const ch = view.channels[c];
        addPlot(`Measured responses, ${ch.name}`, `Arrival of the direct sound: ${ch.arrival_ms.map(a => (a == null ? "-" : a.toFixed(2))).join(", ")} ms.`,
          view.freq_hz, ch.measured_db.map((m, p) => ({ label: view.positions[p], data: m, color: COLORS[p % COLORS.length], width: 1.3 })), "level (dBFS)");
      };
      controls([["loudspeaker", view.channels.map((c, i) => [i, c.name]), v => draw(Number(v))]]);
      draw(0);
    }
    await openDecay(run, 1, "combined", decayData);
    document.body.dataset.exploreMs = (performance.now() - t0).toFixed(0);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

// ---------------------------------------------------------------- explore: decay and ringing
// Decay times (ISO 3382-1 EDT, T20, T30 per band), Schroeder curves and the low-frequency
// ringing map, exactly as /api/decay returns them (the report's functions on the server).
const DECAY_KEYS = [["edt", "EDT", "#3f5fa8"], ["t20", "T20", "#1f7a74"], ["t30", "T30", "#b5532a"]];
const OCTAVE_LABELS = new Set(["31.5", "63", "125", "250", "500", "1k", "2k", "4k", "8k", "16k"]);
const heatMaps = [];
let decayState = null;
let decaySeq = 0;

function clearDecay() {
  decaySeq += 1;
  clearPlots("decay-plots");
  el("decay-controls").innerHTML = "";
  el("decay-table").innerHTML = "";
  el("decay-title").hidden = true;
  heatMaps.length = 0;
  decayState = null;
}

function plotBox(where, title, note) {
  const box = document.createElement("div");
  box.className = "plot";
  box.innerHTML = "<h3></h3><p></p>";
  box.querySelector("h3").textContent = title;
  box.querySelector("p").textContent = note;
  el(where).appendChild(box);
  return box;
}

function bandColor(k, n) {
  // low bands dark blue, through teal, to warm sand for the high bands
  const stops = [[31, 58, 110], [31, 122, 116], [138, 109, 29], [181, 83, 42]];
  const x = n > 1 ? (k / (n - 1)) * (stops.length - 1) : 0;
  const i = Math.min(stops.length - 2, Math.floor(x)), f = x - i;
  const c = stops[i].map((v, j) => Math.round(v + f * (stops[i + 1][j] - v)));
  return `rgb(${c.join(",")})`;
}

function decayUrl(run, fraction, pos, ch) {
  return `/api/decay/${run.kind}/${encodeURIComponent(run.run_id)}?bands=${fraction}&position=${pos}&channel=${ch}`;
}

async function openDecay(run, fraction = 1, position = "combined", prefetched = null, channel = null) {
  // one loudspeaker at a time: the server analyses only the channel shown
  const pos = position === "combined" ? 0 : Number(position);
  const ch = channel !== null ? channel : decayState && decayState.run === run ? decayState.ch : 0;
  const t0 = performance.now();
  const seq = ++decaySeq;
  const view = await (prefetched || api(decayUrl(run, fraction, pos, ch)));
  if (seq !== decaySeq) return;  // a later choice was made meanwhile: that one is drawn
  decayState = { run, view, ch, fraction, position, fetchMs: performance.now() - t0 };
  setHeatScale(view.colour_scale);
  el("decay-title").hidden = false;
  el("decay-controls").innerHTML = "";
  controls([
    ["loudspeaker", view.channels.map((c, i) => [i, c.name]),
      v => openDecay(run, decayState.fraction, decayState.position, null, Number(v)).catch(e => status(String(e.message || e), true))],
    ["bands", [["1", "octave"], ["3", "third-octave"]], v => openDecay(run, Number(v), decayState.position).catch(e => status(String(e.message || e), true))],
    ["decay times of", [["combined", "all positions (mean)"], ...view.positions.map((p, i) => [String(i), p])],
      v => openDecay(run, decayState.fraction, v).catch(e => status(String(e.message || e), true))],
  ], "decay-controls");
  const sel = el("decay-controls").querySelectorAll("select");
  sel[0].value = String(ch); sel[1].value = String(fraction); sel[2].value = String(position);
  drawDecay();
}

function drawDecay() {
  const t0 = performance.now();
  const { view, position } = decayState;
  clearPlots("decay-plots");
  el("decay-table").innerHTML = "";
  heatMaps.length = 0;
  const ch = view.channels[decayState.ch];
  const shown = view.positions[view.position];
  if (!ch.bands) {
    el("decay-table").textContent = `${ch.name}: the responses are too short or silent for a decay analysis.`;
    return;
  }
  const rows = position === "combined" ? ch.combined : ch.per_position[Number(position)];
  const centres = ch.bands.centre_hz, labels = ch.bands.label;
  const series = [], data = [centres];
  for (const [key, name, color] of DECAY_KEYS) {
    const vals = rows[`${key}_s`], ok = rows.valid[key];
    series.push({ label: name, stroke: color, width: 2, points: { show: true, size: 7, fill: color },
      value: (u, v) => (v == null ? "-" : `${v.toFixed(2)} s`) });
    data.push(vals.map((v, i) => (ok[i] ? v : null)));
    if (ok.some(x => !x)) {
      series.push({ label: `${name} * near the noise`, stroke: color, width: 2, paths: () => null,
        points: { show: true, size: 11, fill: "#fff", width: 2 }, value: (u, v) => (v == null ? "-" : `${v.toFixed(2)} s *`) });
      data.push(vals.map((v, i) => (ok[i] ? null : v)));
    }
  }
  const box = plotBox("decay-plots", `Decay times, ${ch.name}`,
    `${view.fraction === 1 ? "Octave" : "Third-octave"} bands, ${position === "combined" ? "mean of all positions" : shown}. ` +
    "EDT from 0 to -10 dB, T20 from -5 to -25 dB, T30 from -5 to -35 dB, each extrapolated to 60 dB (ISO 3382-1). " +
    `${view.method}. ` +
    `Hollow markers (*) are values whose range comes within ${view.noise_margin_db} dB of the noise floor. Click a legend entry to hide it; drag to zoom.`);
  box.id = "decay-times";
  const byCentre = new Map(centres.map((c, i) => [c, labels[i]]));
  const timesPlot = new uPlot({
    ...plotSize(),
    scales: {
      // the whole span with a margin at first; a zoom (drag) keeps what was chosen
      x: { time: false, distr: 3, log: 2, range: (u, lo, hi) => (lo <= centres[0] && hi >= centres[centres.length - 1]
        ? [centres[0] / 1.2, centres[centres.length - 1] * 1.2] : [lo, hi]) },
      y: { range: (u, lo, hi) => [0, Math.max(0.1, hi * 1.1)] },
    },
    axes: [
      { label: "band (Hz)", stroke: "#5d6b76", grid: { stroke: "#eceff1" }, splits: () => centres,
        values: (u, ticks) => ticks.map(t => { const l = byCentre.get(t) || ""; return view.fraction === 1 || OCTAVE_LABELS.has(l) ? l : ""; }) },
      { label: "decay time (s)", stroke: "#5d6b76", grid: { stroke: "#eceff1" } },
    ],
    cursor: { drag: { x: true, y: false } },
    series: [{ label: "band", value: (u, v) => (v == null ? "-" : byCentre.get(v) || v.toFixed(0)) }, ...series],
  }, data, box);
  plots.push(timesPlot);
  box.appendChild(decayTable(rows, labels));

  // Schroeder curves of the shown position, one per band
  const curvePos = position === "combined" ? view.positions[0] : shown;
  const joined = uPlot.join(ch.curves.map(c => [c.time_s, c.edc_db]));
  const cbox = plotBox("decay-plots", `Decay curves, ${ch.name}, ${curvePos}`,
    "Backward-integrated energy per band, noise subtracted, cut where the decay meets the noise. Dashed lines: -5, -25 and -35 dB.");
  const ranges = [-5, -25, -35];
  const curvesPlot = new uPlot({
    ...plotSize(),
    scales: { x: { time: false }, y: { range: [-70, 2] } },
    axes: [{ label: "time (s)", stroke: "#5d6b76", grid: { stroke: "#eceff1" } },
      { label: "decay (dB)", stroke: "#5d6b76", grid: { stroke: "#eceff1" } }],
    cursor: { drag: { x: true, y: true, uni: 30 } },
    series: [{ label: "s", value: (u, v) => (v == null ? "-" : v.toFixed(3)) },
      ...labels.map((l, k) => ({ label: l, stroke: bandColor(k, labels.length), width: 1.3, spanGaps: true,
        value: (u, v) => (v == null ? "-" : v.toFixed(1)) }))],
    hooks: { draw: [u => {
      const ctx = u.ctx;
      ctx.save();
      ctx.strokeStyle = "#9aa6b1"; ctx.setLineDash([5, 5]); ctx.lineWidth = 1;
      for (const r of ranges) {
        const y = u.valToPos(r, "y", true);
        ctx.beginPath(); ctx.moveTo(u.bbox.left, y); ctx.lineTo(u.bbox.left + u.bbox.width, y); ctx.stroke();
      }
      ctx.restore();
    }] },
  }, joined, cbox);
  plots.push(curvesPlot);

  // low-frequency ringing map(s)
  const maps = [["as measured", ch.ringing.measured]];
  if (ch.ringing.corrected) maps.push(["corrected", ch.ringing.corrected]);
  const modes = ch.ringing.measured.modes || [];
  const words = modes.map(m => `${m.freq_hz.toFixed(0)} Hz (${m.decay_s == null ? "-" : m.decay_s.toFixed(2)} s)`).join(", ");
  const rbox = plotBox("decay-plots", `Low-frequency ringing, ${ch.name}, ${curvePos}`,
    "Sliding-window spectra from 20 to 300 Hz; time runs upwards from the direct sound. A bright ridge reaching high up is a room mode that keeps ringing." +
    (words ? ` Still loudest 200 ms after the sound stops (60 dB decay time): ${words}.` : "") +
    " Drag across a map to zoom in frequency, double-click to reset.");
  rbox.id = "ringing";
  const row = document.createElement("div");
  row.className = "heat-row";
  rbox.appendChild(row);
  const readout = document.createElement("div");
  readout.className = "readout";
  readout.textContent = "Point at a map to read its level.";
  rbox.appendChild(readout);
  maps.forEach(([label, m], i) => heatMaps.push(heatMap(row, label, m, i === 0 ? modes : [], readout, maps.length)));
  decayState.drawMs = performance.now() - t0;
  status(`decay of ${view.kind} ${view.run_id}: fetched in ${decayState.fetchMs.toFixed(0)} ms, drawn in ${decayState.drawMs.toFixed(0)} ms`);
}

function decayTable(rows, labels) {
  const t = document.createElement("table");
  t.className = "decay";
  t.innerHTML = "<thead><tr><th>band (Hz)</th><th>EDT (s)</th><th>T20 (s)</th><th>T30 (s)</th><th>peak-to-noise (dB)</th><th>note</th></tr></thead><tbody></tbody>";
  const body = t.querySelector("tbody");
  labels.forEach((l, i) => {
    const tr = document.createElement("tr");
    const cells = [l];
    for (const [key] of DECAY_KEYS) {
      const v = rows[`${key}_s`][i];
      cells.push(v == null ? "n/a" : v.toFixed(2) + (rows.valid[key][i] ? "" : " *"));
    }
    const dyn = rows.dynamic_range_db ? rows.dynamic_range_db[i] : null;
    cells.push(dyn == null ? "-" : dyn.toFixed(0));
    const narrow = DECAY_KEYS.filter(([key]) => rows.filter_limited[key][i]).map(([, name]) => name);
    cells.push(narrow.length ? `${narrow.join(", ")}: the band filter rings about as long as the room (bandwidth × time < ${decayState.view.min_bandwidth_time}): unreliable` : "");
    cells.forEach(c => {
      const td = document.createElement("td");
      td.textContent = c;
      if (c.endsWith(" *")) td.className = "near-noise";
      tr.appendChild(td);
    });
    body.appendChild(tr);
  });
  return t;
}

// Colour ramp of the ringing map (level in dB relative to the loudest bin of the first slice):
// the report's own scale (roomcorr.report.figures.DECAY_MAP_STOPS), sent with every decay view
let HEAT_FLOOR_DB = -45;
let HEAT_STOPS = [[-45, [24, 33, 45]], [0, [252, 246, 226]]];
let HEAT_LUT = [];

function setHeatScale(scale) {
  HEAT_FLOOR_DB = scale.floor_db;
  HEAT_STOPS = scale.stops;
  // one colour per 0.1 dB from the floor to 0 dB, so a map of many pixels is a table look-up
  HEAT_LUT = Array.from({ length: Math.round(-HEAT_FLOOR_DB * 10) + 1 }, (_, k) => heatColor(HEAT_FLOOR_DB + k / 10));
}
window.roomcorrHeat = db => heatColor(db);

function heatIndex(db) {
  if (db == null || !(db > HEAT_FLOOR_DB)) return 0;
  return db >= 0 ? HEAT_LUT.length - 1 : Math.round((db - HEAT_FLOOR_DB) * 10);
}

function heatColor(db) {
  const v = Math.max(HEAT_FLOOR_DB, Math.min(0, db == null ? HEAT_FLOOR_DB : db));
  for (let i = 1; i < HEAT_STOPS.length; i++) {
    const [d1, c1] = HEAT_STOPS[i];
    if (v <= d1) {
      const [d0, c0] = HEAT_STOPS[i - 1];
      const f = (v - d0) / (d1 - d0);
      return c0.map((c, j) => Math.round(c + f * (c1[j] - c)));
    }
  }
  return HEAT_STOPS[HEAT_STOPS.length - 1][1];
}

function heatMap(parent, label, map, modes, readout, count) {
  const wrap = document.createElement("div");
  wrap.className = "heat";
  const canvas = document.createElement("canvas");
  canvas.className = "heat-map";
  wrap.appendChild(canvas);
  parent.appendChild(wrap);
  const f = map.freq_hz, t = map.time_s, lv = map.level_db;
  const full = [f[0], f[f.length - 1]];
  const st = { lo: full[0], hi: full[1], drag: null };
  const M = { l: 58, r: 64, t: 22, b: 42 };
  const df = (f[f.length - 1] - f[0]) / (f.length - 1);

  function geometry() {
    const { width, height } = plotSize();
    const w = Math.max(300, Math.floor((width - 12 * (count - 1)) / count));
    return { w, h: Math.max(260, height), pw: w - M.l - M.r, ph: Math.max(260, height) - M.t - M.b };
  }
  const fAt = (x, g) => st.lo * Math.pow(st.hi / st.lo, (x - M.l) / g.pw);
  const xAt = (hz, g) => M.l + (Math.log(hz / st.lo) / Math.log(st.hi / st.lo)) * g.pw;

  function draw() {
    const g = geometry();
    canvas.width = g.w; canvas.height = g.h;
    const ctx = canvas.getContext("2d");
    ctx.fillStyle = "#fff"; ctx.fillRect(0, 0, g.w, g.h);
    const img = ctx.createImageData(g.pw, g.ph);
    const cols = new Int32Array(g.pw);
    for (let x = 0; x < g.pw; x++) cols[x] = Math.max(0, Math.min(f.length - 1, Math.round((fAt(M.l + x + 0.5, g) - f[0]) / df)));
    for (let y = 0; y < g.ph; y++) {
      const ti = Math.max(0, Math.min(t.length - 1, Math.round((1 - (y + 0.5) / g.ph) * (t.length - 1))));
      const rowv = lv[ti];
      for (let x = 0; x < g.pw; x++) {
        const c = HEAT_LUT[heatIndex(rowv[cols[x]])];
        const k = 4 * (y * g.pw + x);
        img.data[k] = c[0]; img.data[k + 1] = c[1]; img.data[k + 2] = c[2]; img.data[k + 3] = 255;
      }
    }
    ctx.putImageData(img, M.l, M.t);
    ctx.fillStyle = "#23303b"; ctx.font = "13px system-ui, sans-serif";
    ctx.fillText(label, M.l, 15);
    ctx.fillStyle = "#5d6b76"; ctx.font = "12px system-ui, sans-serif"; ctx.textAlign = "center";
    for (const hz of [20, 30, 40, 50, 70, 100, 150, 200, 300]) {
      if (hz < st.lo * 0.99 || hz > st.hi * 1.01) continue;
      const x = xAt(hz, g);
      ctx.fillRect(x, M.t + g.ph, 1, 5);
      ctx.fillText(String(hz), x, M.t + g.ph + 18);
    }
    ctx.fillText("frequency (Hz)", M.l + g.pw / 2, g.h - 6);
    ctx.textAlign = "right";
    const tMax = t[t.length - 1] * 1000;
    for (let ms = 0; ms <= tMax + 1e-6; ms += 100) {
      const y = M.t + g.ph * (1 - ms / tMax);
      ctx.fillRect(M.l - 5, y, 5, 1);
      ctx.fillText(String(ms), M.l - 8, y + 4);
    }
    ctx.save(); ctx.translate(14, M.t + g.ph / 2); ctx.rotate(-Math.PI / 2); ctx.textAlign = "center";
    ctx.fillText("time after the direct sound (ms)", 0, 0); ctx.restore();
    // colour bar
    const bx = M.l + g.pw + 14;
    for (let y = 0; y < g.ph; y++) {
      const c = heatColor(HEAT_FLOOR_DB * y / (g.ph - 1));
      ctx.fillStyle = `rgb(${c.join(",")})`; ctx.fillRect(bx, M.t + y, 12, 1);
    }
    ctx.fillStyle = "#5d6b76"; ctx.textAlign = "left";
    for (const d of [0, -15, -30, -45]) ctx.fillText(`${d}`, bx + 16, M.t + g.ph * (d / HEAT_FLOOR_DB) + 4);
    ctx.fillText("dB", bx + 16, M.t - 6);
    // ringing modes
    ctx.strokeStyle = "#ffffff"; ctx.fillStyle = "#ffffff"; ctx.textAlign = "center";
    modes.forEach((m, k) => {
      if (m.freq_hz < st.lo || m.freq_hz > st.hi) return;
      const x = xAt(m.freq_hz, g), ytop = M.t + 16 + 30 * k;
      ctx.beginPath(); ctx.moveTo(x, M.t + g.ph); ctx.lineTo(x, ytop + 4); ctx.stroke();
      ctx.fillText(`${m.freq_hz.toFixed(0)} Hz, ${m.decay_s == null ? "-" : m.decay_s.toFixed(2)} s`, x, ytop);
    });
    if (st.drag && st.drag.x1 !== undefined) {
      ctx.fillStyle = "rgba(255,255,255,0.25)";
      const a = Math.min(st.drag.x0, st.drag.x1), b = Math.max(st.drag.x0, st.drag.x1);
      ctx.fillRect(a, M.t, b - a, g.ph);
    }
  }

  const inside = (x, y, g) => x >= M.l && x < M.l + g.pw && y >= M.t && y < M.t + g.ph;
  canvas.addEventListener("mousemove", ev => {
    const g = geometry(), x = ev.offsetX, y = ev.offsetY;
    if (st.drag) { st.drag.x1 = Math.max(M.l, Math.min(M.l + g.pw, x)); draw(); }
    if (!inside(x, y, g)) return;
    const hz = fAt(x, g), j = Math.round((hz - f[0]) / df);
    const ti = Math.round((1 - (y - M.t) / g.ph) * (t.length - 1));
    const v = lv[ti][j];
    readout.textContent = `${label}: ${hz.toFixed(1)} Hz, ${(t[ti] * 1000).toFixed(0)} ms: ${v == null ? "-" : v.toFixed(1)} dB`;
  });
  canvas.addEventListener("mousedown", ev => { if (inside(ev.offsetX, ev.offsetY, geometry())) st.drag = { x0: ev.offsetX }; });
  canvas.addEventListener("mouseup", () => {
    const g = geometry(), d = st.drag;
    st.drag = null;
    if (d && d.x1 !== undefined && Math.abs(d.x1 - d.x0) > 5) {
      const a = fAt(Math.min(d.x0, d.x1), g), b = fAt(Math.max(d.x0, d.x1), g);
      st.lo = Math.max(full[0], a); st.hi = Math.min(full[1], Math.max(b, a * 1.05));
    }
    draw();
  });
  canvas.addEventListener("mouseleave", () => { if (st.drag) { st.drag = null; draw(); } });
  canvas.addEventListener("dblclick", () => { st.lo = full[0]; st.hi = full[1]; draw(); });
  draw();
  return { draw, canvas };
}

// Bring impulse responses into the room: uploaded files (base64 in JSON, the server caps
// the request size) or WAVs already inside the room folder; the same checks as the CLI.
async function loadImportCandidates() {
  const sel = el("i-choose");
  if (!sel) return;
  const files = await api("/api/import/candidates");
  sel.innerHTML = "";
  files.forEach(f => { const o = document.createElement("option"); o.value = o.textContent = f; sel.appendChild(o); });
}

function fileBase64(file) {
  return new Promise((resolve, reject) => {
    const r = new FileReader();
    r.onload = () => resolve(String(r.result).split(",", 2)[1] || "");
    r.onerror = () => reject(r.error);
    r.readAsDataURL(file);
  });
}

async function importFiles() {
  const body = { names: el("i-names").value.trim() || null, timing_basis: el("i-basis").value };
  const uploads = [...el("i-upload").files];
  const chosen = [...el("i-choose").selectedOptions].map(o => o.value);
  try {
    if (uploads.length) body.files = await Promise.all(uploads.map(async f => ({ name: f.name, data: await fileBase64(f) })));
    else body.paths = chosen;
    status("importing ...");
    const res = await api("/api/import", body);
    status(`imported ${res.positions} position(s) x ${res.channels} channel(s) as measurement ${res.run_id} (timing: ${res.timing_basis.label})`);
    el("i-upload").value = "";
    await loadRoom(true);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function openCompare() {
  const a = el("c-before").value, b = el("c-after").value;
  if (!a || !b) { status("compare needs two finished measurements", true); return; }
  showTab("explore");
  clearPlots();
  clearDecay();
  el("explore-controls").innerHTML = "";
  el("explore-title").textContent = `What changed from ${a} to ${b}`;
  status("comparing ...");
  try {
    const res = await api(`/api/compare/${encodeURIComponent(a)}/${encodeURIComponent(b)}`);
    el("explore-text").textContent = "";
    const pre = document.createElement("pre");
    pre.textContent = res.text.join("\n");
    el("explore-text").appendChild(pre);
    res.channels.forEach(ch => {
      if (!ch.curves) return;
      addPlot(`${ch.name}: before and after`, `Level change ${Number(ch.level_change_db).toFixed(1)} dB, arrival change ${Number(ch.arrival_change_ms).toFixed(3)} ms.`,
        ch.curves.freq_hz, [
          { label: "before", data: ch.curves.before_db, color: COLORS[2], width: 1.5 },
          { label: "after", data: ch.curves.after_db, color: COLORS[1], width: 1.5 },
        ], "level (dB)");
      addPlot(`${ch.name}: difference (after − before)`, "Above 0 dB the later measurement is louder at that frequency, below 0 dB quieter.",
        ch.curves.freq_hz, [
          { label: "after − before", data: ch.curves.difference_db, color: COLORS[0], width: 1.8 },
        ], "difference (dB)");
    });
    // after a move: the change the room model predicted at the seat beside the measured one
    const pc = res.predicted_change;
    if (pc && pc.available) {
      pc.channels.forEach(ch => addPlot(`${ch.name}: predicted and measured change after the move`,
        `1/${pc.band_fraction} octave at the seat, level offset between the runs removed: the prediction is off by ${Number(ch.held_db).toFixed(1)} dB RMS, assuming nothing changed by ${Number(ch.unchanged_db).toFixed(1)} dB.`,
        pc.bands_hz, [
          { label: "predicted change", data: ch.predicted_change_db, color: COLORS[2], width: 1.8 },
          { label: "measured change", data: ch.measured_change_db, color: COLORS[1], width: 1.8 },
        ], "change (dB)"));
    }
    status(`compared ${a} with ${b}`);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

// The full report of the design shown on the Files tab: the same report.html
// `roomcorr report RUN` writes, beside the run's files (written on the server).
let filesRun = null;

async function writeReport() {
  if (!filesRun) return;
  const note = document.getElementById("report-note");
  const link = document.getElementById("report-link");
  note.textContent = "writing the report...";
  try {
    const res = await api(`/api/report/design/${encodeURIComponent(filesRun)}`, {});
    link.href = `/api/file/design/${encodeURIComponent(filesRun)}/${res.path.split("/").map(encodeURIComponent).join("/")}`;
    link.hidden = false;
    note.textContent = res.summary.length ? res.summary[0] : "";
    status(`report written: ${res.path}`);
  } catch (err) {
    note.textContent = "";
    status(String(err.message || err), true);
  }
}

// Where the design is on disk, taps and pre-gain per filter file, the loading help and
// ffmpeg/sox lines (roomcorr.app.playback.design_loading), and one zip of the whole design.
async function loadLoading(runId) {
  const zip = document.getElementById("loading-zip");
  zip.hidden = true;
  const doc = await api(`/api/loading/${encodeURIComponent(runId)}`);
  document.getElementById("loading-folder").textContent = doc.folder;
  zip.href = `/api/zip/${encodeURIComponent(runId)}`;
  zip.download = doc.zip;
  zip.hidden = false;
  const body = document.querySelector("#loading-files tbody");
  body.innerHTML = "";
  for (const f of doc.files) {
    const tr = document.createElement("tr");
    const pre = f.pre_gain_db === null || f.pre_gain_db === undefined ? "" : Number(f.pre_gain_db).toFixed(2);
    for (const c of [f.path, f.format, f.sample_rate || "", f.taps || "", pre]) {
      const td = document.createElement("td");
      td.textContent = c;
      tr.appendChild(td);
    }
    body.appendChild(tr);
  }
  const lines = [...doc.lines, ""];
  for (const r of doc.commands.rates) {
    lines.push(`# ${r.sample_rate} Hz input, ffmpeg:`, r.ffmpeg);
    if (r.sox) lines.push(`# sox:`, ...r.sox); else lines.push(`# sox: ${r.sox_note}`);
    lines.push("");
  }
  lines.push(...doc.next);
  document.getElementById("loading-help").textContent = lines.join("\n");
}

// Listening from the Files page (roomcorr.app.playback.ListenSession on the server).
function showListen(st) {
  const f = st.figures || {};
  const parts = [st.playing ? (st.corrected ? "playing: corrected" : "playing: uncorrected (loudness-matched)") : "stopped"];
  if (st.playing) parts.push(`level ${Number(st.level_db).toFixed(0)} dB`);
  if (f.uncorrected_gain_db !== undefined) parts.push(`uncorrected path ${Number(f.uncorrected_gain_db).toFixed(2)} dB`);
  if (f.latency_ms) parts.push(`latency ${Number(f.latency_ms).toFixed(2)} ms`);
  if (st.error) parts.push(st.error);
  document.getElementById("listen-state").textContent = parts.join(", ");
}

async function listenCall(action, payload = null) {
  try {
    const st = payload === null ? await api(`/api/listen/${action}`, {}) : await api(`/api/listen/${action}`, payload);
    showListen(st);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function loadListen() {
  const sel = document.getElementById("listen-music");
  const names = await api("/api/listen/music");
  sel.innerHTML = "";
  for (const n of names) {
    const o = document.createElement("option");
    o.value = n; o.textContent = n; sel.appendChild(o);
  }
  document.getElementById("listen-start").disabled = names.length === 0;
  if (!names.length) document.getElementById("listen-state").textContent = "no music: put WAV files in the room's music/ folder";
}

function wireListen() {
  document.getElementById("listen-start").addEventListener("click", () =>
    listenCall("start", { run_id: filesRun, music: document.getElementById("listen-music").value }));
  document.getElementById("listen-switch").addEventListener("click", () => listenCall("switch"));
  document.getElementById("listen-up").addEventListener("click", () => listenCall("level", { delta_db: 3 }));
  document.getElementById("listen-down").addEventListener("click", () => listenCall("level", { delta_db: -3 }));
  document.getElementById("listen-stop").addEventListener("click", () => listenCall("stop"));
}
wireListen();

async function loadFiles(runId, prefetched = null) {
  loadLoading(runId).catch((err) => status(String(err.message || err), true));
  loadListen().catch((err) => status(String(err.message || err), true));
  const files = await (prefetched || api(`/api/files/${encodeURIComponent(runId)}`));
  filesRun = runId;
  document.getElementById("report-link").hidden = true;
  document.getElementById("report-note").textContent = "";
  document.getElementById("files-title").textContent = `Files of design ${runId}`;
  const body = document.querySelector("#files tbody");
  body.innerHTML = "";
  for (const f of files) {
    const tr = document.createElement("tr");
    const a = document.createElement("a");
    a.href = `/api/file/design/${encodeURIComponent(runId)}/${f.path.split("/").map(encodeURIComponent).join("/")}`;
    a.textContent = f.path;
    const cells = [a, f.kind || "", f.sample_rate || "", f.sha256 || ""];
    cells.forEach((c, i) => {
      const td = document.createElement("td");
      if (c instanceof Node) td.appendChild(c); else td.textContent = c;
      if (i === 3) td.className = "hash";
      tr.appendChild(td);
    });
    body.appendChild(tr);
  }
}


// ---------------------------------------------------------------- design tab
const designPlots = [];
let presets = [];
let shaped = false;
let pending = null;

// Target points [Hz, dB], added to the tilt and shelf. The table and the plot handles
// both show this list; every edit goes through setPoint, which applies the target rules
// (the server checks the same ones: roomcorr.design.curve.target.target_points).
const POINT_HZ = [10, 24000];
const POINT_DB = 20;
const MAX_POINTS = 64;
const HANDLE_PX = 9;
let targetPoints = [];
let lastView = null;
let dragging = null;
// live previews: at most one request in flight; edits made meanwhile send one more
let inFlight = false, queued = false, previewCount = 0, lastEdit = null;

function el(id) { return document.getElementById(id); }

function fillMeasurements(runs) {
  const done = runs.filter(r => r.kind === "measurement" && r.status === "complete");
  for (const [id, pick] of [["c-before", done.length - 2], ["c-after", done.length - 1]]) {
    const s = el(id);
    const keep = s.value;
    s.innerHTML = "";
    done.forEach(r => { const o = document.createElement("option"); o.value = r.run_id; o.textContent = runTitle(r); s.appendChild(o); });
    s.value = keep || (done[Math.max(0, pick)] || {}).run_id || "";
  }
  const sel = el("d-measurement");
  const keep = sel.value;
  sel.innerHTML = "";
  runs.filter(r => r.kind === "measurement" && r.status === "complete").reverse().forEach(r => {
    const o = document.createElement("option");
    o.value = r.run_id; o.textContent = runTitle(r); sel.appendChild(o);
  });
  if (keep) sel.value = keep;
}

function setControls(table) {
  el("d-tilt").value = table.tilt_db_per_octave || 0;
  el("d-shelf").value = table.bass_shelf_db || 0;
  el("d-shelf-hz").value = table.bass_shelf_hz || 120;
  targetPoints = (table.points || []).map(([f, g]) => [Number(f), Number(g)]);
  renderPoints();
  showValues();
}

function roundHz(f) { return f >= 100 ? Math.round(f) : Math.round(f * 10) / 10; }
function roundDb(g) { return Math.round(g * 10) / 10; }

function pointProblem(f, g) {
  if (!Number.isFinite(f) || f < POINT_HZ[0] || f > POINT_HZ[1]) return `frequency must be ${POINT_HZ[0]} to ${POINT_HZ[1]} Hz`;
  if (!Number.isFinite(g) || Math.abs(g) > POINT_DB) return `gain must be within ±${POINT_DB} dB`;
  return null;
}

function freeHz(f, skip) {
  // no frequency twice: step past a point that already sits there
  const taken = g => targetPoints.some((p, i) => i !== skip && p[0] === g);
  let out = f;
  const step = f * 1.003 + 0.1 <= POINT_HZ[1] ? 1.003 : 1 / 1.003;
  while (taken(out)) out = roundHz(step > 1 ? out * step + 0.1 : out * step - 0.1);
  return out;
}

function setPoint(i, f, g) {
  // clamp to the target rules, round to what the table shows, avoid duplicates
  f = roundHz(Math.max(POINT_HZ[0], Math.min(POINT_HZ[1], f)));
  g = roundDb(Math.max(-POINT_DB, Math.min(POINT_DB, g)));
  targetPoints[i] = [freeHz(f, i), g];
  const tr = document.querySelectorAll("#d-points tbody tr")[i];
  if (tr) {
    const [fi, gi] = tr.querySelectorAll("input");
    fi.value = targetPoints[i][0]; gi.value = targetPoints[i][1];
    fi.classList.remove("bad"); gi.classList.remove("bad");
  }
}

function addPoint(f, g) {
  if (targetPoints.length >= MAX_POINTS) { status(`at most ${MAX_POINTS} target points`, true); return -1; }
  targetPoints.push([0, 0]);
  setPoint(targetPoints.length - 1, f, g);
  renderPoints();
  shaped = true;
  return targetPoints.length - 1;
}

function removePoint(i) {
  targetPoints.splice(i, 1);
  renderPoints();
  shaped = true;
  schedule();
}

function renderPoints() {
  const body = document.querySelector("#d-points tbody");
  body.innerHTML = "";
  targetPoints.forEach(([f, g], i) => {
    const tr = document.createElement("tr");
    tr.innerHTML = `<td><input type="number" min="${POINT_HZ[0]}" max="${POINT_HZ[1]}" step="1"> Hz</td>
      <td><input type="number" min="${-POINT_DB}" max="${POINT_DB}" step="0.1"> dB</td><td><button type="button">remove</button></td>`;
    const [fi, gi] = tr.querySelectorAll("input");
    fi.value = f; gi.value = g;
    const edited = () => {
      const nf = Number(fi.value), ng = Number(gi.value);
      const problem = fi.value === "" || gi.value === "" ? "a point needs a frequency and a gain" : pointProblem(nf, ng);
      fi.classList.toggle("bad", !!problem && (fi.value === "" || !!pointProblem(nf, 0)));
      gi.classList.toggle("bad", !!problem && !fi.classList.contains("bad"));
      if (problem) { status(`target point ${i + 1}: ${problem}`, true); return; }
      if (targetPoints.some((p, k) => k !== i && p[0] === nf)) { fi.classList.add("bad"); status(`target point ${i + 1}: another point has ${nf} Hz`, true); return; }
      targetPoints[i] = [nf, ng];
      shaped = true;
      schedule();
    };
    fi.addEventListener("input", edited);
    gi.addEventListener("input", edited);
    tr.querySelector("button").addEventListener("click", () => removePoint(i));
    body.appendChild(tr);
  });
  el("d-point-count").textContent = targetPoints.length ? `${targetPoints.length} point${targetPoints.length > 1 ? "s" : ""}` : "none yet: click the target line to add one";
  // one point holds its value at every frequency (ends held): it only moves the whole target up
  // or down, and the design places the target at the room's own midrange level anyway
  el("d-point-note").hidden = targetPoints.length !== 1;
  designPlots.forEach(u => u.redraw(false, false));
}

// ---- undo and redo: every settled edit of the target and the limits is a step
let undoHistory = [], historyAt = -1, restoring = false;

function snapshot() {
  return JSON.stringify({ preset: el("d-preset").value, shaped, tilt: el("d-tilt").value, shelf: el("d-shelf").value,
    shelfHz: el("d-shelf-hz").value, boost: el("d-boost").value, lo: el("d-lo").value, hi: el("d-hi").value,
    points: targetPoints });
}

function remember() {
  if (restoring) return;
  const now = snapshot();
  if (undoHistory[historyAt] === now) return;
  undoHistory = undoHistory.slice(0, historyAt + 1);
  undoHistory.push(now);
  historyAt = undoHistory.length - 1;
  undoButtons();
}

function undoButtons() {
  el("d-undo").disabled = historyAt <= 0;
  el("d-redo").disabled = historyAt >= undoHistory.length - 1;
}

function restore(step) {
  const to = historyAt + step;
  if (to < 0 || to >= undoHistory.length) return;
  historyAt = to;
  const snap = JSON.parse(undoHistory[to]);
  restoring = true;
  el("d-preset").value = snap.preset;
  el("d-tilt").value = snap.tilt; el("d-shelf").value = snap.shelf; el("d-shelf-hz").value = snap.shelfHz;
  el("d-boost").value = snap.boost; el("d-lo").value = snap.lo; el("d-hi").value = snap.hi;
  shaped = snap.shaped;
  targetPoints = snap.points.map(p => p.slice());
  renderPoints();
  restoring = false;
  undoButtons();
  schedule(false);
  status(step < 0 ? "undone" : "redone");
}

function showValues() {
  el("o-tilt").textContent = Number(el("d-tilt").value).toFixed(1);
  el("o-shelf").textContent = Number(el("d-shelf").value).toFixed(1);
  el("o-shelf-hz").textContent = el("d-shelf-hz").value;
  el("o-boost").textContent = Number(el("d-boost").value).toFixed(1);
}

function currentEdit() {
  const edit = { measurement: el("d-measurement").value || null, max_boost_db: Number(el("d-boost").value) };
  if (el("d-lo").value) edit.band_lo_hz = Number(el("d-lo").value);
  if (el("d-hi").value) edit.band_hi_hz = Number(el("d-hi").value);
  if (shaped) {
    edit.table = { tilt_db_per_octave: Number(el("d-tilt").value), tilt_pivot_hz: 1000.0,
      bass_shelf_db: Number(el("d-shelf").value), bass_shelf_hz: Number(el("d-shelf-hz").value) };
    if (targetPoints.length) edit.table.points = targetPoints.map(p => [p[0], p[1]]).sort((a, b) => a[0] - b[0]);
  } else {
    edit.target = el("d-preset").value;
  }
  return edit;
}

function schedule(record = true) {
  showValues();
  if (pending) clearTimeout(pending);
  pending = setTimeout(() => { pending = null; if (record) remember(); requestPreview(); }, 60);
}

function requestPreview() {
  if (inFlight) { queued = true; return; }
  runPreview();
}

async function runPreview() {
  inFlight = true;
  const t0 = performance.now();
  const edit = currentEdit();
  try {
    const view = await api("/api/preview", edit);
    lastEdit = edit;
    previewCount += 1;
    drawPreview(view);
    status(`preview of ${view.measurement} in ${(performance.now() - t0).toFixed(0)} ms`);
  } catch (err) {
    status(String(err.message || err), true);
  } finally {
    inFlight = false;
    if (queued) { queued = false; runPreview(); } else if (!dragging) refreshLevels();
  }
}

// Boost and pre-gain of the filters this target gives: the server computes them with the
// functions a saved design writes into its manifest (a few hundred ms: asked when idle).
let levelsSeq = 0, levelsFor = null;

async function refreshLevels() {
  const edit = currentEdit();
  const key = JSON.stringify(edit);
  if (key === levelsFor) return;
  const seq = ++levelsSeq;
  el("d-levels").classList.add("stale");
  try {
    const view = await api("/api/preview", { ...edit, levels: true });
    if (seq !== levelsSeq) return;
    levelsFor = key;
    const boosts = view.channels.map(c => `${c.name} ${c.max_boost_db.toFixed(2)} dB`).join(", ");
    el("d-levels").innerHTML = "";
    const lines = [
      ["pre-gain", `${view.pre_gain_db.toFixed(2)} dB`, "common to every channel and rate, so no filter rises above 0 dB"],
      ["largest boost", boosts, `cap ${Number(edit.max_boost_db).toFixed(1)} dB`],
      ["at", view.sample_rates.map(r => `${r} Hz`).join(", "), "as Save would design them"],
    ];
    for (const [k, v, why] of lines) {
      const row = document.createElement("div");
      const b = document.createElement("b"); b.textContent = `${k}: `;
      const val = document.createElement("span"); val.className = "value"; val.textContent = v;
      const w = document.createElement("small"); w.textContent = ` (${why})`;
      row.append(b, val, w);
      el("d-levels").appendChild(row);
    }
    el("d-levels").dataset.preGainDb = String(view.pre_gain_db);
    el("d-levels").classList.remove("stale");
  } catch (err) {
    if (seq === levelsSeq) status(String(err.message || err), true);
  }
}

// ---- the target line as something to hold: handles, click to add, drag, double-click to remove

function interpLog(f, xs, ys) {
  // linear in log frequency, ends held (as the target's own interpolation)
  if (!xs.length) return 0;
  if (f <= xs[0]) return ys[0];
  if (f >= xs[xs.length - 1]) return ys[ys.length - 1];
  let i = 1;
  while (xs[i] < f) i++;
  const a = Math.log(xs[i - 1]), b = Math.log(xs[i]);
  return ys[i - 1] + ((Math.log(f) - a) / (b - a)) * (ys[i] - ys[i - 1]);
}

function targetAt(u, f) {
  const x = u.data[0], y = u.data[2];
  const xs = [], ys = [];
  for (let i = 0; i < x.length; i++) if (y[i] != null) { xs.push(x[i]); ys.push(y[i]); }
  return interpLog(f, xs, ys);
}

function sentPoints(edit) {
  if (!edit) return [];
  if (edit.table) return edit.table.points || [];
  const preset = presets.find(q => q.name === edit.target);
  return [...((preset && preset.table.points) || [])].map(p => [Number(p[0]), Number(p[1])]).sort((a, b) => a[0] - b[0]);
}

function sentPointsAt(f) {
  // the points of the previewed target (the curve drawn now), at f
  const pts = sentPoints(lastEdit);
  return interpLog(f, pts.map(p => p[0]), pts.map(p => p[1]));
}

function handleXY(u, i) {
  const [f, g] = targetPoints[i];
  // on the drawn target: its value at f, moved by how far this point has changed since
  const base = targetAt(u, f) - sentPointsAt(f);
  return [u.valToPos(f, "x"), u.valToPos(base + g, "y")];
}

function nearestHandle(u, x, y) {
  let best = -1, dist = HANDLE_PX;
  targetPoints.forEach((p, i) => {
    const [hx, hy] = handleXY(u, i);
    const d = Math.hypot(hx - x, hy - y);
    if (d <= dist) { best = i; dist = d; }
  });
  return best;
}

function drawHandles(u) {
  if (!lastView) return;
  const ctx = u.ctx, r = devicePixelRatio || 1;
  ctx.save();
  targetPoints.forEach((p, i) => {
    const [x, y] = handleXY(u, i);
    if (!Number.isFinite(x) || !Number.isFinite(y)) return;
    ctx.beginPath();
    ctx.arc(u.bbox.left + x * r, u.bbox.top + y * r, (dragging && dragging.i === i ? 7 : 5.5) * r, 0, 2 * Math.PI);
    ctx.fillStyle = dragging && dragging.i === i ? "#b5532a" : "#ffffff";
    ctx.strokeStyle = "#23303b";
    ctx.lineWidth = 2 * r;
    ctx.fill();
    ctx.stroke();
  });
  ctx.restore();
}

function attachTargetEditing(u) {
  const over = u.over;
  over.title = "Click the plot to add a target point, drag a point to move it, double-click a point to remove it.";
  const local = ev => { const b = over.getBoundingClientRect(); return [ev.clientX - b.left, ev.clientY - b.top]; };
  over.addEventListener("mousedown", ev => {
    if (ev.button !== 0) return;
    const [x, y] = local(ev);
    const i = nearestHandle(u, x, y);
    dragging = { u, i, x0: x, y0: y, moved: false, start: i >= 0 ? targetPoints[i].slice() : null,
      f0: u.posToVal(x, "x"), v0: u.posToVal(y, "y") };
    ev.preventDefault();
    ev.stopPropagation();
  }, true);
  over.addEventListener("mousemove", ev => {
    const [x, y] = local(ev);
    over.style.cursor = dragging && dragging.i >= 0 ? "grabbing" : nearestHandle(u, x, y) >= 0 ? "grab" : "copy";
  });
  over.addEventListener("dblclick", ev => {
    const [x, y] = local(ev);
    const i = nearestHandle(u, x, y);
    if (i >= 0) { removePoint(i); status(`target point removed; ${targetPoints.length} left`); }
    ev.stopPropagation();
  }, true);
}

window.addEventListener("mousemove", ev => {
  if (!dragging) return;
  const d = dragging, u = d.u;
  const b = u.over.getBoundingClientRect();
  const x = ev.clientX - b.left, y = ev.clientY - b.top;
  if (!d.moved && Math.hypot(x - d.x0, y - d.y0) < 3) return;
  d.moved = true;
  if (d.i < 0) return;  // a drag on the background: nothing to move
  const f = u.posToVal(Math.max(0, Math.min(b.width, x)), "x");
  const g = d.start[1] + (u.posToVal(y, "y") - d.v0);
  setPoint(d.i, f, g);
  shaped = true;
  designPlots.forEach(p => p.redraw(false, false));
  requestPreview();
});

window.addEventListener("mouseup", () => {
  if (!dragging) return;
  const d = dragging;
  dragging = null;
  if (!d.moved && d.i < 0) {
    // a click: a new point where the target should pass through
    const f = d.f0;
    if (f >= POINT_HZ[0] && f <= POINT_HZ[1]) {
      const own = interpLog(f, [...targetPoints].sort((a, b) => a[0] - b[0]).map(p => p[0]), [...targetPoints].sort((a, b) => a[0] - b[0]).map(p => p[1]));
      const i = addPoint(f, own + (d.v0 - targetAt(d.u, f)));
      if (i >= 0) status(`target point added at ${targetPoints[i][0]} Hz`);
    }
  }
  designPlots.forEach(p => p.redraw(false, false));
  if (d.moved || d.i < 0) { remember(); requestPreview(); }
});

// At least this many screen pixels per dB on the target plot at its default zoom, so that a
// finger's 10 px moves a point by at most 1 dB: the plot grows taller for a wide level range.
const TARGET_PX_PER_DB = 10.5;

function fitTarget(u) {
  const span = u.scales.y.max - u.scales.y.min;
  const plotH = u.bbox.height / (devicePixelRatio || 1);
  if (!(span > 0) || plotH >= span * TARGET_PX_PER_DB || u.rcFull) return;
  u.setSize({ width: u.width, height: Math.ceil(u.height + span * TARGET_PX_PER_DB - plotH) });
}

function previewSeries(ch) {
  const pred = ch.average_db.map((v, i) => (v == null || ch.correction_db[i] == null ? null : v + ch.correction_db[i]));
  return [ch.average_db, ch.target_db, pred, ch.correction_db, ch.boost_withheld_db];
}

function drawPreview(view) {
  lastView = view;
  const words = [];
  const sameShape = designPlots.length === 2 * view.channels.length &&
    designPlots[0].data[0].length === view.freq_hz.length;
  if (sameShape) {
    view.channels.forEach((ch, c) => {
      designPlots[2 * c].setData([view.freq_hz, ...previewSeries(ch)], !dragging);
      designPlots[2 * c + 1].setData([view.freq_hz, ...ch.predicted_db], !dragging);
      designPlots[2 * c].rcBand = ch.band_hz;
      if (!dragging) fitTarget(designPlots[2 * c]);
    });
  } else {
    while (designPlots.length) designPlots.pop().destroy();
    el("design-plots").innerHTML = "";
    view.channels.forEach((ch, c) => {
      const before = plots.length;
      const [avg, target, pred, corr, withheld] = previewSeries(ch);
      const u = addPlot(`${ch.name}: average, target and predicted`,
        "Click to add a target point, drag a point up, down or sideways, double-click it to remove it. " +
        "Points are joined by straight lines on the frequency axis and hold their value beyond the first and last.", view.freq_hz, [
          { label: "measured average", data: avg, color: COLORS[1], width: 1.5 },
          { label: "target", data: target, color: "#23303b", width: 1.5, dash: [6, 4] },
          { label: "predicted average", data: pred, color: COLORS[0], width: 2 },
          { label: "correction", data: corr, color: COLORS[2], width: 1.5, show: false },
          { label: "boost withheld", data: withheld, color: COLORS[3], show: false },
        ], "level (dB)", true, "design-plots", { drag: false, hooks: { draw: [drawHandles] }, yBand: ch.band_hz });
      u.root.classList.add("target-plot");
      u.rcFit = fitTarget;
      fitTarget(u);
      attachTargetEditing(u);
      addPlot(`${ch.name}: predicted at every position`, "", view.freq_hz,
        ch.predicted_db.map((m, p) => ({ label: view.positions[p], data: m, color: COLORS[p % COLORS.length], width: 1.1 })),
        "level (dB)", true, "design-plots", { yBand: ch.band_hz });
      designPlots.push(...plots.splice(before));
    });
  }
  view.channels.forEach(ch => {
    if (ch.bass_variation_db) {
      words.push(`${ch.name}: the bass varies by about ${ch.bass_variation_db.now.toFixed(1)} dB now; ` +
        `expect about ${ch.bass_variation_db.unmeasured_seats.toFixed(1)} dB at seats you did not measure.`);
    }
  });
  el("design-text").textContent = words.join(" ");
  document.body.dataset.previews = String(previewCount);
}

async function saveDesign() {
  const edit = currentEdit();
  status("designing filters ...");
  try {
    const res = await api("/api/save", { ...edit, name: el("d-name").value });
    await loadRoom(true);
    status(`saved as design ${res.run_id} (${res.files} files)`);
    const box = el("d-saved");
    box.innerHTML = "";
    box.append(`Saved as design ${res.run_id} (${res.files} files): `);
    const open = document.createElement("a");
    open.href = "#"; open.id = "d-saved-link"; open.textContent = "open it";
    open.addEventListener("click", ev => {
      ev.preventDefault();
      const run = lastRuns.find(r => r.kind === "design" && r.run_id === res.run_id) || { kind: "design", run_id: res.run_id, status: "complete" };
      openRun(run);
    });
    box.append(open);
    // hear it at once: the Files page's Listen row, on this design (corrected / uncorrected
    // at equal loudness, the same routes as roomcorr listen)
    box.append(" or ");
    const hear = document.createElement("a");
    hear.href = "#"; hear.id = "d-saved-listen"; hear.textContent = "listen to it";
    hear.addEventListener("click", async ev => {
      ev.preventDefault();
      showTab("files");
      try {
        await loadFiles(res.run_id);
        document.getElementById("listen").scrollIntoView({ block: "center" });
      } catch (err) {
        status(String(err.message || err), true);
      }
    });
    box.append(hear);
    box.hidden = false;
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function setupDesign() {
  presets = await api("/api/presets");
  const sel = el("d-preset");
  presets.forEach(p => { const o = document.createElement("option"); o.value = p.name; o.textContent = p.name; sel.appendChild(o); });
  sel.value = presets.some(p => p.name === "flat") ? "flat" : (presets[0] || {}).name;
  const pick = () => { const p = presets.find(q => q.name === sel.value); setControls(p ? p.table : {}); shaped = false; schedule(); };
  sel.addEventListener("change", pick);
  ["d-tilt", "d-shelf", "d-shelf-hz"].forEach(id => el(id).addEventListener("input", () => { shaped = true; schedule(); }));
  ["d-boost", "d-lo", "d-hi", "d-measurement"].forEach(id => el(id).addEventListener("input", schedule));
  el("d-add-point").addEventListener("click", () => { addPoint(1000, 0); schedule(); });
  el("d-clear-points").addEventListener("click", () => { targetPoints = []; renderPoints(); shaped = true; schedule(); });
  el("d-save").addEventListener("click", saveDesign);
  el("c-go").addEventListener("click", openCompare);
  el("i-go").addEventListener("click", importFiles);
  loadImportCandidates().catch(() => {});
  el("report-write").addEventListener("click", writeReport);
  el("d-undo").addEventListener("click", () => restore(-1));
  el("d-redo").addEventListener("click", () => restore(1));
  document.addEventListener("keydown", ev => {
    if (!el("tab-design").classList.contains("active") || !(ev.ctrlKey || ev.metaKey)) return;
    if (ev.target.matches && ev.target.matches("input, textarea")) return;
    const k = ev.key.toLowerCase();
    if (k === "z" && !ev.shiftKey) { ev.preventDefault(); restore(-1); }
    if ((k === "z" && ev.shiftKey) || k === "y") { ev.preventDefault(); restore(1); }
  });
  const p = presets.find(q => q.name === sel.value);
  setControls(p ? p.table : {});
  remember();
}

// for the browser tests: what the page last sent and drew
window.roomcorrDesign = () => {
  const u = designPlots[0];
  return {
    points: targetPoints.map(p => p.slice()), lastEdit, previews: previewCount,
    target: lastView ? lastView.channels.map(c => c.target_db) : null,
    // where the first loudspeaker's plot draws each handle, and its target line at a frequency
    // (CSS pixels from the plot area's top left corner)
    handles: u ? targetPoints.map((_, i) => handleXY(u, i)) : [],
    targetPixel: f => (u ? [u.valToPos(f, "x"), u.valToPos(targetAt(u, f), "y")] : null),
    pxPerDb: u ? u.bbox.height / (devicePixelRatio || 1) / (u.scales.y.max - u.scales.y.min) : null,
  };
};

// for the browser tests: every plot's y-range and its curves' extent inside its band
window.roomcorrPlots = where => [...plots, ...designPlots].filter(u => !where || el(where).contains(u.root)).map(u => ({
  title: u.root.parentElement.querySelector("h3") ? u.root.parentElement.querySelector("h3").firstChild.textContent : "",
  y: [u.scales.y.min, u.scales.y.max], band: u.rcBand || null, extent: bandExtent(u, u.rcBand || null),
}));

function connectLive() {
  const proto = location.protocol === "https:" ? "wss" : "ws";
  const ws = new WebSocket(`${proto}://${location.host}/api/live?token=${encodeURIComponent(TOKEN)}`);
  ws.onmessage = msg => {
    const ev = JSON.parse(msg.data);
    if ((ev.type === "design" || ev.type === "import") && ev.state === "finished") loadRoom(true).catch(() => {});
  };
}

document.querySelectorAll("nav button").forEach(b => b.addEventListener("click", () => {
  showTab(b.dataset.tab);
  if (b.dataset.tab === "design" && !designPlots.length) schedule();
}));
window.addEventListener("resize", () => {
  [...plots, ...designPlots].forEach(p => { p.setSize(plotSize()); if (p.rcFit) p.rcFit(p); });
  heatMaps.forEach(h => h.draw());
});
loadRoom().then(setupDesign).then(connectLive).catch(err => status(String(err.message || err), true));
