"""The terminal monitor's screen (rich): one panel per arm, 80 columns wide, redrawn in place.

Each panel says, in words and marks as well as colour (a monochrome terminal reads the same):
the arm and its service's arm name, GONE when nothing arrives; the mode and the health state with
their marks (clear `ok`, narrow `!`, pinched `!!`) and how long each has held; manipulability (whole,
linear, angular) and the smallest singular value against the thresholds, with a strip of the last
seconds of the smallest singular value (each character one time bucket; `:` marks below narrow,
`#` below pinched); the singular values; scale, damping, the measured tick rate and overruns; refused
input by reason; the lease holder; the nearest keep-out pair and what limited the scale (a joint
bound, a keep-out damper or nothing); the foresight along the current rates (time to the pinched
threshold, the joint that reaches its position limit first and when); each joint's position within
its range and its rate against its limit as bars, with its time to that limit; the newest events.
"""

from __future__ import annotations

import math
import time
from typing import Any

from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from twistrate.clients.watch.model import ArmView, Fleet

#: width the screen is laid out for, columns
WIDTH = 80
#: characters of the smallest-singular-value strip
STRIP_CHARS = 44
#: seconds shown in the strip
STRIP_S = 20.0
#: characters of each joint bar
BAR_CHARS = 21
#: events shown per arm
EVENTS_SHOWN = 3
BLOCKS = " ▁▂▃▄▅▆▇█"
HEALTH_MARK = {"clear": ("ok", "bold green"), "narrow": ("!", "bold yellow"), "pinched": ("!!", "bold red")}
MODE_STYLE = {
    "running": "bold green",
    "disabled": "bold",
    "stopping": "bold yellow",
    "holding": "bold cyan",
    "fault": "bold red reverse",
    "shutdown": "bold magenta",
}
#: the cautions on every screen (the monitor may run on the terminal's alternate screen)
SCREEN_CAUTIONS = (
    "Not a safety-rated function. A hardware emergency stop and an enabling device",
    "are required; risk assessment per the applicable standards; simulation and",
    "reduced speed first; defer to local codes and licensed practice.",
)
CAUTIONS = (
    "twistrate watching the arms - read-only: nothing here can move an arm.",
    "Cautions: not a safety-rated function; a hardware emergency stop and an enabling device are",
    "required; do a risk assessment per the applicable standards; try in simulation and at reduced",
    "speed first; defer to local codes and licensed practice.",
)


def _fmt(v: float | None, spec: str = ".3g", unit: str = "") -> str:
    return "n/a" if v is None or (isinstance(v, float) and not math.isfinite(v)) else f"{v:{spec}}{unit}"


def secs(v: float | None) -> str:
    """A time ahead in at most 5 characters: `3.2s`, `42s`, `>999s`; `-` for never or unknown."""
    if v is None or not math.isfinite(v):
        return "-"
    return f"{v:.1f}s" if v < 9.95 else f"{v:.0f}s" if v < 999.5 else ">999s"


def foresight_line(view: ArmView) -> Text:
    """Where the current rates lead (the health message's foresight): the time to the pinched threshold
    and the first joint to reach a position limit, in words."""
    lt = view.latest
    if "tick" not in lt:
        return Text("at these rates: n/a (no health message yet)", style="dim")
    t = Text("at these rates: pinched ")
    to_pinched = lt.get("time_to_pinched_s")
    if to_pinched is None:
        t.append("not ahead", style="dim")
    elif to_pinched <= 0.0:
        t.append("now", style="bold red")
    else:
        t.append(f"in {secs(to_pinched)}", style="bold yellow" if to_pinched < 2.0 else "")
    t.append("   first limit ")
    first = lt.get("first_limit_joint")
    if first is None:
        t.append("none ahead", style="dim")
    else:
        name = view.joints[first]["name"] if first < len(view.joints) else f"j{first + 1}"
        when = lt.get("time_to_first_limit_s")
        t.append(f"{name} in {secs(when)}", style="bold yellow" if when is not None and when < 2.0 else "")
    return t


def _joint_name(view: ArmView, i: int) -> str:
    return str(view.joints[i]["name"])[:10] if i < len(view.joints) else f"j{i + 1}"


