"""The dashboard in a real browser (headless Debian chromium, Playwright) against a running service and its
simulated arm: the page loads with no console error, values update live, a drive towards a singularity
changes the state shown and the service's foresight counts down on the page, a stopped service shows as
gone and returns by itself (noticed through its instance id); with keep-out zones, the page shows the
nearest keep-out pair and its gap while a drive takes the tool toward a table, and says when a keep-out
damper holds the scale back, and when nothing does again. A screenshot of each state is saved under the
test's tmp dir."""

from __future__ import annotations

import contextlib
import json
import re
import threading
import time

import numpy as np
import pytest

pytest.importorskip("aiohttp")

from dashboard_harness import browser_page, served
from service_harness import make_config, running_service, wait_for
from test_e2e_keepout import FIRST_ORDER_SLACK_M, KEEPOUT
from test_watch_wire import STRETCH, config_on, drive_until

from twistrate.clients.watch.dashboard import Dashboard
from twistrate.clients.watch.model import Fleet
from twistrate.clients.watch.wire_feed import WireFeed
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward
from twistrate.solver.zones import parse_keepout

pytestmark = pytest.mark.timeout(180)
WAIT_MS = 20_000
CARD = 'section.arm[data-arm="cell-a"]'
KO = f"{CARD} [data-field='keepout']"
KO_JS = json.dumps(KO)  # as a JavaScript string literal


def _attr_is(page, attr: str, value: str) -> None:
    page.wait_for_function(
        f"() => document.querySelector('{CARD}')?.dataset.{attr} === '{value}'", timeout=WAIT_MS
    )


def _watching_page(stack, tmp_path, fleet, run, problems: list[str], **feed_options):
    """The dashboard on `run`'s service (arm "cell-a") opened in the browser, its console errors and
    warnings and page errors appended to `problems`: (page, the fleet's view of the arm)."""
    feed = WireFeed("cell-a", run.endpoints, **feed_options)
    _, url = stack.enter_context(served(Dashboard(fleet, [feed])))
    page = stack.enter_context(browser_page(str(tmp_path / "profile")))
    page.on(
        "console",
        lambda m: problems.append(f"{m.type}: {m.text}") if m.type in ("error", "warning") else None,
    )
    page.on("pageerror", lambda e: problems.append(f"pageerror: {e}"))
    page.goto(url + "/")
    return page, fleet.arm("cell-a")


def test_dashboard_against_a_running_service(tmp_path):
    fleet = Fleet(gone_after_s=1.0)
    shots = tmp_path / "screens"
    shots.mkdir()
    problems: list[str] = []
    with contextlib.ExitStack() as stack:
        service = contextlib.ExitStack()  # closed by hand below: the service stops while the page watches
        stack.callback(service.close)
        run = service.enter_context(running_service(make_config()))
        page, view = _watching_page(stack, tmp_path, fleet, run, problems, thresholds=(0.06, 0.015))
        _attr_is(page, "mode", "disabled")
        _attr_is(page, "health", "clear")
        page.wait_for_function(
            f"() => document.querySelectorAll('{CARD} .jt tbody tr').length === 7", timeout=WAIT_MS
        )
        # no [keepout] section: the keep-out box says so (docs/protocol.md 7.4: keepout nil, by none)
        page.wait_for_function(
            f"() => document.querySelector({KO_JS}).dataset.ko === 'none'",
            timeout=WAIT_MS,
        )
        assert page.locator(f'{CARD} [data-field="ko_nearest"]').text_content() == "none configured"
        assert page.locator(f'{CARD} [data-field="limiting"]').text_content() == "nothing (not running)"
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


#: tool twists straight down onto the table of the keep-out cell (tests/test_e2e_keepout.py) and back up
DOWN = ([0.0, 0.0, -0.1], [0.0, 0.0, 0.0])
UP = ([0.0, 0.0, 0.1], [0.0, 0.0, 0.0])


