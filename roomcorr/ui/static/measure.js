// roomcorr browser app, Measure page: devices, wiring tones, the live meter, the listening
// area and the run itself. Every sound and every file is the server's application layer
// (roomcorr/app/measure.py); this page only sends choices and draws the events it receives.
// Loaded after app.js, whose api(), status(), loadRoom() and TOKEN it uses.
"use strict";

const measure = {
  acknowledged: false,
  running: false,
  positions: 0,
  outputs: [],
  names: [],
  done: {},          // position -> "saved" | "skipped"
  current: null,     // position being measured
  speaker: null,     // output being measured
  captures: 0,       // loudspeaker sweeps finished in this run
  peakHold: -120,
  peakHoldAt: 0,
  level: { peak: -120, rms: -120 },
  levelCap: -6,
};

function mLog(text) {
  const log = el("m-log");
  log.textContent = (log.textContent + text + "\n").split("\n").slice(-80).join("\n");
  log.scrollTop = log.scrollHeight;
}

// ---------------------------------------------------------------- set-up

function speakerRows() { return [...document.querySelectorAll("#m-speakers tbody tr")]; }

function addSpeaker(name, output) {
  const tr = document.createElement("tr");
  tr.innerHTML = `<td><input class="m-name" size="10"></td>
    <td><input class="m-output" type="number" min="1" max="64" step="1"></td>
    <td><button type="button" class="m-tone">test tone</button> <span class="m-heard"></span></td>
    <td><button type="button" class="m-remove" title="remove this loudspeaker">remove</button></td>`;
  tr.querySelector(".m-name").value = name;
  tr.querySelector(".m-output").value = output;
  tr.querySelector(".m-tone").addEventListener("click", () => playTone(tr));
  tr.querySelector(".m-remove").addEventListener("click", () => { tr.remove(); drawArea(); });
  tr.querySelectorAll("input").forEach(i => i.addEventListener("input", drawArea));
  el("m-speakers").querySelector("tbody").appendChild(tr);
  drawArea();
}

function currentSettings() {
  const rows = speakerRows();
  const s = {
    outputs: rows.map(tr => Number(tr.querySelector(".m-output").value)),
    names: rows.map(tr => tr.querySelector(".m-name").value.trim() || `out${tr.querySelector(".m-output").value}`),
    input: Number(el("m-input").value),
    positions: Number(el("m-positions").value),
    level_dbfs: Number(el("m-level").value),
    sweep_s: Number(el("m-sweep").value),
    repeats: Number(el("m-repeats").value),
  };
  if (el("m-in-dev").value !== "") s.input_device = el("m-in-dev").value;
  if (el("m-out-dev").value !== "") s.output_device = el("m-out-dev").value;
  if (el("m-loud").checked) s.allow_loud = true;
  return s;
}

function fillDevices(view) {
  const fill = (id, key, lastName) => {
    const sel = el(id);
    sel.innerHTML = "";
    const def = document.createElement("option");
    def.value = ""; def.textContent = "system default"; sel.appendChild(def);
    view.devices.filter(d => d[key] > 0).forEach(d => {
      const o = document.createElement("option");
      o.value = String(d.index);
      o.textContent = `${d.name} (${d.hostapi}, ${d[key]} ch)`;
      o.dataset.name = d.name;
      sel.appendChild(o);
      if (lastName && d.name === lastName) sel.value = o.value;
    });
  };
  fill("m-in-dev", "max_input_channels", (view.last || {}).input);
  fill("m-out-dev", "max_output_channels", (view.last || {}).output);
}

function showLevel() {
  const v = Number(el("m-level").value);
  el("o-level").textContent = v.toFixed(0);
  el("m-level").classList.toggle("loud", v > measure.levelCap);
}

