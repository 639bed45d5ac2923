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
  // The passive watch: an element that stopped acting or moved, from the tunes' traces.
  const w = $("watch");
  w.textContent = (v.watch || []).join("; ");
  w.className = v.watch_flag ? "flag" : "";
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
  const order = v.band_order || Object.keys(v.series || {});
  const target = v.target_swr || 1.5;
  drawSeries(v.series || {}, order, target);
  drawSmith(v.smith || {}, order, target);
}

// Bands in band order (the server's), each with its colour on both charts.
function bandColours(order) {
  const col = {};
  order.forEach((b, k) => { col[b] = COLORS[k % COLORS.length]; });
  return col;
}

function utc(t) { return new Date(t).toISOString().slice(5, 16).replace("T", " "); }

function drawSeries(series, order, target) {
  const c = $("swrtime"), g = c.getContext("2d");
  g.clearRect(0, 0, c.width, c.height);
  const bands = order.filter((b) => series[b]);
  const col = bandColours(order);
  const pts = [];
  bands.forEach((b) => series[b].forEach((r) => pts.push(Date.parse(r[0]))));
  const L = 52, R = c.width - 110, T = 12, B = c.height - 44, TOP = 3;
  g.strokeStyle = "#999"; g.lineWidth = 1; g.strokeRect(L, T, R - L, B - T);
  const y = (s) => B - (Math.min(Math.max(s, 1), TOP) - 1) / (TOP - 1) * (B - T);
  g.fillStyle = "#555"; g.font = "11px sans-serif"; g.textAlign = "right";
  [1, 1.5, 2, 2.5, 3].forEach((s) => {
    g.fillText(s === TOP ? "3+" : String(s), L - 4, y(s) + 4);
    g.strokeStyle = "#eee"; g.beginPath(); g.moveTo(L, y(s)); g.lineTo(R, y(s)); g.stroke(); });
  // The axes' names and units: SWR is a ratio; time in UTC like the report's plots.
  g.save(); g.translate(12, (T + B) / 2); g.rotate(-Math.PI / 2); g.textAlign = "center";
  g.fillText("SWR after tune", 0, 0); g.restore();
  g.textAlign = "center"; g.fillText("time (UTC)", (L + R) / 2, c.height - 6);
  // The target SWR, drawn and said.
  g.strokeStyle = "#d62728"; g.setLineDash([5, 3]); g.beginPath(); g.moveTo(L, y(target)); g.lineTo(R, y(target));
  g.stroke(); g.setLineDash([]);
  g.fillStyle = "#d62728"; g.textAlign = "left"; g.fillText("target " + target, L + 4, y(target) - 4);
  g.fillStyle = "#555";
  if (!pts.length) { g.fillText("no tunes logged yet", L + 10, T + 20); return; }
  const t0 = Math.min(...pts), t1 = Math.max(...pts) + 1;
  const x = (t) => L + (t - t0) / (t1 - t0) * (R - L);
  [t0, (t0 + t1) / 2, t1].forEach((t, i) => {
    g.textAlign = ["left", "center", "right"][i]; g.fillText(utc(t), x(t), B + 15); });
  bands.forEach((band) => {
    const rows = series[band];
    g.strokeStyle = col[band]; g.fillStyle = col[band]; g.lineWidth = 1;
    // One line per memory bin: a line never joins two frequencies.
    const bins = {};
    rows.forEach((r) => { if (r[2] === "locked") (bins[r[3]] = bins[r[3]] || []).push(r); });
    Object.values(bins).forEach((rs) => { if (rs.length < 2) return; g.beginPath();
      rs.forEach((r, i) => { const px = x(Date.parse(r[0])), py = y(r[1]); if (i) g.lineTo(px, py); else g.moveTo(px, py); });
      g.stroke(); });
    rows.forEach((r) => {
      const px = x(Date.parse(r[0])), py = y(r[1]);
      if (r[2] === "locked") { g.beginPath(); g.arc(px, py, 3, 0, 2 * Math.PI); g.fill(); }
      else { g.beginPath(); g.moveTo(px - 3, py - 3); g.lineTo(px + 3, py + 3);
             g.moveTo(px + 3, py - 3); g.lineTo(px - 3, py + 3); g.stroke(); }
    });
  });
  // The key, in band order.
  g.textAlign = "left";
  bands.forEach((band, k) => {
    const ky = T + 12 + 15 * k;
    g.fillStyle = col[band]; g.beginPath(); g.arc(R + 14, ky - 4, 4, 0, 2 * Math.PI); g.fill();
    g.fillStyle = "#333"; g.fillText(band, R + 24, ky);
  });
  const ky = T + 12 + 15 * bands.length + 6;
  g.fillStyle = "#333"; g.fillText("o locked", R + 10, ky); g.fillText("x not locked", R + 10, ky + 14);
}

