// The live station page: server-sent events for the box, the logbook view on change.
"use strict";
const $ = (id) => document.getElementById(id);
const COLORS = ["#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2", "#7f7f7f",
                "#bcbd22", "#17becf"];

function fmt(v, digits) { return (v === null || v === undefined) ? "-" : Number(v).toFixed(digits); }

// When the page last heard from the board and last read the logbook, in UTC like the plots.
const seen = { board: null, logbook: null };
function stamp(what) {
  seen[what] = new Date().toISOString().slice(11, 19) + " UTC";
  $("updated").textContent = "board: " + (seen.board ? "updated " + seen.board : "never updated") +
    "; logbook: " + (seen.logbook ? "read " + seen.logbook : "never read");
}

function showStatus(s) {
  stamp("board");
  $("state").textContent = s.state;
  $("why").textContent = s.why;
  const r = s.relays || [];
  $("relays").textContent = r[3] ? "through (bypass)" : `L${r[0]} C${r[1]} ${r[2] === 0 ? "tx" : "ant"}` +
    (s.l_uh !== undefined ? ` (${s.l_uh.toFixed(2)} uH, ${Math.round(s.c_pf)} pF)` : "");
  $("fwd").textContent = fmt(s.fwd_w, 1);
  $("ref").textContent = fmt(s.ref_w, 2);
  $("swr").textContent = s.swr === null ? "no RF" : fmt(s.swr, 2);
  // The true SWR the reading allows with the coupler's error bounds.
  $("swr_bound").textContent = s.swr_bound ? `${fmt(s.swr_bound[0], 2)}-${fmt(s.swr_bound[1], 2)}` : "-";
  $("freq").textContent = s.freq_hz ? (s.freq_hz / 1e6).toFixed(4) + " MHz" : "no carrier";
  $("seq").textContent = s.seq;
  document.body.dataset.updates = String(Number(document.body.dataset.updates || 0) + 1);
}

function setLink(text, cls) { const l = $("link"); l.textContent = text; l.className = "pill " + cls; }

function pct(x) { return x === null ? "-" : Math.round(100 * x) + "%"; }

function showView(v) {
  stamp("logbook");
  $("summary").textContent = (v.lines && v.lines[0]) || (v.error ? v.error : "no logbook");
  const tb = $("bands").querySelector("tbody");
  tb.innerHTML = "";
  for (const b of v.bands) {
    const tr = document.createElement("tr");
    const st = b.most_used_state ? `L${b.most_used_state[0]} C${b.most_used_state[1]} ${b.most_used_state[2]}` +
      (b.most_used_values ? ` (${b.most_used_values.l_uh.toFixed(2)} uH, ${Math.round(b.most_used_values.c_pf)} pF)` : "") : "-";
    const cells = [b.band, b.tunes, pct(b.success_rate), fmt(b.median_swr_after, 2), fmt(b.median_measurements, 0),
                   pct(b.memory_hit_rate), st,
                   b.best_effort ? `${b.best_effort}` + (b.best_effort_true_swr_max !== null && b.best_effort_true_swr_max !== undefined
                     ? ` (true SWR up to ${fmt(b.best_effort_true_swr_max, 2)})` : "") : "-",
                   (b.health.flag ? "CHECK: " : "") + b.health.note];
    cells.forEach((c, i) => {
      const td = document.createElement("td");
      td.textContent = c;
      if (i === 8 && b.health.flag) td.className = "flag";
      tr.appendChild(td);
    });
    tb.appendChild(tr);
  }
  drawSeries(v.series || {});
  drawSmith(v.smith || {});
}

