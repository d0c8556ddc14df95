// The dashboard page: one WebSocket (frames in docs/dashboard.md), one card per arm, redrawn per frame.
// Read-only: the page never sends anything that could move an arm (it sends nothing at all).
import { drawChart, fmt } from "/static/chart.js";
import { ArmView3D } from "/static/view3d.js";

const cards = new Map();  // name -> {el, hist: {index: row}, view3d, last}
const WORDS = { clear: "clear", narrow: "narrow", pinched: "pinched" };
let serverTime = 0, receivedAt = 0, frames = 0;

function q(el, field) { return el.querySelector(`[data-field="${field}"]`); }
function text(el, field, v) { const n = q(el, field); if (n && n.textContent !== v) n.textContent = v; }
function unit(v, u, spec) { return v === null || v === undefined ? "n/a" : `${spec ? v.toFixed(spec) : fmt(v)} ${u}`.trim(); }
function wallOf(t) { return new Date(Date.now() - (serverTime - t) * 1000 - (performance.now() - receivedAt)); }
function hhmmss(d) { return d.toTimeString().slice(0, 8); }
// foresight (the health message's): a time ahead in words; under SOON_S it is marked (a frame, not colour alone)
const SOON_S = 2.0;
function secs(v) { return v === null || v === undefined ? "never" : v <= 0 ? "now" : v < 9.95 ? `${v.toFixed(1)} s` : v < 999.5 ? `${v.toFixed(0)} s` : "> 999 s"; }
function ahead(el, a) {
  const L = a.latest || {};
  const tp = L.time_to_pinched_s, fj = L.first_limit_joint, tf = L.time_to_first_limit_s;
  const p = q(el, "to_pinched"), f = q(el, "first_limit");
  if (L.tick === undefined) { text(el, "to_pinched", "n/a"); text(el, "first_limit", "n/a"); return; }  // no health yet
  text(el, "to_pinched", tp === null || tp === undefined ? "not ahead" : tp <= 0 ? "now (pinched)" : `in ${secs(tp)}`);
  p.dataset.soon = String(tp !== null && tp !== undefined && tp < SOON_S);
  // the joint and its time come together (docs/protocol.md 7.4); a joint without a time is not ahead
  const name = fj === null || fj === undefined || tf === null || tf === undefined ? null
    : ((a.joints[fj] || {}).name || `joint ${fj + 1}`);
  text(el, "first_limit", name === null ? "none ahead" : `${name} in ${secs(tf)}`);
  f.dataset.soon = String(name !== null && tf !== null && tf < SOON_S);
}

// keep-out (the health message's `keepout` and `limiting`, docs/protocol.md 7.4): the nearest pair and
// what held the scale back. The state is on the box as data-ko / data-by, told by words and marks too.
function jointName(a, i) { return i === null || i === undefined ? "a joint" : ((a.joints[i] || {}).name || `joint ${i + 1}`); }
function pairText(link, other) { return `${link ?? "?"} to ${other ?? "?"}`; }
function keepout(el, a) {
  const L = a.latest || {}, box = q(el, "keepout"), ko = L.keepout, lim = L.limiting;
  if (L.tick === undefined) {  // no health message yet
    box.dataset.ko = "unknown"; box.dataset.by = "unknown";
    text(el, "ko_nearest", "n/a"); text(el, "ko_pair", "n/a"); text(el, "limiting", "n/a");
    return;
  }
  if (!ko) {
    box.dataset.ko = "none";
    text(el, "ko_nearest", "none configured"); text(el, "ko_pair", "no keep-out zones on this service");
  } else {
    const d = ko.nearest_m;
    box.dataset.ko = d === null || d === undefined ? "unknown" : d < 0 ? "overlap" : "clear";
    text(el, "ko_nearest", d === null || d === undefined ? "n/a" : d < 0 ? `overlap ${(-d).toFixed(3)} m` : `${d.toFixed(3)} m`);
    text(el, "ko_pair", `${pairText(ko.link, ko.other)} ${ko.other_kind === "link" ? "(its own link)" : "(zone)"}`);
  }
  const by = lim ? lim.by : null;
  box.dataset.by = by || "unknown";
  if (by === "keepout") {
    const same = ko && ko.link === lim.link && ko.other === lim.other;
    text(el, "limiting", `keep-out damper, ${pairText(lim.link, lim.other)}${same ? " (the nearest pair)" : ""}`);
  } else if (by === "joint") {
    text(el, "limiting", `joint ${jointName(a, lim.joint)}, its ${lim.bound || "?"} bound`);
  } else if (by === "none") {
    text(el, "limiting", a.mode === "running" ? "nothing: the twist is followed in full" : "nothing (not running)");
  } else text(el, "limiting", "n/a");
}

