"""A small blocking client of a twistrate service over the documented wire protocol (docs/protocol.md).

Used by tests, the benchmark, the demo's scripted twist source and other clients. It speaks only
the protocol: messages are built and checked by `twistrate.service.wire`, the protocol's reference
implementation, through the message code it shares with the asyncio client (twistrate.clients.linkbase).
Every receive has a timeout; nothing here waits forever. Not thread-safe: use one Link per thread.

The automatic lease renewal never blocks a twist: `send_twist` sends the renew request and returns;
the reply is taken up by later calls. A restarted service is noticed from its tick counter
(`on_restart`, `restart.restarts`): the lease it no longer knows is dropped, and nothing re-enables.

    with Link() as link:
        link.wait_ready()
        link.claim("pad")
        link.enable()
        link.send_twist([0.02, 0, 0], [0, 0, 0])
        command = link.receive_command(timeout_s=0.5)
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import zmq

from twistrate.clients.linkbase import (  # the shared message code; re-exported for existing callers
    DEFAULT_TIMEOUT_S,
    MAX_MESSAGE_BYTES,
    RECEIVE_HWM,
    RENEW_FRACTION,
    SEND_HWM,
    CurveKeys,
    Endpoints,
    LinkTimeoutError,
    RestartWatch,
    configure_socket,
    lease_token,
    plain,
    read_reply,
    renew_due,
    reply_result,
    request_frames,
)
from twistrate.service import wire
from twistrate.service.wire import (
    CommandMessage,
    EventMessage,
    HealthMessage,
    OutputMessage,
    ReplyMessage,
    StateMessage,
)
from twistrate.solver.errors import ControlError, TwistrateError

__all__ = ["DEFAULT_TIMEOUT_S", "MAX_MESSAGE_BYTES", "RECEIVE_HWM", "RENEW_FRACTION", "SEND_HWM", "CurveKeys",
           "Endpoints", "Link", "LinkTimeoutError", "plain"]


class Link:
    """A connection to one service: control requests, twist and joint-state sending, output receiving.

    endpoints : where the service listens. curve : client keys when the service uses CURVE.
    timeout_s : default reply timeout of control requests. client : name sent with `claim`.
    topics : output topics to subscribe to (command, health, event; empty tuple for none).
    auto_renew : renew the lease from send_twist when a third of it has passed (without waiting for
    the reply). n : joint count, checked in received commands and health (None: any; `arm()` sets it).
    on_restart() : called when a restarted service is noticed (the lease is then already dropped).
    """

    def __init__(self, endpoints: Endpoints | None = None, curve: CurveKeys | None = None, *,
                 timeout_s: float = DEFAULT_TIMEOUT_S, client: str = "link",
                 topics: Sequence[bytes] = wire.OUTPUT_TOPICS, auto_renew: bool = True,
                 n: int | None = None, context: zmq.Context | None = None,
                 on_restart: Callable[[], None] | None = None) -> None:
        self.endpoints = endpoints or Endpoints()
        self.timeout_s = float(timeout_s)
        self.client = client
        self.auto_renew = auto_renew
        self.n = n
        self.lease: str | None = None
        self.lease_ms: int | None = None
        self._renewed_at = 0.0
        self._renewing: tuple[int, float] | None = None  # (seq, sent at) of a renewal in flight
        self.lease_lost: TwistrateError | None = None  # why the last lease was lost, if it was
        self.restart = RestartWatch()
        self.on_restart = on_restart
        self._seq = {wire.KIND_TWIST: 0, wire.KIND_JOINTS: 0, wire.KIND_REQUEST: 0}
        self._own_context = context is None
        self._ctx = context or zmq.Context()
        self._control = self._socket(zmq.DEALER, curve)
        self._intake = self._socket(zmq.XPUB, curve)  # XPUB: sees the service's subscriptions (wait_ready)
        self._output = self._socket(zmq.SUB, curve)
        for topic in topics:
            self._output.setsockopt(zmq.SUBSCRIBE, topic)
        self._control.connect(self.endpoints.control)
        self._intake.connect(self.endpoints.intake)
        self._output.connect(self.endpoints.output)
        self._subscribed: set[bytes] = set()
        self._closed = False

    def _socket(self, kind: int, curve: CurveKeys | None) -> zmq.Socket:
        return configure_socket(self._ctx.socket(kind), curve)

    # -- life cycle ----------------------------------------------------------------------------------

    def close(self) -> None:
        """Close the sockets (and the context if the link made it). Does not release the lease."""
        if self._closed:
            return
        self._closed = True
        for sock in (self._control, self._intake, self._output):
            sock.close(linger=0)
        if self._own_context:
            self._ctx.term()

    def __enter__(self) -> Link:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def wait_ready(self, timeout_s: float | None = None,
                   topics: Sequence[bytes] = (wire.TOPIC_TWIST,)) -> None:
        """Block until the service's intake has subscribed to `topics` (so sent messages are not
        dropped by the publish/subscribe start-up), or raise LinkTimeoutError."""
        timeout = self.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + timeout
        while not set(topics) <= self._subscribed:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not self._intake.poll(int(remaining * 1000) + 1, zmq.POLLIN):
                raise LinkTimeoutError(f"intake {self.endpoints.intake}: no subscription to "
                                  f"{sorted(set(topics) - self._subscribed)} within {timeout:g} s "
                                  "(is the service running?)")
            msg = self._intake.recv()
            if msg[:1] == b"\x01":
                self._subscribed.add(msg[1:])
            elif msg[:1] == b"\x00":
                self._subscribed.discard(msg[1:])

    # -- control -------------------------------------------------------------------------------------

    def request(self, op: str, timeout_s: float | None = None, **args: Any) -> dict[str, Any]:
        """Send one control request and return its result map. Raises ControlError(code, message)
        when refused, LinkTimeoutError when no reply arrives in time, WireError on a malformed reply.
        Argument values may be numpy scalars (see `plain`)."""
        seq = self._send_request(op, args)
        reply = self._await_reply(seq, op, self.timeout_s if timeout_s is None else timeout_s)
        result = reply_result(reply, op)
        if op == "status" and isinstance(result.get("tick"), int):
            self._saw_instance(result["instance"])  # checked by the codec (docs/protocol.md section 6)
            self._saw_tick(result["tick"], status=True)
        return result

    def _send_request(self, op: str, args: Mapping[str, Any]) -> int:
        seq = self._seq[wire.KIND_REQUEST] = self._seq[wire.KIND_REQUEST] + 1
        self._control.send_multipart(request_frames(seq, op, args))
        return seq

    def _await_reply(self, seq: int, op: str, timeout_s: float) -> ReplyMessage:
        deadline = time.monotonic() + timeout_s
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not self._control.poll(int(remaining * 1000) + 1, zmq.POLLIN):
                raise LinkTimeoutError(f"{op}: no reply from {self.endpoints.control} within {timeout_s:g} s")
            reply = read_reply(self._control.recv_multipart())
            if reply.seq == seq:
                return reply
            self._renewal_reply(reply)
            # else a late reply to an earlier request that timed out: dropped

    def claim(self, client: str | None = None, lease_ms: int | None = None) -> str:
        """Take the lease; returns (and keeps) the token."""
        args: dict[str, Any] = {"client": client or self.client}
        if lease_ms is not None:
            args["lease_ms"] = lease_ms
        result = self.request("claim", **args)
        self.lease, self.lease_ms = result["lease"], result["lease_ms"]
        self._renewed_at = time.monotonic()
        self._renewing = None
        self.lease_lost = None
        return result["lease"]

    def _token(self) -> str:
        return lease_token(self.lease, self.lease_lost)

    def renew(self) -> int:
        """Extend the lease; returns its duration, ms."""
        result = self.request("renew", lease=self._token())
        self.lease_ms = result["lease_ms"]
        self._renewed_at = time.monotonic()
        return result["lease_ms"]

    def renew_if_due(self) -> None:
        """Renew (and wait for the reply) when RENEW_FRACTION of the lease has passed since the last
        claim/renew."""
        if self.lease is not None and renew_due(time.monotonic(), self._renewed_at, self.lease_ms):
            self.renew()

    def _renew_without_waiting(self) -> None:
        """When due: send a renew request and return; its reply is taken up by later calls."""
        self._take_replies()
        now = time.monotonic()
        if self._renewing is not None and now - self._renewing[1] > self.timeout_s:
            self._renewing = None  # no reply in time: the lease may still be valid, ask again
        due = renew_due(now, self._renewed_at, self.lease_ms)
        if self.lease is not None and self._renewing is None and due:
            self._renewing = (self._send_request("renew", {"lease": self.lease}), now)

    def _take_replies(self) -> None:
        """Take up replies already waiting (without blocking): a renewal's; late ones are dropped."""
        while self._renewing is not None and self._control.poll(0, zmq.POLLIN):
            self._renewal_reply(read_reply(self._control.recv_multipart()))

    def _renewal_reply(self, reply: ReplyMessage) -> None:
        if self._renewing is None or reply.seq != self._renewing[0]:
            return
        sent_at = self._renewing[1]
        self._renewing = None
        if reply.ok:
            self.lease_ms = reply.result["lease_ms"]
            self._renewed_at = sent_at  # the lease runs from no later than the request
        else:
            self.lease_lost = ControlError(reply.error_code or "no_lease", f"renew: {reply.error_message}")
            self.lease = self.lease_ms = None

    def _saw_instance(self, instance: int) -> None:
        if self.restart.see_instance(instance):
            self._restarted()

    def _saw_tick(self, tick: int, status: bool = False) -> None:
        if self.restart.see(tick, status):
            self._restarted()

    def _restarted(self) -> None:
        if self.lease is not None or self.lease_lost is not None:  # the restart explains the loss
            self.lease_lost = ControlError("no_lease", f"the service restarted ({self.restart.describe()}); "
                                           "a restarted service is disabled and holds no lease")
        self.lease = self.lease_ms = None
        self._renewing = None
        if self.on_restart is not None:
            self.on_restart()

    def release(self) -> None:
        """Give the lease up (motion is disabled by the service)."""
        self.request("release", lease=self._token())
        self.lease = self.lease_ms = None
        self._renewing = None

    def enable(self) -> str:
        """Allow motion; returns the mode."""
        return self.request("enable", lease=self._token())["mode"]

    def disable(self) -> str:
        """Stop following twists (the arm comes to rest); returns the mode."""
        return self.request("disable", lease=self._token())["mode"]

    def clear_fault(self) -> str:
        """Leave fault for disabled; returns the mode."""
        return self.request("clear_fault", lease=self._token())["mode"]

    def status(self) -> dict[str, Any]:
        return self.request("status")

    def arm(self) -> dict[str, Any]:
        """The arm's description; also sets `n` so received messages are length-checked."""
        result = self.request("arm")
        self.n = int(result["n"])
        return result

    def counters(self) -> dict[str, int]:
        return self.request("counters")["counters"]

    def set(self, params: Mapping[str, Any] | None = None, **kw: Any) -> dict[str, Any]:
        """Change run-time tunables (all or nothing); returns every tunable's value after the change."""
        merged = {**(params or {}), **kw}
        return self.request("set", lease=self._token(), params=merged)["params"]

    # -- stream out ----------------------------------------------------------------------------------

    def send_twist(self, linear: Sequence[float] | np.ndarray, angular: Sequence[float] | np.ndarray,
                   frame: str = "base", point: Sequence[float] | np.ndarray | None = None) -> int:
        """Send a twist under the current lease: linear (3,) m/s, angular (3,) rad/s, both in `frame`
        ("base" or "tool"); point (3,) m offset of the reference point from the tool origin in
        `frame`. Returns its seq. Raises InputError for values the protocol refuses."""
        if self.auto_renew:
            self._take_replies()  # a lost lease is known before the twist is sent
        seq = self._seq[wire.KIND_TWIST] = self._seq[wire.KIND_TWIST] + 1
        data = wire.encode_twist(seq=seq, lease=self._token(), linear=linear, angular=angular, frame=frame,
                                  point=point)
        self._intake.send_multipart([wire.TOPIC_TWIST, data])
        if self.auto_renew:
            self._renew_without_waiting()  # a renewal when due, after the twist: it does not delay it
        return seq

    def stream_twists(self, twist_at: Callable[[float], tuple[Sequence[float], Sequence[float]] | None],
                      rate_hz: float, seconds: float,
                      wait: Callable[[float], object] = time.sleep) -> int:
        """Send twist_at(t) = (linear m/s, angular rad/s), base frame, at `rate_hz` on absolute
        deadlines for `seconds` (t in s since the start), until twist_at returns None. `wait(dt)`
        sleeps dt s and may return True to stop early (e.g. threading.Event.wait). Returns the number
        of twists sent. Claim and enable first; disable and release after."""
        t0 = time.monotonic()
        period = 1.0 / rate_hz
        next_send = t0
        sent = 0
        while (t := time.monotonic() - t0) < seconds:
            twist = twist_at(t)
            if twist is None:
                break
            self.send_twist(*twist)
            sent += 1
            next_send += period
            if wait(max(0.0, next_send - time.monotonic())):
                break
        return sent

    def send_joints(self, position: Sequence[float] | np.ndarray,
                    velocity: Sequence[float] | np.ndarray | None = None, source: str | None = None) -> int:
        """Send measured joint state (a driver's job): position (n,) rad or m, velocity (n,) or None;
        source : the driver's name, the same in every joint state it sends (docs/protocol.md 7.2)."""
        seq = self._seq[wire.KIND_JOINTS] = self._seq[wire.KIND_JOINTS] + 1
        data = wire.encode_joints(seq=seq, position=position, velocity=velocity, source=source)
        self._intake.send_multipart([wire.TOPIC_JOINTS, data])
        return seq

    # -- stream in -----------------------------------------------------------------------------------

    def receive(self, timeout_s: float | None = None) -> OutputMessage:
        """The next output message (command, health or event of the subscribed topics), decoded and
        checked. Raises LinkTimeoutError, or WireError for a malformed message."""
        timeout = self.timeout_s if timeout_s is None else timeout_s
        if not self._output.poll(max(0, int(timeout * 1000)), zmq.POLLIN):
            raise LinkTimeoutError(f"no message from {self.endpoints.output} within {timeout:g} s")
        message = wire.decode_output(self._output.recv_multipart(), self.n)
        if isinstance(message, wire.EventMessage):
            self._saw_instance(message.instance)
        self._saw_tick(message.tick)
        return message

    def _receive_kind(self, cls: type, timeout_s: float | None) -> Any:
        timeout = self.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + timeout
        while True:
            remaining = deadline - time.monotonic()
            if remaining < 0:  # other kinds keep arriving, but not this one
                raise LinkTimeoutError(f"no {cls.__name__} from {self.endpoints.output} within {timeout:g} s")
            message = self.receive(remaining)
            if isinstance(message, cls):
                return message

    def receive_command(self, timeout_s: float | None = None) -> CommandMessage:
        """The next command (other kinds are skipped). Raises LinkTimeoutError."""
        return self._receive_kind(CommandMessage, timeout_s)

    def receive_health(self, timeout_s: float | None = None) -> HealthMessage:
        """The next health report (other kinds are skipped). Raises LinkTimeoutError."""
        return self._receive_kind(HealthMessage, timeout_s)

    def receive_state(self, timeout_s: float | None = None) -> StateMessage:
        """The next state report (other kinds are skipped). Raises LinkTimeoutError."""
        return self._receive_kind(StateMessage, timeout_s)

    def receive_event(self, timeout_s: float | None = None) -> EventMessage:
        """The next event (other kinds are skipped). Raises LinkTimeoutError."""
        return self._receive_kind(EventMessage, timeout_s)

    def drain(self) -> int:
        """Drop every output message already queued (to read fresh ones next); returns how many."""
        count = 0
        while self._output.poll(0, zmq.POLLIN):
            self._output.recv_multipart()
            count += 1
        return count
