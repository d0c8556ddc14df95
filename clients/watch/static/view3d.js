// A hand-written 3-D view of one arm on a 2-D canvas: the chain through the `state` message's origins
// (base frame, m), the tool's axes, the translational manipulability ellipsoid at the tool (radii: the
// singular values of J_v, axes: its principal directions) and the weakest direction (the axis of the
// smallest radius). Orthographic projection, z up; drag to turn, wheel to zoom, double-click to reset.
import { fit, fmt } from "/static/chart.js";

const DEFAULT_YAW = -0.7, DEFAULT_PITCH = 0.35;
// the largest ellipsoid radius seen is drawn as this fraction of the arm's reach (fixed per arm, so a
// shrinking ellipsoid is seen to shrink)
const ELLIPSOID_SHARE = 0.35;

export class ArmView3D {
  constructor(canvas, onScale) {
    this.canvas = canvas;
    this.onScale = onScale;
    this.yaw = DEFAULT_YAW; this.pitch = DEFAULT_PITCH; this.zoom = 1;
    this.state = null; this.nearest = null; this.reach = 0; this.rmax = 0; this.health = "clear";
    let drag = null;
    canvas.addEventListener("pointerdown", (e) => { drag = [e.clientX, e.clientY]; canvas.setPointerCapture(e.pointerId); canvas.style.cursor = "grabbing"; });
    canvas.addEventListener("pointermove", (e) => {
      if (!drag) return;
      this.yaw -= (e.clientX - drag[0]) * 0.01;
      this.pitch = Math.max(-1.5, Math.min(1.5, this.pitch + (e.clientY - drag[1]) * 0.01));
      drag = [e.clientX, e.clientY];
      this.draw();
    });
    const end = () => { drag = null; canvas.style.cursor = "grab"; };
    canvas.addEventListener("pointerup", end);
    canvas.addEventListener("pointercancel", end);
    canvas.addEventListener("wheel", (e) => { e.preventDefault(); this.zoom = Math.max(0.3, Math.min(5, this.zoom * (e.deltaY > 0 ? 0.9 : 1.1))); this.draw(); }, { passive: false });
    canvas.addEventListener("dblclick", () => { this.yaw = DEFAULT_YAW; this.pitch = DEFAULT_PITCH; this.zoom = 1; this.draw(); });
  }

  set(origins, ellipsoid, tool, health, nearest) {
    this.state = { origins, ellipsoid, tool };
    this.nearest = nearest || null;  // {segments, distance, link, other, kind, held}: the nearest keep-out pair's link(s)
    this.health = health || "clear";
    if (origins) for (const p of origins) this.reach = Math.max(this.reach, Math.hypot(p[0], p[1], p[2]));
    if (ellipsoid && ellipsoid.radii) for (const r of ellipsoid.radii) if (r !== null) this.rmax = Math.max(this.rmax, r);
    if (this.onScale && this.rmax > 0 && this.reach > 0) this.onScale(`1 m/s per rad/s drawn as ${fmt(ELLIPSOID_SHARE * this.reach / this.rmax)} m`);
  }

  project(p) {
    // world (x, y, z up) -> turn about z by yaw, tilt about the screen's x by pitch
    const cy = Math.cos(this.yaw), sy = Math.sin(this.yaw), cp = Math.cos(this.pitch), sp = Math.sin(this.pitch);
    const x1 = cy * p[0] - sy * p[1], y1 = sy * p[0] + cy * p[1];
    const sx = x1, up = cp * p[2] - sp * y1, depth = sp * p[2] + cp * y1;
    return [this.cx + sx * this.k, this.cy - up * this.k, depth];
  }

  line(ctx, a, b) { const p = this.project(a), q = this.project(b); ctx.beginPath(); ctx.moveTo(p[0], p[1]); ctx.lineTo(q[0], q[1]); ctx.stroke(); }