// The link of the nearest keep-out pair as a segment of the `origins` polyline (base, joint origins in
// chain order, tool): the link joint i moves carries joint i's origin and the next one (or the tool's),
// points i + 1 and i + 2; `root` carries the base and joint 0's origin. The closest points themselves
// are not on the wire, so only the link is marked.
function nearestLink(a) {
  const ko = (a.latest || {}).keepout, lim = (a.latest || {}).limiting;
  if (!ko || !a.origins || ko.nearest_m === null || ko.nearest_m === undefined) return null;
  const seg = (name) => { const i = name === "root" ? -1 : a.joints.findIndex((j) => j.name === name); return name === "root" || i >= 0 ? i + 1 : null; };
  const segments = [seg(ko.link), ko.other_kind === "link" ? seg(ko.other) : null].filter((k) => k !== null && k + 1 < a.origins.length);
  if (!segments.length) return null;
  const held = !!lim && lim.by === "keepout" && lim.link === ko.link && lim.other === ko.other;
  return { segments, distance: ko.nearest_m, link: ko.link, other: ko.other, kind: ko.other_kind, held };
}

function card(name) {
  let c = cards.get(name);
  if (c) return c;
  const el = document.getElementById("arm-card").content.firstElementChild.cloneNode(true);
  el.dataset.arm = name;
  el.querySelector(".arm-name").textContent = name;
  document.getElementById("empty")?.remove();
  document.getElementById("arms").appendChild(el);
  c = { el, hist: new Map(), view3d: null, pending: null };
  c.view3d = new ArmView3D(el.querySelector(".c3d"), (s) => text(el, "ell-scale", s));
  cards.set(name, c);
  return c;
}

function meter(frac, centred, label) {
  const m = document.createElement("div");
  m.className = "meter";
  if (frac === null || frac === undefined || !isFinite(frac)) { m.innerHTML = '<span class="val">n/a</span>'; return m; }
  const f = document.createElement("span"); f.className = "fill";
  const k = document.createElement("span"); k.className = "mark";
  if (centred) {
    const a = Math.min(Math.abs(frac), 1) * 50;
    f.style.left = frac >= 0 ? "50%" : `${50 - a}%`; f.style.width = `${a}%`;
    k.style.left = `calc(${50 + Math.max(-1, Math.min(1, frac)) * 50}% - 0.12em)`;
    if (Math.abs(frac) >= 0.98) m.classList.add("at"); else if (Math.abs(frac) >= 0.8) m.classList.add("near");
  } else {
    const p = Math.max(0, Math.min(1, frac));
    k.style.left = `calc(${p * 100}% - 0.12em)`;
    const margin = Math.min(frac, 1 - frac);
    if (margin <= 0.02) m.classList.add("at"); else if (margin <= 0.1) m.classList.add("near");
  }
  const v = document.createElement("span"); v.className = "val"; v.textContent = label;
  m.append(f, k, v);
  return m;
}

