"""The terminal monitor's loop: feeds and a live, in-place redraw of the fleet on one uvloop loop.

    python -m twistrate.clients.watch.monitor --fake left,right [--seconds S]   invented arms, no service

`twistrate watch` (service/commands) runs the same loop with feeds from real services.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import sys
import time
from typing import Any

from twistrate.clients.watch.model import Fleet

#: screen refreshes per second
REFRESH_HZ = 4.0


async def run_monitor(
    fleet: Fleet,
    feeds: list[Any],
    seconds: float | None = None,
    screen: bool = False,
    refresh_hz: float = REFRESH_HZ,
    console: Any = None,
) -> None:
    """Run the feeds and redraw the screen in place until Ctrl-C or `seconds` have passed.

    screen : draw on the terminal's alternate screen (restored on exit) instead of below the prompt.
    """
    from rich.console import Console
    from rich.live import Live

    from twistrate.clients.watch.feed import tick_checks
    from twistrate.clients.watch.terminal import CAUTIONS, WIDTH, render_fleet

    console = console or Console(width=WIDTH if Console().width < WIDTH else None)
    if not screen:
        console.print("\n".join(CAUTIONS), style="bold")
    stop = asyncio.Event()
    tasks = [asyncio.create_task(f.run(fleet, stop)) for f in feeds]
    tasks.append(asyncio.create_task(tick_checks(fleet, stop)))
    end = None if seconds is None else time.monotonic() + seconds
    try:
        with Live(
            render_fleet(fleet, time.monotonic()),
            console=console,
            screen=screen,
            auto_refresh=False,
            transient=False,
            vertical_overflow="visible",
        ) as live:
            while end is None or time.monotonic() < end:
                live.update(render_fleet(fleet, time.monotonic()), refresh=True)
                await asyncio.sleep(1.0 / refresh_hz)
    finally:
        stop.set()
        for t in tasks:
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await asyncio.wait_for(t, 2.0)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m twistrate.clients.watch.monitor",
        description="the terminal monitor on invented arms (no service)",
    )
    parser.add_argument("--fake", default="left,right", help="comma-separated names of invented arms")
    parser.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    parser.add_argument("--screen", action="store_true", help="use the terminal's alternate screen")
    args = parser.parse_args(argv)
    try:
        import uvloop
    except ImportError:  # pragma: no cover - uvloop is a core dependency off Windows
        uvloop = None
    from twistrate.clients.watch.feed import FakeFeed

    names = [n for n in args.fake.split(",") if n]
    fleet = Fleet()
    coro = run_monitor(fleet, [FakeFeed(names)], args.seconds, args.screen)
    try:
        if uvloop is not None:
            uvloop.run(coro)
        else:
            asyncio.run(coro)
    except KeyboardInterrupt:
        pass
    return 0


if __name__ == "__main__":
    sys.exit(main())
