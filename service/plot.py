"""The figure of a recording (matplotlib): what the arm did, against its limits and thresholds, over time.

Panels, one shared time axis (s since the first record; the title gives the wall-clock start, UTC):

    0. the events in three rows: changes of mode, changes of health state, joints reaching a limit
    1. joint positions as a fraction of each joint's range (0 = lower limit, 1 = upper limit; the limits
       drawn at 0 and 1); raw positions with a note when the arm's limits are not known
    2. joint rates as a fraction of each joint's rate limit (+-1 drawn); raw rates when unknown
    3. tool linear speed |v|, desired (after the speed caps) against produced (J qd), m/s
    4. tool angular speed |w|, desired against produced, rad/s
    5. the task scale of the hard limits and the speed-cap factor, both in [0, 1]
    6. damping lambda, m
    7. manipulability (product of the task-weighted singular values)
    8. the smallest task-weighted singular value, m, with the health thresholds as lines

Every panel carries the health state as background bands (one hatch and one shade per state, so the
state is read without colour) and the changes of mode and of health state as vertical lines; a joint
reaching a limit (a limit bit turning on) is marked in the events strip. Series that never change are drawn
as they are, with their value written on the panel and a y range around that value (no offset
notation that would make a constant look like noise); fields a recording could not know (all NaN)
say "not recorded" instead of an empty axis.
"""

from __future__ import annotations

import datetime
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import matplotlib

matplotlib.use("Agg")  # no display: files only (must precede pyplot's import)

import matplotlib.pyplot as plt
import numpy as np
from matplotlib.figure import Figure

#: relative span below which a finite series counts as constant (common practice for float data)
CONSTANT_REL_TOL = 1e-6
#: absolute span below which a series counts as constant, in the series' units
CONSTANT_ABS_TOL = 1e-12
#: half-height of the y range drawn around a constant series, as a fraction of |value| (or 1 if 0)
CONSTANT_HALF_SPAN = 0.1
#: most points drawn per series (longer recordings are decimated by min/max per bucket)
MAX_POINTS = 4000
#: figure width, inches; height per panel, inches; dots per inch of the PNG
FIG_WIDTH_IN = 11.0
PANEL_HEIGHT_IN = 1.9
DPI = 100

#: health-state bands: (grey shade, hatch) per state position in the header's list
#: (clear, narrow, pinched)
_BAND_STYLE = (("#ffffff", ""), ("#e4e4e4", "//"), ("#b8b8b8", "xx"))
_LINE_COLOURS = ("#1b4f8a", "#b03a2e", "#1e7b4f", "#7d3c98", "#ca6f1e", "#117a75", "#5d6d7e", "#9a7d0a")
_EVENT_COLOUR = "#333333"
_EVENT_LINES = {"mode": "-", "health": "--"}
_EVENT_MARKERS = {"mode": "v", "health": "D", "limit": "|"}
#: height of the events strip against a panel
EVENT_STRIP_RATIO = 0.7
#: a label in the events strip closer to the previous one of its row than this fraction of the time
#: span is left out
EVENT_LABEL_GAP = 0.12

PANEL_TITLES = (
    "events",
    "joint positions within their range",
    "joint rates against their limits",
    "tool linear speed",
    "tool angular speed",
    "scale and speed cap",
    "damping",
    "manipulability",
    "smallest singular value",
)


@dataclass(frozen=True)
class JointLimits:
    """Per joint, joint order: position_min, position_max (rad or m, +-inf when unlimited), velocity_max
    (rad/s or m/s). Each (n,)."""

    position_min: np.ndarray
    position_max: np.ndarray
    velocity_max: np.ndarray

    @classmethod
    def of_arm(cls, arm: Any) -> JointLimits:
        """From a twistrate.solver.arm.Arm."""
        return cls(
            np.array([j.position_min for j in arm.joints], dtype=float),
            np.array([j.position_max for j in arm.joints], dtype=float),
            np.array([j.velocity_max for j in arm.joints], dtype=float),
        )


@dataclass(frozen=True)
class Thresholds:
    """Health thresholds on the smallest singular value, m: narrow below `narrow_below_m`, pinched below
    `pinched_below_m`."""

    narrow_below_m: float
    pinched_below_m: float


@dataclass(frozen=True)
class Event:
    """One event marked on the figure. t : s since the first record; kind : mode, health or limit."""

    t: float
    kind: str
    label: str