def keepout_line(view: ArmView) -> Text:
    """The newest health message's nearest keep-out pair and the constraint that limited the scale."""
    lt = view.latest
    if "tick" not in lt:
        return Text("keep-out n/a (no health message yet)", style="dim")
    ko, lim = lt.get("keepout"), lt.get("limiting") or {}
    t = Text("keep-out ")
    if ko is None:
        t.append("none configured", style="dim")
    else:
        d = ko.get("nearest_m")
        self_pair = " (self)" if ko.get("other_kind") == "link" else ""
        t.append(f"{_fmt(d, '.3f', ' m')} {ko.get('link')} to {ko.get('other')}{self_pair}")
    t.append("   limit ")
    by = lim.get("by")
    if by == "joint" and lim.get("joint") is not None:
        t.append(f"{_joint_name(view, int(lim['joint']))} {lim.get('bound')}", style="bold yellow")
    elif by == "keepout":
        same = ko is not None and (ko.get("link"), ko.get("other")) == (lim.get("link"), lim.get("other"))
        t.append(
            "keep-out" + (", this pair" if same else f" {lim.get('link')} to {lim.get('other')}"),
            style="bold yellow",
        )
    else:
        t.append("none" if by == "none" else "n/a", style="dim")
    return t


def _since(view: ArmView, what: str, now: float) -> str:
    for c in reversed(view.changes):
        if c["what"] == what:
            return f"{now - c['t']:.0f}s"
    return "-"


def sigma_strip(view: ArmView, now: float, chars: int = STRIP_CHARS, span_s: float = STRIP_S) -> Text:
    """The last span_s seconds of the smallest singular value, one character per bucket (newest right).

    Height: the bucket's minimum on a scale from 0 to the window's largest value; `:` replaces the
    block below the narrow threshold and `#` below the pinched one (readable without colour).
    """
    text = Text()
    rows = [r for r in view.history if r[1] >= now - span_s]
    k = 2 + 3  # sigma_min column (see model.SERIES)
    values = [r[k] for r in rows if r[k] is not None]
    top = max(values) if values else 0.0
    th = view.thresholds or {}
    narrow, pinched = th.get("narrow_below_m"), th.get("pinched_below_m")
    for i in range(chars):
        a = now - span_s + i * span_s / chars
        b = a + span_s / chars
        bucket = [r[k] for r in rows if a <= r[1] < b and r[k] is not None]
        if not bucket:
            text.append(" " if not rows or a < rows[0][1] else "·", style="dim")
            continue
        v = min(bucket)
        if pinched is not None and v < pinched:
            text.append("#", style="bold red")
        elif narrow is not None and v < narrow:
            text.append(":", style="yellow")
        else:
            level = 1 + int((len(BLOCKS) - 2) * (v / top if top > 0 else 0.0))
            text.append(BLOCKS[min(level, len(BLOCKS) - 1)], style="green")
    return text


def _bar(frac: float | None, centred: bool = False, chars: int = BAR_CHARS) -> Text:
    """A bar: position in [0, 1] as a `|` in `[.....]`, or a centred rate in [-1, 1] as `=` fill.

    Ends that are reached show `<` / `>` (at or beyond the limit)."""
    t = Text("[")
    inner = chars - 2
    if frac is None:
        t.append("?" * inner, style="dim")
        t.append("]")
        return t
    if centred:
        mid = inner // 2
        n = round(min(abs(frac), 1.0) * mid)
        cells = ["."] * inner
        cells[mid] = "|"
        for i in range(1, n + 1):
            cells[mid + i if frac > 0 else mid - i] = "="
        if abs(frac) >= 0.98:
            cells[-1 if frac > 0 else 0] = ">" if frac > 0 else "<"
        style = "red" if abs(frac) >= 0.98 else "yellow" if abs(frac) >= 0.8 else ""
    else:
        pos = round(min(max(frac, 0.0), 1.0) * (inner - 1))
        cells = ["."] * inner
        cells[pos] = "|"
        if frac <= 0.02:
            cells[0] = "<"
        if frac >= 0.98:
            cells[-1] = ">"
        style = "red" if min(frac, 1 - frac) <= 0.02 else "yellow" if min(frac, 1 - frac) <= 0.1 else ""
    t.append("".join(cells), style=style)
    t.append("]")
    return t


def _joints_table(view: ArmView) -> Table:
    table = Table.grid(padding=(0, 1))
    for _ in range(6):
        table.add_column(no_wrap=True)
    table.add_row(
        Text("joint", style="dim"),
        Text("position in range", style="dim"),
        Text("value", style="dim"),
        Text("rate against limit", style="dim"),
        Text("rate", style="dim"),
        Text("lim in", style="dim"),
    )
    to_limit = view.latest.get("time_to_limit_s") or []
    n = len(view.position or view.joints or [])
    for i in range(n):
        j = view.joints[i] if i < len(view.joints) else {}
        q = view.position[i] if view.position and i < len(view.position) else None
        qd = view.rate[i] if view.rate and i < len(view.rate) else None
        lo, hi, vmax = j.get("position_min"), j.get("position_max"), j.get("velocity_max")
        frac = (
            (q - lo) / (hi - lo) if q is not None and lo is not None and hi is not None and hi > lo else None
        )
        rfrac = qd / vmax if qd is not None and vmax else None
        table.add_row(
            Text(str(j.get("name", f"j{i + 1}"))[:10]),
            _bar(frac),
            Text(f"{_fmt(q, '+.2f'):>6}"),
            _bar(rfrac, centred=True),
            Text(f"{_fmt(qd, '+.2f'):>6}"),
            Text(f"{secs(to_limit[i] if i < len(to_limit) else None):>5}"),
        )
    return table


