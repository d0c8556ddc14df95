"""A restarted service is noticed through its instance id (docs/protocol.md section 6), end to end: a real
service is stopped and a new one binds the same endpoints; the teleop driver (over the asyncio link) and
the dashboard's wire feed both see a new `instance` and say so; the teleop session claims again and
never enables; the watcher lists `restarted` with both ids. Plus the restart watch's rules on their own:
with an id known, a tick counter going back is a hint, not a restart; a new id is one even when the
new instance's ticks are already past the old one's (a client that was away for long)."""

from __future__ import annotations

import asyncio
import contextlib
import threading
import time

import pytest
import uvloop
from service_harness import make_config, running_service
from teleop_streams import StartWhenEnabled

from twistrate.clients.alink import AsyncLink
from twistrate.clients.linkbase import RESTART_MARGIN_TICKS, Endpoints, RestartWatch
from twistrate.clients.teleop.core import TeleopCore
from twistrate.clients.teleop.device import DeviceInfo
from twistrate.clients.teleop.profile import profile_from_dict
from twistrate.clients.teleop.run import TeleopRun

pytestmark = pytest.mark.timeout(120)

PUCK = DeviceInfo("/dev/input/event7", "six axis puck", "relative", (0x100,))
#: every wait on the services below is bounded by this, s
WAIT_S = 20.0


def test_with_an_id_known_a_tick_drop_is_only_a_hint():
    watch = RestartWatch(trust_ticks=False)
    assert not watch.see_instance(0xA1) and watch.instance == 0xA1
    assert not watch.see(5000)
    assert not watch.see(3) and watch.suspect and watch.restarts == 0  # ask status, do not decide
    assert not watch.see_instance(0xA1) and not watch.suspect  # the same process: no restart
    assert watch.see_instance(0xB2) and watch.restarts == 1 and watch.by == "instance"
    assert "00000000000000a1 -> 00000000000000b2" in watch.describe()


def test_a_new_id_is_a_restart_even_when_the_ticks_went_up():
    watch = RestartWatch(trust_ticks=False)
    watch.see_instance(7)
    watch.see(100)
    assert not watch.see(100 + 10 * RESTART_MARGIN_TICKS)  # the counter alone cannot tell
    assert watch.see_instance(8) and watch.restarts == 1


def test_without_an_id_the_tick_counter_decides_once():
    watch = RestartWatch(trust_ticks=False)
    watch.see(5000)
    assert watch.see(2) and watch.by == "tick" and watch.restarts == 1
    assert not watch.see_instance(9), "the new instance's id is learned, not a second restart"
    trusting = RestartWatch(trust_ticks=True)  # the blocking link: an id known, the ticks still count
    trusting.see_instance(9)
    trusting.see(5000)
    assert trusting.see(2) and trusting.instance is None
    assert not trusting.see_instance(10) and trusting.restarts == 1


def test_a_status_tick_ahead_of_queued_output_is_not_a_restart():
    # docs/protocol.md section 6: the same id within a run is the same process, whatever its counters
    # show; section 7.3: a command every tick, tick counting up by one. A status reply carries the tick
    # the service is at now, ahead of the commands still queued for the client.
    for trust in (True, False):
        watch = RestartWatch(trust_ticks=trust)
        watch.see_instance(0xC3)
        watch.see(1000)  # a command read
        assert not watch.see(6000, status=True)  # status while 5000 ticks of commands wait unread
        assert not any(watch.see(t) for t in range(1001, 1010)), "the queued commands, read in order"
        assert watch.restarts == 0 and not watch.suspect and watch.instance == 0xC3
        # a real restart still shows: a status tick far below the commands seen, or the commands' own
        # counter going back
        assert watch.see(3, status=True) == trust and (watch.restarts == 1 or watch.suspect)
    watch = RestartWatch(trust_ticks=True)
    watch.see(1000)
    watch.see(6000, status=True)
    assert watch.see(2) and watch.by == "tick", "the output's own counter went back"


def test_the_blocking_link_keeps_its_lease_reading_commands_queued_before_a_status():
    """End to end: commands pile up unread while the link waits (more than RESTART_MARGIN_TICKS of
    them), then `status` answers with the service's current tick, then the queued commands are read:
    the same instance id throughout (docs/protocol.md section 6), so no restart and the lease is kept."""
    rate_hz = 250.0
    with running_service(make_config(tick={"rate_hz": rate_hz})) as run:
        link = run.link(topics=(b"command",))
        link.claim(lease_ms=10_000)
        link.receive_command(timeout_s=WAIT_S)
        time.sleep(3 * RESTART_MARGIN_TICKS / rate_hz)  # about 300 commands queue unread
        status = link.status()
        first = link.receive_command(timeout_s=WAIT_S)
        assert status["tick"] > first.tick + RESTART_MARGIN_TICKS, "the commands read are older"
        for _ in range(20):
            link.receive_command(timeout_s=WAIT_S)
        assert link.restart.restarts == 0 and link.lease is not None and link.lease_lost is None
        assert link.status()["holder"] == "link"
        assert link.restart.instance == status["instance"]


