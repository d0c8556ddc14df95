"""A recording as a plain SVG plot: manipulability, smallest singular value, scale and speed cap, damping and
the joint rates against time, over a colour band of the mode (`twistrate record --summary X --svg OUT`)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np


def plot_svg(header: dict[str, Any], rec: np.ndarray, out: str | Path, width: int = 900) -> Path:
    """Write a plain SVG of a recording: manipulability, smallest singular value, scale and damping,
    per-joint rates, and the mode as a colour band, against time. Returns the path."""
    panels: list[tuple[str, list[tuple[str, np.ndarray]]]] = [
        ("manipulability", [("manipulability", rec["manipulability"].astype(float))]),
        ("smallest singular value (m)", [("sigma_min", rec["sigma_min"].astype(float))]),
        ("scale, speed cap", [("scale", rec["scale"].astype(float)), ("cap", rec["cap"].astype(float))]),
        ("damping (m)", [("damping", rec["damping"].astype(float))]),
        ("joint rates (rad/s or m/s)", [(j, rec["qd"][:, i]) for i, j in enumerate(header["joints"])]),
    ]
    colours = ["#1f5fa8", "#c0392b", "#2e8b57", "#8e44ad", "#d35400", "#16a085", "#7f8c8d", "#b7950b"]
    mode_colours = {"disabled": "#dddddd", "running": "#d5f5e3", "stopping": "#fdebd0", "holding": "#fcf3cf",
                    "fault": "#f5b7b1", "shutdown": "#d6dbdf"}
    ph, gap, left, top = 130, 30, 70, 30
    height = top + len(panels) * (ph + gap) + 20
    t = rec["t"] if len(rec) else np.zeros(1)
    t0, t1 = float(t[0]), float(t[-1]) if float(t[-1]) > float(t[0]) else float(t[0]) + 1.0
    pw = width - left - 20

    def x(tv: np.ndarray) -> np.ndarray:
        return left + (tv - t0) / (t1 - t0) * pw

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
             f'font-family="sans-serif" font-size="11">',
             f'<text x="{left}" y="16" font-size="13">{header["arm"]}: {len(rec)} ticks, '
             f'{t1 - t0:.2f} s ({header["source"]})</text>']
    modes = header["modes"]
    for k, (title, series) in enumerate(panels):
        y0 = top + k * (ph + gap)
        if len(rec):
            codes = rec["mode"]
            starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
            ends = np.r_[starts[1:], len(codes)]
            for a, b in zip(starts, ends, strict=True):
                xa, xb = float(x(t[a])), float(x(t[b - 1]))
                colour = mode_colours.get(modes[codes[a]], "#eeeeee")
                parts.append(f'<rect x="{xa:.1f}" y="{y0}" width="{max(xb - xa, 0.5):.1f}" height="{ph}" '
                             f'fill="{colour}"/>')
        parts.append(f'<rect x="{left}" y="{y0}" width="{pw}" height="{ph}" fill="none" stroke="#555"/>')
        values = np.concatenate([v[np.isfinite(v)] for _, v in series] + [np.zeros(0)])
        lo, hi = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
        if hi <= lo:
            hi = lo + 1.0
        parts.append(f'<text x="{left}" y="{y0 - 4}">{title}</text>')
        parts.append(f'<text x="{left - 4}" y="{y0 + 10}" text-anchor="end">{hi:.3g}</text>')
        parts.append(f'<text x="{left - 4}" y="{y0 + ph}" text-anchor="end">{lo:.3g}</text>')
        step = max(1, len(rec) // pw)
        for i, (name, v) in enumerate(series):
            vv = v[::step]
            tt = t[::step]
            ok = np.isfinite(vv)
            if not ok.any():
                continue
            ys = y0 + ph - (vv[ok] - lo) / (hi - lo) * ph
            pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(x(tt[ok]), ys, strict=True))
            colour = colours[i % len(colours)]
            parts.append(f'<polyline fill="none" stroke="{colour}" stroke-width="1" points="{pts}"/>')
            parts.append(f'<text x="{left + pw - 4}" y="{y0 + 12 + 12 * i}" text-anchor="end" '
                         f'fill="{colour}">{name}</text>')
    yb = top + len(panels) * (ph + gap) - 8
    parts.append(f'<text x="{left}" y="{yb}">time {t0:.2f} .. {t1:.2f} s; background: mode ('
                 + ", ".join(f'<tspan fill="#555">{m}</tspan>' for m in mode_colours) + ")</text>")
    parts.append("</svg>")
    out = Path(out)
    out.write_text("\n".join(parts), encoding="utf-8")
    return out
