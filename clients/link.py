"""A small blocking client of a twistrate service over the documented wire protocol (docs/protocol.md).

Used by tests, the benchmark, the demo's scripted twist source and other clients. It speaks only
the protocol: messages are built and checked by `twistrate.service.wire`, the protocol's reference
implementation. Every receive has a timeout; nothing here waits forever. Not thread-safe: use one
Link per thread.

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
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zmq
import zmq.auth

from twistrate.service import wire
from twistrate.service.wire import (
    CommandMessage,
    EventMessage,
    HealthMessage,
    OutputMessage,
    ReplyMessage,
    StateMessage,
)
from twistrate.solver.errors import ConfigError, ControlError, TwistrateError, WireError, field_error

#: Default reply timeout of a control request, s.
DEFAULT_TIMEOUT_S = 1.0
#: Renew the lease when this fraction of its duration has passed since the last claim/renew.
RENEW_FRACTION = 1.0 / 3.0
#: Socket bounds of the client (the service sets its own; docs/protocol.md section 12).
MAX_MESSAGE_BYTES = 65536
SEND_HWM = 100
RECEIVE_HWM = 1000


class LinkTimeoutError(TwistrateError, TimeoutError):
    """No reply (or no message) within the timeout."""


def plain(value: Any) -> Any:
    """`value` with numpy scalars made Python ones (np.float64 -> float, np.int64 -> int, np.bool_ -> bool,
    np.str_ -> str), inside maps, lists and tuples too; anything else unchanged. The codec accepts only
    Python types (a numpy float is not a msgpack float to it); callers of the link need not care."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, Mapping):
        return {plain(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    return value


@dataclass(frozen=True)
class Endpoints:
    """Where the service listens (it binds; the link connects)."""

    intake: str = wire.DEFAULT_INTAKE
    output: str = wire.DEFAULT_OUTPUT
    control: str = wire.DEFAULT_CONTROL


@dataclass(frozen=True)
class CurveKeys:
    """CURVE keys of a client (Z85 bytes): the service's public key and the client's own pair."""

    server_public: bytes
    public: bytes
    secret: bytes

    @classmethod
    def from_files(cls, server_public_file: str | Path, client_secret_file: str | Path) -> CurveKeys:
        """Read the service's NAME.key and the client's NAME.key_secret (from `twistrate keys`)."""
        try:
            server_public, _ = zmq.auth.load_certificate(server_public_file)
            public, secret = zmq.auth.load_certificate(client_secret_file)
        except (OSError, ValueError) as exc:
            raise field_error(ConfigError, "curve key file", str(exc),
                              "key files written by `twistrate keys`") from None
        if secret is None:
            raise field_error(ConfigError, "client_secret_file", str(client_secret_file),
                              "the client's NAME.key_secret file (public and secret key)")
        return cls(server_public, public, secret)


class Link:
    """A connection to one service: control requests, twist and joint-state sending, output receiving.

    endpoints : where the service listens. curve : client keys when the service uses CURVE.
    timeout_s : default reply timeout of control requests. client : name sent with `claim`.
    topics : output topics to subscribe to (command, health, event; empty tuple for none).
    auto_renew : renew the lease from send_twist/send_joints when a third of it has passed.
    n : joint count, checked in received commands and health (None: any; `arm()` sets it).
    """

    def __init__(self, endpoints: Endpoints | None = None, curve: CurveKeys | None = None, *,
                 timeout_s: float = DEFAULT_TIMEOUT_S, client: str = "link",
                 topics: Sequence[bytes] = wire.OUTPUT_TOPICS, auto_renew: bool = True,
                 n: int | None = None, context: zmq.Context | None = None) -> None:
        self.endpoints = endpoints or Endpoints()
        self.timeout_s = float(timeout_s)
        self.client = client
        self.auto_renew = auto_renew
        self.n = n
        self.lease: str | None = None
        self.lease_ms: int | None = None
        self._renewed_at = 0.0
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
        sock = self._ctx.socket(kind)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
        sock.setsockopt(zmq.SNDHWM, SEND_HWM)
        sock.setsockopt(zmq.RCVHWM, RECEIVE_HWM)
        if curve is not None:
            sock.curve_serverkey = curve.server_public
            sock.curve_publickey = curve.public
            sock.curve_secretkey = curve.secret
        return sock

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
        seq = self._seq[wire.KIND_REQUEST] = self._seq[wire.KIND_REQUEST] + 1
        data = wire.encode_request(seq=seq, op=op, **{k: plain(v) for k, v in args.items()})
        self._control.send_multipart([b"", data])
        reply = self._await_reply(seq, op, self.timeout_s if timeout_s is None else timeout_s)
        if not reply.ok:
            text = reply.error_message or ""
            # name the op once: the service's message may already start with it ("claim: lease held ...")
            raise ControlError(reply.error_code or "internal", text if text.startswith(f"{op}:") else
                               f"{op}: {text}")
        return reply.result

    def _await_reply(self, seq: int, op: str, timeout_s: float) -> ReplyMessage:
        deadline = time.monotonic() + timeout_s
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not self._control.poll(int(remaining * 1000) + 1, zmq.POLLIN):
                raise LinkTimeoutError(f"{op}: no reply from {self.endpoints.control} within {timeout_s:g} s")
            frames = self._control.recv_multipart()
            if len(frames) != 2 or frames[0] != b"":
                raise WireError("bad_frames", f"reply frames: got {len(frames)}; accepted: [b'', map]")
            reply = wire.decode_reply(frames[1])
            if reply.seq == seq:
                return reply
            # a late reply to an earlier request that timed out: drop it and keep waiting

    def claim(self, client: str | None = None, lease_ms: int | None = None) -> str:
        """Take the lease; returns (and keeps) the token."""
        args: dict[str, Any] = {"client": client or self.client}
        if lease_ms is not None:
            args["lease_ms"] = lease_ms
        result = self.request("claim", **args)
        self.lease, self.lease_ms = result["lease"], result["lease_ms"]
        self._renewed_at = time.monotonic()
        return result["lease"]

    def _token(self) -> str:
        if self.lease is None:
            raise ControlError("no_lease", "lease: got None; accepted: a token from claim() (claim first)")
        return self.lease

    def renew(self) -> int:
        """Extend the lease; returns its duration, ms."""
        result = self.request("renew", lease=self._token())
        self.lease_ms = result["lease_ms"]
        self._renewed_at = time.monotonic()
        return result["lease_ms"]

    def renew_if_due(self) -> None:
        """Renew when RENEW_FRACTION of the lease has passed since the last claim/renew."""
        if self.lease is not None and self.lease_ms is not None and \
                time.monotonic() - self._renewed_at >= self.lease_ms * 1e-3 * RENEW_FRACTION:
            self.renew()

    def release(self) -> None:
        """Give the lease up (motion is disabled by the service)."""
        self.request("release", lease=self._token())
        self.lease = self.lease_ms = None

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
            self.renew_if_due()
        seq = self._seq[wire.KIND_TWIST] = self._seq[wire.KIND_TWIST] + 1
        data = wire.encode_twist(seq=seq, lease=self._token(), linear=linear, angular=angular, frame=frame,
                                  point=point)
        self._intake.send_multipart([wire.TOPIC_TWIST, data])
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
        return wire.decode_output(self._output.recv_multipart(), self.n)

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