function drawSeries(series) {
  const c = $("swrtime"), g = c.getContext("2d");
  g.clearRect(0, 0, c.width, c.height);
  const pts = [];
  Object.values(series).forEach((rows) => rows.forEach((r) => pts.push(Date.parse(r[0]))));
  const L = 40, R = c.width - 80, T = 10, B = c.height - 25;
  g.strokeStyle = "#999"; g.strokeRect(L, T, R - L, B - T);
  const y = (s) => B - (Math.min(Math.max(s, 1), 3) - 1) / 2 * (B - T);
  g.fillStyle = "#555"; g.font = "11px sans-serif";
  [1, 1.5, 2, 3].forEach((s) => { g.fillText(String(s), 8, y(s) + 4);
    g.strokeStyle = s === 1.5 ? "#d62728" : "#eee"; g.beginPath(); g.moveTo(L, y(s)); g.lineTo(R, y(s)); g.stroke(); });
  if (!pts.length) { g.fillText("no tunes logged yet", L + 10, T + 20); return; }
  const t0 = Math.min(...pts), t1 = Math.max(...pts) + 1;
  const x = (t) => L + (t - t0) / (t1 - t0) * (R - L);
  Object.keys(series).forEach((band, k) => {
    const col = COLORS[k % COLORS.length];
    g.fillStyle = col;
    series[band].forEach((r) => {
      const px = x(Date.parse(r[0])), py = y(r[1]);
      if (r[2] === "locked") { g.beginPath(); g.arc(px, py, 3, 0, 2 * Math.PI); g.fill(); }
      else { g.strokeStyle = col; g.beginPath(); g.moveTo(px - 3, py - 3); g.lineTo(px + 3, py + 3);
             g.moveTo(px + 3, py - 3); g.lineTo(px - 3, py + 3); g.stroke(); }
    });
    g.fillText(band, R + 8, T + 12 + 14 * k);
  });
}

function drawSmith(smith) {
  const c = $("smith"), g = c.getContext("2d");
  g.clearRect(0, 0, c.width, c.height);
  const cx = c.width / 2, cy = c.height / 2, rad = c.width / 2 - 12;
  g.strokeStyle = "#bbb";
  g.beginPath(); g.arc(cx, cy, rad, 0, 2 * Math.PI); g.stroke();
  g.beginPath(); g.moveTo(cx - rad, cy); g.lineTo(cx + rad, cy); g.stroke();
  [0.2, 1, 3].forEach((r) => {   // constant-resistance circles
    const rr = rad / (1 + r); g.beginPath(); g.arc(cx + rad - rr, cy, rr, 0, 2 * Math.PI); g.stroke(); });
  g.save();                      // constant-reactance arcs, inside the unit circle only
  g.beginPath(); g.arc(cx, cy, rad, 0, 2 * Math.PI); g.clip();
  [0.5, 1, 2].forEach((xv) => [1, -1].forEach((sgn) => {
    const rr = rad / xv; g.beginPath(); g.arc(cx + rad, cy - sgn * rr, rr, 0, 2 * Math.PI); g.stroke(); }));
  g.restore();
  Object.keys(smith).forEach((band, k) => {
    g.fillStyle = COLORS[k % COLORS.length];
    smith[band].forEach((p) => { g.beginPath(); g.arc(cx + p[0] * rad, cy - p[1] * rad, 3, 0, 2 * Math.PI); g.fill(); });
  });
}

// The measured antenna: R and X against frequency with one-sigma bars, the loads on a Smith chart.
function drawAntenna(a) {
  const pts = a.points || [];
  const res = (a.resonances || []).map((r) => `${r.kind} resonance ${(r.freq_hz / 1e6).toFixed(3)} MHz`);
  $("antenna-summary").textContent = a.error ? a.error : pts.length ?
    `${pts.length} frequencies, ${pts.reduce((n, p) => n + p.tunes, 0)} tunes` + (res.length ? "; " + res.join(", ") : "") :
    "no tune with readings logged yet";
  const ul = $("antenna-notes");
  ul.innerHTML = "";
  const notes = (a.notes || []).slice();
  Object.keys(a.health || {}).forEach((band) => { if (a.health[band].flag) notes.push(band + ": " + a.health[band].note); });
  notes.forEach((n) => { const li = document.createElement("li"); li.textContent = "CHECK: " + n; li.className = "flag"; ul.appendChild(li); });
  const c = $("antrx"), g = c.getContext("2d");
  g.clearRect(0, 0, c.width, c.height);
  const L = 50, R = c.width - 60, T = 10, B = c.height - 25;
  g.strokeStyle = "#999"; g.strokeRect(L, T, R - L, B - T);
  if (!pts.length) { drawSmithPoints($("antsmith"), []); return; }
  const f = pts.map((p) => p.freq_hz / 1e6);
  const f0 = Math.min(...f) * 0.97, f1 = Math.max(...f) * 1.03;
  const vals = [];
  pts.forEach((p) => { vals.push(p.r_ohm + p.r_err_ohm, p.x_ohm - p.x_err_ohm, p.x_ohm + p.x_err_ohm, 0); });
  const lo = Math.max(Math.min(...vals), -2000), hi = Math.min(Math.max(...vals), 2000);
  const x = (v) => L + (v - f0) / (f1 - f0) * (R - L);
  const y = (v) => B - (Math.min(Math.max(v, lo), hi) - lo) / ((hi - lo) || 1) * (B - T);
  g.fillStyle = "#555"; g.font = "11px sans-serif";
  g.strokeStyle = "#ccc"; g.beginPath(); g.moveTo(L, y(0)); g.lineTo(R, y(0)); g.stroke();
  g.fillText(Math.round(hi) + " ohm", 4, T + 10); g.fillText(Math.round(lo) + " ohm", 4, B);
  g.fillText(f0.toFixed(1) + " MHz", L, B + 16); g.fillText(f1.toFixed(1) + " MHz", R - 50, B + 16);
  [["r_ohm", "r_err_ohm", COLORS[0], "R"], ["x_ohm", "x_err_ohm", COLORS[1], "X"]].forEach(([k, e, col, name], i) => {
    g.strokeStyle = col; g.fillStyle = col;
    pts.forEach((p) => {
      const px = x(p.freq_hz / 1e6);
      g.beginPath(); g.moveTo(px, y(p[k] - p[e])); g.lineTo(px, y(p[k] + p[e])); g.stroke();
      g.beginPath(); g.arc(px, y(p[k]), 3, 0, 2 * Math.PI); g.fill();
    });
    g.fillText(name, R + 8, T + 12 + 14 * i);
  });
  drawSmithPoints($("antsmith"), pts.map((p) => p.gamma));
}

