"""The intake: the newest valid twist and joint state from the intake socket, everything skipped counted.

Socket-free: `drain(poll, now, budget_ns)` takes messages from `poll()` (the next waiting [topic, map]
frames, or None when nothing waits). Only the newest twist and the newest joint state matter, so a drain
costs bounded time, not only a bounded count (a flood from any local peer must not cost the tick its
deadline):

1. take: frames come off the socket until it is empty, MAX_DRAIN_PER_TICK were taken, or half the
   drain's time budget is spent; what is not taken waits in the socket for the next drain (nothing is
   dropped by the service; the socket's receive high-water mark bounds that queue, and ZeroMQ drops
   beyond it on the sending side, unseen here);
2. decode newest first: per topic (twist, joints) the newest frame taken is decoded and checked; if it
   is refused the next older one is tried, until one is accepted or the budget is spent (the newest is
   always decoded). Frames of neither topic or not of two frames are refused (`bad_frames`,
   `unknown_kind`) without decoding anything.

Every frame taken is counted once: `accepted_twist` / `accepted_joints` (the one decoded and used), a
refusal reason (`rejected_REASON`: the wire reasons, `not_leased`, `unexpected_joints`,
`second_source`), or `superseded`: taken in the same drain as a newer message of its topic and
discarded unread (never decoded, so never checked), either because a newer one was accepted or
because the budget ran out while newer ones were decoded and refused. Refusals are logged at a
bounded rate.

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

#: At most this many intake messages are taken per drain (the rest wait for the next drain, and the
#: socket's receive high-water mark bounds the queue).
MAX_DRAIN_PER_TICK = 256
#: Time budget of one drain, ns (taking frames stops at half of it, decoding older ones at all of it).
#: Measured here: taking a frame off the socket costs about 2 us, decoding and checking a twist about
#: 6 us, so 150 us is some 35 frames and a dozen decodes under a flood, and one or two of each when the
#: peers behave. The pipeline gives the drain before the deadline this budget and the one at the
#: deadline a third of it (the publish waits for that one).
DRAIN_BUDGET_NS = 150_000

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
                 guard: JointSourceGuard | None = None,
                 commanded: Callable[[], np.ndarray] | None = None) -> None:
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
        #: the rates commanded last, (n,) rad/s or m/s (the guard's frozen-state check), or None
        self.commanded = commanded

    def reject(self, reason: str, now: int, text: str) -> None:
        self.telemetry.reject(reason)
        self.rlog.warning(reason, now, f"intake refused ({reason}): {text}")

    def drain(self, poll: Poll, now: int, budget_ns: int = DRAIN_BUDGET_NS) -> None:
        """Take what waits, within budget_ns, and keep the newest valid twist and joint state (now :
        monotonic ns, the receive time the watchdogs use and the start of the budget)."""
        since = self.empty_ns
        clock = self.clock
        take_until = now + budget_ns // 2
        twists: list[bytes] = []
        joints: list[bytes] = []
        polled = now
        for i in range(MAX_DRAIN_PER_TICK):
            if i:
                polled = clock()  # before the poll: what it finds arrived after this reading
                if polled > take_until:
                    break
            frames = poll()
            if frames is None:
                self.empty_ns = polled
                break
            if len(frames) == 2:
                topic = frames[0]
                if topic == wire.TOPIC_TWIST:
                    twists.append(frames[1])
                    continue
                if topic == wire.TOPIC_JOINTS:
                    joints.append(frames[1])
                    continue
            self._refuse_frames(frames, now)
        decode_until = now + budget_ns
        if twists:
            self._newest_twist(twists, now, since, decode_until)
        if joints:
            self._newest_joints(joints, now, decode_until)

    def _refuse_frames(self, frames: list[bytes], now: int) -> None:
        """A message of neither intake topic, or not [topic, map]: refused by the codec's reason."""
        try:
            wire.decode_intake(frames, self.n)
        except WireError as exc:
            self.reject(exc.reason, now, str(exc))
            return
        raise AssertionError("decode_intake accepted frames the drain did not sort")  # pragma: no cover

    def _newest_twist(self, datas: list[bytes], now: int, since: int, decode_until: int) -> None:
        counts, clock = self.telemetry.counts, self.clock
        for k in range(len(datas) - 1, -1, -1):
            if k < len(datas) - 1 and clock() > decode_until:
                counts["superseded"] += k + 1
                return
            try:
                msg = wire.decode_twist(datas[k])
            except WireError as exc:
                self.reject(exc.reason, now, str(exc))
                continue
            if not self.state.holds(msg.lease, now):
                self.reject("not_leased", now, f"twist seq {msg.seq} without the current lease")
                continue
            counts["accepted_twist"] += 1
            counts["superseded"] += k
            self.twist = msg
            self.desired = DesiredTwist(msg.linear, msg.angular, msg.frame, msg.point)
            self.twist_rx_ns = now
            self.twist_since_ns = since
            self.twist_unanswered = True
            return

    def _newest_joints(self, datas: list[bytes], now: int, decode_until: int) -> None:
        counts, clock = self.telemetry.counts, self.clock
        for k in range(len(datas) - 1, -1, -1):
            if k < len(datas) - 1 and clock() > decode_until:
                counts["superseded"] += k + 1
                return
            try:
                msg = wire.decode_joints(datas[k], self.n)
            except WireError as exc:
                self.reject(exc.reason, now, str(exc))
                if not self.simulated and exc.reason in ("non_finite", "too_large"):
                    self.fault(f"joint state refused: {exc}")
                continue
            if self.simulated:
                self.reject("unexpected_joints", now, "joint state sent to a service simulating its arm")
                continue
            if self.guard is not None and self._second_source(msg, now):
                # refused (and the service faulted); the older states of this drain are not used either
                self.telemetry.reject("second_source")
                counts["superseded"] += k
                return
            counts["accepted_joints"] += 1
            counts["superseded"] += k
            self.q = msg.position
            self.q_rx_ns = now
            if self.commanded is not None and self.guard is not None:
                self._frozen(msg.position, now)
            return

    # -- one joint-state source (service/joint_source.py) ---------------------------------------------

    def _frozen(self, q: np.ndarray, now: int) -> None:
        """A driver repeating one position while motion is commanded: the state is taken (it is the newest
        measurement) but the joint state is fresh only from its last change, so it goes stale and the
        service stops the arm as for a silent driver (counted `joints_frozen`, logged at a bounded rate).
        In fault the check restarts from each state."""
        if self.state.mode in (st.FAULT, st.SHUTDOWN):
            self.guard.restart_frozen(q, now)
            return
        reason = self.guard.frozen(q, now, self.commanded())
        if reason is not None:
            self.q_rx_ns = self.guard.changed_ns
            self.telemetry.counts["joints_frozen"] += 1
            self.rlog.warning("joints_frozen", now, reason)

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
