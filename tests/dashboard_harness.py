"""The dashboard on its own uvloop loop in a thread (tests drive a browser against it), and the
headless system browser, launched the way every browser test launches it.

Import from a test file: `from dashboard_harness import ...` (pytest puts the tests folder on sys.path).
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import threading
from collections.abc import Iterator
from typing import Any

import pytest

CHROMIUM = "/usr/bin/chromium"
#: the browser's switches: headless, no sandbox (root in a container), no GPU, and nothing that would
#: reach the network on its own (updates, sync, background fetches)
BROWSER_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


class DashboardThread:
    """A Dashboard served from a background thread; call(fn) runs fn on its loop."""

    def __init__(self, dash: Any) -> None:
        self.dash = dash
        self.loop: asyncio.AbstractEventLoop | None = None
        self.port: int | None = None
        self._ready = threading.Event()
        self._done: asyncio.Event | None = None
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="dashboard", daemon=True)

    def _run(self) -> None:
        import uvloop

        loop = uvloop.new_event_loop()
        self.loop = loop
        asyncio.set_event_loop(loop)

        async def main() -> None:
            self._done = asyncio.Event()
            try:
                self.port = await self.dash.start("127.0.0.1", 0)
            except BaseException as exc:
                self._error = exc
                self._ready.set()
                return
            self._ready.set()
            await self._done.wait()
            await self.dash.stop()

        loop.run_until_complete(main())
        loop.close()

    def start(self) -> str:
        self._thread.start()
        assert self._ready.wait(10.0), "dashboard did not start"
        if self._error is not None:
            raise self._error
        return f"http://127.0.0.1:{self.port}"

    def call(self, fn: Any) -> None:
        assert self.loop is not None
        self.loop.call_soon_threadsafe(fn)

    def stop(self) -> None:
        if self.loop is not None and self._done is not None:
            with contextlib.suppress(RuntimeError):
                self.loop.call_soon_threadsafe(self._done.set)
        self._thread.join(10.0)


@contextlib.contextmanager
def served(dash: Any) -> Iterator[tuple[DashboardThread, str]]:
    server = DashboardThread(dash)
    url = server.start()
    try:
        yield server, url
    finally:
        server.stop()


@contextlib.contextmanager
def browser_page(user_data_dir: str, width: int = 1400, height: int = 1000) -> Iterator[Any]:
    """A page of headless Debian chromium (fresh profile); skips when chromium or playwright is missing
    (tests/setup_browser.py installs chromium)."""
    sync_api = pytest.importorskip("playwright.sync_api")
    if not os.path.exists(CHROMIUM):
        pytest.skip(f"{CHROMIUM} missing: run `python3 tests/setup_browser.py` as root")
    with sync_api.sync_playwright() as p:
        ctx = p.chromium.launch_persistent_context(
            user_data_dir,
            executable_path=CHROMIUM,
            headless=True,
            args=BROWSER_ARGS,
            viewport={"width": width, "height": height},
        )
        try:
            yield ctx.new_page()
        finally:
            ctx.close()
