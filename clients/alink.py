"""An asyncio client of a twistrate service (zmq.asyncio; run it on uvloop), beside the blocking Link.

Both forms share their message code (twistrate.clients.linkbase over twistrate.service.wire). What this
form adds: several coroutines may wait on requests at once (replies are matched by seq by one reader
task); the lease is renewed by a task of its own, so a slow renewal never delays a twist (`send_twist`
is a plain, non-blocking call that never waits for the service); output messages are fanned out to
any number of iterators (`commands()`, `health()`, `events()`); a restarted service is noticed
(`on_restart`) from its instance id (in `status` and in every event; a tick counter that goes back
makes the link ask `status` at once) and the lease it no longer knows is dropped, never re-enabled.

    async with AsyncLink(client="pad") as link:
        await link.wait_ready()
        await link.claim()
        await link.enable()
        link.send_twist([0.02, 0, 0], [0, 0, 0])
        async for command in link.commands():
            ...
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from collections.abc import AsyncIterator, Callable, Mapping, Sequence
from typing import Any

import numpy as np
import zmq
import zmq.asyncio

from twistrate.clients.linkbase import (
    DEFAULT_TIMEOUT_S,
    RENEW_FRACTION,
    CurveKeys,
    Endpoints,
    LinkTimeoutError,
    RestartWatch,
    configure_socket,
    lease_token,
    read_reply,
    reply_result,
    request_frames,
)
from twistrate.service import wire
from twistrate.service.wire import CommandMessage, EventMessage, HealthMessage, OutputMessage, StateMessage
from twistrate.solver.errors import ControlError, TwistrateError, WireError

#: Messages an iterator may fall behind by before the oldest are dropped.
QUEUE_DEPTH = 1000
#: How long close() waits for the background tasks to end, s.
CLOSE_TIMEOUT_S = 1.0
#: After a renewal that got no reply, try again this soon, s (the lease may still be valid).
RENEW_RETRY_S = 0.05


class AsyncLink:
    """A connection to one service for asyncio programs.

    endpoints, curve, timeout_s, client, topics, n : as for the blocking Link. renew : renew the lease
    from a background task while it is held. on_restart() : called when a restarted service is noticed.
    on_lease_lost(error) : called when a renewal is refused (the lease expired or was taken).
    """

    def __init__(self, endpoints: Endpoints | None = None, curve: CurveKeys | None = None, *,
                 timeout_s: float = DEFAULT_TIMEOUT_S, client: str = "alink",
                 topics: Sequence[bytes] = wire.OUTPUT_TOPICS, n: int | None = None, renew: bool = True,
                 on_restart: Callable[[], None] | None = None,
                 on_lease_lost: Callable[[TwistrateError], None] | None = None,
                 context: zmq.asyncio.Context | None = None) -> None:
        self.endpoints = endpoints or Endpoints()
        self.timeout_s = float(timeout_s)
        self.client = client
        self.n = n
        self.auto_renew = renew
        self.on_restart = on_restart
        self.on_lease_lost = on_lease_lost
        self.lease: str | None = None
        self.lease_ms: int | None = None
        self.lease_lost: TwistrateError | None = None  # why the last lease was lost, if it was
        self.renewed_at = 0.0
        self.restart = RestartWatch(trust_ticks=False)  # the id decides; a tick drop asks status
        self._seq = {wire.KIND_TWIST: 0, wire.KIND_REQUEST: 0}
        self._own_context = context is None
        self._ctx = context or zmq.asyncio.Context()
        self._control = configure_socket(self._ctx.socket(zmq.DEALER), curve)
        self._intake = configure_socket(self._ctx.socket(zmq.XPUB), curve)
        self._intake_now = zmq.Socket.shadow(self._intake.underlying)  # plain sends: never awaited
        self._output = configure_socket(self._ctx.socket(zmq.SUB), curve)
        for topic in topics:
            self._output.setsockopt(zmq.SUBSCRIBE, topic)
        self._control.connect(self.endpoints.control)
        self._intake.connect(self.endpoints.intake)
        self._output.connect(self.endpoints.output)
        self._subscribed: set[bytes] = set()
        self._pending: dict[int, asyncio.Future] = {}
        self._queues: list[tuple[tuple[type, ...], asyncio.Queue]] = []
        self._tasks: dict[str, asyncio.Task] = {}
        self.dropped = 0
        self.malformed = 0
        self._closed = False

    # -- life cycle ----------------------------------------------------------------------------------

    async def __aenter__(self) -> AsyncLink:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    async def close(self) -> None:
        """Stop the background tasks and close the sockets (does not release the lease)."""
        if self._closed:
            return
        self._closed = True
        tasks = list(self._tasks.values())
        for task in tasks:
            task.cancel()
        if tasks:
            await asyncio.wait(tasks, timeout=CLOSE_TIMEOUT_S)  # bounded, come what may
        for future in self._pending.values():
            if not future.done():
                future.cancel()
        # not self._intake_now.close(): closing the shadow closes the socket it shadows, and closing
        # that one again below would corrupt the next link made in this process
        for sock in (self._control, self._intake, self._output):
            sock.close(linger=0)
        if self._own_context:
            self._ctx.term()

    def _task(self, name: str, factory: Callable[[], Any]) -> None:
        task = self._tasks.get(name)
        if task is None or task.done():
            self._tasks[name] = asyncio.get_running_loop().create_task(factory(), name=f"alink-{name}")

    async def wait_ready(self, timeout_s: float | None = None,
                         topics: Sequence[bytes] = (wire.TOPIC_TWIST,)) -> None:
        """Wait until the service's intake has subscribed to `topics`, or raise LinkTimeoutError."""
        timeout = self.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + timeout
        while not set(topics) <= self._subscribed:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not await self._intake.poll(int(remaining * 1000) + 1, zmq.POLLIN):
                raise LinkTimeoutError(f"intake {self.endpoints.intake}: no subscription to "
                                       f"{sorted(set(topics) - self._subscribed)} within {timeout:g} s "
                                       "(is the service running?)")
            msg = await self._intake.recv()
            if msg[:1] == b"\x01":
                self._subscribed.add(msg[1:])
            elif msg[:1] == b"\x00":
                self._subscribed.discard(msg[1:])

    # -- control -------------------------------------------------------------------------------------

    async def request(self, op: str, timeout_s: float | None = None, **args: Any) -> dict[str, Any]:
        """Send one control request and await its result map. Raises ControlError(code, message) when
        refused, LinkTimeoutError when no reply arrives in time, WireError on a malformed reply."""
        self._task("control", self._read_control)
        seq = self._seq[wire.KIND_REQUEST] = self._seq[wire.KIND_REQUEST] + 1
        future: asyncio.Future = asyncio.get_running_loop().create_future()
        self._pending[seq] = future
        timeout = self.timeout_s if timeout_s is None else timeout_s
        try:
            # asyncio.timeout, not wait_for: wait_for on Python 3.11 can swallow a cancellation that
            # meets a reply (the caller's task then runs on after cancel())
            async with asyncio.timeout(timeout):
                await self._control.send_multipart(request_frames(seq, op, args))
                reply = await future
        except TimeoutError:
            raise LinkTimeoutError(f"{op}: no reply from {self.endpoints.control} "
                                   f"within {timeout:g} s") from None
        finally:
            self._pending.pop(seq, None)
        if op == "status" and reply.ok:
            self._saw_instance(reply.result["instance"])  # checked by the codec: an int >= 1
        if "tick" in reply.result and isinstance(reply.result["tick"], int):
            self._saw_tick(reply.result["tick"], status=True)
        return reply_result(reply, op)

    async def _read_control(self) -> None:
        while True:
            frames = await self._control.recv_multipart()
            try:
                reply = read_reply(frames)
            except WireError:
                self.malformed += 1
                continue
            future = self._pending.get(reply.seq)
            if future is not None and not future.done():
                future.set_result(reply)
            # else: a late reply to a request that timed out: dropped

    def _token(self) -> str:
        return lease_token(self.lease, self.lease_lost)

    async def claim(self, client: str | None = None, lease_ms: int | None = None) -> str:
        """Take the lease; returns (and keeps) the token. Starts the renewal task (renew=True)."""
        args: dict[str, Any] = {"client": client or self.client}
        if lease_ms is not None:
            args["lease_ms"] = lease_ms
        result = await self.request("claim", **args)
        self.lease, self.lease_ms = result["lease"], result["lease_ms"]
        self.renewed_at = time.monotonic()
        self.lease_lost = None
        if self.auto_renew:
            self._task("renew", self._renew_loop)
        return result["lease"]

    async def renew(self) -> int:
        """Extend the lease; returns its duration, ms."""
        result = await self.request("renew", lease=self._token())
        self.lease_ms = result["lease_ms"]
        self.renewed_at = time.monotonic()
        return result["lease_ms"]

    async def _renew_loop(self) -> None:
        while self.lease is not None and self.lease_ms is not None:
            due = self.renewed_at + self.lease_ms * 1e-3 * RENEW_FRACTION
            await asyncio.sleep(max(0.0, due - time.monotonic()))
            if self.lease is None:
                return
            try:
                await self.renew()
            except LinkTimeoutError:
                await asyncio.sleep(RENEW_RETRY_S)
            except ControlError as exc:
                self.lease = self.lease_ms = None
                self.lease_lost = exc
                if self.on_lease_lost is not None:
                    self.on_lease_lost(exc)
                return

    async def release(self) -> None:
        """Give the lease up (motion is disabled by the service)."""
        token = self._token()
        self.lease = self.lease_ms = None
        await self.request("release", lease=token)

    async def enable(self) -> str:
        """Allow motion; returns the mode."""
        return (await self.request("enable", lease=self._token()))["mode"]

    async def disable(self) -> str:
        """Stop following twists (the arm comes to rest); returns the mode."""
        return (await self.request("disable", lease=self._token()))["mode"]

    async def clear_fault(self) -> str:
        return (await self.request("clear_fault", lease=self._token()))["mode"]

    async def status(self) -> dict[str, Any]:
        return await self.request("status")

    async def arm(self) -> dict[str, Any]:
        """The arm's description; also sets `n` so received messages are length-checked."""
        result = await self.request("arm")
        self.n = int(result["n"])
        return result

    async def counters(self) -> dict[str, int]:
        return (await self.request("counters"))["counters"]

    async def set(self, params: Mapping[str, Any] | None = None, **kw: Any) -> dict[str, Any]:
        """Change run-time tunables (all or nothing); returns every tunable's value after the change."""
        return (await self.request("set", lease=self._token(), params={**(params or {}), **kw}))["params"]

    # -- stream out ----------------------------------------------------------------------------------

    def send_twist(self, linear: Sequence[float] | np.ndarray, angular: Sequence[float] | np.ndarray,
                   frame: str = "base", point: Sequence[float] | np.ndarray | None = None) -> int:
        """Send a twist under the current lease, now (never waits): linear (3,) m/s, angular (3,) rad/s,
        both in `frame` ("base" or "tool"); point (3,) m offset of the reference point from the tool
        origin in `frame`. Returns its seq. Raises InputError for values the protocol refuses,
        ControlError("no_lease") without a lease."""
        seq = self._seq[wire.KIND_TWIST] = self._seq[wire.KIND_TWIST] + 1
        data = wire.encode_twist(seq=seq, lease=self._token(), linear=linear, angular=angular, frame=frame,
                                 point=point)
        self._intake_now.send_multipart([wire.TOPIC_TWIST, data], zmq.NOBLOCK)
        return seq

    # -- stream in -----------------------------------------------------------------------------------

    def _saw_tick(self, tick: int, status: bool = False) -> None:
        if self.restart.see(tick, status):
            self._restarted()
        elif self.restart.suspect and not self._closed:
            self._task("confirm", self._confirm)  # the counter went back: let the instance id decide

    def _saw_instance(self, instance: int) -> None:
        if self.restart.see_instance(instance):
            self._restarted()

    async def _confirm(self) -> None:
        with contextlib.suppress(TwistrateError):  # no reply: the next tick drop asks again
            await self.status()

    def _restarted(self) -> None:
        if self.lease is not None or self.lease_lost is not None:  # the restart explains the loss
            self.lease_lost = ControlError("no_lease", f"the service restarted ({self.restart.describe()}); "
                                           "a restarted service is disabled and holds no lease")
        self.lease = self.lease_ms = None  # the new instance knows no lease of ours
        task = self._tasks.get("renew")
        if task is not None:
            task.cancel()
        if self.on_restart is not None:
            self.on_restart()

    async def _read_output(self) -> None:
        while True:
            frames = await self._output.recv_multipart()
            try:
                message = wire.decode_output(frames, self.n)
            except WireError:
                self.malformed += 1
                continue
            if isinstance(message, EventMessage):
                self._saw_instance(message.instance)
            self._saw_tick(message.tick)
            for kinds, queue in self._queues:
                if isinstance(message, kinds):
                    if queue.full():
                        queue.get_nowait()
                        self.dropped += 1
                    queue.put_nowait(message)

    async def messages(self, kinds: tuple[type, ...] = (CommandMessage, HealthMessage, EventMessage,
                                                        StateMessage)) -> AsyncIterator[OutputMessage]:
        """Every output message of `kinds` from now on, decoded and checked, oldest first (each
        iterator has its own queue; a slow one drops its oldest beyond QUEUE_DEPTH)."""
        queue: asyncio.Queue = asyncio.Queue(QUEUE_DEPTH)
        entry = (kinds, queue)
        self._queues.append(entry)
        self._task("output", self._read_output)
        try:
            while True:
                yield await queue.get()
        finally:
            self._queues.remove(entry)

    def commands(self) -> AsyncIterator[CommandMessage]:
        return self.messages((CommandMessage,))  # type: ignore[return-value]

    def health(self) -> AsyncIterator[HealthMessage]:
        return self.messages((HealthMessage,))  # type: ignore[return-value]

    def events(self) -> AsyncIterator[EventMessage]:
        return self.messages((EventMessage,))  # type: ignore[return-value]

    async def receive(self, kinds: tuple[type, ...] = (CommandMessage, HealthMessage, EventMessage),
                      timeout_s: float | None = None) -> OutputMessage:
        """The next output message of `kinds`, or LinkTimeoutError."""
        timeout = self.timeout_s if timeout_s is None else timeout_s
        iterator = self.messages(kinds)
        try:
            async with asyncio.timeout(timeout):
                return await anext(iterator)
        except TimeoutError:
            raise LinkTimeoutError(f"no {'/'.join(k.__name__ for k in kinds)} from {self.endpoints.output} "
                                   f"within {timeout:g} s") from None
        finally:
            await iterator.aclose()