  draw() {
    const canvas = this.canvas, ctx = canvas.getContext("2d");
    const dpr = fit(canvas) * Math.max(1, canvas.clientWidth / 360);  // lines and type grow with the view
    const W = canvas.width, H = canvas.height;
    ctx.clearRect(0, 0, W, H);
    canvas.dataset.yaw = this.yaw.toFixed(3); canvas.dataset.pitch = this.pitch.toFixed(3);
    const s = this.state;
    ctx.font = `${12 * dpr}px system-ui, sans-serif`;
    if (!s || !s.origins || s.origins.some((p) => !p || p.some((v) => v === null))) {
      ctx.fillStyle = "#93a4b5"; ctx.fillText("no joint state yet", 10 * dpr, 20 * dpr);
      canvas.dataset.drawn = "none"; canvas.dataset.nearest = ""; return;
    }
    canvas.dataset.drawn = s.ellipsoid ? "arm+ellipsoid" : "arm";
    const reach = Math.max(this.reach, 0.1);
    this.k = Math.min(W, H) * 0.42 / reach * this.zoom;
    this.cx = W / 2; this.cy = H / 2;
    const mid = this.project([0, 0, 0.35 * reach]);
    this.cy += H / 2 - mid[1];  // the arm's middle height at the canvas centre
    // floor grid, 0.1 m, out to the reach
    ctx.strokeStyle = "#223140"; ctx.lineWidth = 1 * dpr;
    const g = Math.ceil(reach * 10) / 10;
    for (let v = -g; v <= g + 1e-9; v += 0.1) { this.line(ctx, [v, -g, 0], [v, g, 0]); this.line(ctx, [-g, v, 0], [g, v, 0]); }
    // base axes
    const al = 0.25 * reach;
    for (const [d, c, n] of [[[al, 0, 0], "#d9675f", "x"], [[0, al, 0], "#6fbf73", "y"], [[0, 0, al], "#6aa7e8", "z"]]) {
      ctx.strokeStyle = c; ctx.lineWidth = 1.5 * dpr; this.line(ctx, [0, 0, 0], d);
      const q = this.project(d); ctx.fillStyle = c; ctx.fillText(n, q[0] + 3 * dpr, q[1]);
    }
    // links and joints
    ctx.strokeStyle = "#dfe7ee"; ctx.lineWidth = 5 * dpr; ctx.lineCap = "round";
    const o = s.origins;
    for (let i = 0; i + 1 < o.length; i++) this.line(ctx, o[i], o[i + 1]);
    for (let i = 1; i < o.length - 1; i++) {
      const p = this.project(o[i]);
      ctx.fillStyle = "#17202a"; ctx.strokeStyle = "#dfe7ee"; ctx.lineWidth = 2 * dpr;
      ctx.beginPath(); ctx.arc(p[0], p[1], 5 * dpr, 0, 2 * Math.PI); ctx.fill(); ctx.stroke();
    }
    const tip = o[o.length - 1];
    // tool axes
    if (s.tool && s.tool.rotation && s.tool.rotation.every((v) => v !== null)) {
      const R = s.tool.rotation, tl = 0.12 * reach;
      [["#d9675f", 0], ["#6fbf73", 1], ["#6aa7e8", 2]].forEach(([c, j]) => {
        ctx.strokeStyle = c; ctx.lineWidth = 2 * dpr;
        this.line(ctx, tip, [tip[0] + tl * R[j], tip[1] + tl * R[3 + j], tip[2] + tl * R[6 + j]]);
      });
    }
    // ellipsoid and weakest direction
    const e = s.ellipsoid;
    if (e && e.radii && e.axes && e.radii.every((v) => v !== null) && e.axes.every((v) => v !== null) && this.rmax > 0) {
      const A = e.axes, kk = ELLIPSOID_SHARE * reach / this.rmax, r = e.radii.map((v) => v * kk);
      const at = (u) => [0, 1, 2].map((i) => tip[i] + A[3 * i] * r[0] * u[0] + A[3 * i + 1] * r[1] * u[1] + A[3 * i + 2] * r[2] * u[2]);
      const colour = { clear: "#35b89a", narrow: "#e9a23b", pinched: "#ef5a6f" }[this.health] || "#93a4b5";
      ctx.strokeStyle = colour; ctx.lineWidth = 1.2 * dpr; ctx.lineCap = "butt";
      const ring = (f) => { ctx.beginPath(); for (let k = 0; k <= 48; k++) { const a = 2 * Math.PI * k / 48, p = this.project(at(f(a))); if (k) ctx.lineTo(p[0], p[1]); else ctx.moveTo(p[0], p[1]); } ctx.stroke(); };
      ring((a) => [Math.cos(a), Math.sin(a), 0]);
      ring((a) => [Math.cos(a), 0, Math.sin(a)]);
      ring((a) => [0, Math.cos(a), Math.sin(a)]);
      ctx.globalAlpha = 0.45;
      for (const h of [-0.6, 0.6]) ring((a) => [Math.cos(a) * Math.sqrt(1 - h * h), Math.sin(a) * Math.sqrt(1 - h * h), h]);
      ctx.globalAlpha = 1;
      let w = 0; for (let i = 1; i < 3; i++) if (e.radii[i] < e.radii[w]) w = i;
      const dir = [A[w], A[3 + w], A[6 + w]], len = 0.3 * reach;
      const a = [tip[0] - dir[0] * len, tip[1] - dir[1] * len, tip[2] - dir[2] * len];
      const b = [tip[0] + dir[0] * len, tip[1] + dir[1] * len, tip[2] + dir[2] * len];
      ctx.strokeStyle = "#ef5a6f"; ctx.lineWidth = 3 * dpr; ctx.setLineDash([6 * dpr, 4 * dpr]);
      this.line(ctx, a, b); ctx.setLineDash([]);
      for (const end of [a, b]) { const p = this.project(end); ctx.fillStyle = "#ef5a6f"; ctx.beginPath(); ctx.arc(p[0], p[1], 4 * dpr, 0, 2 * Math.PI); ctx.fill(); }
      const pb = this.project(b), label = `weakest ${fmt(e.radii[w])} m/s per rad/s`;
      const tw = ctx.measureText(label).width;
      ctx.fillText(label, Math.max(4 * dpr, Math.min(pb[0] + 5 * dpr, W - tw - 4 * dpr)), Math.max(14 * dpr, Math.min(pb[1], H - 6 * dpr)));
    }
    this.drawNearest(ctx, o, dpr);
  }