function drawSmithPoints(c, gs) {
  const g = c.getContext("2d");
  g.clearRect(0, 0, c.width, c.height);
  const cx = c.width / 2, cy = c.height / 2, rad = c.width / 2 - 12;
  g.strokeStyle = "#bbb";
  g.beginPath(); g.arc(cx, cy, rad, 0, 2 * Math.PI); g.stroke();
  g.beginPath(); g.moveTo(cx - rad, cy); g.lineTo(cx + rad, cy); g.stroke();
  [0.2, 1, 3].forEach((r) => { const rr = rad / (1 + r); g.beginPath(); g.arc(cx + rad - rr, cy, rr, 0, 2 * Math.PI); g.stroke(); });
  g.strokeStyle = COLORS[2]; g.fillStyle = COLORS[2];
  gs.forEach((p, i) => {
    const px = cx + p[0] * rad, py = cy - p[1] * rad;
    if (i) { const q = gs[i - 1]; g.beginPath(); g.moveTo(cx + q[0] * rad, cy - q[1] * rad); g.lineTo(px, py); g.stroke(); }
    g.beginPath(); g.arc(px, py, 3, 0, 2 * Math.PI); g.fill();
  });
}

async function loadAntenna() {
  try { const r = await fetch("/api/antenna"); drawAntenna(await r.json()); }
  catch (e) { $("antenna-summary").textContent = "antenna view failed: " + e; }
}

async function loadView() {
  try { const r = await fetch("/api/view"); showView(await r.json()); }
  catch (e) { $("summary").textContent = "logbook view failed: " + e; }
}

async function control(word, body) {
  const r = await fetch("/api/" + word, { method: "POST", headers: { "X-Feedmatch-Token": $("token").value,
    "Content-Type": "application/json" }, body: JSON.stringify(body || {}) });
  const a = await r.json();
  $("control-msg").textContent = r.ok ? word + ": ok" : (a.error || r.statusText);
}

async function start() {
  const cfg = await (await fetch("/api/config")).json();
  if (!cfg.board) { $("noboard").hidden = false; $("board-panel").querySelector("table").hidden = true; setLink("logbook only", ""); }
  if (cfg.control) {
    $("controls").hidden = false;
    $("tune").onclick = () => control("tune");
    $("bypass").onclick = () => control("bypass", { on: true });
    $("inline").onclick = () => control("bypass", { on: false });
  }
  loadView();
  loadAntenna();
  const es = new EventSource("/api/events");
  es.addEventListener("status", (e) => { setLink("board", "ok"); showStatus(JSON.parse(e.data)); });
  es.addEventListener("record", () => loadView());
  es.addEventListener("logbook", () => loadView());
  es.addEventListener("record", () => loadAntenna());
  es.addEventListener("logbook", () => loadAntenna());
  es.addEventListener("board-lost", (e) => setLink("board lost: " + JSON.parse(e.data).error, "bad"));
  es.onerror = () => setLink("server unreachable", "bad");
}
start();
