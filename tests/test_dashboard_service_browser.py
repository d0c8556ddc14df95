"""The dashboard in a real browser (headless Debian chromium, Playwright) against a running service and its
simulated arm: the page loads with no console error, values update live, a drive towards a singularity
changes the state shown and the service's foresight counts down on the page, a stopped service shows as
gone and returns by itself (noticed through its instance id); a screenshot of each state is saved under
the test's tmp dir."""

from __future__ import annotations

import contextlib
import re

import pytest

pytest.importorskip("aiohttp")

from dashboard_harness import browser_page, served
from service_harness import make_config, running_service, wait_for
from test_watch_wire import STRETCH, config_on, drive_until

from twistrate.clients.watch.dashboard import Dashboard
from twistrate.clients.watch.model import Fleet
from twistrate.clients.watch.wire_feed import WireFeed

pytestmark = pytest.mark.timeout(180)
WAIT_MS = 20_000
CARD = 'section.arm[data-arm="cell-a"]'


def _attr_is(page, attr: str, value: str) -> None:
    page.wait_for_function(
        f"() => document.querySelector('{CARD}')?.dataset.{attr} === '{value}'", timeout=WAIT_MS
    )


def test_dashboard_against_a_running_service(tmp_path):
    fleet = Fleet(gone_after_s=1.0)
    shots = tmp_path / "screens"
    shots.mkdir()
    problems: list[str] = []
    with contextlib.ExitStack() as stack:
        service = contextlib.ExitStack()  # closed by hand below: the service stops while the page watches
        stack.callback(service.close)
        run = service.enter_context(running_service(make_config()))
        feed = WireFeed("cell-a", run.endpoints, thresholds=(0.06, 0.015))
        _, url = stack.enter_context(served(Dashboard(fleet, [feed])))
        page = stack.enter_context(browser_page(str(tmp_path / "profile")))
        page.on(
            "console",
            lambda m: problems.append(f"{m.type}: {m.text}") if m.type in ("error", "warning") else None,
        )
        page.on("pageerror", lambda e: problems.append(f"pageerror: {e}"))
        view = fleet.arm("cell-a")
        page.goto(url + "/")
        _attr_is(page, "mode", "disabled")
        _attr_is(page, "health", "clear")
        page.wait_for_function(
            f"() => document.querySelectorAll('{CARD} .jt tbody tr').length === 7", timeout=WAIT_MS
        )
        page.screenshot(path=str(shots / "at-rest.png"), full_page=True)
        sigma = page.locator(f'{CARD} [data-field="sigma_min"]').text_content()
        # the foresight fields as the page shows them, sampled every 50 ms through the drives below
        page.evaluate(
            f"""() => {{ window.ahead = []; window.sampling = setInterval(() => window.ahead.push([
                document.querySelector('{CARD} [data-field="to_pinched"]').textContent,
                document.querySelector('{CARD} [data-field="first_limit"]').textContent]), 50); }}"""
        )
        link = run.link()
        link.claim("browser-test", lease_ms=60_000)  # the page waits between drives
        link.enable()
        drive_until(link, STRETCH, lambda: view.health == "narrow")
        _attr_is(page, "mode", "running")
        assert page.locator(f'{CARD} [data-field="sigma_min"]').text_content() != sigma  # live
        page.screenshot(path=str(shots / "narrow.png"), full_page=True)
        drive_until(link, STRETCH, lambda: view.health == "pinched")
        _attr_is(page, "health", "pinched")
        # stretching toward the singularity, the page showed the service's foresight: a time to pinched
        # that changed as the arm moved, and a joint of the arm as the first to reach a limit
        ahead = page.evaluate("() => { clearInterval(window.sampling); return window.ahead; }")
        counting = {p for p, _ in ahead if re.fullmatch(r"in ([0-9.]+ s|> 999 s)", p)}
        assert len(counting) >= 2, ahead
        names = {j["name"] for j in view.joints}
        named = [f.split(" in ")[0] for _, f in ahead if " in " in f]
        assert named and set(named) <= names, (named, names)
        assert page.locator(f'{CARD} [data-field="health"] .word').text_content() == "pinched"
        page.wait_for_function(
            f"() => document.querySelector('{CARD} [data-field=\"holder\"]').textContent === 'browser-test'",
            timeout=WAIT_MS,
        )
        # the 3-D view draws the arm from the service's state messages, with its ellipsoid
        page.wait_for_function(
            f"() => document.querySelector('{CARD} canvas.c3d').dataset.drawn === 'arm+ellipsoid'",
            timeout=WAIT_MS,
        )
        page.screenshot(path=str(shots / "pinched.png"), full_page=True)
        # the service stops: gone, then back by itself when it runs again on the same address
        service.close()
        _attr_is(page, "gone", "true")
        page.screenshot(path=str(shots / "gone.png"), full_page=True)
        with running_service(config_on(run.endpoints)):
            _attr_is(page, "gone", "false")
            _attr_is(page, "mode", "disabled")
            wait_for(lambda: view.restarts == 1)
            page.wait_for_selector(f'{CARD} ol.ev li[data-event="restarted"]', timeout=WAIT_MS)
            # noticed through the instance id (docs/protocol.md section 6), both ids listed
            detail = page.locator(f'{CARD} ol.ev li[data-event="restarted"] .detail').first.text_content()
            assert re.fullmatch(r"instance [0-9a-f]{16} -> [0-9a-f]{16}", detail), detail
            page.screenshot(path=str(shots / "back.png"), full_page=True)
    assert problems == [], problems
    for name in ("at-rest", "narrow", "pinched", "gone", "back"):
        assert (shots / f"{name}.png").stat().st_size > 10_000