def find_events(header: dict[str, Any], rec: np.ndarray) -> list[Event]:
    """Changes of mode and of health state, and each limit bit turning on (joint, kind), in time order."""
    events: list[Event] = []
    if len(rec) == 0:
        return events
    t = rec["t"]
    for field, names, kind in (
        ("mode", header["modes"], "mode"),
        ("health", header["health_states"], "health"),
    ):
        codes = rec[field]
        for i in np.flatnonzero(codes[1:] != codes[:-1]) + 1:
            events.append(Event(float(t[i]), kind, f"{names[codes[i - 1]]} -> {names[codes[i]]}"))
    bits = rec["limits"]
    if len(rec) > 1:
        rising = bits[1:] & ~bits[:-1]
        joints = header["joints"]
        names = {1: "position", 2: "rate", 4: "acceleration"}
        for i, j in zip(*np.nonzero(rising), strict=True):
            b = int(rising[i, j])
            which = "+".join(v for k, v in names.items() if b & k)
            events.append(Event(float(t[i + 1]), "limit", f"{joints[j]} {which} limit"))
    events.sort(key=lambda e: e.t)
    return events


def _decimate(t: np.ndarray, v: np.ndarray, max_points: int = MAX_POINTS) -> tuple[np.ndarray, np.ndarray]:
    """At most ~max_points points keeping each bucket's min and max (extremes stay visible)."""
    if len(t) <= max_points:
        return t, v
    k = math.ceil(len(t) / (max_points / 2))
    m = len(t) // k * k
    tb = t[:m].reshape(-1, k)
    vb = v[:m].reshape(-1, k)
    with np.errstate(invalid="ignore"):
        lo = np.nanargmin(np.where(np.isnan(vb), np.inf, vb), axis=1)
        hi = np.nanargmax(np.where(np.isnan(vb), -np.inf, vb), axis=1)
    rows = np.arange(len(tb))
    first = np.minimum(lo, hi)
    second = np.maximum(lo, hi)
    tt = np.column_stack([tb[rows, first], tb[rows, second]]).ravel()
    vv = np.column_stack([vb[rows, first], vb[rows, second]]).ravel()
    return np.r_[tt, t[m:]], np.r_[vv, v[m:]]


def is_constant(values: np.ndarray) -> bool:
    """True when every finite value equals the first within CONSTANT_REL_TOL / CONSTANT_ABS_TOL."""
    v = values[np.isfinite(values)]
    if v.size == 0:
        return False
    span = float(v.max() - v.min())
    return span <= max(CONSTANT_ABS_TOL, CONSTANT_REL_TOL * float(np.abs(v).max()))


def _draw_series(
    ax: Any,
    t: np.ndarray,
    series: Sequence[tuple[str, np.ndarray, dict[str, Any]]],
    unit: str,
    fixed: tuple[float, float] | None = None,
) -> None:
    """Plot each (label, values, style); constants keep their value and a y range around it."""
    finite = [v[np.isfinite(v)] for _, v, _ in series]
    if not any(f.size for f in finite):
        ax.text(0.5, 0.5, "not recorded", transform=ax.transAxes, ha="center", va="center", color="#555")
        ax.set_yticks([])
        return
    constants = []
    for label, v, style in series:
        if not np.isfinite(v).any():
            continue
        tt, vv = _decimate(t, v)
        ax.plot(tt, vv, label=label, linewidth=1.1, **style)
        if is_constant(v):
            c = float(v[np.isfinite(v)][0])
            constants.append(f"{label} constant at {c:.4g}{unit}")
    allv = np.concatenate(finite)
    if fixed is not None:
        ax.set_ylim(*fixed)
    elif is_constant(allv):
        c = float(allv[0])
        half = CONSTANT_HALF_SPAN * (abs(c) if c != 0.0 else 1.0)
        ax.set_ylim(c - half, c + half)
    ax.ticklabel_format(axis="y", useOffset=False, style="plain")
    if constants:
        ax.text(
            0.01,
            0.04,
            "; ".join(constants),
            transform=ax.transAxes,
            fontsize=7.5,
            color="#222",
            bbox={"facecolor": "white", "edgecolor": "#999", "pad": 2},
        )


def _health_bands(ax: Any, t: np.ndarray, health: np.ndarray, dt: float) -> None:
    if len(t) == 0:
        return
    starts = np.flatnonzero(np.r_[True, health[1:] != health[:-1]])
    ends = np.r_[starts[1:], len(health)]
    for a, b in zip(starts, ends, strict=True):
        code = int(health[a])
        if code == 0:
            continue
        shade, hatch = _BAND_STYLE[min(code, len(_BAND_STYLE) - 1)]
        ax.axvspan(
            float(t[a]),
            float(t[b - 1]) + dt,
            facecolor=shade,
            hatch=hatch,
            edgecolor="#8a8a8a",
            linewidth=0,
            zorder=0,
        )


