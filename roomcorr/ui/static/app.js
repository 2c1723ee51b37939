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
}

function plotSize() {
  const w = Math.max(360, Math.min(1200, document.querySelector("main").clientWidth - 24));
  return { width: w, height: Math.round(Math.min(380, w * 0.42)) };
}

function describe(run) {
  const f = run.figures || {};
  if (run.kind === "measurement") {
    const parts = [];
    if (f.positions) parts.push(`${f.positions} positions`);
    if (f.channels) parts.push(`${f.channels} loudspeakers`);
    if (f.sample_rate) parts.push(`${f.sample_rate} Hz`);
    return parts.join(", ");
  }
  const parts = [];
  if (run.source) parts.push(`from ${run.source}`);
  if (f.target) parts.push(`target ${f.target}`);
  if (f.pre_gain_db !== undefined && f.pre_gain_db !== null) parts.push(`pre-gain ${Number(f.pre_gain_db).toFixed(1)} dB`);
  return parts.join(", ");
}

async function loadRoom(quiet = false) {
  const room = await api("/api/room");
  document.getElementById("room-name").textContent = room.name;
  const body = document.querySelector("#runs tbody");
  body.innerHTML = "";
  for (const run of room.runs) {
    const tr = document.createElement("tr");
    const cells = [run.kind, run.run_id, run.status, describe(run)];
    cells.forEach((text, i) => {
      const td = document.createElement("td");
      td.textContent = text;
      if (i === 2) td.className = "status-" + run.status;
      tr.appendChild(td);
    });
    if (run.status === "complete") {
      tr.className = "pick";
      tr.addEventListener("click", () => openRun(run));
    }
    body.appendChild(tr);
  }
  if (!quiet) status(`${room.runs.length} runs in ${room.root}`);
  fillMeasurements(room.runs);
}

function clearPlots() {
  while (plots.length) plots.pop().destroy();
  document.getElementById("plots").innerHTML = "";
}

function hzLabel(v) {
  // label 1-2-5 steps only, so the log axis stays readable
  const m = v / Math.pow(10, Math.floor(Math.log10(v) + 1e-9));
  if (![1, 2, 5].some(k => Math.abs(m - k) < 1e-6)) return "";
  return v >= 1000 ? `${v / 1000}k` : `${v}`;
}

function addPlot(title, note, x, series, yLabel, logX = true, where = "plots") {
  const box = document.createElement("div");
  box.className = "plot";
  box.innerHTML = `<h3></h3><p></p>`;
  box.querySelector("h3").textContent = title;
  box.querySelector("p").textContent = note;
  document.getElementById(where).appendChild(box);
  const opts = {
    ...plotSize(),
    scales: { x: logX ? { time: false, distr: 3, log: 10, range: (u, lo, hi) => [lo, hi] } : { time: false }, y: {} },
    axes: [
      { label: "frequency (Hz)", stroke: "#5d6b76", grid: { stroke: "#eceff1" }, values: (u, ticks) => ticks.map(hzLabel) },
      { label: yLabel, stroke: "#5d6b76", grid: { stroke: "#eceff1" } },
    ],
    cursor: { drag: { x: true, y: true, uni: 30 } },
    series: [{ label: "Hz", value: (u, v) => (v == null ? "-" : v.toFixed(0)) },
      ...series.map(s => ({ label: s.label, stroke: s.color, width: s.width || 1.5, show: s.show !== false, dash: s.dash,
        value: (u, v) => (v == null ? "-" : v.toFixed(1)) }))],
  };
  const plot = new uPlot(opts, [x, ...series.map(s => s.data)], box);
  plots.push(plot);
  return plot;
}