def sway(t: float):
    """Sideways at 1 m/s, turning back every 0.4 s: each turn asks more change of rate than the joints'
    acceleration bounds allow in a tick, so a joint bound holds the scale for part of every swing (about
    45 % of the time, base_yaw's acceleration bound, measured on this cell)."""
    return ([0.0, 1.0 if int(t / 0.4) % 2 == 0 else -1.0, 0.0], [0.0, 0.0, 0.0])


@contextlib.contextmanager
def sending(link, twist, period_s: float = 0.01):
    """Send the twist (linear, angular), or twist(t) of the seconds since the start when it is a function,
    every period_s from a thread of its own while the block runs (the service holds a twist for 100 ms
    only; the page is checked meanwhile). The block must not use the link."""
    stop = threading.Event()
    t0 = time.monotonic()

    def run():
        while not stop.is_set():
            link.send_twist(*(twist(time.monotonic() - t0) if callable(twist) else twist))
            time.sleep(period_s)

    thread = threading.Thread(target=run, name="twist-sender", daemon=True)
    thread.start()
    try:
        yield
    finally:
        stop.set()
        thread.join(5.0)


#: the keep-out box as the page shows it: its state attributes and its three texts
BOX_JS = f"""() => {{
    const b = document.querySelector({KO_JS});
    const t = (f) => b.querySelector(`[data-field="${{f}}"]`).textContent;
    return {{ko: b.dataset.ko, by: b.dataset.by, nearest: t("ko_nearest"), pair: t("ko_pair"),
             limiting: t("limiting")}}; }}"""
#: sample the gap shown and what held the scale every 50 ms (window.ko), and stop sampling
SAMPLE_JS = f"""() => {{ window.ko = []; window.sampling = setInterval(() => {{
    const b = document.querySelector({KO_JS});
    window.ko.push([b.querySelector('[data-field="ko_nearest"]').textContent, b.dataset.by]); }}, 50); }}"""
#: the words for what held the scale, the first time the page says a joint bound did (else false)
JOINT_HELD_JS = f"""() => {{ const b = document.querySelector({KO_JS});
    return b.dataset.by === "joint" && b.querySelector('[data-field="limiting"]').textContent; }}"""
STOP_JS = "() => { clearInterval(window.sampling); return window.ko; }"


def _box_is(page, attr: str, value: str) -> None:
    page.wait_for_function(
        f"() => document.querySelector({KO_JS}).dataset.{attr} === '{value}'", timeout=WAIT_MS
    )


def _metres(text: str) -> float:
    m = re.fullmatch(r"(overlap )?([0-9]+\.[0-9]{3}) m", text)
    assert m, text
    return -float(m.group(2)) if m.group(1) else float(m.group(2))