def render_arm(view: ArmView, now: float) -> Panel:
    """One arm's panel (WIDTH columns)."""
    mode = view.mode or "unknown"
    health = view.health or "unknown"
    mark, hstyle = HEALTH_MARK.get(health, ("?", "bold"))
    title = Text()
    title.append(f" {view.name} ", style="bold")
    if view.arm:
        title.append(f"({view.arm}) ", style="dim")
    if view.gone:
        age = now - (view.last_rx or now)
        title.append(f" GONE - nothing for {age:.0f}s ", style="bold white on red")
    elif not view.connected:
        title.append(" WAITING - nothing received yet ", style="bold reverse")
    lines: list[RenderableType] = []
    head = Text()
    head.append("mode ")
    head.append(mode.upper(), style=MODE_STYLE.get(mode, "bold"))
    head.append(f" ({_since(view, 'mode', now)})   health ")
    head.append(f"[{mark}] {health.upper()}", style=hstyle)
    head.append(f" ({_since(view, 'health', now)})")
    lines.append(head)
    lt = view.latest
    th = view.thresholds or {}
    lines.append(
        Text(
            f"manipulability {_fmt(lt.get('manipulability'))}  linear "
            f"{_fmt(lt.get('manipulability_linear'))}  angular {_fmt(lt.get('manipulability_angular'))}"
        )
    )
    sv = lt.get("singular_values") or []
    lines.append(Text("singular values " + " ".join(_fmt(s, ".3g") for s in sv)))
    strip = Text(f"smallest {_fmt(lt.get('sigma_min'), '.3f', ' m'):>9} ")
    strip.append_text(sigma_strip(view, now))
    strip.append(f" narrow<{_fmt(th.get('narrow_below_m'), 'g')}", style="dim")
    lines.append(strip)
    refused = view.rejected
    total = sum(refused.values())
    by = ", ".join(f"{k} {v}" for k, v in sorted(refused.items(), key=lambda kv: -kv[1]) if v)
    late = view.timing.get("p99")
    late_us = _fmt(None if late is None else late * 1e6, ".0f", " us")
    lines.append(
        Text(
            f"scale {_fmt(lt.get('scale'), '.2f')}  damping {_fmt(lt.get('damping'), '.3f', ' m')}  "
            f"tick {_fmt(view.tick_hz, '.0f', ' Hz')}  late p99 {late_us}  overruns {view.overruns}"
        )
    )
    holder = view.holder or "nobody"
    lines.append(Text(f"lease held by {holder}   refused {total}" + (f": {by}" if by else "")))
    lines.append(keepout_line(view))
    lines.append(foresight_line(view))
    lines.append(_joints_table(view))
    events = list(view.events)[-EVENTS_SHOWN:]
    for e in reversed(events):
        stamp = time.strftime("%H:%M:%S", time.localtime(time.time() - (now - e["t"])))
        detail = f" {e['detail']}" if e["detail"] else ""
        lines.append(Text(f"{stamp} {e['event']}{detail}"[: WIDTH - 4], style="dim" if view.gone else ""))
    for line in lines:
        if isinstance(line, Text):
            line.no_wrap = True
            line.overflow = "ellipsis"
            if view.gone:
                line.stylize("dim")
    return Panel(
        Group(*lines),
        title=title,
        title_align="left",
        width=WIDTH,
        border_style="red" if view.gone else "bright_black",
        padding=(0, 1),
    )


def render_fleet(fleet: Fleet, now: float) -> Group:
    """Every arm's panel, in the order they were added, under the header and the cautions."""
    head = Text(
        f"twistrate watch - {len(fleet.arms)} arm(s), read-only: nothing here moves an arm. Ctrl-C quits.",
        style="bold",
    )
    cautions = Text("\n".join(SCREEN_CAUTIONS), style="dim")
    if not fleet.arms:
        return Group(head, cautions, Text("waiting for the first message ..."))
    return Group(head, cautions, *(render_arm(v, now) for v in fleet.arms.values()))


def render_text(fleet: Fleet, now: float, width: int = WIDTH) -> str:
    """The screen as plain text at `width` columns (for tests and logs)."""
    from rich.console import Console

    console = Console(width=width, record=True, color_system=None, file=_Null(), force_terminal=False)
    console.print(render_fleet(fleet, now))
    return console.export_text()


class _Null:
    def write(self, _: Any) -> int:
        return 0

    def flush(self) -> None:
        pass
