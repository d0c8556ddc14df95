"""The intake: the newest valid twist and joint state taken from the intake socket, every refusal counted.

Socket-free: `drain(poll, now)` takes messages from `poll()` (the next waiting [topic, map] frames, or None
when nothing waits) until the queue is empty or MAX_DRAIN_PER_TICK were taken. Only the newest twist
and the newest joint state matter; older ones are superseded. A refused message is counted under its
reason key (twistrate.service.wire.REASONS, plus `not_leased` and `unexpected_joints`) and logged at a
bounded rate; nothing else is lost.

Arrival bound: a message taken by drain() was not waiting at the last poll that found the queue empty
(`empty_ns`, a clock reading taken just before that poll), so it arrived after that instant; the
service cannot see when ZeroMQ queued it. `twist_since_ns` keeps that instant for the newest twist.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from twistrate.service import state as st
from twistrate.service import wire
from twistrate.service.joint_source import JointSourceGuard
from twistrate.service.state import ServiceState
from twistrate.service.telemetry import RateLimitedLog, Telemetry
from twistrate.solver.errors import WireError
from twistrate.solver.resolve import DesiredTwist

#: At most this many intake messages are taken per drain (a flood cannot stall the tick; the rest
#: wait for the next drain, and the socket's receive high-water mark bounds the queue).
MAX_DRAIN_PER_TICK = 256

#: poll() -> the next waiting message's frames, or None when the queue is empty
Poll = Callable[[], "list[bytes] | None"]


class Intake:
    """Newest twist and joint state of one service (tick thread only).

    n : the arm's joint count. simulated : the service simulates its arm (joint state from outside is
    refused). state : the state machine (lease check). clock : monotonic ns. fault : called with a
    reason when a joint state is refused for a non-finite or absurd value (the arm must hold).
    """

    def __init__(self, n: int, simulated: bool, state: ServiceState, telemetry: Telemetry,
                 rlog: RateLimitedLog, clock: Callable[[], int], fault: Callable[[str], None],
                 guard: JointSourceGuard | None = None) -> None:
        self.n = n
        self.simulated = simulated
        self.state = state
        self.telemetry = telemetry
        self.rlog = rlog
        self.clock = clock
        self.fault = fault
        #: the newest accepted twist, its solver form, receive time (monotonic ns) and arrival bound
        self.twist: wire.TwistMessage | None = None
        self.desired: DesiredTwist | None = None
        self.twist_rx_ns = 0
        self.twist_since_ns = 0
        #: True until a command answering the newest twist went out
        self.twist_unanswered = False
        #: the newest joint state (n,) rad or m, and its receive time (monotonic ns)
        self.q: np.ndarray | None = None
        self.q_rx_ns = 0
        #: monotonic ns of the last poll that found no message waiting
        self.empty_ns = 0
        #: the one-source check of joint state (service/joint_source.py), or None
        self.guard = guard

    def reject(self, reason: str, now: int, text: str) -> None:
        self.telemetry.reject(reason)
        self.rlog.warning(reason, now, f"intake refused ({reason}): {text}")

    def drain(self, poll: Poll, now: int) -> None:
        """Take up to MAX_DRAIN_PER_TICK waiting messages (now : monotonic ns, the receive time the
        watchdogs use)."""
        n = self.n
        since = self.empty_ns
        polled = now
        counts = self.telemetry.counts
        for i in range(MAX_DRAIN_PER_TICK):
            if i:
                polled = self.clock()
            frames = poll()
            if frames is None:
                self.empty_ns = polled
                return
            try:
                msg = wire.decode_intake(frames, n)
            except WireError as exc:
                self.reject(exc.reason, now, str(exc))
                if frames[0] == wire.TOPIC_JOINTS and not self.simulated and \
                        exc.reason in ("non_finite", "too_large"):
                    self.fault(f"joint state refused: {exc}")
                continue
            if type(msg) is wire.TwistMessage:
                if not self.state.holds(msg.lease, now):
                    self.reject("not_leased", now, f"twist seq {msg.seq} without the current lease")
                    continue
                counts["accepted_twist"] += 1
                self.twist = msg
                self.desired = DesiredTwist(msg.linear, msg.angular, msg.frame, msg.point)
                self.twist_rx_ns = now
                self.twist_since_ns = since
                self.twist_unanswered = True
            else:
                if self.simulated:
                    self.reject("unexpected_joints", now, "joint state sent to a service simulating its arm")
                    continue
                if self.guard is not None and self._second_source(msg, now):
                    continue
                counts["accepted_joints"] += 1
                self.q = msg.position
                self.q_rx_ns = now

    # -- one joint-state source (service/joint_source.py) ---------------------------------------------

    def _second_source(self, msg: wire.JointsMessage, now: int) -> bool:
        """True (and a fault) when msg cannot come from the driver that sent the previous state. In
        fault (or shutdown) every state is taken as the new reference: after clear_fault the check
        starts again from the newest one."""
        guard = self.guard
        if self.state.mode in (st.FAULT, st.SHUTDOWN):
            guard.reset(msg.position, now, msg.source)
            return False
        reason = guard.check(msg.position, now, msg.source)
        if reason is None:
            return False
        self.fault(reason)
        return True
