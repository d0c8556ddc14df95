"""The demo's live panel (service/commands/demo.py): drawn with rich on a terminal, 80 columns wide and
redrawn in place; one short plain line per refresh otherwise. Reads the service's Snapshot only."""

from __future__ import annotations

import sys
import textwrap
import time
from typing import Any

import numpy as np

from twistrate.service.runtime import Service

#: The live panel's width, columns (fits an 80-column terminal).
PANEL_COLUMNS = 80


class Display:
    """The live panel: drawn with rich on a terminal (at most PANEL_COLUMNS wide, redrawn in place),
    one short plain line per refresh otherwise (a pipe, a log file). source : anything with a `phase`
    text (the scripted source)."""

    def __init__(self, service: Service, source: Any, out=sys.stdout) -> None:
        self.service = service
        self.source = source
        self.out = out
        self.tty = bool(getattr(out, "isatty", lambda: False)())
        #: (monotonic s, ticks) of the previous rate sample; the first is taken now, so the first refresh
        #: already has an interval to measure over
        self._last = (time.monotonic(), service.ticker.ticks)
        self._rate: float | None = None
        self._live = None

    def start(self) -> None:
        if self.tty:
            from rich.console import Console
            from rich.live import Live

            console = Console(file=self.out, width=min(PANEL_COLUMNS, Console(file=self.out).width))
            self._live = Live(console=console, auto_refresh=False, transient=False)
            self._live.start()

    def stop(self) -> None:
        if self._live is not None:
            self._live.stop()
            self._live = None

    def _tick_rate(self) -> float | None:
        """Ticks per second over the time since the previous sample (None until 50 ms have passed)."""
        now, ticks = time.monotonic(), self.service.ticker.ticks
        t0, k0 = self._last
        if now - t0 >= 0.05:
            self._rate = (ticks - k0) / (now - t0)
            self._last = (now, ticks)
        return self._rate

    def fields(self) -> dict[str, str]:
        """The panel's values as short labelled texts."""
        svc = self.service
        snap = svc.snapshot  # the last tick's state, published by the tick thread
        rate = self._tick_rate()
        names = svc.arm.joint_names
        active = [names[i] for i in np.flatnonzero(snap.limits_active)]
        margin = snap.limit_margin  # fractions of each joint's range (inf: unlimited)
        nearest = "-"
        if margin is not None and len(margin) and np.isfinite(margin).any():
            i = int(np.argmin(margin))
            nearest = f"{names[i]} at {100 * float(margin[i]):.1f} % of its range"
        tw = snap.twist_desired
        moving = snap.mode == "running" and tw is not None and bool(np.any(tw))
        return {
            "time": f"{snap.t_s:6.2f} s",
            "phase": self.source.phase,
            "tick": ("measuring" if rate is None else f"{rate:.0f} Hz") + f" of {svc.rate_hz:g} Hz, "
                    + ("real-time" if svc.scheduling.realtime else "normal scheduling")
                    + f", {svc.ticker.overruns} overruns",
            "mode": snap.mode,
            "health": snap.health_state,
            "sigma_min": f"{snap.sigma_min:.4f} m (smallest singular value)",
            "manipulability": f"{snap.manipulability:.3e}",
            "scale": f"{snap.scale:.2f} (share of the twist the limits allow)" if moving else
                     "- (no twist to scale)",
            "speed cap": f"x{snap.cap:.2f} (factor on the twist)" if moving else "-",
            "damping": f"{snap.damping:.4f} m (lambda)",
            "limits": ", ".join(active) if active else "none in play",
            "nearest limit": nearest,
            **keepout_fields(svc),
        }

    def line(self) -> str:
        """One short plain line (not a terminal)."""
        f = self.fields()
        scale = f["scale"].split(" ")[0]
        keep = " KEEP-OUT" if f.get("limited by", "").startswith("KEEP-OUT") else ""
        return (f"t {f['time'].strip()} {f['mode']} {f['health']} sigma_min {f['sigma_min'].split()[0]} m "
                f"scale {scale}{keep} limits {f['limits'].replace('none in play', '-')}")[:PANEL_COLUMNS]

    def panel(self) -> Any:
        from rich.panel import Panel
        from rich.table import Table

        grid = Table.grid(padding=(0, 1))
        grid.add_column(style="bold", no_wrap=True)
        grid.add_column(overflow="fold")
        for key, value in self.fields().items():
            grid.add_row(key, value)
        return Panel(grid, title="twistrate demo", width=PANEL_COLUMNS)

    def show(self) -> None:
        if self._live is not None:
            self._live.update(self.panel(), refresh=True)
        else:
            self.out.write(self.line() + "\n")
            self.out.flush()


def keepout_fields(svc: Service) -> dict[str, str]:
    """The panel's keep-out rows from the last health report (a map the tick thread replaces whole, never
    changes): the nearest pair and what limited the scale; none without a [keepout] section."""
    last = svc.pipeline.reports.last
    near, lim = last.get("keepout"), last.get("limiting")
    if svc.pipeline.keepout is None:
        return {}
    names = svc.arm.joint_names
    out = {"keep-out": "-" if near is None else f"{near.nearest_m:.3f} m, {near.link} to {near.other}"}
    if lim is None or lim.by == "none":
        out["limited by"] = "nothing (full twist)"
    elif lim.by == "keepout":
        out["limited by"] = f"KEEP-OUT {lim.link} to {lim.other}"
    else:
        out["limited by"] = f"joint {names[lim.joint]}, {lim.bound} bound"
    return out


def fit(lines: list[str], width: int = PANEL_COLUMNS) -> list[str]:
    """`lines` wrapped at word boundaries to `width` columns (continuations indented)."""
    out: list[str] = []
    for line in lines:
        indent = " " * (len(line) - len(line.lstrip()) + 2)
        out += textwrap.wrap(line, width, subsequent_indent=indent, break_on_hyphens=False,
                             break_long_words=False) or [""]
    return out