class _Restarter:
    """Stops a running service and starts a new one on the same endpoints (from any thread)."""

    def __init__(self, stack: contextlib.ExitStack) -> None:
        self.config = make_config(tick={"rate_hz": 250.0})
        self.first = running_service(self.config)
        self.run = self.first.__enter__()
        self.stack = stack
        self.done = threading.Event()
        ep = self.run.endpoints
        self.endpoints = Endpoints(ep.intake, ep.output, ep.control)
        self.again = make_config(tick={"rate_hz": 250.0},
                                 endpoints={"intake": ep.intake, "output": ep.output, "control": ep.control})
        self.second = None

    def restart(self) -> None:
        self.first.__exit__(None, None, None)
        self.second = self.stack.enter_context(running_service(self.again))
        self.done.set()

    def close(self) -> None:
        if not self.done.is_set():
            self.first.__exit__(None, None, None)


def _until(predicate, what: str) -> None:
    end = time.monotonic() + WAIT_S
    while not predicate():
        assert time.monotonic() < end, f"not within {WAIT_S:g} s: {what}"
        time.sleep(0.02)


def test_teleop_notices_a_restart_through_the_instance_id():
    profile = profile_from_dict({"device": {"settle_ms": 50.0}, "filter": {"on": False}})
    with contextlib.ExitStack() as stack:
        services = _Restarter(stack)
        stack.callback(services.close)

        async def body() -> None:
            async with AsyncLink(services.endpoints, client="teleop", renew=False, timeout_s=2.0) as link:
                await link.wait_ready(5.0)
                await link.arm()
                core = TeleopCore(profile, None, PUCK)
                core.source = StartWhenEnabled([], core.session)  # nobody touches the controller
                driver = TeleopRun(core, link)
                run = asyncio.get_running_loop().create_task(driver.run(seconds=WAIT_S))
                await asyncio.to_thread(_until, lambda: core.session.lease and link.restart.instance,
                                        "the session holds the lease and the link knows the id")
                old = link.restart.instance
                await asyncio.to_thread(services.restart)
                await asyncio.to_thread(_until, lambda: link.restart.restarts == 1, "the restart noticed")
                assert link.restart.by == "instance", "noticed through the id, not the tick counter"
                assert link.restart.instance_before == old and link.restart.instance != old
                assert "restarted" in core.session.notice
                # the session claims the new instance's lease again and does not enable
                await asyncio.to_thread(_until, lambda: core.session.lease, "claimed again")
                status = await link.status()
                assert status["holder"] == "teleop" and status["mode"] == "disabled"
                assert status["instance"] == link.restart.instance
                driver.quit()
                await asyncio.wait_for(run, WAIT_S)
                assert link.restart.restarts == 1

        uvloop.run(asyncio.wait_for(body(), 3 * WAIT_S))


def test_the_watch_feed_notices_a_restart_through_the_instance_id():
    pytest.importorskip("rich")
    from twistrate.clients.watch.model import Fleet
    from twistrate.clients.watch.wire_feed import WireFeed

    with contextlib.ExitStack() as stack:
        services = _Restarter(stack)
        stack.callback(services.close)
        fleet = Fleet(gone_after_s=1.0)
        feed = WireFeed("cell", services.endpoints)

        async def body() -> None:
            stop = asyncio.Event()
            task = asyncio.get_running_loop().create_task(feed.run(fleet, stop))
            view = fleet.arm("cell")

            async def until(predicate, what: str) -> None:
                end = time.monotonic() + WAIT_S
                while not predicate():
                    assert time.monotonic() < end, f"not within {WAIT_S:g} s: {what}"
                    await asyncio.sleep(0.05)

            try:
                await until(lambda: view.instance is not None and view.received["health"] > 0, "first status")
                old = view.instance
                await asyncio.to_thread(services.restart)
                await until(lambda: view.restarts == 1, "the restart noticed")
                assert view.instance != old
                restarted = [e for e in view.events if e["event"] == "restarted"]
                assert len(restarted) == 1 and f"{old:016x} -> {view.instance:016x}" in restarted[0]["detail"]
                assert view.snapshot()["instance"] == f"{view.instance:016x}"
                await asyncio.sleep(1.5)  # another status or two from the same instance: no second restart
                assert view.restarts == 1
            finally:
                stop.set()
                await asyncio.wait_for(task, WAIT_S)

        uvloop.run(asyncio.wait_for(body(), 3 * WAIT_S))