def test_dashboard_shows_the_nearest_keepout_pair_and_the_damper_holding_the_scale(tmp_path):
    """A velocity damper (Faverjon & Tournassoud, ICRA 1987; the form of Kanoun, Lamiraux & Wieber,
    IEEE T-RO 2011) brings the tool to rest at the security distance d_s: the gap the page shows goes
    from beyond the influence distance d_i down to d_s and not below it, and the page says a keep-out
    damper holds the scale while it does. The gap shown at rest is checked against the exact distance
    kernels at the joint state the page was sent (KeepOut.all_contacts, themselves checked against the
    coal collision library in tests/test_distance.py)."""
    fleet = Fleet(gone_after_s=1.0)
    shots = tmp_path / "screens"
    shots.mkdir()
    problems: list[str] = []
    d_i, d_s = KEEPOUT["influence_m"], KEEPOUT["security_m"]
    with contextlib.ExitStack() as stack:
        run = stack.enter_context(running_service(make_config(simulation={"lag_s": 0.0}, keepout=KEEPOUT)))
        page, view = _watching_page(stack, tmp_path, fleet, run, problems, thresholds=(0.06, 0.015))
        _attr_is(page, "mode", "disabled")
        _box_is(page, "ko", "clear")
        page.wait_for_function(  # the arm op's joint names have come: the link is drawn in the 3-D view
            f"() => document.querySelector('{CARD} canvas.c3d').dataset.nearest", timeout=WAIT_MS
        )
        box = page.evaluate(BOX_JS)
        assert box["by"] == "none" and box["limiting"] == "nothing (not running)", box
        assert box["pair"].endswith(" to table (zone)"), box
        assert _metres(box["nearest"]) > d_i  # the cell's tool starts beyond the influence distance
        page.screenshot(path=str(shots / "keepout-far.png"), full_page=True)
        # the gap, the pair and what held the scale, as the page shows them, every 50 ms through the drive
        page.evaluate(SAMPLE_JS)
        link = run.link()
        link.claim("browser-test", lease_ms=60_000)
        link.enable()
        with sending(link, DOWN):
            # held: the damper holds the scale back, and the tool comes to rest (scale near 0)
            wait_for(lambda: (view.latest.get("limiting") or {}).get("by") == "keepout", limit_s=30.0)
            wait_for(
                lambda: view.latest.get("scale", 1.0) is not None and view.latest["scale"] < 0.02,
                limit_s=30.0,
            )
            _box_is(page, "by", "keepout")
            page.wait_for_selector(f'{CARD} ol.ev li[data-event="keepout_limiting"]', timeout=WAIT_MS)
            time.sleep(0.5)  # a few frames at rest
            box = page.evaluate(BOX_JS)
            rest_q = np.array(view.position, dtype=float)
            page.screenshot(path=str(shots / "keepout-held.png"), full_page=True)
            canvas = page.locator(f"{CARD} canvas.c3d")
            canvas.screenshot(path=str(shots / "keepout-held-3d.png"))
            marked = canvas.get_attribute("data-nearest")  # the chain segment(s) marked in the 3-D view
            # the same state on a laptop's screen, and on a wall screen with the page's wall size
            page.set_viewport_size({"width": 1280, "height": 800})
            page.screenshot(path=str(shots / "keepout-held-laptop.png"))
            page.set_viewport_size({"width": 1920, "height": 1080})
            page.click("#size")
            page.screenshot(path=str(shots / "keepout-held-wall.png"))
            page.click("#size")
            page.set_viewport_size({"width": 1400, "height": 1000})
        samples = page.evaluate(STOP_JS)
        assert box["by"] == "keepout" and box["ko"] == "clear", box
        assert re.fullmatch(r"keep-out damper, \S+ to table \(the nearest pair\)", box["limiting"]), box
        shown = [_metres(n) for n, _ in samples]
        # the gap shown fell from beyond d_i to d_s and never below it (the damper's rest point), give or
        # take half a mm (the page rounds to mm) and the rows' first-order slack
        assert max(shown) > d_i and min(shown) >= d_s - FIRST_ORDER_SLACK_M - 5e-4, (max(shown), min(shown))
        assert abs(_metres(box["nearest"]) - d_s) < 0.005, box
        assert "keepout" in {by for _, by in samples}
        # the same gap and pair from the exact kernels at the joint state the page was sent
        arm = run.service.arm
        oracle = KeepOut(arm, parse_keepout(KEEPOUT))
        contacts = oracle.all_contacts(forward(arm, rest_q))
        k = int(contacts.distance.argmin())
        link_a, other, _ = oracle.pair_links[int(contacts.pair[k])]
        assert abs(_metres(box["nearest"]) - float(contacts.distance[k])) <= 6e-4, (box, contacts.distance[k])
        assert box["pair"] == f"{link_a} to {other} (zone)", (box, link_a, other)
        # the 3-D view marks that link: the chain's segment from its joint's origin to the next one (the
        # `origins` polyline: the base, each joint's origin in chain order, the tool; docs/protocol.md 7.6)
        names = [j["name"] for j in view.joints]
        assert marked == str(0 if link_a == "root" else names.index(link_a) + 1), (marked, link_a)
        # away from the table: followed in full again, and the page says nothing holds the scale
        with sending(link, UP):
            _box_is(page, "by", "none")
            page.wait_for_selector(f'{CARD} ol.ev li[data-event="keepout_released"]', timeout=WAIT_MS)
            page.wait_for_function(
                f"() => document.querySelector({KO_JS}).querySelector('[data-field=limiting]').textContent"
                " === 'nothing: the twist is followed in full'",
                timeout=WAIT_MS,
            )
            page.screenshot(path=str(shots / "keepout-released.png"), full_page=True)
        # swaying from there: a joint bound holds the scale in every swing, and the page names the joint
        # and the bound
        with sending(link, sway):
            held = page.wait_for_function(JOINT_HELD_JS, timeout=WAIT_MS, polling="raf").json_value()
        bounds = "|".join(("position", "velocity", "acceleration"))
        assert re.fullmatch(rf"joint ({'|'.join(names)}), its ({bounds}) bound", held), held
    assert problems == [], problems
    for name in ("keepout-far", "keepout-held", "keepout-released"):
        assert (shots / f"{name}.png").stat().st_size > 10_000


