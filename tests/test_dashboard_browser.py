"""The dashboard in a real browser (Debian's chromium, headless, driven by Playwright), fed by the fake
feed: the page loads with no console error and fetches nothing but its own server's assets; values
update live; the foresight (time to pinched, the first joint to reach a limit, each joint's time to
its limit) shows and counts down; a change of health state shows (in words and a glyph, not colour
alone); an arm that goes quiet shows as gone and comes back by itself; the page sends nothing
(read-only). Screenshots of each state are saved under the test's tmp dir."""

from __future__ import annotations

import re

import pytest

pytest.importorskip("aiohttp")

from dashboard_harness import browser_page, served

from twistrate.clients.watch.dashboard import Dashboard
from twistrate.clients.watch.feed import FakeFeed
from twistrate.clients.watch.model import Fleet

pytestmark = pytest.mark.timeout(120)

#: every wait in the browser is bounded (ms)
WAIT_MS = 20_000


def _card(name: str) -> str:
    return f'section.arm[data-arm="{name}"]'


def test_dashboard_live_states_gone_and_back(tmp_path):
    feed = FakeFeed(["left", "right"], period_s=6.0)
    dash = Dashboard(Fleet(gone_after_s=1.0), [feed])
    shots = tmp_path / "screens"
    shots.mkdir()
    with served(dash) as (server, url), browser_page(str(tmp_path / "profile")) as page:
        problems: list[str] = []
        requests: list[str] = []
        page.on(
            "console",
            lambda m: problems.append(f"{m.type}: {m.text}") if m.type in ("error", "warning") else None,
        )
        page.on("pageerror", lambda e: problems.append(f"pageerror: {e}"))
        page.on("request", lambda r: requests.append(r.url))
        page.goto(url + "/")
        page.wait_for_selector(_card("left"), timeout=WAIT_MS)
        page.wait_for_selector(_card("right"), timeout=WAIT_MS)
        assert (
            page.locator("text=not a safety-rated function").count() == 1
        )  # the cautions on the first screen
        page.screenshot(path=str(shots / "loaded.png"), full_page=True)

        # live: the smallest singular value shown changes, and frames keep coming
        sigma = page.locator(f'{_card("left")} [data-field="sigma_min"]')
        frames0 = int(page.evaluate("document.body.dataset.frames"))  # read first: a frame may come between
        first = sigma.text_content()
        page.wait_for_function(
            f"""() => document.querySelector('{_card("left")} [data-field="sigma_min"]')
                                   .textContent !== {first!r}""",
            timeout=WAIT_MS,
        )
        page.wait_for_function(f"() => Number(document.body.dataset.frames) > {frames0}", timeout=WAIT_MS)
        assert page.locator(f"{_card('left')} .jt tbody tr").count() == 4  # a row per joint

        # foresight (the health message's): time to pinched along the current rates, counting down as
        # the arm nears the threshold; the first joint to reach a limit by name; per joint its time
        ahead = f'{_card("left")} [data-field="to_pinched"]'
        page.wait_for_function(
            f"""() => /^in [0-9.]+ s$/.test(document.querySelector('{ahead}').textContent)""", timeout=WAIT_MS
        )
        before = page.locator(ahead).text_content()
        page.wait_for_function(
            f"""() => document.querySelector('{ahead}').textContent !== {before!r}""", timeout=WAIT_MS
        )
        first = page.locator(f'{_card("left")} [data-field="first_limit"]').text_content()
        assert re.fullmatch(r"(turn|lift|bend|nod) in ([0-9.]+ s|> 999 s|now)", first), first
        times = page.locator(f"{_card('left')} .jt td.tlim").all_text_contents()
        assert len(times) == 4 and all(re.fullmatch(r"never|now|[0-9.]+ s|> 999 s", t) for t in times), times
        marked = page.locator(f'{_card("left")} .jt tr:has(td.tlim[data-first="true"])').all()
        assert len(marked) <= 1  # at most the one joint the message names (a frame later it may differ)

        # a state change: the arm reaches pinched (badge says so, with its own glyph), then clear again
        page.wait_for_function(
            f"""() => document.querySelector('{_card("left")}').dataset.health === 'pinched'""",
            timeout=WAIT_MS,
        )
        badge = page.locator(f'{_card("left")} [data-field="health"]')
        assert badge.locator(".word").text_content() == "pinched"
        assert badge.get_attribute("data-state") == "pinched"
        page.wait_for_function(  # pinched: the foresight says so, marked as soon (not colour alone)
            f"""() => document.querySelector('{ahead}').textContent === 'now (pinched)'
                      && document.querySelector('{ahead}').dataset.soon === 'true'""",
            timeout=WAIT_MS,
        )
        page.screenshot(path=str(shots / "pinched.png"), full_page=True)
        page.wait_for_function(
            f"""() => document.querySelector('{_card("left")}').dataset.health === 'clear'""", timeout=WAIT_MS
        )
        page.screenshot(path=str(shots / "clear.png"), full_page=True)
        changes = page.locator(f"{_card('left')} ol.changes li").all_text_contents()
        assert any("health: narrow → pinched" in c for c in changes), changes

        # gone: the right arm's service goes quiet; its card says GONE; the left one is not affected
        server.call(lambda: feed.pause("right"))
        page.wait_for_function(
            f"""() => document.querySelector('{_card("right")}').dataset.gone === 'true'""", timeout=WAIT_MS
        )
        assert page.locator(f"{_card('right')} .gone-note").is_visible()
        assert not page.locator(f"{_card('left')} .gone-note").is_visible()
        page.screenshot(path=str(shots / "gone.png"), full_page=True)
        # and back by itself when the service returns (restarted: ticks from 0)
        server.call(lambda: feed.resume("right", restart=True))
        page.wait_for_function(
            f"""() => document.querySelector('{_card("right")}').dataset.gone === 'false'""", timeout=WAIT_MS
        )
        page.wait_for_selector(f'{_card("right")} ol.ev li[data-event="back"]', timeout=WAIT_MS)
        page.screenshot(path=str(shots / "back.png"), full_page=True)

        # the 3-D view turns with the mouse: a drag of 80 px right and 30 px down turns it by 0.01 rad per px
        canvas = page.locator(f"{_card('left')} canvas.c3d")
        yaw0, pitch0 = float(canvas.get_attribute("data-yaw")), float(canvas.get_attribute("data-pitch"))
        box = canvas.bounding_box()
        page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
        page.mouse.down()
        page.mouse.move(box["x"] + box["width"] / 2 + 80, box["y"] + box["height"] / 2 + 30, steps=5)
        page.mouse.up()
        assert float(canvas.get_attribute("data-yaw")) == pytest.approx(yaw0 - 0.8, abs=0.02)
        assert float(canvas.get_attribute("data-pitch")) == pytest.approx(pitch0 + 0.3, abs=0.02)
        canvas.screenshot(path=str(shots / "turned-3d.png"))

        assert problems == [], problems
        assert all(r.startswith(url) for r in requests if not r.startswith("data:")), requests
    assert dash.received_from_pages == 0  # the page sent nothing back
    for name in ("loaded", "pinched", "clear", "gone", "back"):
        assert (shots / f"{name}.png").stat().st_size > 10_000
