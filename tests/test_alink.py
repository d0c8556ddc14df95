"""The asyncio client against a real service on loopback (tick thread, control plane, simulated arm):
the lease cycle, renewal off the streaming path, the output iterators, and a service restart."""

from __future__ import annotations

import asyncio
import contextlib
import time

import numpy as np
import pytest
import uvloop
from service_harness import make_config, running_service

from twistrate.clients.alink import AsyncLink
from twistrate.clients.linkbase import RESTART_MARGIN_TICKS, Endpoints, LinkTimeoutError, RestartWatch
from twistrate.service.wire import CommandMessage, EventMessage
from twistrate.solver.errors import ControlError

LIMIT_S = 10.0


def _run(coro) -> object:
    return uvloop.run(asyncio.wait_for(coro, LIMIT_S))


def test_restart_watch() -> None:
    watch = RestartWatch()
    assert not any(watch.see(t) for t in (5, 6, 7, 900, 901))
    assert not watch.see(901 - RESTART_MARGIN_TICKS), "a lagging status reply is not a restart"
    assert watch.see(3) and watch.restarts == 1
    assert not watch.see(4) and not watch.see(5)


def test_lease_cycle_twists_and_iterators() -> None:
    config = make_config(tick={"rate_hz": 250.0})
    with running_service(config) as run:
        async def body() -> None:
            ep = run.endpoints
            async with AsyncLink(Endpoints(ep.intake, ep.output, ep.control), client="apad",
                                 timeout_s=2.0) as link:
                await link.wait_ready(5.0)
                arm = await link.arm()
                assert link.n == arm["n"]
                # long enough that a starved process on a loaded machine still renews in time
                token = await link.claim(lease_ms=2000)
                assert token == link.lease
                events: list[EventMessage] = []

                async def watch_events() -> None:
                    async for event in link.events():
                        events.append(event)

                watcher = asyncio.create_task(watch_events())
                await asyncio.sleep(0.05)
                assert await link.enable() in ("holding", "running")
                answered: list[CommandMessage] = []
                started = time.monotonic()
                seqs = set()
                # 2.5 s: longer than the lease, so only the background renewals can have kept it
                async for command in link.commands():
                    seqs.add(link.send_twist([0.01, 0.0, 0.0], [0.0, 0.0, 0.0]))
                    if command.answers in seqs:
                        answered.append(command)
                    if time.monotonic() - started > 2.5:
                        break
                assert len(answered) > 50 and answered[-1].mode == "running"
                assert np.abs(answered[-1].rate).max() > 0
                status = await link.status()
                assert status["holder"] == "apad", "the background renewal kept the lease"
                assert await link.disable() == "disabled"
                await link.release()
                with pytest.raises(ControlError, match="claim first"):
                    link.send_twist([0, 0, 0], [0, 0, 0])
                await asyncio.sleep(0.1)
                watcher.cancel()
                names = [e.event for e in events]
                assert "enabled" in names and "lease_released" in names

        _run(body())


def test_a_hanging_renewal_does_not_delay_twists() -> None:
    # Link B's control endpoint leads nowhere, so its renewal waits its full timeout; its twists (under
    # the lease A claimed) keep flowing and keep being answered meanwhile.
    config = make_config(tick={"rate_hz": 250.0})
    with running_service(config) as run:
        async def body() -> None:
            ep = run.endpoints
            good = Endpoints(ep.intake, ep.output, ep.control)
            dead = Endpoints(ep.intake, ep.output, "tcp://127.0.0.1:9")
            async with AsyncLink(good, client="a", timeout_s=2.0) as a, \
                    AsyncLink(dead, client="b", timeout_s=2.0) as b:
                await b.wait_ready(5.0)
                await a.claim(lease_ms=5000)
                await a.enable()
                b.lease, b.lease_ms, b.renewed_at = a.lease, 30, time.monotonic() - 1.0
                renewal = asyncio.create_task(b.renew())
                await asyncio.sleep(0.01)
                assert not renewal.done()
                seqs, answered = set(), 0
                async for command in b.commands():
                    seqs.add(b.send_twist([0.0, 0.01, 0.0], [0.0, 0.0, 0.0]))
                    answered += command.answers in seqs
                    if answered >= 50:
                        break
                assert not renewal.done(), "all those twists were answered while the renewal hung"
                with pytest.raises(LinkTimeoutError):
                    await renewal
                await a.disable()
                await a.release()

        _run(body())


def test_a_restarted_service_is_noticed_and_the_lease_dropped() -> None:
    config = make_config(tick={"rate_hz": 250.0})
    restarts: list[float] = []
    first = running_service(config)
    run = first.__enter__()
    ep = run.endpoints
    endpoints = Endpoints(ep.intake, ep.output, ep.control)
    # the new instance binds where the first one was bound
    again = make_config(tick={"rate_hz": 250.0},
                        endpoints={"intake": ep.intake, "output": ep.output, "control": ep.control})
    exited: list[bool] = []
    with contextlib.ExitStack() as stack:
        def restart() -> None:  # the same endpoints, a new service instance
            exited.append(True)
            first.__exit__(None, None, None)
            stack.enter_context(running_service(again))

        async def body() -> None:
            async with AsyncLink(endpoints, client="r", timeout_s=2.0,
                                 on_restart=lambda: restarts.append(time.monotonic())) as link:
                await link.wait_ready(5.0)
                await link.claim()
                async for command in link.commands():
                    if command.tick > 3 * RESTART_MARGIN_TICKS:
                        break
                await asyncio.to_thread(restart)
                async for _ in link.commands():
                    if restarts:
                        break
                assert link.lease is None and link.restart.restarts == 1
                with pytest.raises(ControlError, match="service restarted"):
                    link.send_twist([0, 0, 0], [0, 0, 0])
                await link.claim()  # the new instance grants a lease; nothing enabled it
                assert (await link.status())["mode"] == "disabled"
                await link.release()

        try:
            _run(body())
        finally:
            if not exited:
                first.__exit__(None, None, None)
    assert len(restarts) == 1