function joints(el, a) {
  const body = el.querySelector(".jt tbody");
  const n = (a.position || a.joints || []).length;
  while (body.rows.length > n) body.deleteRow(-1);
  while (body.rows.length < n) { const r = body.insertRow(); for (let k = 0; k < 4; k++) r.insertCell(); r.cells[3].className = "tlim"; }
  const L = a.latest || {}, tl = L.time_to_limit_s || [];
  for (let i = 0; i < n; i++) {
    const j = a.joints[i] || {}, r = body.rows[i];
    const pos = a.position ? a.position[i] : null, rate = a.rate ? a.rate[i] : null;
    const lo = j.position_min, hi = j.position_max, vmax = j.velocity_max;
    const frac = pos !== null && lo !== null && hi !== null && lo !== undefined && hi > lo ? (pos - lo) / (hi - lo) : null;
    const rfrac = rate !== null && vmax ? rate / vmax : null;
    r.cells[0].textContent = j.name || `joint ${i + 1}`;
    r.cells[1].replaceChildren(meter(frac, false, pos === null ? "n/a" : pos.toFixed(3)));
    r.cells[2].replaceChildren(meter(rfrac, true, rate === null ? "n/a" : rate.toFixed(3)));
    const t = i < tl.length ? tl[i] : null;
    r.cells[3].textContent = secs(t);
    r.cells[3].dataset.soon = String(t !== null && t < SOON_S);
    r.cells[3].dataset.first = String(L.first_limit_joint === i);
    r.dataset.joint = j.name || String(i);
  }
}

function events(el, a) {
  const ol = el.querySelector("ol.ev");
  const key = a.events.length ? `${a.events.length}:${a.events[a.events.length - 1].t}` : "0";
  if (ol.dataset.key === key) return;
  ol.dataset.key = key;
  ol.replaceChildren(...a.events.slice().reverse().map((e) => {
    const li = document.createElement("li");
    li.dataset.event = e.event;
    li.innerHTML = '<span class="when"></span><span class="name"></span><span class="detail"></span>';
    li.children[0].textContent = hhmmss(wallOf(e.t));
    li.children[1].textContent = e.event;
    li.children[2].textContent = e.detail;
    return li;
  }));
  const ch = el.querySelector("ol.changes");
  ch.replaceChildren(...a.changes.slice(-8).reverse().map((c) => {
    const li = document.createElement("li");
    li.textContent = `${hhmmss(wallOf(c.t))} ${c.what}: ${c.from} \u2192 ${c.to}`;
    return li;
  }));
}

function charts(el, c, a) {
  const cols = a.series, rows = [...c.hist.values()];
  const col = (name) => 2 + cols.indexOf(name);
  const pts = (name) => rows.map((r) => [r[1] - serverTime, r[col(name)]]);
  const th = a.thresholds;
  const zones = th ? [
    { from: -1, to: th.pinched_below_m, color: "#ef5a6f", angle: 1 },
    { from: th.pinched_below_m, to: th.narrow_below_m, color: "#e9a23b", angle: -1 }] : [];
  const thresholds = th ? [{ y: th.narrow_below_m, label: "narrow below", dash: [6, 4] },
                           { y: th.pinched_below_m, label: "pinched below", dash: [2, 3] }] : [];
  drawChart(el.querySelector(".chart-sigma"), { window_s: a.window_s, title: "smallest singular value", unit: "m",
    series: [{ label: "smallest", color: "#7cc4ff", points: pts("sigma_min") }], thresholds, zones, yMin: 0 });
  drawChart(el.querySelector(".chart-manip"), { window_s: a.window_s, title: "manipulability", log: true,
    series: [{ label: "whole", color: "#e6edf3", points: pts("manipulability") },
             { label: "linear", color: "#b48ef0", points: pts("manipulability_linear"), dash: [5, 3] },
             { label: "angular", color: "#7fd1c7", points: pts("manipulability_angular"), dash: [1, 3] }] });
  drawChart(el.querySelector(".chart-scale"), { window_s: a.window_s, title: "scale (0 to 1) and damping", unit: "",
    series: [{ label: "scale", color: "#35b89a", points: pts("scale") },
             { label: "damping m", color: "#e9a23b", points: pts("damping"), dash: [5, 3] }], yMin: 0 });
}

