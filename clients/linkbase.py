"""What the blocking and the asyncio client share: endpoints, keys, socket set-up, request and reply
handling, lease timing and service-restart detection. No I/O of its own: both link forms call these
around their own sockets, so they build and check every message the same way (twistrate.service.wire).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zmq
import zmq.auth

from twistrate.service import wire
from twistrate.service.wire import ReplyMessage
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


def configure_socket(sock: zmq.Socket, curve: CurveKeys | None) -> zmq.Socket:
    """The client's socket options (no linger, size and queue bounds, CURVE when given)."""
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
    sock.setsockopt(zmq.SNDHWM, SEND_HWM)
    sock.setsockopt(zmq.RCVHWM, RECEIVE_HWM)
    if curve is not None:
        sock.curve_serverkey = curve.server_public
        sock.curve_publickey = curve.public
        sock.curve_secretkey = curve.secret
    return sock


def request_frames(seq: int, op: str, args: Mapping[str, Any]) -> list[bytes]:
    """The DEALER frames of one control request (numpy scalars in args allowed)."""
    return [b"", wire.encode_request(seq=seq, op=op, **{k: plain(v) for k, v in args.items()})]


def read_reply(frames: Sequence[bytes]) -> ReplyMessage:
    """Decode the DEALER frames of one reply. Raises WireError when malformed."""
    if len(frames) != 2 or frames[0] != b"":
        raise WireError("bad_frames", f"reply frames: got {len(frames)}; accepted: [b'', map]")
    return wire.decode_reply(frames[1])


def reply_result(reply: ReplyMessage, op: str) -> dict[str, Any]:
    """The result map of a reply, or ControlError(code, message) when refused."""
    if not reply.ok:
        text = reply.error_message or ""
        # name the op once: the service's message may already start with it ("claim: lease held ...")
        raise ControlError(reply.error_code or "internal",
                           text if text.startswith(f"{op}:") else f"{op}: {text}")
    return reply.result


def no_lease_error() -> ControlError:
    return ControlError("no_lease", "lease: got None; accepted: a token from claim() (claim first)")


def lease_token(lease: str | None, lost: str | None) -> str:
    """The token to send, or ControlError no_lease: none claimed yet, or lost (`lost` says why)."""
    if lease is None:
        if lost is not None:
            raise ControlError("no_lease", f"lease: lost ({lost}); accepted: a token from claim() "
                               "(claim again)")
        raise no_lease_error()
    return lease


def renew_due(now_s: float, renewed_at_s: float, lease_ms: int | None) -> bool:
    """A third (RENEW_FRACTION) of the lease has passed since the last claim or renew."""
    return lease_ms is not None and now_s - renewed_at_s >= lease_ms * 1e-3 * RENEW_FRACTION


#: A tick this far below the highest seen means a new service instance (a status reply may lag the
#: published commands by a few ticks; a restarted service starts again from tick 0).
RESTART_MARGIN_TICKS = 100


class RestartWatch:
    """Notices a restarted service. The authority is the instance id (docs/protocol.md section 6: a
    random id per service process, in the `status` result and in every event): `see_instance(id)`
    returns True once per new id. The tick counter is the fast hint: a new service starts it at zero,
    so a tick more than RESTART_MARGIN_TICKS below the highest seen `see(tick)` reports as a restart
    while no id is known, or, once one is, when `trust_ticks` (the blocking Link, which has no task to
    ask with); otherwise it sets `suspect`, and the caller asks `status` to let the id decide. A
    restarted service is disabled and holds no lease (sections 9 and 10): the client must claim again,
    and only the operator may enable.

    Which ticks are compared: output messages (commands, health, state, events) arrive in the order
    the service published them, so one lower than an earlier one by more than the margin is a new
    instance's. A `status` reply carries the tick the service is at now, ahead of every output message
    still queued for the client: it is compared with everything seen before (a status tick far below
    an output message's is a restart), but it never raises the mark the output messages are compared
    with (`see(tick, status=True)`), or reading queued commands after a status would look like the tick
    counter going back.

    by : what noticed the last restart ("instance" or "tick"); instance : the id known (None: not yet;
    after a restart noticed from the ticks, the next id is learned without a second notice)."""

    def __init__(self, trust_ticks: bool = True) -> None:
        self.trust_ticks = trust_ticks
        #: the highest tick seen (output messages and status replies)
        self.highest: int | None = None
        #: the highest tick of an output message (what the next output message is compared with)
        self.highest_output: int | None = None
        self.highest_before: int | None = None  # the highest tick of the instance before the restart
        self.restarts = 0
        self.instance: int | None = None
        self.instance_before: int | None = None
        self.by: str | None = None
        self.suspect = False

    def see(self, tick: int, status: bool = False) -> bool:
        """The tick of an output message (in the order received), or of a `status` reply (status=True);
        True when it shows a restart (see the class docstring)."""
        mark = self.highest if status else self.highest_output
        dropped = mark is not None and tick + RESTART_MARGIN_TICKS < mark
        if dropped and (self.instance is None or self.trust_ticks):
            self._restarted("tick")
            self.instance_before, self.instance = self.instance, None  # the new id: learned, not news
            self.highest = tick
            self.highest_output = None if status else tick  # output still queued may be the old one's
            return True
        if dropped:
            self.suspect = True  # the id decides (ask status)
            self.highest = tick
            if not status:
                self.highest_output = tick
            return False
        if self.highest is None or tick > self.highest:
            self.highest = tick
        if not status and (self.highest_output is None or tick > self.highest_output):
            self.highest_output = tick
        return False

    def see_instance(self, instance: int) -> bool:
        """The instance id of a status result or an event; True when it is a new instance's."""
        self.suspect = False
        old, self.instance = self.instance, instance
        if old is None or old == instance:
            return False
        self._restarted("instance")
        self.instance_before = old
        self.highest = self.highest_output = None  # the new instance's ticks start afresh
        return True

    def _restarted(self, by: str) -> None:
        self.restarts += 1
        self.by = by
        self.highest_before = self.highest

    def describe(self) -> str:
        """The last restart in words (for the lease-lost message)."""
        if self.by == "instance" and self.instance_before is not None and self.instance is not None:
            return f"instance id {self.instance_before:016x} -> {self.instance:016x}"
        return f"tick counter back below {self.highest_before}"
