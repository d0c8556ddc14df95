"""The control plane: a ROUTER socket on an asyncio (uvloop) loop answering lease, enable and query requests.

Requests are decoded and checked here (twistrate.service.wire); anything that reads or changes tick
state is handed to the tick thread with `Service.submit` and awaited, so the loop never blocks the
tick and the tick never waits for the loop. `arm` and `counters` are answered here from read-only
data; `set` is validated here (pydantic, off the tick thread) and installed at a tick boundary.
Requests are answered one at a time, in order (a reply takes at most about one tick period).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import threading
from typing import Any

import uvloop
import zmq
import zmq.asyncio

from twistrate.service import wire
from twistrate.service.operations import apply_tunables, carry_out
from twistrate.service.runtime import Service
from twistrate.service.tunables import apply_set
from twistrate.solver.errors import ControlError, InputError, WireError

log = logging.getLogger("twistrate.service.control")

#: How long a request may wait for the tick thread, s (a tick answers within one period; more
#: means the tick thread is gone or stuck, and the client hears `internal`).
TICK_ANSWER_TIMEOUT_S = 1.0
#: ops the control plane answers without the tick thread
LOCAL_OPS = ("arm", "counters", "set")


class ControlServer:
    """Serve control requests for `service` on its configured control endpoint."""

    def __init__(self, service: Service) -> None:
        self.service = service
        self.requests = 0
        self.refused: dict[str, int] = {}
        self._arm = service.arm_description()
        self._sock: zmq.asyncio.Socket | None = None

    def open(self, context: zmq.asyncio.Context) -> None:
        """Create and bind the ROUTER socket (bounds and CURVE as the service's other sockets)."""
        sock = context.socket(zmq.ROUTER)
        try:
            self.service.configure_socket(sock)
            sock.setsockopt(zmq.ROUTER_MANDATORY, 0)
            self.service.bind(sock, "control")
        except BaseException:
            sock.close(0)
            raise
        self._sock = sock

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close(linger=100)
            self._sock = None

    async def serve(self, stop: asyncio.Event) -> None:
        """Answer requests until `stop` is set."""
        sock = self._sock
        assert sock is not None, "open() first"
        stopper = asyncio.ensure_future(stop.wait())
        try:
            while not stop.is_set():
                receiver = asyncio.ensure_future(sock.recv_multipart())
                done, _ = await asyncio.wait({receiver, stopper}, return_when=asyncio.FIRST_COMPLETED)
                if receiver not in done:
                    receiver.cancel()
                    with contextlib.suppress(asyncio.CancelledError, zmq.ZMQError):
                        await receiver
                    break
                frames = receiver.result()
                if len(frames) < 2:
                    continue  # no envelope: nothing to answer
                envelope, body = frames[:-1], frames[-1]
                reply = await self.answer(body)
                with contextlib.suppress(zmq.ZMQError):
                    await sock.send_multipart([*envelope, reply])
        finally:
            stopper.cancel()

    async def answer(self, body: bytes) -> bytes:
        """The encoded reply to one request body."""
        self.requests += 1
        try:
            req = wire.decode_request(body)
        except WireError as exc:
            seq, op = wire.peek_request(body)
            self._count(wire.error_code(exc))
            return wire.encode_reply(seq=seq, op=op, error=(wire.error_code(exc), str(exc)))
        try:
            result = await self._dispatch(req)
            return wire.encode_reply(seq=req.seq, op=req.op, result=result)
        except ControlError as exc:
            self._count(exc.code)
            code = exc.code if exc.code in wire.ERROR_CODES else "internal"
            return wire.encode_reply(seq=req.seq, op=req.op, error=(code, str(exc)))
        except (InputError, TimeoutError) as exc:  # a result we cannot encode, or no tick answer
            self._count("internal")
            log.error("control %s failed: %s", req.op, exc)
            return wire.encode_reply(seq=req.seq, op=req.op, error=("internal", f"{req.op}: {exc}"))

    def _count(self, code: str) -> None:
        self.refused[code] = self.refused.get(code, 0) + 1

    async def _dispatch(self, req: wire.RequestMessage) -> dict[str, Any]:
        op, args, service = req.op, req.args, self.service
        if op == "arm":
            return self._arm
        if op == "counters":
            counters = service.counters()
            counters["control_requests"] = self.requests
            for code, count in list(self.refused.items()):
                counters[f"control_refused_{code}"] = count
            return {"counters": counters}
        pipeline = service.pipeline
        if op == "set":
            tunables = apply_set(pipeline.tunables, args["params"])  # validation here, off the tick
            token = args["lease"]
            return await self._on_tick(lambda now: apply_tunables(pipeline, token, tunables, now))
        return await self._on_tick(lambda now: carry_out(pipeline, op, args, now))

    async def _on_tick(self, fn: Any) -> dict[str, Any]:
        fut = self.service.submit(fn)
        try:
            return await asyncio.wait_for(asyncio.wrap_future(fut), TICK_ANSWER_TIMEOUT_S)
        except TimeoutError:
            raise TimeoutError(f"the tick thread did not answer within {TICK_ANSWER_TIMEOUT_S:g} s") from None


class ControlThread:
    """The control plane on its own thread with its own uvloop loop (tests, the demo, the bench).

    `twistrate serve` runs it on the main thread instead (signals arrive there); see serve.py.
    """

    def __init__(self, service: Service) -> None:
        self.server = ControlServer(service)
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop: asyncio.Event | None = None
        self._ready = threading.Event()
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="twistrate-control", daemon=True)

    def start(self, timeout_s: float = 5.0) -> None:
        self._thread.start()
        if not self._ready.wait(timeout_s):
            raise TimeoutError("control thread did not start")
        if self._error is not None:
            raise self._error

    def _run(self) -> None:
        loop = uvloop.new_event_loop()
        asyncio.set_event_loop(loop)
        self._loop = loop
        ctx = zmq.asyncio.Context.shadow(self.server.service.context)
        try:
            self._stop = asyncio.Event()
            try:
                self.server.open(ctx)
            except BaseException as exc:
                self._error = exc
                self._ready.set()
                return
            self._ready.set()
            loop.run_until_complete(self.server.serve(self._stop))
        finally:
            self.server.close()
            loop.close()

    def stop(self, timeout_s: float = 5.0) -> None:
        if self._loop is not None and self._stop is not None and self._thread.is_alive():
            with contextlib.suppress(RuntimeError):
                self._loop.call_soon_threadsafe(self._stop.set)
        self._thread.join(timeout_s)