const SMITH_R = [0.2, 0.5, 1, 2, 5], SMITH_X = [0.2, 0.5, 1, 2, 5];

// A Smith chart's grid with its circles labelled: r where each circle meets the real
// axis, +jx / -jx where each arc meets the rim, Z normalised to 50 ohm.
function smithGrid(g, cx, cy, rad) {
  g.strokeStyle = "#bbb"; g.lineWidth = 1;
  g.beginPath(); g.arc(cx, cy, rad, 0, 2 * Math.PI); g.stroke();
  g.beginPath(); g.moveTo(cx - rad, cy); g.lineTo(cx + rad, cy); g.stroke();
  g.strokeStyle = "#ddd";
  SMITH_R.forEach((r) => { const rr = rad / (1 + r); g.beginPath(); g.arc(cx + rad - rr, cy, rr, 0, 2 * Math.PI); g.stroke(); });
  g.save();                      // constant-reactance arcs, inside the unit circle only
  g.beginPath(); g.arc(cx, cy, rad, 0, 2 * Math.PI); g.clip();
  SMITH_X.forEach((xv) => [1, -1].forEach((sgn) => {
    const rr = rad / xv; g.beginPath(); g.arc(cx + rad, cy - sgn * rr, rr, 0, 2 * Math.PI); g.stroke(); }));
  g.restore();
  g.fillStyle = "#666"; g.font = "9px sans-serif"; g.textAlign = "center";
  SMITH_R.forEach((r) => g.fillText(String(r), cx + rad * (r - 1) / (r + 1), cy + 11));
  SMITH_X.forEach((xv) => [1, -1].forEach((sgn) => {
    // gamma = (jx - 1) / (jx + 1) on the rim
    const d = 1 + xv * xv, gr = (xv * xv - 1) / d, gi = sgn * 2 * xv / d;
    g.fillText((sgn > 0 ? "+j" : "-j") + xv, cx + 1.09 * rad * gr, cy - 1.09 * rad * gi + 3); }));
}

function drawSmith(smith, order, target) {
  const c = $("smith"), g = c.getContext("2d");
  g.clearRect(0, 0, c.width, c.height);
  const cx = c.width / 2, rad = c.width / 2 - 24, cy = rad + 20;
  smithGrid(g, cx, cy, rad);
  // The target: every load inside this circle (|gamma| = (s - 1) / (s + 1)) is matched to it.
  const gt = (target - 1) / (target + 1);
  g.strokeStyle = "#d62728"; g.setLineDash([4, 3]); g.beginPath(); g.arc(cx, cy, gt * rad, 0, 2 * Math.PI); g.stroke();
  g.setLineDash([]);
  const col = bandColours(order), bands = order.filter((b) => smith[b]);
  bands.forEach((band) => {
    g.fillStyle = col[band];
    smith[band].forEach((p) => {
      const px = cx + p[0] * rad, py = cy - p[1] * rad;
      g.beginPath();
      if (p[2] === 1) { g.moveTo(px, py - 4); g.lineTo(px + 4, py + 3); g.lineTo(px - 4, py + 3); g.closePath(); }
      else g.arc(px, py, 3, 0, 2 * Math.PI);
      g.fill();
    });
  });
  // The key: bands in band order, the capacitor's side by the marker, the target circle.
  g.font = "11px sans-serif"; g.textAlign = "left";
  let kx = 8, ky = cy + rad + 30;
  bands.forEach((band) => {
    g.fillStyle = col[band]; g.fillRect(kx, ky - 8, 8, 8); g.fillStyle = "#333"; g.fillText(band, kx + 11, ky);
    kx += 18 + g.measureText(band).width + 8;
    if (kx > c.width - 50) { kx = 8; ky += 15; }
  });
  ky += 17;
  g.fillStyle = "#333";
  g.beginPath(); g.arc(12, ky - 4, 3, 0, 2 * Math.PI); g.fill(); g.fillText("C on tx side", 20, ky);
  g.beginPath(); g.moveTo(112, ky - 8); g.lineTo(116, ky - 1); g.lineTo(108, ky - 1); g.closePath(); g.fill();
  g.fillText("C on ant side", 120, ky);
  g.fillStyle = "#d62728"; g.fillText("- - SWR " + target, 210, ky);
  g.fillStyle = "#666"; g.fillText("the load each matched state matches, Z / 50 ohm", 8, ky + 15);
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
  const cx = c.width / 2, cy = c.height / 2, rad = c.width / 2 - 24;
  smithGrid(g, cx, cy, rad);
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