function onLoud() {
  const box = el("m-loud");
  if (box.checked) {
    const ok = window.confirm(`Allow sweeps louder than ${measure.levelCap} dBFS? Turn the amplifier down first. ` +
      "Loud sweeps can damage hearing and loudspeakers; respect their excursion limits and local rules on noise.");
    if (!ok) box.checked = false;
  }
  const slider = el("m-level");
  slider.max = box.checked ? "0" : String(measure.levelCap);
  if (Number(slider.value) > Number(slider.max)) slider.value = slider.max;
  showLevel();
}

function setAcknowledged(ack, when) {
  measure.acknowledged = ack;
  el("m-cautions").classList.toggle("done", ack);
  el("m-ack").hidden = ack;
  el("m-ack-done").hidden = !ack;
  if (ack && when) el("m-ack-done").textContent = `Read and acknowledged for this room (${when}). They still apply every time.`;
  updateButtons();
}

function updateButtons() {
  el("m-start").disabled = !measure.acknowledged || measure.running;
  // Stop always works (it silences whatever plays), but it is red only while sound may play
  el("m-stop").disabled = false;
  el("m-stop").classList.toggle("idle", !measure.running);
  document.querySelectorAll("#m-speakers .m-tone").forEach(b => { b.disabled = !measure.acknowledged || measure.running; });
  document.querySelectorAll("#m-setup input, #m-setup select, #m-setup .m-remove, #m-add-speaker")
    .forEach(i => { i.disabled = measure.running; });
}

// ---------------------------------------------------------------- actions

