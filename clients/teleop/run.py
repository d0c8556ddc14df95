"""The asyncio driver of a teleop run: the core on a fixed publish tick, the session's actions carried out
against a link, the service's news fed back, the live line refreshed.

Timing: one loop task ticks at the profile's rate on absolute deadlines; each tick polls the input
(device events, keys) and lets the session publish. Control requests (claim, enable, disable,
renew, release) run as tasks of their own, so none of them ever delays a twist. Stops on `quit`
(the x key, Ctrl-C, SIGTERM), after `seconds`, or when the input source is finished (replays):
zeros, disable and release go out before the run returns.
"""

from __future__ import annotations

import asyncio
import contextlib
import re
import signal
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from twistrate.clients.teleop.core import TeleopCore
from twistrate.clients.teleop.session import (
    Action,
    Claim,
    Disable,
    Enable,
    Release,
    Renew,
    SendTwist,
    TeleopLink,
    View,
)
from twistrate.service.wire import CommandMessage, EventMessage, HealthMessage
from twistrate.solver.errors import ControlError, TwistrateError

#: How often the service's status is asked for (holder, fault reason), s.
STATUS_PERIOD_S = 0.5
#: How often the live line is redrawn, s.
LINE_PERIOD_S = 0.1
#: How long the closing disable and release may take, s.
CLOSE_TIMEOUT_S = 2.0


def holder_of(refusal: ControlError) -> str | None:
    """The holder a `lease_held` refusal names ("... lease held by 'pad'; ..."), or None."""
    found = re.search(r"held by '([^']*)'", str(refusal))
    return found.group(1) if found else None


