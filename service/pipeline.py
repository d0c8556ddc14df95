"""One arm's tick as a plain object: the clock injected, input from a poll function, output to a publish
function, no sockets and no threads (the runtime, service/runtime.py, owns those).

A tick runs in three calls, from the tick thread:

* prepare(deadline), before the deadline: take what has arrived, check the newest joint state, compute
  its kinematics, and solve and encode this tick's command speculatively for the inputs at hand (not on a
  driver's joint state older than the last command when such states have mostly been replaced by the
  deadline: STALE_PREPARE_PAYS);
* command(deadline), at the deadline: run queued control operations, take what arrived since, step the
  state machine (lease, watchdogs, fault), then resolve rates (the speculative result when the inputs
  are still the same objects) or ramp to rest, and publish the command;
* finish(), after the command went out: book the resolution, answer the control operations, publish
  health at its own rate (and the state message on the tick after it) and the events, feed the
  recorder, step the simulated arm, and publish a Snapshot (at the health rate, and on every change of
  mode).

The runtime collects garbage between command() and finish().
"""

from __future__ import annotations

import concurrent.futures
import logging
import math
import time
from collections import deque
from collections.abc import Callable
from typing import Any

import numpy as np

from twistrate.service import state as st
from twistrate.service import wire
from twistrate.service.config import ServiceConfig
from twistrate.service.intake import DRAIN_BUDGET_NS, Intake, Poll
from twistrate.service.joint_source import JointSourceGuard
from twistrate.service.keepout_watch import KeepoutWatch
from twistrate.service.motion import ramp_to_rest, speed_cap_factor
from twistrate.service.recorder import limit_events
from twistrate.service.reports import HealthReporter
from twistrate.service.shaping import ramped, twist_ramp
from twistrate.service.simarm import SimArm
from twistrate.service.telemetry import RateLimitedLog, Snapshot, Telemetry
from twistrate.service.tick import Ticker
from twistrate.solver.arm import Arm
from twistrate.solver.errors import ControlError, InputError
from twistrate.solver.health import next_state
from twistrate.solver.kinematics import Frames, forward, geometric_jacobian
from twistrate.solver.resolve import DesiredTwist, Resolution, resolve_from_kinematics

log = logging.getLogger("twistrate.service")

#: A measured joint position this far beyond its limit (rad or m) is out of range (fault). A driver
#: whose joint stopped on a limit may report it a hair beyond (quantisation, noise): 1 mrad is
#: about 0.06 degrees (common practice: encoder resolution of a joint is well below that).
JOINT_RANGE_TOLERANCE = 1e-3
#: A driver answers each command with a joint state. When none has come since the last command, the one
#: on its way may arrive before the deadline and void a solve prepared on the older one (measured at
#: 1 kHz with the driver in its own process: 41 % of ticks, each solved twice). The pipeline keeps a
#: running estimate of how often the older state is still the newest at the deadline (an exponential
#: average, this weight for the newest tick) and prepares on it only while that is at least
#: STALE_PREPARE_PAYS (below, the tick solves once, at the deadline; the commands are the same).
STALE_PREPARE_WEIGHT = 1.0 / 32.0
STALE_PREPARE_PAYS = 0.5

#: publish(topic, map frame): send one output message
Publish = Callable[[bytes, bytes], None]
#: (resolution, speed-cap factor, health state, encoded command or None)
Solved = tuple[Resolution, float, str, "bytes | None"]