#: the self-collision cell and fold of tests/test_e2e_self_collision.py: the tool back toward the base and
#: down, until two of the arm's own links hold each other back
SELF_KEEPOUT = {"influence_m": 0.10, "security_m": 0.02, "gain_m_s": 0.3, "self_collision": True}
FOLD = ([-0.25, 0.0, -0.15], [0.0, 0.0, 0.0])


def test_dashboard_shows_a_self_collision_pair_and_marks_both_links(tmp_path):
    """Folded on itself, the arm's nearest pair is two of its own links: the page says so, names both,
    and the 3-D view marks both links' segments of the chain."""
    fleet = Fleet(gone_after_s=1.0)
    shots = tmp_path / "screens"
    shots.mkdir()
    problems: list[str] = []
    with contextlib.ExitStack() as stack:
        cfg = make_config(simulation={"lag_s": 0.0}, keepout=SELF_KEEPOUT)
        run = stack.enter_context(running_service(cfg))
        page, view = _watching_page(stack, tmp_path, fleet, run, problems)
        _attr_is(page, "mode", "disabled")
        _box_is(page, "ko", "clear")
        link = run.link()
        link.claim("browser-test", lease_ms=60_000)
        link.enable()
        with sending(link, FOLD):
            wait_for(
                lambda: (
                    (view.latest.get("limiting") or {}).get("by") == "keepout"
                    and (view.latest.get("keepout") or {}).get("other_kind") == "link"
                ),
                limit_s=40.0,
            )
            page.wait_for_function(
                f"() => document.querySelector({KO_JS}).dataset.by === 'keepout'"
                f" && / \\(its own link\\)$/.test(document.querySelector({KO_JS})"
                ".querySelector('[data-field=ko_pair]').textContent)",
                timeout=WAIT_MS,
            )
            box = page.evaluate(BOX_JS)
            marked = page.locator(f"{CARD} canvas.c3d").get_attribute("data-nearest")
            page.screenshot(path=str(shots / "self-held.png"), full_page=True)
    names = [j["name"] for j in view.joints]
    m = re.fullmatch(r"(\S+) to (\S+) \(its own link\)", box["pair"])
    assert m and {m.group(1), m.group(2)} <= {*names, "root"}, box
    # both links marked: each one's segment of the `origins` polyline (docs/protocol.md 7.6)
    segment = {n: i + 1 for i, n in enumerate(names)} | {"root": 0}
    assert marked == f"{segment[m.group(1)]},{segment[m.group(2)]}", (marked, box)
    assert box["limiting"].startswith("keep-out damper, "), box
    assert (shots / "self-held.png").stat().st_size > 10_000
    assert problems == [], problems
