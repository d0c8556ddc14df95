"""Feeds that fill a Fleet: the fake one (invented arms, for tests and offline demos) runs on asyncio.

A feed is an object with `async run(fleet, stop)` that hands decoded messages to `fleet.feed(name,
kind, msg, now)` with the monotonic receive time until the `stop` event is set. The terminal monitor
and the dashboard both run their feeds on one asyncio loop (uvloop) beside their display.
"""

from __future__ import annotations

import asyncio
import contextlib
import time

from twistrate.clients.watch.fake import NARROW_BELOW_M, PINCHED_BELOW_M, FakeArm
from twistrate.clients.watch.model import Fleet

#: health messages per second of the fake feed (the service's default health rate)
FAKE_HEALTH_HZ = 50.0


class FakeFeed:
    """Invented arms named `names`, each on its own phase of the same cycle.

    pause(name) silences one (it goes gone after the model's timeout); resume(name) brings it back,
    restarted (its ticks count from 0 again) when restart=True.
    """

    def __init__(self, names: list[str], rate_hz: float = FAKE_HEALTH_HZ, period_s: float = 12.0) -> None:
        self.arms = {name: FakeArm(name, phase=2.5 * i, period_s=period_s) for i, name in enumerate(names)}
        self.rate_hz = rate_hz
        self.paused: set[str] = set()
        self._introduced: set[str] = set()  # arms whose description the fleet has (the control ops' part)
        self.sent = 0

    def pause(self, name: str) -> None:
        self.paused.add(name)

    def resume(self, name: str, restart: bool = False) -> None:
        if restart:
            old = self.arms[name]
            self.arms[name] = FakeArm(name, phase=old.phase, period_s=old.period_s)
            self._introduced.discard(name)
        self.paused.discard(name)

    async def run(self, fleet: Fleet, stop: asyncio.Event) -> None:
        period = 1.0 / self.rate_hz
        t0 = time.monotonic()
        next_t = t0
        while not stop.is_set():
            now = time.monotonic()
            for name, arm in list(self.arms.items()):
                if name in self.paused:
                    continue
                if name not in self._introduced:
                    self._introduced.add(name)
                    view = fleet.arm(name)
                    view.set_arm(arm.description())
                    view.set_thresholds(NARROW_BELOW_M, PINCHED_BELOW_M)
                for kind, msg in arm.messages(now - t0, time.time()):
                    fleet.feed(name, kind, msg, now)
                    self.sent += 1
            fleet.check(now)
            next_t += period
            delay = next_t - time.monotonic()
            if delay < -1.0:  # fell far behind (a stalled loop): start afresh, no burst
                next_t = time.monotonic()
            await _wait(stop, max(delay, 0.0))


async def _wait(stop: asyncio.Event, seconds: float) -> None:
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(stop.wait(), seconds)


async def tick_checks(fleet: Fleet, stop: asyncio.Event, period_s: float = 0.25) -> None:
    """Run the gone check of every arm every period_s (feeds that wait on sockets do not)."""
    while not stop.is_set():
        fleet.check(time.monotonic())
        await _wait(stop, period_s)