class Pipeline:
    """The tick of one arm. config : validated ServiceConfig; arm : its arm; ticker : the schedule (its
    counts and lateness feed the telemetry); clock, wall_clock : monotonic and wall ns; recorder : a
    Recorder (push() every tick) or None. Call bind(poll, publish) before the first tick."""

    def __init__(self, config: ServiceConfig, arm: Arm, ticker: Ticker, *,
                 clock: Callable[[], int] = time.monotonic_ns, wall_clock: Callable[[], int] = time.time_ns,
                 recorder: Any = None) -> None:
        self.config, self.arm, self.n = config, arm, arm.n
        self.rate_hz = float(config.tick.rate_hz)
        self.period_ns = round(1e9 / self.rate_hz)
        self.period_s = self.period_ns / 1e9
        #: the time budget of the drain before the deadline, ns (a third of it at the deadline)
        self.drain_budget_ns = min(DRAIN_BUDGET_NS, self.period_ns // 8)
        self.health_every = max(1, round(self.rate_hz / config.tick.health_hz))
        self.twist_timeout_ns = int(config.watchdog.twist_timeout_ms * 1e6)
        self.joints_timeout_ns = int(config.watchdog.joints_timeout_ms * 1e6)
        self._q_lo = np.where(np.isfinite(arm.q_min), arm.q_min - JOINT_RANGE_TOLERANCE, -np.inf)
        self._q_hi = np.where(np.isfinite(arm.q_max), arm.q_max + JOINT_RANGE_TOLERANCE, np.inf)
        self.clock, self.wall_clock, self.recorder = clock, wall_clock, recorder
        self.telemetry = Telemetry(ticker)
        self.rlog = RateLimitedLog(log, config.logging.max_per_s)
        self.state = st.ServiceState(config.lease.default_ms, config.lease.min_ms, config.lease.max_ms)
        posture = config.initial_posture(arm)
        self.sim = SimArm.from_arm(arm, config.simulation.lag_s, None if posture is None else
                                   np.array(posture)) if config.simulation.enabled else None
        guard = None if self.sim is not None else JointSourceGuard(arm.joint_names, arm.v_max, arm.revolute,
                                                                   self.joints_timeout_ns)
        self.intake = Intake(self.n, self.sim is not None, self.state, self.telemetry, self.rlog, clock,
                             self.fault, guard, commanded=lambda: self.qd)
        if self.sim is not None:
            self.intake.q = self.sim.q
        self._base_options = config.solver_options(arm)
        #: the keep-out pass of the config's [keepout] section (built once; one tick loop's object) or None
        self.keepout = config.keepout_pass(arm)
        self.keepout_watch = KeepoutWatch(self)
        self.ramp = twist_ramp(config.speed, self.period_s)  # the asked twist's ramp, or None (off)
        self.install_tunables(config.tunables())
        self.reports = HealthReporter(self)
        # tick state
        self.tick = 0
        self.qd = np.zeros(self.n)
        #: monotonic ns at which self.qd was commanded (the stop ramp follows the clock from it)
        self.qd_ns = 0
        self.mode = self.state.mode
        self.health_state = self.reports.initial_state
        self.scale, self.cap, self.damping = 1.0, 1.0, 0.0
        self.sigma_min = self.manipulability = math.nan
        self.limits_active = np.zeros(self.n, dtype=np.uint8)
        self.last_resolution: Resolution | None = None
        self.final_command_sent = False
        self.snapshot = self._snapshot(None)
        #: (q, frames, J) of the newest joint state, computed once
        self._kin: tuple[np.ndarray, Frames, np.ndarray] | None = None
        #: the joint state last found within its limits (by identity)
        self._range_ok: np.ndarray | None = None
        #: ((q, qd_prev, desired, options, tunables, tick), solved) computed before the deadline
        self._spec: tuple[tuple[Any, ...], Solved] | None = None
        #: this tick between command() and finish(): (wall, q, qd, solved, replies, mode)
        self._this: tuple[int, np.ndarray | None, np.ndarray, Solved | None, list, str] | None = None
        self._deadline = 0
        #: monotonic ns of the last command's publish
        self._published_ns = 0
        #: the joint state a prepare met that was older than the last command (or None), and how often
        #: such a state was still the newest at the deadline (running estimate, see STALE_PREPARE_WEIGHT)
        self._stale_q: np.ndarray | None = None
        self.stale_still_newest = 1.0
        self._pending: deque[tuple[Callable[[int], Any], concurrent.futures.Future]] = deque()
        #: the state message of the last health tick, published on the next tick so that the two reports'
        #: work is not one tick's (0.4-0.7 ms together at 1 kHz on this machine): publish_state's arguments
        self.shutdown_why: str | None = None
        self.poll: Poll = lambda: None
        self.publish: Publish = lambda topic, data: None

    def bind(self, poll: Poll, publish: Publish) -> None:
        """Connect the pipeline to its intake and output (the runtime's sockets, or a test's fakes)."""
        self.poll, self.publish = poll, publish

    def start(self, now: int) -> None:
        """The tick starts at `now` (monotonic ns): nothing arrived before it; a simulated arm's joint
        state is fresh from it."""
        self.intake.empty_ns = now
        self.qd_ns = now
        if self.sim is not None:
            self.intake.q_rx_ns = now

    # -- between threads -----------------------------------------------------------------------------

    def submit(self, fn: Callable[[int], Any]) -> concurrent.futures.Future:
        """Run fn(now_ns) at the start of the next tick; the future gets its result or exception.
        Thread-safe (deque append): the only way other threads change tick state."""
        fut: concurrent.futures.Future = concurrent.futures.Future()
        self._pending.append((fn, fut))
        return fut

    def cancel_pending(self) -> None:
        """Refuse what is still queued (the tick has stopped)."""
        while self._pending:
            _, fut = self._pending.popleft()
            fut.set_exception(ControlError(st.E_SHUTDOWN, "service: stopped; accepted: none"))

    def install_tunables(self, tunables: Any) -> None:
        """New run-time tunables (validated; at a tick boundary or before the first tick)."""
        self.tunables = tunables
        self.options = tunables.solver_options(self._base_options)
        self.thresholds = tunables.health_thresholds()

    # -- the tick ------------------------------------------------------------------------------------

    def _take_input(self, now: int, budget_ns: int) -> None:
        """Drain the intake (within budget_ns) and check the newest joint state against the limits (once
        per state)."""
        self.intake.drain(self.poll, now, budget_ns)
        q = self.intake.q
        if q is not None and q is not self._range_ok and self.state.mode not in (st.FAULT, st.SHUTDOWN):
            if ((q >= self._q_lo) & (q <= self._q_hi)).all():  # NaN compares False: out of range too
                self._range_ok = q
            else:
                self.fault(f"joint state out of range: {self._range_text(q)}")

    def kinematics(self, q: np.ndarray) -> tuple[Frames, np.ndarray]:
        """(frames, J) at q: the prepared ones when q is the state they were made for."""
        kin = self._kin
        if kin is None or kin[0] is not q:
            frames = forward(self.arm, q)
            kin = self._kin = (q, frames, geometric_jacobian(self.arm, frames))
        return kin[1], kin[2]

    def prepare(self, deadline: int) -> None:
        """Before the deadline: take what has arrived, its kinematics, and the speculative command."""
        intake = self.intake
        self._take_input(self.clock(), self.drain_budget_ns)
        q = intake.q
        self._stale_q = None
        if q is not None and self.sim is None and intake.q_rx_ns <= self._published_ns:
            self._stale_q = q  # the driver's answer to the last command is still on its way
            if self.stale_still_newest < STALE_PREPARE_PAYS:
                self._spec = None
                return
        if q is not None:
            self.kinematics(q)
        self._speculate(deadline)

    def command(self, deadline: int) -> None:
        """At the deadline: control operations, input, state machine, rates, and the command's publish."""
        self._deadline = deadline
        now, wall = self.clock(), self.wall_clock()
        state, intake = self.state, self.intake
        replies = []
        while self._pending:
            fn, fut = self._pending.popleft()
            try:
                replies.append((fut, fn(now)))
            except BaseException as exc:
                fut.set_exception(exc)
        if self.shutdown_why is not None and state.mode != st.SHUTDOWN:
            state.shutdown(self.shutdown_why)
        self._take_input(now, self.drain_budget_ns // 3)  # the publish waits for this one
        q, twist = intake.q, intake.twist
        if self._stale_q is not None:
            self.stale_still_newest += STALE_PREPARE_WEIGHT * ((q is self._stale_q) - self.stale_still_newest)
            self._stale_q = None
        # the intake took only the holder's twists; the lease may have ended since
        twist_fresh = (twist is not None and now - intake.twist_rx_ns <= self.twist_timeout_ns
                       and intake.twist_rx_ns >= state.epoch_ns and state.holds(twist.lease, now))
        joints_fresh = q is not None and now - intake.q_rx_ns <= self.joints_timeout_ns
        qd_prev = self.qd
        # the time the previous rates really were in force: a late tick ramps by it, not by one period
        elapsed_s = (now - self.qd_ns) / 1e9
        mode = state.step(now, twist_fresh, joints_fresh, not qd_prev.any())
        solved = self._solve(q, qd_prev, intake.desired) if mode == st.RUNNING else None
        if solved is None:
            self._spec = None
            qd = ramp_to_rest(qd_prev, self.arm.a_max, elapsed_s)
            mode = state.mode
        else:
            qd = solved[0].qd
        self.mode = mode
        if q is not None:
            data = None if solved is None else solved[3]
            if data is None:
                data = self._encode(wall, q, qd, solved)
            if data is None and solved is not None:  # not encodable: fault, hold
                solved, mode = None, state.mode
                qd = ramp_to_rest(qd_prev, self.arm.a_max, elapsed_s)
                self.mode = mode
                data = self._encode(wall, q, qd, None)
            if data is not None:
                self._send_command(data, qd, solved is not None)
        self.qd_ns = now
        self._this = (wall, q, qd, solved, replies, mode)

    def finish(self) -> None:
        """After the command: book it, answer control, publish health and events, record, simulate."""
        assert self._this is not None, "command() first"
        wall, q, qd, solved, replies, mode = self._this
        self._this = None
        if solved is not None:
            self._commit(*solved[:3])
        else:
            self.scale, self.cap, self.damping = 1.0, 1.0, 0.0
            if self.limits_active.any():
                self.limits_active = np.zeros(self.n, dtype=np.uint8)
            self.last_resolution = None
            self.intake.twist_unanswered = False
            self.keepout_watch.step(None)
        for fut, result in replies:  # replies that report a mode report the one this tick runs in
            if type(result) is dict and "mode" in result:
                result["mode"] = mode
            fut.set_result(result)
        self.reports.publish_due(wall, q, qd)  # health, and its state message a tick later (7.6)
        rec = self.recorder
        if rec is not None and rec.notice is not None:  # the writer stopped (full disk, size cap)
            self.emit_event("recording_stopped", rec.take_notice())
        if self.state.events:
            self.reports.publish_events(wall)
        res = self.last_resolution
        if self.recorder is not None and q is not None:
            self.recorder.push(self._deadline, wall, self.tick, mode, self.health_state, self.limits_active,
                               q, qd, None if res is None else res.twist_desired,
                               None if res is None else res.twist_achieved, self.scale, self.cap,
                               self.damping, self.sigma_min, self.manipulability)
        sim = self.sim
        if sim is not None:
            sim.command(qd)
            sim.step(self.period_s)
            self.intake.q = sim.q  # the joint state the next tick uses
            self.intake.q_rx_ns = self.clock()
        self.qd = qd
        self.tick += 1
        if self.tick % self.health_every == 0 or mode != self.snapshot.mode:
            self.snapshot = self._snapshot(q)

    # -- solving -------------------------------------------------------------------------------------

    def _compute(self, q: np.ndarray, qd_prev: np.ndarray, desired: DesiredTwist) -> tuple[Resolution, float]:
        """(resolution, speed-cap factor) for a twist at q: the speed caps, then the solver. May raise."""
        t = self.tunables
        cap = speed_cap_factor(desired.linear, desired.angular, desired.point, t.tool_linear_max,
                               t.angular_max)
        if cap < 1.0:
            desired = DesiredTwist(desired.linear * cap, desired.angular * cap, desired.frame, desired.point)
        t0 = self.clock()
        frames, J = self.kinematics(q)
        desired = ramped(self.ramp, desired, frames, J, qd_prev, self.last_resolution, t)
        res, _ = resolve_from_kinematics(self.arm, q, qd_prev, desired, self.period_s, self.options, frames,
                                         J, self.keepout)
        self.telemetry.hist["solve"].add(self.clock() - t0)
        return res, cap

    def _inputs(self, q: Any, qd_prev: np.ndarray, desired: Any) -> tuple[Any, ...]:
        return (q, qd_prev, desired, self.options, self.tunables, self.tick)

    def _speculate(self, deadline: int) -> None:
        """Solve and encode this tick's command for the inputs at hand, assuming it will run. At the
        deadline the tick sends these bytes at once when the inputs are still the same objects: same
        inputs, same functions, computed earlier. Anything unusual (a solver error, a non-finite or
        unencodable result) is left for the tick itself to meet and report."""
        self._spec = None
        s, q, desired = self.state, self.intake.q, self.intake.desired
        if q is None or desired is None or not s.enabled or s.mode in (st.FAULT, st.SHUTDOWN):
            return
        try:
            res, cap = self._compute(q, self.qd, desired)
            if not np.isfinite(res.qd).all():
                return
            health = next_state(self.health_state, float(res.singular_values[-1]), self.thresholds)
            stamp = self.wall_clock() + (deadline - self.clock())  # the wall clock at the deadline
            data = self._command_bytes(stamp, q, res.qd, self.intake.twist.seq, float(res.scale), st.RUNNING,
                                       health)
        except Exception:
            return
        self._spec = (self._inputs(q, self.qd, desired), (res, cap, health, data))

    def _solve(self, q: np.ndarray, qd_prev: np.ndarray, desired: DesiredTwist) -> Solved | None:
        """The solved tick for the newest twist, or None after a fault (solver error, non-finite rates)."""
        spec, self._spec = self._spec, None
        if spec is not None and all(a is b for a, b in zip(spec[0], self._inputs(q, qd_prev, desired),
                                                           strict=True)):
            self.telemetry.counts["speculation_used"] += 1
            return spec[1]
        try:
            res, cap = self._compute(q, qd_prev, desired)
        except Exception as exc:  # a solver bug must hold the arm, not kill the tick
            self.telemetry.counts["solver_errors"] += 1
            self.fault(f"solver error: {type(exc).__name__}: {exc}")
            return None
        if not np.isfinite(res.qd).all():
            self.fault("non-finite solver result")
            return None
        return res, cap, next_state(self.health_state, float(res.singular_values[-1]), self.thresholds), None

    def _commit(self, res: Resolution, cap: float, health: str) -> None:
        """Book a tick's resolution (after its command went out)."""
        new_limits = res.limits_active
        if (new_limits & ~self.limits_active).any():  # one definition with the recording summary
            self.telemetry.counts["limit_events"] += limit_events(self.limits_active, new_limits)
        self.limits_active = new_limits
        self.cap = cap
        self.scale = float(res.scale)
        self.damping = float(res.damping)
        self.last_resolution = res
        self.keepout_watch.step(res)
        sv = res.singular_values
        self.sigma_min = float(sv[-1])
        self.manipulability = float(np.prod(sv))
        self.set_health(health)

    def set_health(self, health: str) -> None:
        if health != self.health_state:
            self.emit_event("health", f"{self.health_state} -> {health} (smallest singular value "
                                      f"{self.sigma_min:.4g} m)")
            self.health_state = health

    # -- output --------------------------------------------------------------------------------------

    def _command_bytes(self, stamp: int, q: np.ndarray, qd: np.ndarray, answers: int, scale: float, mode: str,
                       health: str) -> bytes:
        """The encoded command of this tick (raises InputError when it cannot be encoded)."""
        return wire.encode_command(seq=self.telemetry.out_seq["command"], stamp_ns=stamp, tick=self.tick,
                                   rate=qd, target=q + qd * self.period_s, answers=answers,
                                   scale=min(1.0, max(0.0, scale)), mode=mode, health=health)

    def _encode(self, wall: int, q: np.ndarray, qd: np.ndarray, solved: Solved | None) -> bytes | None:
        """This tick's command, or None (and a fault) when it cannot be encoded (non-finite, too large)."""
        try:
            if solved is None:
                return self._command_bytes(wall, q, qd, -1, 1.0, self.mode, self.health_state)
            return self._command_bytes(wall, q, qd, self.intake.twist.seq, float(solved[0].scale), self.mode,
                                       solved[2])
        except InputError as exc:
            self.fault(f"command not encodable: {exc}")
            self.telemetry.counts["publish_failed"] += 1
            return None

    def _send_command(self, data: bytes, qd: np.ndarray, answering: bool) -> None:
        self.publish(wire.TOPIC_COMMAND, data)
        published = self._published_ns = self.clock()
        tel, intake = self.telemetry, self.intake
        tel.hist["deadline_to_publish"].add(published - self._deadline)
        tel.out_seq["command"] += 1
        tel.counts["commands"] += 1
        if answering and intake.twist_unanswered:
            intake.twist_unanswered = False
            tel.hist["arrival_to_publish"].add(published - intake.twist_since_ns)
            tel.hist["send_to_publish"].add(self.wall_clock() - intake.twist.stamp_ns)
        if self.state.mode == st.SHUTDOWN and not qd.any():
            self.final_command_sent = True

    def emit_event(self, name: str, detail: str) -> None:
        """Queue an event for this tick's publish (tick thread only)."""
        self.state.events.append((name, detail))

    def fault(self, reason: str) -> None:
        if self.state.mode in (st.FAULT, st.SHUTDOWN):
            return
        self.telemetry.counts["faults"] += 1
        log.error("fault: %s", reason)
        self.state.fault(reason)

    def _range_text(self, q: np.ndarray) -> str:
        bad = np.nonzero((q < self._q_lo) | (q > self._q_hi))[0]
        names = self.arm.joint_names
        return ", ".join(f"{names[i]} = {q[i]:.4g} outside [{self.arm.q_min[i]:.4g}, {self.arm.q_max[i]:.4g}]"
                         for i in bad[:3])

    def _snapshot(self, q: np.ndarray | None) -> Snapshot:
        res = self.last_resolution
        return Snapshot(self.tick, self.tick * self.period_s, self.mode, self.health_state, q, self.qd,
                        self.scale, self.cap, self.damping, self.sigma_min, self.manipulability,
                        self.limits_active, self.reports.last.get("limit_margin"),
                        None if res is None else res.twist_desired,
                        None if res is None else res.twist_achieved)
