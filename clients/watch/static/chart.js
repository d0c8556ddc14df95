// Time-series charts on a 2-D canvas, drawn by hand (no library). x: seconds before now; y: linear or log.
// Zones (y ranges) are shaded with a stripe pattern of their own angle, so they read without colour.

function fit(canvas) {
  // the drawing buffer follows the canvas's size on the page (CSS pixels times the device ratio)
  const dpr = window.devicePixelRatio || 1;
  const w = Math.max(50, Math.round(canvas.clientWidth * dpr));
  const h = Math.max(30, Math.round(canvas.clientHeight * dpr));
  if (canvas.width !== w || canvas.height !== h) { canvas.width = w; canvas.height = h; }
  return dpr;
}

export { fit, fmt };

function stripes(ctx, color, angle) {
  const p = document.createElement("canvas");
  p.width = p.height = 10;
  const g = p.getContext("2d");
  g.strokeStyle = color; g.lineWidth = 2;
  g.beginPath();
  if (angle > 0) { g.moveTo(0, 10); g.lineTo(10, 0); } else { g.moveTo(0, 0); g.lineTo(10, 10); }
  g.stroke();
  return ctx.createPattern(p, "repeat");
}

function fmt(v) {
  if (v === null || v === undefined || !isFinite(v)) return "n/a";
  const a = Math.abs(v);
  if (a !== 0 && (a < 1e-3 || a >= 1e4)) return v.toExponential(1);
  return Number(v.toPrecision(3)).toString();
}

// opts: {window_s, title, unit, log, series: [{label, color, dash, points: [[x_s, v], ...]}],
//        thresholds: [{y, label, dash}], zones: [{from, to, color, angle, label}], yMin, yMax}
export function drawChart(canvas, opts) {
  const dpr = fit(canvas);
  const ctx = canvas.getContext("2d");
  const W = canvas.width, H = canvas.height, f = dpr * Math.max(1, canvas.clientWidth / 520);
  ctx.clearRect(0, 0, W, H);
  const L = 52 * f, R = 8 * f, T = 16 * f, B = 16 * f;
  const pw = W - L - R, ph = H - T - B;
  let lo = Infinity, hi = -Infinity;
  for (const s of opts.series) for (const [, v] of s.points) if (v !== null && isFinite(v) && (!opts.log || v > 0)) { lo = Math.min(lo, v); hi = Math.max(hi, v); }
  for (const t of opts.thresholds || []) { lo = Math.min(lo, t.y); hi = Math.max(hi, t.y * 1.6); }
  if (opts.yMin !== undefined) lo = opts.yMin;
  if (opts.yMax !== undefined) hi = opts.yMax;
  if (!isFinite(lo) || !isFinite(hi)) { lo = opts.log ? 1e-3 : 0; hi = 1; }
  if (opts.log) { lo = Math.max(lo, 1e-9); if (hi <= lo) hi = lo * 10; }
  else if (hi - lo < 1e-12) { const c = hi, d = Math.abs(c) > 0 ? Math.abs(c) * 0.1 : 1; lo = c - d; hi = c + d; }
  const ty = opts.log ? (v) => Math.log10(v) : (v) => v;
  const y0 = ty(lo), y1 = ty(hi);
  const Y = (v) => T + ph - (ty(Math.max(v, opts.log ? lo : -Infinity)) - y0) / (y1 - y0) * ph;
  const X = (x) => L + (x + opts.window_s) / opts.window_s * pw;
  ctx.font = `${11 * f}px system-ui, sans-serif`;
  // zones
  for (const z of opts.zones || []) {
    const a = Y(Math.min(Math.max(z.to, lo), hi)), b = Y(Math.max(Math.min(z.from, hi), lo));
    if (b <= a) continue;
    ctx.fillStyle = stripes(ctx, z.color, z.angle);
    ctx.globalAlpha = 0.35; ctx.fillRect(L, a, pw, b - a); ctx.globalAlpha = 1;
  }
  // frame and ticks
  ctx.strokeStyle = "#2c3a48"; ctx.lineWidth = 1 * dpr; ctx.strokeRect(L, T, pw, ph);
  ctx.fillStyle = "#93a4b5"; ctx.textAlign = "right"; ctx.textBaseline = "middle";
  ctx.fillText(fmt(hi), L - 4 * f, T + 4 * f); ctx.fillText(fmt(lo), L - 4 * f, T + ph - 2 * f);
  ctx.textAlign = "center"; ctx.textBaseline = "top";
  for (let s = 0; s <= opts.window_s; s += opts.window_s / 3) ctx.fillText(s === 0 ? "now" : `-${Math.round(s)} s`, X(-s), T + ph + 2 * f);
  ctx.textAlign = "left"; ctx.textBaseline = "bottom"; ctx.fillStyle = "#e6edf3";
  ctx.fillText(opts.title + (opts.unit ? ` (${opts.unit})` : "") + (opts.log ? ", log scale" : ""), L, T - 2 * f);
  // thresholds
  (opts.thresholds || []).forEach((t, i) => {
    if (t.y < lo || t.y > hi) return;
    ctx.setLineDash(t.dash.map((d) => d * f)); ctx.strokeStyle = "#e6edf3"; ctx.lineWidth = 1.2 * dpr;
    ctx.beginPath(); ctx.moveTo(L, Y(t.y)); ctx.lineTo(L + pw, Y(t.y)); ctx.stroke();
    ctx.setLineDash([]); ctx.fillStyle = "#e6edf3"; ctx.textBaseline = "bottom";
    ctx.textAlign = i % 2 ? "left" : "right";  // alternate sides: close thresholds keep readable labels
    ctx.fillText(`${t.label} ${fmt(t.y)}`, i % 2 ? L + 3 * f : L + pw - 3 * f, Y(t.y) - 1);
  });
  // series
  let lx = L + pw - 3 * f;
  ctx.textAlign = "right"; ctx.textBaseline = "top";
  for (const s of opts.series.slice().reverse()) {
    ctx.strokeStyle = s.color; ctx.lineWidth = 1.8 * dpr; ctx.setLineDash((s.dash || []).map((d) => d * f));
    ctx.beginPath();
    let pen = false;
    for (const [x, v] of s.points) {
      if (v === null || !isFinite(v) || x < -opts.window_s) { pen = false; continue; }
      if (pen) ctx.lineTo(X(x), Y(v)); else { ctx.moveTo(X(x), Y(v)); pen = true; }
    }
    ctx.stroke(); ctx.setLineDash([]);
    ctx.fillStyle = s.color;
    const w = ctx.measureText(s.label).width;
    ctx.fillText(s.label, lx, T + 2 * f);  // the key inside the plot, top right
    lx -= w + 12 * f;
  }
}