function apply(a, full) {
  const c = card(a.name), el = c.el, L = a.latest || {};
  if (full) c.hist.clear();
  for (const r of a.history) c.hist.set(r[0], r);
  const oldest = serverTime - a.window_s;
  for (const [k, r] of c.hist) { if (r[1] < oldest) c.hist.delete(k); else break; }
  el.dataset.gone = String(a.gone);
  el.dataset.connected = String(a.connected);
  el.dataset.health = a.health || "";
  el.dataset.mode = a.mode || "";
  el.querySelector(".arm-model").textContent = a.arm ? `(${a.arm})` : "";
  const hb = q(el, "health");
  hb.dataset.state = a.health || "";
  hb.querySelector(".word").textContent = a.health ? WORDS[a.health] || a.health : "unknown";
  const mb = q(el, "mode"); mb.dataset.mode = a.mode || ""; mb.textContent = a.mode || "unknown";
  text(el, "age", a.age_s === null ? "?" : a.age_s.toFixed(1));
  text(el, "sigma_min", unit(L.sigma_min, "m"));
  text(el, "manipulability", unit(L.manipulability, ""));
  text(el, "manip_la", `${fmt(L.manipulability_linear)} / ${fmt(L.manipulability_angular)}`);
  text(el, "scale", unit(L.scale, "", 2));
  text(el, "damping", unit(L.damping, "m"));
  text(el, "tick_hz", a.tick_hz ? `${a.tick_hz.toFixed(0)} Hz` : "n/a");
  text(el, "overruns", String(a.overruns));
  text(el, "late", a.lateness_s && a.lateness_s.p99 !== null && a.lateness_s.p99 !== undefined ? `${(a.lateness_s.p99 * 1e6).toFixed(0)} \u00b5s` : "n/a");
  text(el, "holder", a.holder || "nobody");
  text(el, "singular_values", (L.singular_values || []).map(fmt).join("  ") || "n/a");
  const rej = Object.entries(a.rejected).filter(([, v]) => v > 0).sort((x, y) => y[1] - x[1]);
  text(el, "refused", rej.length ? `${a.rejected_total} in all: ` + rej.map(([k, v]) => `${k} ${v}`).join(", ") : "none");
  ahead(el, a);
  keepout(el, a);
  joints(el, a);
  events(el, a);
  c.view3d.set(a.origins, a.ellipsoid, a.tool, a.health, nearestLink(a));
  q(el, "ko-key").hidden = c.view3d.nearest === null;
  c.pending = a;  // the canvases are redrawn once per displayed frame, not once per message
  if (!drawScheduled) { drawScheduled = true; requestAnimationFrame(drawAll); }
}

let drawScheduled = false;
function drawAll() {
  drawScheduled = false;
  for (const c of cards.values()) {
    if (!c.pending) continue;
    charts(c.el, c, c.pending);
    c.view3d.draw();
    c.pending = null;
  }
}

function connect(delay) {
  const link = document.getElementById("link"), lt = document.getElementById("link-text");
  const ws = new WebSocket(`${location.protocol === "https:" ? "wss" : "ws"}://${location.host}/ws`);
  ws.onopen = () => { link.dataset.link = "live"; lt.textContent = "live"; delay = 500; };
  ws.onmessage = (m) => {
    const f = JSON.parse(m.data);
    if (f.schema !== "twistrate-dashboard/1") return;
    serverTime = f.server_time; receivedAt = performance.now(); frames += 1;
    document.body.dataset.frames = String(frames);
    for (const a of f.arms) apply(a, f.type === "full");
  };
  ws.onclose = () => {
    link.dataset.link = "lost"; lt.textContent = "connection to the dashboard lost; retrying";
    setTimeout(() => connect(Math.min(delay * 2, 5000)), delay);
  };
}

document.getElementById("size").addEventListener("click", () => document.body.classList.toggle("wall"));
if (new URLSearchParams(location.search).has("wall")) document.body.classList.add("wall");
connect(500);