async function acknowledge() {
  try {
    const view = await api("/api/measure/acknowledge", { acknowledged: true });
    setAcknowledged(view.acknowledged, view.acknowledged_utc);
    status("cautions acknowledged for this room");
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function playTone(tr) {
  const out = Number(tr.querySelector(".m-output").value);
  const heard = tr.querySelector(".m-heard");
  heard.textContent = "playing ...";
  heard.className = "m-heard";
  try {
    const res = await api("/api/measure/tone", { output: out, settings: currentSettings() });
    if (res.stopped) { heard.textContent = "stopped"; return; }
    heard.textContent = res.heard ? `heard (${res.heard_db.toFixed(0)} dB over the quiet)` : "not heard";
    heard.className = "m-heard " + (res.heard ? "ok" : "bad");
    mLog(res.advice);
  } catch (err) {
    heard.textContent = "";
    status(String(err.message || err), true);
  }
}

async function startMeasuring() {
  const s = currentSettings();
  measure.positions = s.positions;
  measure.outputs = s.outputs;
  measure.names = s.names;
  measure.done = {};
  measure.current = null;
  measure.speaker = null;
  measure.captures = 0;
  el("m-log").textContent = "";
  try {
    await api("/api/measure/start", { settings: s, resume: el("m-resume").checked });
    measure.running = true;
    updateButtons();
    drawArea();
    showProgress("starting: a quiet level check comes first");
    status("measuring ... (Stop silences the loudspeakers at once)");
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function stopMeasuring() {
  try {
    await api("/api/measure/stop", {});
    status("stopping: sound off");
  } catch (err) {
    status(String(err.message || err), true);
  }
}

async function answer(choice) {
  el("m-prompt").hidden = true;
  try {
    await api("/api/measure/answer", { answer: choice });
  } catch (err) {
    status(String(err.message || err), true);
  }
}

const CHOICE_TEXT = {
  continue: "Microphone in place: continue",
  repeat: "Repeat this loudspeaker",
  skip: "Skip this position",
  quit: "Stop here",
};

function showPrompt(ev) {
  el("m-prompt-text").textContent = ev.text.replace(/\s*\(Ctrl-C stops at once\)\s*/, " ").replace(/and press Enter/, "");
  const box = el("m-prompt-buttons");
  box.innerHTML = "";
  ev.choices.forEach(c => {
    const b = document.createElement("button");
    b.type = "button";
    b.textContent = CHOICE_TEXT[c] || c;
    b.dataset.choice = c;
    b.className = c === "quit" ? "" : "primary";
    b.addEventListener("click", () => answer(c));
    box.appendChild(b);
  });
  el("m-prompt").hidden = false;
}

// ---------------------------------------------------------------- live events

function speakerName(output) {
  const i = measure.outputs.indexOf(output);
  return i >= 0 && measure.names[i] ? measure.names[i] : `output ${output}`;
}

function showProgress(text, fraction) {
  el("m-progress-text").textContent = text;
  const total = Math.max(1, measure.positions * Math.max(1, measure.outputs.length));
  const whole = Math.min(1, (measure.captures + (fraction || 0)) / total);
  el("m-progress-bar").style.width = `${(100 * whole).toFixed(1)}%`;
}

function onEvent(ev) {
  switch (ev.type) {
    case "meter":
      measure.level = { peak: ev.peak_dbfs, rms: ev.rms_dbfs };
      if (measure.running && measure.current !== null && measure.speaker !== null) {
        showProgress(`position ${measure.current} of ${measure.positions} · ${speakerName(measure.speaker)} · ` +
          `${Math.round(100 * ev.fraction)} %`, ev.fraction);
      }
      break;
    case "started":
      measure.running = true;
      measure.positions = ev.positions;
      measure.outputs = ev.outputs;
      if (ev.names) measure.names = ev.names;
      mLog(`measurement ${ev.run_id}: ${ev.positions} position(s), sweep peak ${ev.level_dbfs} dBFS`);
      updateButtons();
      drawArea();
      break;
    case "say":
      mLog(ev.text);
      break;
    case "level_check":
      showProgress(`level check: ${ev.advice}`);
      break;
    case "position":
      measure.current = ev.position;
      measure.speaker = null;
      showProgress(`next: position ${ev.position} of ${ev.positions}`);
      drawArea();
      break;
    case "speaker":
      measure.current = ev.position;
      measure.speaker = ev.output;
      drawArea();
      break;
    case "gates": {
      if (ev.gates.every(g => g.passed || g.severity === "warning")) measure.captures += 1;
      // a warning gate lets the run carry on, but is shown where it is seen, not only in the log
      const warned = ev.gates.filter(g => !g.passed && g.severity === "warning");
      if (warned.length) {
        const text = "Warning: " + warned.map(g => g.message).join("; ");
        const box = el("m-warning");
        if (box) { box.textContent = text; box.hidden = false; }
        status(text, true);
        mLog(text);
      }
      break;
    }
    case "saved":
      measure.done[ev.position] = "saved";
      measure.current = null;
      drawArea();
      break;
    case "skipped":
      measure.done[ev.position] = "skipped";
      measure.current = null;
      drawArea();
      break;
    case "prompt":
      showPrompt(ev);
      break;
    case "finished":
    case "stopped":
    case "failed":
      measure.running = false;
      measure.current = null;
      measure.speaker = null;
      el("m-prompt").hidden = true;
      updateButtons();
      drawArea();
      if (ev.type === "finished") {
        showProgress(`finished: ${ev.positions_saved} position(s) saved as measurement ${ev.run_id}`, 0);
        el("m-progress-bar").style.width = "100%";
        el("m-resume").checked = false;
        el("m-resume-box").hidden = true;
        status(`measured ${ev.positions_saved} position(s) into ${ev.run_id}; next: the Design page`);
      } else if (ev.type === "stopped") {
        showProgress("stopped: sound off. Positions already saved are kept; tick 'continue' to resume.");
        el("m-resume").checked = !!ev.resumable;
        el("m-resume-box").hidden = !ev.resumable;
        status("measurement stopped", true);
      } else {
        showProgress(`not finished: ${ev.error}`);
        status(ev.error, true);
      }
      if (typeof loadRoom === "function") loadRoom(true).catch(() => {});
      break;
    default:
      break;
  }
}

function connectMeasureLive() {
  const proto = location.protocol === "https:" ? "wss" : "ws";
  const ws = new WebSocket(`${proto}://${location.host}/api/live?token=${encodeURIComponent(TOKEN)}`);
  ws.onmessage = msg => onEvent(JSON.parse(msg.data));
  ws.onclose = () => setTimeout(connectMeasureLive, 2000);
}

// ---------------------------------------------------------------- meter

function meterX(db, w) { return w * Math.min(1, Math.max(0, (db + 60) / 60)); }

function drawMeter() {
  const canvas = el("m-meter");
  const ctx = canvas.getContext("2d");
  const w = canvas.width, h = canvas.height;
  const now = performance.now();
  const { peak, rms } = measure.level;
  if (peak >= measure.peakHold || now - measure.peakHoldAt > 1500) { measure.peakHold = peak; measure.peakHoldAt = now; }
  ctx.clearRect(0, 0, w, h);
  ctx.fillStyle = "#eef1f3";
  ctx.fillRect(0, 8, w, h - 22);
  const zone = (from, to, color) => { ctx.fillStyle = color; ctx.fillRect(meterX(from, w), 8, meterX(to, w) - meterX(from, w), h - 22); };
  const r = Math.min(rms, 0);
  zone(-60, Math.min(r, -12), "#2f8a83");
  if (r > -12) zone(-12, Math.min(r, -3), "#c98a1b");
  if (r > -3) zone(-3, r, "#b23a3a");
  ctx.fillStyle = "#23303b";
  ctx.fillRect(meterX(peak, w) - 1, 4, 2, h - 14);
  ctx.fillStyle = "#7b3f8c";
  ctx.fillRect(meterX(measure.peakHold, w) - 1, 4, 2, h - 14);
  ctx.fillStyle = "#5d6b76";
  ctx.font = "10px system-ui, sans-serif";
  [-60, -48, -36, -24, -12, -6, 0].forEach(db => ctx.fillText(String(db), Math.min(meterX(db, w), w - 12), h - 2));
  // the words describe what the marks show: the held peak (purple mark) and the level now
  const held = measure.peakHold;
  let txt = `input peak ${held.toFixed(1)} dBFS (purple mark, held 1.5 s); now ` +
    (peak <= -119 ? "silent" : `peak ${peak.toFixed(1)} dBFS, rms ${rms.toFixed(1)} dBFS`);
  if (held <= -119) txt = "input: no signal yet (the meter runs while sound plays)";
  else if (held < -60) txt += ": quiet";
  el("m-meter-text").textContent = txt;
  // the level sinks when no blocks arrive (between sweeps)
  measure.level = { peak: Math.max(-120, peak - 1.5), rms: Math.max(-120, rms - 1.5) };
  requestAnimationFrame(drawMeter);
}

// ---------------------------------------------------------------- listening area

function positionSpots(n, cx, cy, r) {
  const spots = [{ x: cx, y: cy }];
  for (let k = 1; k < n; k++) {
    const a = -Math.PI / 2 + (2 * Math.PI * (k - 1)) / Math.max(1, n - 1);
    spots.push({ x: cx + r * Math.cos(a), y: cy + 0.62 * r * Math.sin(a) });
  }
  return spots;
}

function svgNode(tag, attrs, text) {
  const node = document.createElementNS("http://www.w3.org/2000/svg", tag);
  Object.entries(attrs).forEach(([k, v]) => node.setAttribute(k, v));
  if (text !== undefined) node.textContent = text;
  return node;
}

function drawArea() {
  const svg = el("m-area");
  if (!svg) return;
  svg.innerHTML = "";
  const n = measure.running ? measure.positions : Number(el("m-positions").value);
  const names = measure.running ? measure.names : speakerRows().map(tr => tr.querySelector(".m-name").value || "?");
  svg.appendChild(svgNode("rect", { x: 10, y: 10, width: 400, height: 280, rx: 10, class: "room" }));
  names.forEach((name, i) => {
    const x = 40 + (340 * (i + 0.5)) / Math.max(1, names.length) - 22;
    svg.appendChild(svgNode("rect", { x, y: 22, width: 44, height: 22, rx: 4, class: "speaker" }));
    svg.appendChild(svgNode("text", { x: x + 22, y: 58, class: "label" }, name));
  });
  svg.appendChild(svgNode("rect", { x: 120, y: 150, width: 180, height: 110, rx: 18, class: "seat" }));
  svg.appendChild(svgNode("text", { x: 210, y: 280, class: "label" }, "listening area"));
  // several subwoofers (speakers named like "front_sub" or "sub2"): their delays and levels
  // are chosen to make the seats agree, so the positions should cover the whole area
  const nSubs = names.filter(nm => /(^sub|sub$|sub\d*$|^sub\d)/i.test(nm) || /_sub/i.test(nm)).length;
  const spots = positionSpots(n, 210, 205, nSubs > 1 ? 88 : 70);
  const pending = [];
  for (let p = 1; p <= n; p++) if (!measure.done[p]) pending.push(p);
  const next = measure.current !== null ? measure.current : pending[0];
  spots.forEach((s, i) => {
    const p = i + 1;
    let cls = "spot";
    if (measure.done[p] === "saved") cls += " saved";
    else if (measure.done[p] === "skipped") cls += " skipped";
    else if (p === next) cls += measure.speaker !== null && measure.current === p ? " current" : " next";
    svg.appendChild(svgNode("circle", { cx: s.x, cy: s.y, r: 13, class: cls, "data-position": p }));
    svg.appendChild(svgNode("text", { x: s.x, y: s.y + 4, class: "num" }, String(p)));
  });
  const saved = Object.values(measure.done).filter(v => v === "saved").length;
  let txt = next
    ? `${saved} of ${n} positions measured; next: position ${next} (the ringed circle)`
    : `${saved} of ${n} positions measured`;
  if (nSubs > 1) {
    txt += `. ${nSubs} subwoofers: spread the positions over the whole listening area (both ends ` +
      "of the sofa, its middle, a second row if people sit there)" + (n < 5 ? "; measure at least 5" : "");
  }
  el("m-area-text").textContent = txt;
}

// ---------------------------------------------------------------- start-up

async function setupMeasure() {
  addSpeaker("left", 1);
  addSpeaker("right", 2);
  el("m-add-speaker").addEventListener("click", () => {
    const used = speakerRows().map(tr => Number(tr.querySelector(".m-output").value));
    addSpeaker(`speaker${used.length + 1}`, Math.max(0, ...used) + 1);
  });
  el("m-positions").addEventListener("input", drawArea);
  el("m-level").addEventListener("input", showLevel);
  el("m-loud").addEventListener("change", onLoud);
  el("m-ack").addEventListener("click", acknowledge);
  el("m-start").addEventListener("click", startMeasuring);
  el("m-stop").addEventListener("click", stopMeasuring);
  showLevel();
  requestAnimationFrame(drawMeter);
  connectMeasureLive();
  try {
    const c = await api("/api/measure/cautions");
    measure.levelCap = c.level_cap_dbfs;
    el("m-level").max = String(c.level_cap_dbfs);
    el("m-caution-text").textContent = c.text;
    el("m-tone-note").textContent = `Test tones play for a second at ${c.test_tone_dbfs} dBFS, never louder than the sweep.`;
    setAcknowledged(c.acknowledged, c.acknowledged_utc);
    const st = await api("/api/measure/state");
    el("m-resume").checked = false;
    el("m-resume-box").hidden = !st.resumable;
  } catch (err) {
    status(String(err.message || err), true);
  }
  try {
    const view = await api("/api/measure/devices");
    fillDevices(view);
    el("m-devices-note").textContent = view.problem || "";
  } catch (err) {
    el("m-devices-note").textContent = String(err.message || err);
  }
  updateButtons();
}

setupMeasure();