class TeleopRun:
    """core : the teleop core (device or keyboard). link : a connected TeleopLink (e.g. AsyncLink with
    renew=False: the session renews). keys : a terminal key reader (read() -> str) or None. show :
    called with the View LINE_PERIOD_S apart (None: nothing shown). lease_ms : asked for with the claim.
    clock : monotonic seconds."""

    def __init__(self, core: TeleopCore, link: TeleopLink, *, keys: Any = None,
                 show: Callable[[View], None] | None = None, lease_ms: int | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.core = core
        self.session = core.session
        self.link = link
        self.keys = keys
        self.show = show
        self.lease_ms = lease_ms
        self.clock = clock
        self.period_s = 1.0 / core.profile.motion.rate_hz
        self.sent = 0
        self.errors: list[str] = []
        self._requests: set[asyncio.Task] = set()
        self._queue: asyncio.Queue[Action] = asyncio.Queue()
        self._stop = asyncio.Event()
        if hasattr(link, "on_restart"):
            link.on_restart = self._restarted  # type: ignore[attr-defined]

    # -- carrying out actions -----------------------------------------------------------------------

    def apply(self, actions: list[Action]) -> None:
        for action in actions:
            if isinstance(action, SendTwist):
                try:
                    self.link.send_twist(action.linear, action.angular, action.frame, action.point)
                    self.sent += 1
                except ControlError:
                    self.apply(self.session.lease_lost("no lease to send under"))
                except TwistrateError as exc:  # a value the protocol refuses: stop, never skip silently
                    self.errors.append(str(exc))
                    self.apply(self.session.command("stop", self.clock()))
            else:
                self._request(action)

    def _request(self, action: Action) -> None:
        """Renewals run on their own; every other request in order, one at a time (claim before
        enable, disable before release)."""
        if isinstance(action, Renew):
            task = asyncio.get_running_loop().create_task(self._carry_out(action))
            self._requests.add(task)
            task.add_done_callback(self._requests.discard)
        else:
            self._queue.put_nowait(action)

    async def _worker(self) -> None:
        while True:
            action = await self._queue.get()
            try:
                await self._carry_out(action)
            finally:
                self._queue.task_done()

    async def _carry_out(self, action: Action) -> None:
        s = self.session
        try:
            if isinstance(action, Claim):
                await self.link.claim(s.client, self.lease_ms)
                self.apply(s.claimed(True, self.clock(), getattr(self.link, "lease_ms", self.lease_ms)))
            elif isinstance(action, Renew):
                self.apply(s.renewed(True, self.clock(), await self.link.renew()))
            elif isinstance(action, Enable):
                self.apply(s.enabled(True, await self.link.enable()))
            elif isinstance(action, Disable):
                await self.link.disable()
            elif isinstance(action, Release):
                await self.link.release()
        except ControlError as exc:
            if isinstance(action, Claim):
                self.apply(s.claimed(False, self.clock(), holder=holder_of(exc)))
            elif isinstance(action, Renew):
                self.apply(s.renewed(False, self.clock()))
            elif isinstance(action, Enable):
                self.apply(s.enabled(False, error=str(exc)))
            # a refused disable or release: the lease is already gone, so is motion
        except TwistrateError as exc:  # no reply in time
            if isinstance(action, Claim):
                self.apply(s.claimed(False, self.clock()))
            elif isinstance(action, Enable):
                self.apply(s.enabled(False, error=str(exc)))
            self.errors.append(f"{type(action).__name__.lower()}: {exc}")

    def _restarted(self) -> None:
        self.apply(self.session.service_restarted(self.clock()))

    # -- loops ---------------------------------------------------------------------------------------

    async def _ticks(self, seconds: float | None) -> None:
        start = next_tick = self.clock()
        self.apply(self.core.start(start))
        while not self._stop.is_set():
            now = self.clock()
            if self.keys is not None:
                for char in self.keys.read():
                    self.apply(self.core.key(char, now))
            self.apply(self.core.poll(now) + self.core.tick(now))
            if self.session.closed or (seconds is not None and now - start >= seconds) or \
                    getattr(self.core.source, "finished", False):
                break
            next_tick += self.period_s
            if next_tick < self.clock():  # a late loop re-anchors instead of bursting
                next_tick = self.clock() + self.period_s
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(max(0.0, next_tick - self.clock())):
                    await self._stop.wait()

    async def _news(self) -> None:
        async for message in self.link.messages():  # type: ignore[attr-defined]
            if isinstance(message, CommandMessage):
                self.apply(self.session.service_mode(message.mode, message.health, message.scale))
            elif isinstance(message, HealthMessage):
                self.apply(self.session.service_mode(message.mode, message.state, message.scale))
            elif isinstance(message, EventMessage):
                self.apply(self.session.service_event(message.event, message.mode, message.detail))
            else:
                self._state(message)

    def _state(self, message: Any) -> None:
        """A `state` message (docs/protocol.md 7.6): the tool's orientation R_base_tool (3, 3) of the tick
        it describes, for a reference point given in the base frame."""
        rotation = getattr(message, "tool_rotation", None)
        if rotation is not None and np.shape(rotation) == (3, 3):
            self.session.tool_pose(np.asarray(rotation, dtype=float))

    async def _status(self) -> None:
        while not self._stop.is_set():
            with contextlib.suppress(TwistrateError):
                self.apply(self.session.service_status(await self.link.status()))
            await asyncio.sleep(STATUS_PERIOD_S)

    async def _line(self) -> None:
        while self.show is not None and not self._stop.is_set():
            self.show(self.session.view())
            await asyncio.sleep(LINE_PERIOD_S)

    def quit(self) -> None:
        """Stop from outside (signal handlers): zeros, disable and release go out at once."""
        self.apply(self.session.command("quit", self.clock()))
        self._stop.set()

    async def run(self, seconds: float | None = None) -> int:
        """Run until quit; returns the number of twists sent."""
        loop = asyncio.get_running_loop()
        handled = []
        for sig in (signal.SIGINT, signal.SIGTERM):
            with contextlib.suppress(NotImplementedError, RuntimeError, ValueError):
                loop.add_signal_handler(sig, self.quit)
                handled.append(sig)
        worker = loop.create_task(self._worker())
        helpers = [loop.create_task(self._news()), loop.create_task(self._status()),
                   loop.create_task(self._line())]
        try:
            await self._ticks(seconds)
        finally:
            if not self.session.closed:
                self.apply(self.session.command("quit", self.clock()))
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(CLOSE_TIMEOUT_S):
                    await self._queue.join()
            if self._requests:
                await asyncio.wait(set(self._requests), timeout=CLOSE_TIMEOUT_S)
            helpers.append(worker)
            self._stop.set()
            for task in helpers:
                task.cancel()
            # bounded: a helper that missed its cancellation must not keep the run from returning
            _, late = await asyncio.wait(helpers, timeout=CLOSE_TIMEOUT_S)
            for task in late:
                task.cancel()
            for sig in handled:
                loop.remove_signal_handler(sig)
            if self.show is not None:
                self.show(self.session.view())
        return self.sent