function controls(items) {
  const el = document.getElementById("explore-controls");
  el.innerHTML = "";
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

function drawDesign(view, chIndex, rate) {
  clearPlots();
  const ch = view.channels[chIndex];
  const x = view.freq_hz;
  const avgPred = ch.average_db.map((v, i) => (v == null || ch.correction_db[i] == null ? null : v + ch.correction_db[i]));
  const series = ch.measured_db.map((m, p) => ({ label: `position ${p + 1}`, data: m, color: "#b8c2c9", width: 1 }));
  series.push({ label: "average", data: ch.average_db, color: COLORS[1], width: 2 });
  series.push({ label: "target", data: ch.target_db, color: "#23303b", width: 1.5, dash: [6, 4] });
  series.push({ label: "predicted average", data: avgPred, color: COLORS[0], width: 2 });
  addPlot("Measured and predicted", `Band ${ch.band_hz[0].toFixed(0)}–${ch.band_hz[1].toFixed(0)} Hz. Click a legend entry to hide or show it; drag to zoom, double-click to reset.`,
    x, series, "level (dB)");
  addPlot("Predicted result at every position", "The correction applied to each measured position.", x,
    ch.predicted_db.map((m, p) => ({ label: `position ${p + 1}`, data: m, color: COLORS[p % COLORS.length], width: 1.2 })), "level (dB)");
  addPlot("Correction and where boost was withheld", "Boost is withheld in deep, narrow dips and where positions disagree.", x, [
    { label: "correction", data: ch.correction_db, color: COLORS[0], width: 2 },
    { label: "boost withheld", data: ch.boost_withheld_db, color: COLORS[1] },
    { label: "spread of positions", data: ch.spread_db, color: COLORS[2], show: false },
  ], "dB");
  const filt = (view.filters[rate] || [])[chIndex];
  if (filt) {
    addPlot(`Filter at ${rate} Hz: magnitude`, `Includes the common pre-gain of ${view.pre_gain_db.toFixed(2)} dB.`, filt.freq_hz,
      [{ label: "magnitude", data: filt.magnitude_db, color: COLORS[0], width: 2 }], "dB");
    addPlot(`Filter at ${rate} Hz: phase and group delay`, "Minimum phase: the delay is largest where the correction changes fastest.", filt.freq_hz, [
      { label: "group delay (ms)", data: filt.group_delay_ms, color: COLORS[2], width: 1.5 },
      { label: "phase (degrees)", data: filt.phase_deg, color: COLORS[3], show: false },
    ], "ms / degrees");
  }
}

async function openRun(run) {
  showTab("explore");
  clearPlots();
  document.getElementById("explore-text").textContent = "";
  document.getElementById("explore-title").textContent = `${run.kind} ${run.run_id}`;
  status(`loading ${run.kind} ${run.run_id} ...`);
  try {
    if (run.kind === "design") {
      const view = await api(`/api/design/${encodeURIComponent(run.run_id)}`);
      const rates = Object.keys(view.filters);
      let ch = 0, rate = rates.includes("48000") ? "48000" : rates[0];
      controls([
        ["loudspeaker", view.channels.map((c, i) => [i, c.name]), v => { ch = Number(v); drawDesign(view, ch, rate); }],
        ["sample rate", rates.map(r => [r, `${r} Hz`]), v => { rate = v; drawDesign(view, ch, rate); }],
      ]);
      const sel = document.querySelectorAll("#explore-controls select");
      if (sel[1]) sel[1].value = rate;
      drawDesign(view, ch, rate);
      await loadFiles(run.run_id);
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
    status(`${run.kind} ${run.run_id}`);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function openCompare() {
  const a = el("c-before").value, b = el("c-after").value;
  if (!a || !b) { status("compare needs two finished measurements", true); return; }
  showTab("explore");
  clearPlots();
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
    });
    status(`compared ${a} with ${b}`);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function loadFiles(runId) {
  const files = await api(`/api/files/${encodeURIComponent(runId)}`);
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

function el(id) { return document.getElementById(id); }

function fillMeasurements(runs) {
  const done = runs.filter(r => r.kind === "measurement" && r.status === "complete");
  for (const [id, pick] of [["c-before", done.length - 2], ["c-after", done.length - 1]]) {
    const s = el(id);
    const keep = s.value;
    s.innerHTML = "";
    done.forEach(r => { const o = document.createElement("option"); o.value = r.run_id; o.textContent = r.run_id; s.appendChild(o); });
    s.value = keep || (done[Math.max(0, pick)] || {}).run_id || "";
  }
  const sel = el("d-measurement");
  const keep = sel.value;
  sel.innerHTML = "";
  runs.filter(r => r.kind === "measurement" && r.status === "complete").reverse().forEach(r => {
    const o = document.createElement("option");
    o.value = r.run_id; o.textContent = r.run_id; sel.appendChild(o);
  });
  if (keep) sel.value = keep;
}

function setControls(table) {
  el("d-tilt").value = table.tilt_db_per_octave || 0;
  el("d-shelf").value = table.bass_shelf_db || 0;
  el("d-shelf-hz").value = table.bass_shelf_hz || 120;
  const body = document.querySelector("#d-points tbody");
  body.innerHTML = "";
  (table.points || []).forEach(([f, g]) => addPointRow(f, g));
  showValues();
}

function addPointRow(f, g) {
  const tr = document.createElement("tr");
  tr.innerHTML = `<td><input type="number" min="10" max="24000" value="${f}"> Hz</td>
    <td><input type="number" min="-20" max="20" step="0.5" value="${g}"> dB</td><td><button type="button">remove</button></td>`;
  tr.querySelectorAll("input").forEach(i => i.addEventListener("input", () => { shaped = true; schedule(); }));
  tr.querySelector("button").addEventListener("click", () => { tr.remove(); shaped = true; schedule(); });
  document.querySelector("#d-points tbody").appendChild(tr);
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
    const points = [...document.querySelectorAll("#d-points tbody tr")].map(tr => {
      const [f, g] = tr.querySelectorAll("input");
      return [Number(f.value), Number(g.value)];
    }).filter(([f]) => f > 0);
    edit.table = { tilt_db_per_octave: Number(el("d-tilt").value), tilt_pivot_hz: 1000.0,
      bass_shelf_db: Number(el("d-shelf").value), bass_shelf_hz: Number(el("d-shelf-hz").value) };
    if (points.length) edit.table.points = points.sort((a, b) => a[0] - b[0]);
  } else {
    edit.target = el("d-preset").value;
  }
  return edit;
}

function schedule() {
  showValues();
  if (pending) clearTimeout(pending);
  pending = setTimeout(runPreview, 60);
}

async function runPreview() {
  pending = null;
  const t0 = performance.now();
  try {
    const view = await api("/api/preview", currentEdit());
    drawPreview(view);
    status(`preview of ${view.measurement} in ${(performance.now() - t0).toFixed(0)} ms`);
  } catch (err) {
    status(String(err.message || err), true);
  }
}

function drawPreview(view) {
  while (designPlots.length) designPlots.pop().destroy();
  el("design-plots").innerHTML = "";
  const words = [];
  view.channels.forEach((ch, c) => {
    const pred = ch.average_db.map((v, i) => (v == null || ch.correction_db[i] == null ? null : v + ch.correction_db[i]));
    const before = plots.length;
    addPlot(`${ch.name}: average, target and predicted`, `Band ${ch.band_hz[0].toFixed(0)}–${ch.band_hz[1].toFixed(0)} Hz.`, view.freq_hz, [
      { label: "measured average", data: ch.average_db, color: COLORS[1], width: 1.5 },
      { label: "target", data: ch.target_db, color: "#23303b", width: 1.5, dash: [6, 4] },
      { label: "predicted average", data: pred, color: COLORS[0], width: 2 },
      { label: "correction", data: ch.correction_db, color: COLORS[2], width: 1.5, show: false },
      { label: "boost withheld", data: ch.boost_withheld_db, color: COLORS[3], show: false },
    ], "level (dB)", true, "design-plots");
    addPlot(`${ch.name}: predicted at every position`, "", view.freq_hz,
      ch.predicted_db.map((m, p) => ({ label: view.positions[p], data: m, color: COLORS[p % COLORS.length], width: 1.1 })),
      "level (dB)", true, "design-plots");
    designPlots.push(...plots.splice(before));
    if (ch.bass_variation_db) {
      words.push(`${ch.name}: the bass varies by about ${ch.bass_variation_db.now.toFixed(1)} dB now; ` +
        `expect about ${ch.bass_variation_db.unmeasured_seats.toFixed(1)} dB at seats you did not measure.`);
    }
  });
  el("design-text").textContent = words.join(" ");
}

async function saveDesign() {
  const edit = currentEdit();
  status("designing filters ...");
  try {
    const res = await api("/api/save", { ...edit, name: el("d-name").value });
    await loadRoom(true);
    status(`saved as design ${res.run_id} (${res.files} files)`);
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
  el("d-add-point").addEventListener("click", () => { addPointRow(1000, 0); shaped = true; schedule(); });
  el("d-save").addEventListener("click", saveDesign);
  el("c-go").addEventListener("click", openCompare);
  const p = presets.find(q => q.name === sel.value);
  setControls(p ? p.table : {});
}

function connectLive() {
  const proto = location.protocol === "https:" ? "wss" : "ws";
  const ws = new WebSocket(`${proto}://${location.host}/api/live?token=${encodeURIComponent(TOKEN)}`);
  ws.onmessage = msg => {
    const ev = JSON.parse(msg.data);
    if (ev.type === "design" && ev.state === "finished") loadRoom(true).catch(() => {});
  };
}

document.querySelectorAll("nav button").forEach(b => b.addEventListener("click", () => {
  showTab(b.dataset.tab);
  if (b.dataset.tab === "design" && !designPlots.length) schedule();
}));
window.addEventListener("resize", () => [...plots, ...designPlots].forEach(p => p.setSize(plotSize())));
loadRoom().then(setupDesign).then(connectLive).catch(err => status(String(err.message || err), true));
