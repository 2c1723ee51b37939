// roomcorr browser app, Plan page: the room's layout drawn to scale and edited.
// Every check is the server's (the same as `roomcorr layout set`); this page only draws and sends.
"use strict";

(function () {
  const SVG_NS = "http://www.w3.org/2000/svg";
  const W = 640, H = 600, M = 44;          // drawing size and margin, SVG units
  const DEFAULT = {                          // a starting point when the room has no layout yet
    size_m: [5.0, 6.0, 2.6],
    loudspeakers: [["left", [1.5, 0.9, 1.0]], ["right", [3.5, 0.9, 1.0]]],
    seat: [2.5, 3.6, 1.1],
    measured: [],
  };
  let view = null;       // what the server last sent (GET or POST /api/plan)
  let plan = null;       // the layout being edited: {size_m, loudspeakers: [[name, [x,y,z]]], seat, measured}
  let drag = null;       // {kind: "speaker"|"seat", index}

  const $ = id => document.getElementById(id);
  const r2 = v => Math.round(v * 100) / 100;

  function fromLayout(layout) {
    if (!layout) return JSON.parse(JSON.stringify(DEFAULT));
    return {
      size_m: layout.room.size_m.slice(),
      loudspeakers: Object.entries(layout.loudspeakers).map(([n, p]) => [n, p.slice()]),
      seat: layout.seat.position.slice(),
      measured: (layout.measured || []).map(m => m.position.slice()),
    };
  }

  // metres <-> drawing units: x across from the left wall, y down the page from the front wall
  function scale() {
    const [w, l] = plan.size_m.map(Number);
    const ok = w > 0 && l > 0 && isFinite(w) && isFinite(l);
    const s = ok ? Math.min((W - 2 * M) / w, (H - 2 * M) / l) : 1;
    return { s, w: ok ? w : 1, l: ok ? l : 1, x0: M, y0: M };
  }
  const toPx = (sc, x, y) => [sc.x0 + Number(x) * sc.s, sc.y0 + Number(y) * sc.s];

  function node(tag, attrs, parent, text) {
    const e = document.createElementNS(SVG_NS, tag);
    Object.entries(attrs).forEach(([k, v]) => e.setAttribute(k, v));
    if (text !== undefined) e.textContent = text;
    if (parent) parent.appendChild(e);
    return e;
  }

  function mapColor(v, lo, hi) {
    // darker is smoother (less bass unevenness), as in the advise plan drawing
    const f = hi > lo ? (v - lo) / (hi - lo) : 0.5;
    const c = Math.round(90 + 150 * f);
    return `rgb(${c},${Math.round(c * 0.98)},${Math.round(c * 0.9)})`;
  }

  function drawAdvice(svg, sc) {
    const adv = view && view.advice;
    if (!adv || !adv.plan) return;
    const map = adv.plan.map;
    if (map && map.x_m.length > 1 && map.y_m.length > 1) {
      const vals = map.ripple_db.flat();
      const lo = Math.min(...vals), hi = Math.max(...vals);
      const dx = (map.x_m[1] - map.x_m[0]) * sc.s, dy = (map.y_m[1] - map.y_m[0]) * sc.s;
      const g = node("g", { id: "p-map", opacity: view.advice_current ? 0.75 : 0.3 }, svg);
      map.ripple_db.forEach((row, j) => row.forEach((v, i) => {
        const [px, py] = toPx(sc, map.x_m[i], map.y_m[j]);
        node("rect", { x: px - dx / 2, y: py - dy / 2, width: dx, height: dy, fill: mapColor(v, lo, hi) }, g)
          .appendChild(node("title", {}, null, `${v.toFixed(1)} dB bass unevenness predicted here`));
      }));
    }
    const sugg = adv.plan.suggested;
    if (!sugg) return;
    Object.entries(sugg.speakers_m).forEach(([n, p]) => {
      const cur = plan.loudspeakers.find(e => e[0] === n);
      const [px, py] = toPx(sc, p[0], p[1]);
      if (cur) {
        const [cx, cy] = toPx(sc, cur[1][0], cur[1][1]);
        node("line", { x1: cx, y1: cy, x2: px, y2: py, class: "p-arrow" }, svg);
      }
      node("rect", { x: px - 9, y: py - 9, width: 18, height: 18, class: "p-suggested", "data-name": n }, svg);
    });
    const [sx, sy] = toPx(sc, sugg.seat_m[0], sugg.seat_m[1]);
    node("circle", { cx: sx, cy: sy, r: 11, class: "p-suggested" }, svg);
  }

  function draw() {
    const svg = $("p-svg");
    svg.textContent = "";
    const sc = scale();
    const [rw, rl] = [sc.w * sc.s, sc.l * sc.s];
    for (let x = 1; x < sc.w; x++) node("line", { x1: M + x * sc.s, y1: M, x2: M + x * sc.s, y2: M + rl, class: "grid" }, svg);
    for (let y = 1; y < sc.l; y++) node("line", { x1: M, y1: M + y * sc.s, x2: M + rw, y2: M + y * sc.s, class: "grid" }, svg);
    drawAdvice(svg, sc);
    node("rect", { x: M, y: M, width: rw, height: rl, class: "wall" }, svg);
    node("text", { x: M + rw / 2, y: M - 10, "text-anchor": "middle" }, svg, `front wall (${Number(plan.size_m[0]).toFixed(2)} m)`);
    node("text", { x: M + rw / 2, y: M + rl + 20, "text-anchor": "middle" }, svg, "back wall");
    node("text", { x: M - 8, y: M + rl / 2, "text-anchor": "middle", transform: `rotate(-90 ${M - 8} ${M + rl / 2})` }, svg,
      `left wall (${Number(plan.size_m[1]).toFixed(2)} m)`);
    node("text", { x: M + rw + 14, y: M + rl / 2, "text-anchor": "middle", transform: `rotate(90 ${M + rw + 14} ${M + rl / 2})` }, svg, "right wall");
    plan.measured.forEach((p, i) => {
      const [px, py] = toPx(sc, p[0], p[1]);
      node("path", { d: `M${px - 5},${py - 5}L${px + 5},${py + 5}M${px - 5},${py + 5}L${px + 5},${py - 5}`, class: "p-measured" }, svg)
        .appendChild(node("title", {}, null, `measured position ${i + 1}`));
    });
    const limits = (view && view.limits) || { head_half_width_m: 0.3 };
    const [sx, sy] = toPx(sc, plan.seat[0], plan.seat[1]);
    node("circle", { cx: sx, cy: sy, r: limits.head_half_width_m * sc.s, class: "p-head" }, svg);
    const seat = node("circle", { cx: sx, cy: sy, r: 9, class: "p-seat", id: "p-seat" }, svg);
    seat.appendChild(node("title", {}, null, "seat"));
    startDrag(seat, "seat", 0);
    plan.loudspeakers.forEach(([n, p], i) => {
      const [px, py] = toPx(sc, p[0], p[1]);
      const r = node("rect", { x: px - 8, y: py - 8, width: 16, height: 16, class: "p-speaker", "data-name": n }, svg);
      r.appendChild(node("title", {}, null, n));
      node("text", { x: px, y: py + 22, "text-anchor": "middle" }, svg, n);
      startDrag(r, "speaker", i);
    });
    const want = view && view.latest_positions;
    $("p-count").hidden = !(want && plan.measured.length !== want);
    $("p-count").textContent = want ? `The latest measurement (${view.latest_measurement}) has ${want} positions and the layout lists ${plan.measured.length}: predict, advise and compare need one measured position per file, in file order.` : "";
    $("p-legend").textContent = `Grid: 1 m. Squares: loudspeakers; circle: the seat, dashed: the listening area a loudspeaker must stay out of (${limits.head_half_width_m} m); crosses: measured positions.`
      + (view && view.advice && view.advice.plan && view.advice.plan.suggested ? " Green: where advise's best suggestion puts them, over its map of predicted bass unevenness (darker is smoother)." : "");
  }

  function metresAt(ev) {
    // the pointer's place in the room, m (unrounded)
    const svg = $("p-svg");
    const pt = svg.createSVGPoint();
    pt.x = ev.clientX; pt.y = ev.clientY;
    const q = pt.matrixTransform(svg.getScreenCTM().inverse());
    const sc = scale();
    return [(q.x - sc.x0) / sc.s, (q.y - sc.y0) / sc.s];
  }

  function startDrag(el, kind, index) {
    el.addEventListener("pointerdown", ev => {
      ev.preventDefault();
      const p = kind === "seat" ? plan.seat : plan.loudspeakers[index][1];
      const [mx, my] = metresAt(ev);
      // where on the symbol it was taken: a drag moves it by the pointer's movement only
      drag = { kind, index, from: [Number(p[0]), Number(p[1])], grab: [mx, my] };
      el.classList.add("dragging");
    });
  }

  function onMove(ev) {
    if (!drag) return;
    const [mx, my] = metresAt(ev);
    const sc = scale();
    const clamp = (v, hi) => Math.min(hi - 0.01, Math.max(0.01, v));
    const p = drag.kind === "seat" ? plan.seat : plan.loudspeakers[drag.index][1];
    const dx = mx - drag.grab[0], dy = my - drag.grab[1];
    // positions snap to 1 cm; an axis the pointer did not move along keeps its value
    if (Math.abs(dx) >= 0.005) p[0] = r2(clamp(drag.from[0] + dx, sc.w));
    if (Math.abs(dy) >= 0.005) p[1] = r2(clamp(drag.from[1] + dy, sc.l));
    draw();
    fillTable();
    changed();
  }

  function onUp() { drag = null; }

  function changed() {
    $("p-saved").hidden = true;
  }

  function numberCell(tr, arr, i, cls) {
    const td = document.createElement("td");
    const inp = document.createElement("input");
    inp.type = "number"; inp.step = "0.01"; inp.value = arr[i];
    if (cls) inp.className = cls;
    inp.addEventListener("input", () => {
      const v = inp.value.trim();
      arr[i] = v !== "" && isFinite(Number(v)) ? Number(v) : v;
      draw();
      changed();
    });
    td.appendChild(inp);
    tr.appendChild(td);
    return inp;
  }

  function row(tbody, label, arr, id, remove) {
    const tr = document.createElement("tr");
    if (id) tr.id = id;
    const th = document.createElement("th");
    if (typeof label === "string") th.textContent = label; else th.appendChild(label);
    tr.appendChild(th);
    [0, 1, 2].forEach(i => numberCell(tr, arr, i, ["x", "y", "z"][i]));
    const td = document.createElement("td");
    if (remove) {
      const b = document.createElement("button");
      b.type = "button"; b.className = "quiet"; b.textContent = "remove";
      b.addEventListener("click", () => { remove(); draw(); fillTable(); changed(); });
      td.appendChild(b);
    }
    tr.appendChild(td);
    tbody.appendChild(tr);
  }

  function fillTable() {
    const tbody = $("p-table").querySelector("tbody");
    tbody.textContent = "";
    const head = document.createElement("tr");
    ["", "x (m)", "y (m)", "z (m)", ""].forEach(t => { const th = document.createElement("th"); th.textContent = t; head.appendChild(th); });
    tbody.appendChild(head);
    row(tbody, "room: width, length, height", plan.size_m, "p-size");
    plan.loudspeakers.forEach((entry, i) => {
      const name = document.createElement("input");
      name.className = "name"; name.value = entry[0]; name.title = "loudspeaker name (as the channel's)";
      name.addEventListener("input", () => { entry[0] = name.value.trim(); draw(); changed(); });
      row(tbody, name, entry[1], `p-speaker-${i}`, plan.loudspeakers.length > 1 ? () => plan.loudspeakers.splice(i, 1) : null);
    });
    row(tbody, "seat", plan.seat, "p-seat-row");
    plan.measured.forEach((p, i) => row(tbody, `measured ${i + 1}`, p, `p-measured-${i}`, () => plan.measured.splice(i, 1)));
  }

  function showAdvice() {
    const box = $("p-advice");
    box.textContent = "";
    const adv = view && view.advice;
    if (view && view.advice_problem) {
      const p = document.createElement("p"); p.className = "warning"; p.textContent = view.advice_problem; box.appendChild(p);
    }
    if (!adv) {
      const p = document.createElement("p"); p.className = "hint";
      p.textContent = "No suggestions yet: run 'roomcorr advise' in the room folder (it needs this layout with at least three measured positions) and they appear here.";
      box.appendChild(p);
      return;
    }
    const h = document.createElement("h3");
    h.textContent = `Suggestions of advise (${adv.made_utc})`;
    box.appendChild(h);
    if (!view.advice_current) {
      const p = document.createElement("p"); p.className = "hint";
      p.textContent = "Made for the layout as it was then; the layout has changed since (run advise again for suggestions from this one).";
      box.appendChild(p);
    }
    const cur = adv.current || {};
    if (cur.boom_db !== undefined) {
      const p = document.createElement("p"); p.className = "hint";
      p.textContent = `Now, after correction: boom ${Number(cur.boom_db).toFixed(1)} dB, bass varies by ${Number(cur.ripple_db).toFixed(1)} dB over the listening area.`;
      box.appendChild(p);
    }
    adv.suggestions.forEach((s, i) => {
      const p = document.createElement("p"); p.className = "suggestion";
      p.textContent = `${i + 1}. ${s.text} `;
      const b = document.createElement("button");
      b.type = "button"; b.className = "quiet"; b.textContent = "put them there";
      b.title = "moves the loudspeakers and the seat in this editor (not saved until you save)";
      b.addEventListener("click", () => {
        plan.loudspeakers.forEach(e => { if (s.speakers_m[e[0]]) e[1] = s.speakers_m[e[0]].slice(); });
        plan.seat = s.seat_m.slice();
        draw(); fillTable(); changed();
      });
      p.appendChild(b);
      box.appendChild(p);
    });
  }

  function render(data) {
    view = data;
    plan = fromLayout(data.layout);
    $("p-error").hidden = !data.problem;
    $("p-error").textContent = data.problem || "";
    if (!data.layout && !data.problem) {
      $("p-saved").hidden = false;
      $("p-saved").textContent = "This room has no layout yet: set the room's size and where things stand, then save.";
    }
    $("p-cautions").textContent = (data.cautions || []).join(" ");
    draw();
    fillTable();
    showAdvice();
  }

  async function load() {
    try {
      render(await api("/api/plan"));
    } catch (err) {
      status(String(err.message || err), true);
    }
  }

  function request() {
    const names = plan.loudspeakers.map(e => e[0]);
    const dup = names.find((n, i) => names.indexOf(n) !== i);
    if (dup !== undefined) throw new Error(`two loudspeakers are named ${JSON.stringify(dup)}; give each its own name`);
    return {
      size_m: plan.size_m, seat: plan.seat, measured: plan.measured,
      loudspeakers: Object.fromEntries(plan.loudspeakers),
    };
  }

  async function save() {
    $("p-error").hidden = true;
    try {
      const data = await api("/api/plan", request());
      render(data);
      $("p-saved").hidden = false;
      $("p-saved").textContent = `Saved to ${data.saved} in the room folder.`;
      status(`layout saved to ${data.saved}`);
    } catch (err) {
      const text = String(err.message || err);
      $("p-error").textContent = text;
      $("p-error").hidden = false;
      status(text, true);
    }
  }

  document.querySelector("nav button[data-tab=plan]").addEventListener("click", load);
  $("p-save").addEventListener("click", save);
  $("p-reload").addEventListener("click", load);
  $("p-add-speaker").addEventListener("click", () => {
    const sc = scale();
    plan.loudspeakers.push([`speaker${plan.loudspeakers.length + 1}`, [r2(sc.w / 2), 0.5, 1.0]]);
    draw(); fillTable(); changed();
  });
  $("p-add-measured").addEventListener("click", () => {
    plan.measured.push(plan.seat.slice());
    draw(); fillTable(); changed();
  });
  const svg = $("p-svg");
  svg.addEventListener("pointermove", onMove);
  window.addEventListener("pointerup", onUp);

  // for the browser tests: the layout being edited and where a loudspeaker or the seat is drawn
  window.roomcorrPlan = () => ({
    plan: plan && JSON.parse(JSON.stringify(plan)),
    pxPerMetre: plan ? scale().s * svg.getScreenCTM().a : null,
  });
})();
