"""A feed from one running service over the wire: its output streams and its read-only control ops.

Per service, one thread holds a blocking client Link (the client library) subscribed to the
service's health, event and state topics (and command, when asked), and hands what it received, in
batches, to the asyncio loop that owns the Fleet (the model is only touched on that loop); a second
thread with its own Link asks the read-only control ops. Every STATUS_EVERY_S it asks the `status`
op (mode, health, lease holder, tick rate), every COUNTERS_EVERY_S `counters` (tick lateness) and,
after each (re)connection, the `arm` op (joint names and limits). A service that stops simply stops sending:
the model shows it gone, and it comes back by itself when the service does (ZeroMQ reconnects).
Nothing here claims a lease or sends a twist: the watcher cannot move an arm.
"""

from __future__ import annotations

import asyncio
import contextlib
import threading
import time
from typing import Any

from twistrate.clients.link import CurveKeys, Endpoints, Link, LinkTimeoutError
from twistrate.clients.watch.model import Fleet
from twistrate.solver.errors import TwistrateError

#: status op every this many seconds, s
STATUS_EVERY_S = 1.0
#: counters op every this many seconds, s. The service answers `counters` on its control thread with
#: percentiles of its latency histograms, which hold the interpreter lock for milliseconds (measured
#: 12 ms median for the six summaries on a loaded 2-core machine) while its tick thread needs it every
#: period; the figures the watchers show from it (tick lateness since the start) change slowly.
COUNTERS_EVERY_S = 10.0
#: control reply timeout, s (the control ops run on their own thread: a slow reply holds no stream up)
CONTROL_TIMEOUT_S = 1.0
#: longest wait for the first message of a batch, s
RECEIVE_WAIT_S = 0.05
#: most messages handed over in one batch
BATCH_MAX = 400
#: topics a watcher subscribes to by default (command comes every tick: ask for it explicitly)
WATCH_TOPICS: tuple[bytes, ...] = (b"health", b"event", b"state")
_KINDS = {
    "HealthMessage": "health",
    "CommandMessage": "command",
    "EventMessage": "event",
    "StateMessage": "state",
}


def kind_of(msg: Any) -> str | None:
    """The protocol kind of a decoded output message (health, command, event, state), or None."""
    return _KINDS.get(type(msg).__name__) or (msg.get("kind") if isinstance(msg, dict) else None)


class WireFeed:
    """One service, shown under `name`. endpoints : the service's; curve : client keys when it uses CURVE;
    topics : output topics; thresholds : (narrow_below_m, pinched_below_m) when known (its config)."""

    def __init__(
        self,
        name: str,
        endpoints: Endpoints,
        curve: CurveKeys | None = None,
        topics: tuple[bytes, ...] = WATCH_TOPICS,
        thresholds: tuple[float, float] | None = None,
        counters_every_s: float = COUNTERS_EVERY_S,
    ) -> None:
        self.name = name
        self.counters_every_s = counters_every_s
        self.endpoints = endpoints
        self.curve = curve
        self.topics = topics
        self.thresholds = thresholds
        self.received = 0
        self.malformed = 0
        self._stop = threading.Event()

    async def run(self, fleet: Fleet, stop: asyncio.Event) -> None:
        loop = asyncio.get_running_loop()
        view = fleet.arm(self.name)
        if self.thresholds is not None:
            view.set_thresholds(*self.thresholds)
        threads = [
            threading.Thread(
                target=fn, args=(loop, fleet), name=f"watch-{self.name}-{fn.__name__}", daemon=True
            )
            for fn in (self._streams, self._control)
        ]
        for t in threads:
            t.start()
        try:
            await stop.wait()
        finally:
            self._stop.set()
            for t in threads:
                await loop.run_in_executor(None, t.join, 5.0)

    def _link(self, topics: tuple[bytes, ...]) -> Link:
        return Link(
            self.endpoints,
            self.curve,
            timeout_s=CONTROL_TIMEOUT_S,
            client=f"watch-{self.name}",
            topics=topics,
            auto_renew=False,
        )

    def _streams(self, loop: asyncio.AbstractEventLoop, fleet: Fleet) -> None:
        """The output streams, in batches (a thread of its own: a slow control reply never holds them)."""
        with self._link(self.topics) as link:
            while not self._stop.is_set():
                batch = self._receive_batch(link)
                if batch:
                    loop.call_soon_threadsafe(self._apply, fleet, batch)

    def _control(self, loop: asyncio.AbstractEventLoop, fleet: Fleet) -> None:
        """The read-only ops: status every STATUS_EVERY_S, counters every counters_every_s (and after each
        (re)connection, with arm)."""
        with self._link(()) as link:
            need_arm = True
            restarts = 0
            counters_due = 0.0  # monotonic time the next counters request is due
            wait = 0.0  # ask at once, then every STATUS_EVERY_S
            while not self._stop.wait(wait):
                wait = STATUS_EVERY_S
                view = fleet.arms[self.name]
                if view.restarts != restarts:  # a new service process: its arm may differ
                    restarts, need_arm = view.restarts, True
                with contextlib.suppress(LinkTimeoutError, TwistrateError):
                    status = link.request("status")
                    loop.call_soon_threadsafe(view.set_status, status, time.monotonic())
                    if need_arm:
                        loop.call_soon_threadsafe(view.set_arm, link.request("arm"))
                        need_arm, counters_due = False, 0.0
                    if time.monotonic() >= counters_due:
                        counters = link.request("counters")["counters"]
                        counters_due = time.monotonic() + self.counters_every_s
                        loop.call_soon_threadsafe(view.set_counters, counters)

    def _receive_batch(self, link: Link) -> list[tuple[str, Any, float]]:
        batch: list[tuple[str, Any, float]] = []
        wait = RECEIVE_WAIT_S
        while len(batch) < BATCH_MAX:
            try:
                msg = link.receive(timeout_s=wait)
            except LinkTimeoutError:
                break
            except TwistrateError:  # a malformed or unknown message: counted, skipped
                self.malformed += 1
                continue
            wait = 0.0
            kind = kind_of(msg)
            if kind is not None:
                batch.append((kind, msg, time.monotonic()))
        return batch

    def _apply(self, fleet: Fleet, batch: list[tuple[str, Any, float]]) -> None:
        for kind, msg, now in batch:
            fleet.feed(self.name, kind, msg, now)
        self.received += len(batch)