def build_figure(
    header: dict[str, Any],
    rec: np.ndarray,
    limits: JointLimits | None = None,
    thresholds: Thresholds | None = None,
) -> Figure:
    """The figure of a recording (read_recording's header and records).

    limits : the arm's joint limits (positions and rates are drawn as fractions of them), or None.
    thresholds : the health thresholds drawn on the smallest-singular-value panel, or None.
    """
    n = int(header["n"])
    joints = list(header["joints"])
    dt = 1.0 / float(header["tick_hz"])
    t = rec["t"].astype(float) if len(rec) else np.zeros(0)
    ratios = [EVENT_STRIP_RATIO] + [1.0] * (len(PANEL_TITLES) - 1)
    fig, all_axes = plt.subplots(
        len(PANEL_TITLES),
        1,
        sharex=True,
        height_ratios=ratios,
        figsize=(FIG_WIDTH_IN, PANEL_HEIGHT_IN * sum(ratios)),
        dpi=DPI,
    )
    strip, axes = all_axes[0], all_axes[1:]
    started = int(header.get("started_unix_ns") or 0)
    when = (
        datetime.datetime.fromtimestamp(started / 1e9, datetime.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
        if started
        else "start time unknown"
    )
    duration = float(t[-1] - t[0]) + dt if len(t) else 0.0
    fig.suptitle(
        f"{header['arm']}: {len(rec)} ticks at {header['tick_hz']:g} Hz, {duration:.2f} s from {when} "
        f"(recorded by the {header['source']})",
        fontsize=11,
    )
    styles = [
        {
            "color": _LINE_COLOURS[i % len(_LINE_COLOURS)],
            "linestyle": ("-", "--", "-.", ":")[(i // len(_LINE_COLOURS)) % 4],
        }
        for i in range(n)
    ]
    q = rec["q"].astype(float) if len(rec) else np.zeros((0, n))
    qd = rec["qd"].astype(float) if len(rec) else np.zeros((0, n))

    ax = axes[0]
    if limits is not None and np.all(np.isfinite(limits.position_min) & np.isfinite(limits.position_max)):
        frac = (q - limits.position_min) / (limits.position_max - limits.position_min)
        _draw_series(ax, t, [(joints[i], frac[:, i], styles[i]) for i in range(n)], "", fixed=(-0.05, 1.05))
        for y, name in ((0.0, "lower limit"), (1.0, "upper limit")):
            ax.axhline(y, color="#000", linewidth=1.2, linestyle="-")
            ax.text(1.0, y, f" {name}", transform=ax.get_yaxis_transform(), fontsize=7, va="center")
        ax.set_ylabel("fraction of range")
    else:
        _draw_series(ax, t, [(joints[i], q[:, i], styles[i]) for i in range(n)], "")
        ax.set_ylabel("rad or m")
        ax.text(
            0.99,
            0.92,
            "joint limits not known: raw positions",
            transform=ax.transAxes,
            ha="right",
            fontsize=7.5,
        )
    ax = axes[1]
    if limits is not None:
        _draw_series(
            ax,
            t,
            [(joints[i], qd[:, i] / limits.velocity_max[i], styles[i]) for i in range(n)],
            "",
            fixed=(-1.1, 1.1),
        )
        for y in (-1.0, 1.0):
            ax.axhline(y, color="#000", linewidth=1.2)
        ax.set_ylabel("fraction of limit")
    else:
        _draw_series(ax, t, [(joints[i], qd[:, i], styles[i]) for i in range(n)], "")
        ax.set_ylabel("rad/s or m/s")
    for k, (ax, lo, hi, unit) in enumerate(((axes[2], 0, 3, "m/s"), (axes[3], 3, 6, "rad/s"))):
        want = (
            np.linalg.norm(rec["twist_desired"][:, lo:hi].astype(float), axis=1) if len(rec) else np.zeros(0)
        )
        got = (
            np.linalg.norm(rec["twist_achieved"][:, lo:hi].astype(float), axis=1) if len(rec) else np.zeros(0)
        )
        _draw_series(
            ax,
            t,
            [
                ("desired", want, {"color": "#555555", "linestyle": "--"}),
                ("produced", got, {"color": _LINE_COLOURS[k]}),
            ],
            f" {unit}",
        )
        ax.set_ylabel(unit)
    _draw_series(
        axes[4],
        t,
        [
            ("scale", rec["scale"].astype(float), {"color": _LINE_COLOURS[0]}),
            ("speed cap", rec["cap"].astype(float), {"color": _LINE_COLOURS[1], "linestyle": "--"}),
        ],
        "",
        fixed=(-0.05, 1.05),
    )
    _draw_series(axes[5], t, [("damping", rec["damping"].astype(float), {"color": _LINE_COLOURS[2]})], " m")
    axes[5].set_ylabel("m")
    _draw_series(
        axes[6], t, [("manipulability", rec["manipulability"].astype(float), {"color": _LINE_COLOURS[3]})], ""
    )
    ax = axes[7]
    _draw_series(
        ax,
        t,
        [("smallest singular value", rec["sigma_min"].astype(float), {"color": _LINE_COLOURS[4]})],
        " m",
    )
    ax.set_ylabel("m")
    if thresholds is not None:
        for y, name, style in (
            (thresholds.narrow_below_m, "narrow below", "--"),
            (thresholds.pinched_below_m, "pinched below", ":"),
        ):
            ax.axhline(y, color="#000", linewidth=1.2, linestyle=style, label=f"{name} {y:g} m")
    health_codes = rec["health"] if len(rec) else np.zeros(0, dtype=np.uint8)
    events = find_events(header, rec)
    span = (float(t[-1]) + dt - float(t[0])) if len(t) else 1.0
    _event_strip(strip, events, span)
    for title, ax in zip(PANEL_TITLES, all_axes, strict=True):
        ax.set_title(title, fontsize=9, loc="left")
        _health_bands(ax, t, health_codes, dt)
        for e in events:
            if e.kind != "limit":
                ax.axvline(e.t, color=_EVENT_COLOUR, linewidth=0.7, linestyle=_EVENT_LINES[e.kind], zorder=1)
        ax.grid(True, color="#dddddd", linewidth=0.5)
        if ax is not strip and ax.get_legend_handles_labels()[0]:
            ax.legend(
                loc="upper left", bbox_to_anchor=(1.005, 1.0), fontsize=7, framealpha=0.9, borderaxespad=0
            )
    states = header["health_states"]
    key = ", ".join(
        f"{states[i]} {'hatched ' + _BAND_STYLE[i][1] if _BAND_STYLE[i][1] else 'plain'}"
        for i in range(min(len(states), len(_BAND_STYLE)))
    )
    axes[-1].set_xlabel("time since the first record, s", fontsize=9)
    fig.text(
        0.01,
        0.004,
        f"Background: health state ({key}). Vertical lines: mode change (solid), health change (dashed).",
        fontsize=8,
        va="bottom",
    )
    if len(t):
        axes[-1].set_xlim(float(t[0]), float(t[-1]) + dt)
    fig.tight_layout(rect=(0, 0.012, 1, 0.985))
    return fig


def _event_strip(ax: Any, events: list[Event], span: float) -> None:
    """The events in three rows (mode, health, limit). A label is left out when it would overlap the
    previous one in its row (closer than EVENT_LABEL_GAP of the span); the count of those is written."""
    rows = {"mode": 2, "health": 1, "limit": 0}
    last: dict[str, float] = {}
    hidden = 0
    for e in events:
        y = rows[e.kind]
        ax.plot(
            [e.t], [y], marker=_EVENT_MARKERS[e.kind], color=_EVENT_COLOUR, markersize=5, linestyle="none"
        )
        if e.t - last.get(e.kind, -math.inf) >= EVENT_LABEL_GAP * span:
            ax.annotate(
                e.label,
                xy=(e.t, y),
                xytext=(3, 2),
                textcoords="offset points",
                fontsize=6.5,
                va="bottom",
                clip_on=True,
            )
            last[e.kind] = e.t
        else:
            hidden += 1
    ax.set_ylim(-0.6, 2.9)
    ax.set_yticks([0, 1, 2], ["limit", "health", "mode"], fontsize=7)
    if hidden:
        ax.text(1.005, 0.5, f"{hidden} more\nnot labelled", transform=ax.transAxes, fontsize=7, va="center")


def save_figure(fig: Figure, path: Any, fmt: str | None = None) -> None:
    """Write the figure (format from the suffix unless fmt is given: png or svg) and release it."""
    fig.savefig(path, format=fmt, dpi=DPI)
    plt.close(fig)