  // The link(s) of the nearest keep-out pair, drawn last (on top): a wide band along the link's segment
  // of the chain and a ring at its middle (a link can be a few mm of the chain), in the narrow colour
  // (the weakest direction has the pinched one): the ring dashed while the pair is only the nearest,
  // solid and the label starting with HELD while its damper holds the scale; a label in the
  // top left corner with a leader to the ring. The closest points are not on the wire: only the link.
  drawNearest(ctx, o, dpr) {
    const nk = this.nearest, canvas = this.canvas;
    canvas.dataset.nearest = nk ? nk.segments.join(",") : "";
    if (!nk) return;
    const colour = "#e9a23b";
    ctx.save();
    ctx.strokeStyle = colour; ctx.lineCap = "round"; ctx.globalAlpha = 0.8; ctx.lineWidth = 11 * dpr;
    for (const k of nk.segments) this.line(ctx, o[k], o[k + 1]);
    ctx.globalAlpha = 1; ctx.lineWidth = 2.5 * dpr; ctx.setLineDash(nk.held ? [] : [5 * dpr, 4 * dpr]);
    const rings = nk.segments.map((k) => this.project(o[k].map((v, j) => (v + o[k + 1][j]) / 2)));
    for (const m of rings) { ctx.beginPath(); ctx.arc(m[0], m[1], 14 * dpr, 0, 2 * Math.PI); ctx.stroke(); }
    const label = `${nk.held ? "HELD, " : ""}nearest keep-out: ${nk.distance < 0 ? "overlap " : ""}${Math.abs(nk.distance).toFixed(3)} m, ${nk.link} to ${nk.other}`;
    ctx.font = `600 ${12 * dpr}px system-ui, sans-serif`;
    const tw = Math.min(ctx.measureText(label).width, this.canvas.width - 16 * dpr), x = 8 * dpr, y = 20 * dpr;
    ctx.setLineDash([2 * dpr, 3 * dpr]); ctx.lineWidth = 1.5 * dpr;
    const m = rings[0], lx = Math.max(x, Math.min(m[0], x + tw)), ly = y + 5 * dpr;
    const dx = m[0] - lx, dy = m[1] - ly, len = Math.hypot(dx, dy);
    if (len > 16 * dpr) { ctx.beginPath(); ctx.moveTo(lx, ly); ctx.lineTo(m[0] - dx / len * 14 * dpr, m[1] - dy / len * 14 * dpr); ctx.stroke(); }
    ctx.setLineDash([]);
    ctx.fillStyle = "rgba(15, 20, 25, 0.9)"; ctx.fillRect(x - 4 * dpr, y - 14 * dpr, tw + 8 * dpr, 19 * dpr);
    ctx.strokeStyle = colour; ctx.lineWidth = (nk.held ? 2.5 : 1) * dpr; ctx.strokeRect(x - 4 * dpr, y - 14 * dpr, tw + 8 * dpr, 19 * dpr);
    ctx.fillStyle = "#f0b860"; ctx.fillText(label, x, y, tw);
    ctx.restore();
  }
}
