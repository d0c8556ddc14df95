"""The web dashboard's server: aiohttp on the uvloop loop, one page, its packaged assets, a WebSocket.

Read-only: the server answers GET for the page and its assets and opens a WebSocket that only sends;
whatever a page sends is ignored, and nothing here holds a control socket that could claim a lease,
enable motion or change a parameter. Every asset is a file inside this package (static/), served
with a Content-Security-Policy that lets the page load nothing from anywhere else.

Frames (JSON text messages on /ws, schema in docs/dashboard.md): on connect one `full` frame with
every arm's whole snapshot (history window included), then `update` frames at FRAME_HZ with each
arm's current state and only the history rows appended since the previous update. Update frames are
encoded once and sent to every page, so pages cost a send each, not an encode each.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import math
import time
from importlib import resources
from typing import Any

from aiohttp import WSMsgType, web

from twistrate.clients.watch.model import Fleet
from twistrate.clients.watch.priority import add_nice_argument, lower_priority

log = logging.getLogger("twistrate.dashboard")

#: update frames per second sent to each page
FRAME_HZ = 10.0
#: events sent per arm in an update frame (a full frame has all the model keeps)
EVENTS_PER_UPDATE = 20
#: schema name and version carried by every frame
SCHEMA = "twistrate-dashboard/1"
#: a page that has not taken its frames for this long is dropped, s
SEND_TIMEOUT_S = 2.0
#: the page's assets (package data), by URL path -> (file, content type)
ASSETS = {
    "/": ("index.html", "text/html; charset=utf-8"),
    "/static/style.css": ("style.css", "text/css; charset=utf-8"),
    "/static/app.js": ("app.js", "text/javascript; charset=utf-8"),
    "/static/chart.js": ("chart.js", "text/javascript; charset=utf-8"),
    "/static/view3d.js": ("view3d.js", "text/javascript; charset=utf-8"),
}
CSP = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
    "base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)


def _clean(v: Any) -> Any:
    """JSON-safe: non-finite floats become null (JSON has no NaN)."""
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    return v


def encode_frame(fleet: Fleet, kind: str, now: float, since: dict[str, int] | None = None) -> str:
    """One frame as JSON text. kind : full or update; since : per arm, the last history index already
    sent (update frames carry rows after it)."""
    arms = []
    for name, view in fleet.arms.items():
        snap = view.snapshot(since=-1 if since is None else since.get(name, -1), now=now)
        if kind == "update":
            snap["events"] = snap["events"][-EVENTS_PER_UPDATE:]
        arms.append(snap)
    return json.dumps(
        _clean({"schema": SCHEMA, "type": kind, "server_time": now, "frame_hz": FRAME_HZ, "arms": arms}),
        separators=(",", ":"),
        allow_nan=False,
    )


class Dashboard:
    """The server. fleet : the arms shown; feeds : objects with `async run(fleet, stop)` filling it."""

    def __init__(self, fleet: Fleet, feeds: list[Any], frame_hz: float = FRAME_HZ) -> None:
        self.fleet = fleet
        self.feeds = feeds
        self.frame_hz = frame_hz
        self.pages: set[web.WebSocketResponse] = set()
        self.frames_sent = 0
        self.received_from_pages = 0  # messages pages sent (ignored; a read-only page sends none)
        self._since: dict[str, int] = {}
        self._stop = asyncio.Event()
        self._tasks: list[asyncio.Task] = []
        self._runner: web.AppRunner | None = None
        self.port: int | None = None

    def app(self) -> web.Application:
        app = web.Application()
        for path in ASSETS:
            app.router.add_get(path, self._asset)
        app.router.add_get("/ws", self._ws)
        return app

    async def _asset(self, request: web.Request) -> web.Response:
        name, ctype = ASSETS[request.path]
        body = resources.files("twistrate.clients.watch").joinpath("static", name).read_bytes()
        return web.Response(
            body=body,
            headers={
                "Content-Type": ctype,
                "Content-Security-Policy": CSP,
                "Cache-Control": "no-cache",
                "X-Content-Type-Options": "nosniff",
            },
        )

    async def _ws(self, request: web.Request) -> web.WebSocketResponse:
        ws = web.WebSocketResponse(heartbeat=10.0, max_msg_size=4096)
        await ws.prepare(request)
        await ws.send_str(encode_frame(self.fleet, "full", time.monotonic()))
        self.pages.add(ws)
        try:
            async for msg in ws:  # read-only: anything a page sends is ignored
                if msg.type == WSMsgType.ERROR:
                    break
                self.received_from_pages += 1
        finally:
            self.pages.discard(ws)
        return ws

    async def _broadcast(self) -> None:
        period = 1.0 / self.frame_hz
        next_t = time.monotonic()
        while not self._stop.is_set():
            next_t += period  # an absolute schedule: the time spent sending does not slow the frame rate
            delay = next_t - time.monotonic()
            if delay < -period:  # fell behind (a busy machine): skip, do not burst
                next_t = time.monotonic()
                delay = 0.0
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._stop.wait(), max(delay, 0.0))
            if self._stop.is_set():
                break
            now = time.monotonic()
            self.fleet.check(now)
            frame = encode_frame(self.fleet, "update", now, self._since)
            self._since = {name: view.index - 1 for name, view in self.fleet.arms.items()}
            for ws in list(self.pages):
                try:
                    await asyncio.wait_for(ws.send_str(frame), SEND_TIMEOUT_S)
                    self.frames_sent += 1
                except (ConnectionError, TimeoutError, RuntimeError):
                    self.pages.discard(ws)
                    with contextlib.suppress(Exception):
                        await ws.close()

    async def start(self, host: str = "127.0.0.1", port: int = 0) -> int:
        """Start the feeds, the frame broadcast and the HTTP server; returns the bound port."""
        for feed in self.feeds:
            self._tasks.append(asyncio.create_task(feed.run(self.fleet, self._stop)))
        self._tasks.append(asyncio.create_task(self._broadcast()))
        self._runner = web.AppRunner(self.app(), access_log=None)
        await self._runner.setup()
        site = web.TCPSite(self._runner, host, port)
        await site.start()
        sockets = site._server.sockets if site._server is not None else []
        self.port = sockets[0].getsockname()[1] if sockets else port
        return self.port

    async def stop(self) -> None:
        self._stop.set()
        for ws in list(self.pages):
            with contextlib.suppress(Exception):
                await ws.close()
        for task in self._tasks:
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await asyncio.wait_for(task, 2.0)
        if self._runner is not None:
            await self._runner.cleanup()


async def serve(dash: Dashboard, host: str, port: int, seconds: float | None = None) -> None:
    """Run the dashboard until Ctrl-C / SIGTERM or `seconds` have passed."""
    import signal

    bound = await dash.start(host, port)
    print(f"dashboard on http://{host}:{bound}/ (read-only; Ctrl-C stops it)", flush=True)
    done = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        with contextlib.suppress(NotImplementedError, RuntimeError):
            loop.add_signal_handler(sig, done.set)
    try:
        if seconds is None:
            await done.wait()
        else:
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(done.wait(), seconds)
    finally:
        await dash.stop()


def parse_connect(text: str) -> tuple[str, Any]:
    """NAME=OUTPUT,CONTROL (ZeroMQ endpoints of one service) -> (name, Endpoints)."""
    from twistrate.clients.link import Endpoints
    from twistrate.solver.errors import InputError, field_error

    name, _, rest = text.partition("=")
    parts = rest.split(",")
    if not name or len(parts) != 2 or not all(p.startswith(("tcp://", "ipc://")) for p in parts):
        raise field_error(
            InputError,
            "--connect",
            text,
            "NAME=OUTPUT,CONTROL, e.g. cell-a=tcp://127.0.0.1:47311,tcp://127.0.0.1:47312",
        )
    return name, Endpoints(output=parts[0], control=parts[1])


def main(argv: list[str] | None = None) -> int:
    """The dashboard on invented arms or on services given by endpoints:
    python -m twistrate.clients.watch.dashboard --fake a,b | --connect NAME=OUTPUT,CONTROL ..."""
    import argparse

    import uvloop

    from twistrate.clients.watch.feed import FakeFeed
    from twistrate.clients.watch.terminal import CAUTIONS
    from twistrate.clients.watch.wire_feed import WireFeed
    from twistrate.solver.errors import TwistrateError

    parser = argparse.ArgumentParser(
        prog="python -m twistrate.clients.watch.dashboard",
        description="the web dashboard, on invented arms or on running services",
    )
    parser.add_argument("--fake", default="", help="comma-separated names of invented arms")
    parser.add_argument(
        "--connect",
        action="append",
        default=[],
        metavar="NAME=OUTPUT,CONTROL",
        help="a service's output and control endpoints (repeat for more arms)",
    )
    parser.add_argument("--host", default="127.0.0.1", help="address to serve on (default loopback)")
    parser.add_argument("--port", type=int, default=47380, help="port (0: any free one)")
    parser.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    add_nice_argument(parser)
    args = parser.parse_args(argv)
    lower_priority(args.nice)  # first: before any thread starts
    print("\n".join(CAUTIONS), flush=True)
    feeds: list[Any] = []
    try:
        for text in args.connect:
            name, endpoints = parse_connect(text)
            feeds.append(WireFeed(name, endpoints))
    except TwistrateError as exc:
        print(f"dashboard: {exc}", flush=True)
        return 2
    names = [n for n in args.fake.split(",") if n]
    if names or not feeds:
        feeds.append(FakeFeed(names or ["left", "right"]))
    dash = Dashboard(Fleet(), feeds)
    uvloop.run(serve(dash, args.host, args.port, args.seconds))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
