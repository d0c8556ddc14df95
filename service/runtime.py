"""The service runtime: the tick thread, its sockets, the per-tick pipeline, health, events, control handoff.

Threads (docs/operation.md, "Threads"):

* The tick thread owns the intake SUB and output PUB sockets, the state machine and the embedded
  simulated arm. Each tick: run queued control operations (the thread-safe handoff), drain the
  intake without blocking (newest valid twist and joint state kept, bad input counted per reason),
  step the state machine (lease, watchdogs, fault), resolve rates or ramp to rest, publish the
  command, health at its own rate, and events; feed the recorder; step the simulated arm.
* The control plane (service/control.py) runs on an asyncio/uvloop loop in another thread. It never
  touches tick state: it submits a function to `Service.submit`, which the tick thread runs at the
  start of its next tick and whose result comes back through a concurrent.futures.Future. Read-only
  counters are read directly (plain ints and histograms; a torn read only shifts a count).
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import gc
import logging
import math
import os
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from typing import Any

import numpy as np
import zmq

from twistrate.service import state as st
from twistrate.service import wire
from twistrate.service.config import ServiceConfig, Tunables
from twistrate.service.motion import ramp_to_rest, speed_cap_factor
from twistrate.service.simarm import SimArm
from twistrate.service.tick import (
    LatencyHistogram,
    Scheduling,
    Ticker,
    guard_runaway,
    hold_cpu_wake_latency,
    is_realtime,
    make_realtime,
    probe_realtime,
    release_cpu_wake_latency,
    rt_throttling,
    set_timer_slack,
)
from twistrate.solver.arm import Arm
from twistrate.solver.errors import ControlError, InputError, WireError
from twistrate.solver.health import NORMAL, assess, next_state
from twistrate.solver.kinematics import Frames, forward, geometric_jacobian
from twistrate.solver.resolve import DesiredTwist, Resolution, resolve_from_kinematics

log = logging.getLogger("twistrate.service")

#: GIL switch interval the service sets at start, s (Python's default is 5 ms: a busy control thread
#: could hold the GIL that long when the tick wakes). See docs/operation.md for the measurement.
SWITCH_INTERVAL_S = 0.0005
#: A measured joint position this far beyond its limit (rad or m) is out of range (fault). A driver
#: whose joint stopped on a limit may report it a hair beyond (quantisation, noise): 1 mrad is
#: about 0.06 degrees (common practice: encoder resolution of a joint is well below that).
JOINT_RANGE_TOLERANCE = 1e-3
#: At most this many intake messages are taken per tick (a flood cannot stall the tick; the rest
#: wait for the next tick, and the socket's receive high-water mark bounds the queue).
MAX_DRAIN_PER_TICK = 256
#: The tick thread wakes this long before each deadline to prepare: drain the intake, kinematics at the
#: newest joint state, and a speculative solve for the inputs at hand (reused at the deadline when no
#: new twist or joint state has arrived meanwhile), ns; at most PREPARE_FRACTION of the period.
PREPARE_NS = 700_000
PREPARE_FRACTION = 0.45
#: Garbage collection (docs/operation.md, "Threads"): automatic collection pauses the tick wherever
#: an allocation crosses a threshold (measured here: 0.3-0.6 ms for the young generation, 1.5-3 ms for
#: the middle one, on a cold cache). The service freezes what exists at start (gc.freeze: start-up
#: objects are never scanned again), turns automatic collection off, and collects on the tick thread
#: after the command is out: the young generation every GC_YOUNG_EVERY ticks, the middle one every
#: GC_MIDDLE_EVERY young collections, everything every GC_FULL_EVERY middle ones.
GC_YOUNG_EVERY = 10
GC_MIDDLE_EVERY = 10
GC_FULL_EVERY = 100
#: How long a final command may take to leave the output socket at shutdown, ms (bounded linger).
FINAL_LINGER_MS = 500
#: Shutdown gives up ramping after this long, s (a ramp from the velocity limits takes < 1 s on
#: any of the example arms; a hard bound keeps a broken clock from hanging the process).
SHUTDOWN_TIMEOUT_S = 5.0



class RateLimitedLog:
    """Log at most `max_per_s` lines per second per key; the suppressed count rides on the next line."""

    def __init__(self, logger: logging.Logger, max_per_s: float) -> None:
        self.logger = logger
        self.min_gap_ns = int(1e9 / max_per_s)
        self._last: dict[str, int] = {}
        self._suppressed: dict[str, int] = {}

    def warning(self, key: str, now_ns: int, text: str) -> None:
        last = self._last.get(key)
        if last is not None and now_ns - last < self.min_gap_ns:
            self._suppressed[key] = self._suppressed.get(key, 0) + 1
            return
        self._last[key] = now_ns
        skipped = self._suppressed.pop(key, 0)
        self.logger.warning("%s%s", text, f" (+{skipped} similar suppressed)" if skipped else "")


class Service:
    """One arm's streaming service: tick thread, sockets, state machine, simulated arm, recorder hook.

    config : validated ServiceConfig. arm : the arm (default: config.load_arm()).
    context : ZeroMQ context (default: a new one, terminated by close()).
    realtime_priority : SCHED_FIFO priority of the tick thread when permitted (0: normal scheduling;
        None: the configured [tick] realtime_priority). Refused: normal scheduling, one logged warning.
    switch_interval_s : sys.setswitchinterval applied at start (None: leave Python's).
    recorder : a Recorder (push() every tick on the tick thread), or None.
    manage_gc : take over garbage collection (see GC_YOUNG_EVERY); restored by close().
    """

    def __init__(self, config: ServiceConfig, arm: Arm | None = None, context: zmq.Context | None = None,
                 realtime_priority: int | None = None, switch_interval_s: float | None = SWITCH_INTERVAL_S,
                 recorder: Any = None, manage_gc: bool = True) -> None:
        self.config = config
        self.arm = config.load_arm() if arm is None else arm
        arm = self.arm
        self.n = arm.n
        self.rate_hz = float(config.tick.rate_hz)
        self.period_ns = round(1e9 / self.rate_hz)
        self.period_s = self.period_ns / 1e9
        self.health_every = max(1, round(self.rate_hz / config.tick.health_hz))
        self.tunables = config.tunables()
        self._base_options = config.solver_options(arm)
        self.options = self.tunables.solver_options(self._base_options)
        self.thresholds = self.tunables.health_thresholds()
        self.health_state = NORMAL
        self.state = st.ServiceState(config.lease.default_ms, config.lease.min_ms, config.lease.max_ms)
        posture = config.initial_posture(arm)
        self.sim = SimArm.from_arm(arm, config.simulation.lag_s, None if posture is None else
                                   np.array(posture)) if config.simulation.enabled else None
        self.twist_timeout_ns = int(config.watchdog.twist_timeout_ms * 1e6)
        self.joints_timeout_ns = int(config.watchdog.joints_timeout_ms * 1e6)
        self.realtime_priority = (config.tick.realtime_priority if realtime_priority is None
                                  else realtime_priority)
        self.switch_interval_s = switch_interval_s
        self.recorder = recorder
        self.manage_gc = manage_gc
        self._gc_was_enabled = gc.isenabled()
        self._gc_count = 0
        self._own_context = context is None
        self.context = context or zmq.Context()
        self._rlog = RateLimitedLog(log, config.logging.max_per_s)
        self._q_lo = np.where(np.isfinite(arm.q_min), arm.q_min - JOINT_RANGE_TOLERANCE, -np.inf)
        self._q_hi = np.where(np.isfinite(arm.q_max), arm.q_max + JOINT_RANGE_TOLERANCE, np.inf)

        # tick-thread state
        self.q: np.ndarray | None = None if self.sim is None else self.sim.q
        self.q_rx_ns = 0
        self.qd = np.zeros(self.n)
        self.twist: wire.TwistMessage | None = None
        self.twist_rx_ns = 0
        self._twist_unanswered = False
        self.tick = 0
        self.start_ns = 0
        self.scale = 1.0
        self.cap = 1.0
        self.damping = 0.0
        self.sigma_min = math.nan
        self.manipulability = math.nan
        self.limits_active = np.zeros(self.n, dtype=np.uint8)
        self.last_resolution: Resolution | None = None
        #: (q, frames, J) computed before the deadline; used when q is still the newest joint state
        self._kin: tuple[np.ndarray, Frames, np.ndarray] | None = None
        self._health_q: np.ndarray | None = None
        #: the joint state last found within its limits (by identity)
        self._range_ok: np.ndarray | None = None
        #: (inputs, resolution, cap) solved before the deadline (see _speculate)
        self._spec: tuple[tuple[Any, ...], Resolution, float] | None = None
        self.last_health: dict[str, Any] = {}
        self.mode = self.state.mode
        self.final_command_sent = False

        # counters (written by the tick thread only)
        self.rejected: dict[str, int] = {}
        self.counts: dict[str, int] = {
            "accepted_twist": 0, "accepted_joints": 0, "commands": 0, "health_messages": 0,
            "events": 0, "faults": 0, "limit_events": 0, "publish_failed": 0, "solver_errors": 0,
            "speculation_used": 0, "gc_collections": 0,
        }
        self.ticker = Ticker(self.period_ns, adaptive=True)
        #: twist arrival at the service to the publish of the first command answering it, an upper bound:
        #: from the last intake poll that found the queue empty before the twist was taken (see _drain)
        self.arrival_to_publish = LatencyHistogram()
        #: the twist's send stamp (the sender's wall clock) to that publish (wall clock): end to end,
        #: with the transport and the sender's own scheduling
        self.send_to_publish = LatencyHistogram()
        #: monotonic ns of the last intake poll that found no message waiting
        self._intake_empty_ns = 0
        #: the same as it stood before the newest accepted twist was taken: that twist arrived after it
        self._twist_since_ns = 0
        self.tick_work = LatencyHistogram()
        self.solve_time = LatencyHistogram()
        self.deadline_to_publish = LatencyHistogram()
        self._deadline = 0
        self._out_seq = {"command": 0, "health": 0, "event": 0}

        # handoff and life cycle
        self._pending: deque[tuple[Callable[[int], Any], concurrent.futures.Future]] = deque()
        self._shutdown_why: str | None = None
        self._thread: threading.Thread | None = None
        self._ready = threading.Event()
        self._done = threading.Event()
        self._start_error: BaseException | None = None
        self.scheduling = Scheduling(False, 0, self.realtime_priority, "not started")
        #: the CPU wake-up latency request held while the tick runs real-time (tick.hold_cpu_wake_latency)
        self._cpu_latency_fd: int | None = None
        self._auth = None
        self._intake: zmq.Socket | None = None
        self._output: zmq.Socket | None = None
        self.curve_keys: tuple[bytes, bytes] | None = None
        self._done_callbacks: list[Callable[[], None]] = []

    # ============================================================================================
    # life cycle (any thread)
    # ============================================================================================

    def start(self, timeout_s: float = 5.0) -> None:
        """Start the CURVE authenticator (if configured) and the tick thread; return once the sockets
        are bound. Raises the bind error (zmq.ZMQError) or ConfigError of the thread."""
        if self.switch_interval_s is not None:
            sys.setswitchinterval(self.switch_interval_s)
        prio = self.realtime_priority
        if prio > 0 and self._own_context and probe_realtime(prio).realtime:
            # The ZeroMQ I/O thread moves every message in and out: with a SCHED_FIFO tick it gets the
            # same policy (one level below), or it queues behind normal processes for the CPU. libzmq
            # applies this when it starts the thread (at the first socket) and aborts the process when
            # the operating system refuses, hence the probe on a throwaway thread first.
            with contextlib.suppress(zmq.ZMQError, AttributeError):
                self.context.set(zmq.THREAD_SCHED_POLICY, os.SCHED_FIFO)
                self.context.set(zmq.THREAD_PRIORITY, max(1, prio - 1))
        if self.manage_gc:
            gc.collect()
            gc.freeze()
            gc.disable()
        sec = self.config.security
        if sec.curve:
            from twistrate.service.security import start_authenticator

            self.curve_keys = sec.server_keys()
            self._auth = start_authenticator(self.context, sec.allowed_clients())
        self._thread = threading.Thread(target=self._run, name="twistrate-tick", daemon=True)
        self._thread.start()
        if not self._ready.wait(timeout_s):
            raise TimeoutError("tick thread did not start")
        if self._start_error is not None:
            self._thread.join(1.0)
            self._stop_auth()
            raise self._start_error

    def submit(self, fn: Callable[[int], Any]) -> concurrent.futures.Future:
        """Run fn(now_ns) on the tick thread at the start of its next tick; the future gets its result
        or exception. Thread-safe (deque append); the only way other threads change tick state."""
        fut: concurrent.futures.Future = concurrent.futures.Future()
        if self._done.is_set():
            fut.set_exception(ControlError(st.E_SHUTDOWN, "service: stopped; accepted: none"))
        else:
            self._pending.append((fn, fut))
        return fut

    def shutdown(self, why: str = "shutdown requested") -> None:
        """Ask the tick thread to ramp to rest, publish a final zero command and stop (thread-safe)."""
        if self._shutdown_why is None:
            self._shutdown_why = why

    def add_done_callback(self, fn: Callable[[], None]) -> None:
        """fn() is called from the tick thread when it has finished (or at once if it has)."""
        self._done_callbacks.append(fn)
        if self._done.is_set():
            fn()

    @property
    def done(self) -> bool:
        return self._done.is_set()

    def join(self, timeout_s: float | None = None) -> bool:
        """Wait for the tick thread to finish; True if it has."""
        return self._done.wait(timeout_s)

    def close(self) -> None:
        """Stop (if running), wait, release the authenticator and the context."""
        self.shutdown("closed")
        if self._thread is not None:
            self._thread.join(SHUTDOWN_TIMEOUT_S + 2.0)
        self._stop_auth()
        if self.manage_gc and self._gc_was_enabled:
            gc.enable()
        if self._own_context:
            self.context.term()

    def _stop_auth(self) -> None:
        if self._auth is not None:
            self._auth.stop()
            self._auth = None

    # ============================================================================================
    # sockets (tick thread)
    # ============================================================================================

    def configure_socket(self, sock: zmq.Socket) -> None:
        """Bounds (and CURVE server keys when configured) every service socket gets before bind."""
        sk = self.config.sockets
        sock.setsockopt(zmq.MAXMSGSIZE, sk.max_message_bytes)
        sock.setsockopt(zmq.SNDHWM, sk.send_hwm)
        sock.setsockopt(zmq.RCVHWM, sk.receive_hwm)
        sock.setsockopt(zmq.LINGER, sk.linger_ms)
        if self.curve_keys is not None:
            from twistrate.service.security import apply_curve_server

            apply_curve_server(sock, *self.curve_keys)

    def _open_sockets(self) -> None:
        ep = self.config.endpoints
        intake = self.context.socket(zmq.SUB)
        output = self.context.socket(zmq.PUB)
        try:
            self.configure_socket(intake)
            self.configure_socket(output)
            for topic in wire.INTAKE_TOPICS:
                intake.setsockopt(zmq.SUBSCRIBE, topic)
            intake.bind(ep.intake)
            output.bind(ep.output)
        except BaseException:
            intake.close(0)
            output.close(0)
            raise
        self._intake, self._output = intake, output

    def _close_sockets(self) -> None:
        if self._intake is not None:
            self._intake.close(0)
        if self._output is not None:
            self._output.close(FINAL_LINGER_MS)
        self._intake = self._output = None

    # ============================================================================================
    # the tick loop (tick thread)
    # ============================================================================================

    def _run(self) -> None:
        self._intake_empty_ns = time.monotonic_ns()  # nothing can arrive before the bind
        try:
            self._open_sockets()
        except BaseException as exc:  # reported to start()
            self._start_error = exc
            self._done.set()
            self._ready.set()
            return
        set_timer_slack(1_000)
        self.scheduling = sched = make_realtime(self.realtime_priority)
        if sched.realtime:
            guard_runaway()
            self._cpu_latency_fd = hold_cpu_wake_latency()
            if rt_throttling() is False:
                log.warning("kernel real-time throttling is off (sched_rt_runtime_us = -1): the tick still "
                            "sleeps every period, but nothing else reserves CPU time for normal processes")
        elif sched.requested > 0:
            log.warning("real-time scheduling not available, the tick runs with %s; the timing targets "
                        "assume SCHED_FIFO (root, CAP_SYS_NICE or `ulimit -r`; docs/operation.md)",
                        sched.text)
        ticker = self.ticker
        ticker.start()
        self.start_ns = ticker.deadline + self.period_ns
        if self.sim is not None:
            self.q_rx_ns = ticker.deadline
        self._ready.set()
        log.info("tick %g Hz on %s (%s%s); intake %s, output %s", self.rate_hz, self.arm.name, sched.text,
                 "; idle CPUs poll" if self._cpu_latency_fd is not None else "",
                 self.config.endpoints.intake, self.config.endpoints.output)
        shutdown_deadline = None
        clock = time.monotonic_ns
        prepare_ns = min(PREPARE_NS, int(PREPARE_FRACTION * self.period_ns))
        try:
            while True:
                deadline = ticker.wait(self._prepare, prepare_ns)
                self._tick(deadline)
                self.tick_work.add(clock() - deadline)
                if self._shutdown_why is not None:
                    if shutdown_deadline is None:
                        shutdown_deadline = clock() + int(SHUTDOWN_TIMEOUT_S * 1e9)
                    if self.final_command_sent or self.q is None or clock() > shutdown_deadline:
                        break
        except BaseException:  # the tick must not die silently: log, hold, stop
            log.exception("tick thread failed; stopping")
        finally:
            self._finish()

    def _finish(self) -> None:
        release_cpu_wake_latency(self._cpu_latency_fd)
        self._cpu_latency_fd = None
        self._close_sockets()
        while self._pending:
            _, fut = self._pending.popleft()
            fut.set_exception(ControlError(st.E_SHUTDOWN, "service: stopped; accepted: none"))
        if self.recorder is not None:
            self.recorder.close()
        self._done.set()
        for fn in self._done_callbacks:
            fn()
        log.info("tick stopped after %d ticks, %d overruns", self.ticker.ticks, self.ticker.overruns)

    def _prepare(self, deadline: int) -> None:
        """Before the deadline: take what has arrived, check the newest joint state, its kinematics, and
        the speculative command (see _speculate)."""
        self._drain(time.monotonic_ns())
        q = self.q
        if q is not None and q is not self._range_ok and self.state.mode not in (st.FAULT, st.SHUTDOWN):
            self._check_range(q)
        if q is not None and (self._kin is None or self._kin[0] is not q):
            frames = forward(self.arm, q)
            self._kin = (q, frames, geometric_jacobian(self.arm, frames))
        self._speculate(deadline)

    def _kinematics(self, q: np.ndarray) -> tuple[Frames, np.ndarray]:
        """(frames, J) at q: the prepared ones when q is the state they were made for."""
        kin = self._kin
        if kin is None or kin[0] is not q:
            frames = forward(self.arm, q)
            kin = self._kin = (q, frames, geometric_jacobian(self.arm, frames))
        return kin[1], kin[2]

    def _tick(self, deadline: int) -> None:
        self._deadline = deadline
        now = time.monotonic_ns()
        wall = time.time_ns()
        state = self.state
        pending = self._pending
        replies = []
        while pending:
            fn, fut = pending.popleft()
            try:
                replies.append((fut, fn(now)))
            except BaseException as exc:
                fut.set_exception(exc)
        if self._shutdown_why is not None and state.mode != st.SHUTDOWN:
            state.shutdown(self._shutdown_why)
        self._drain(now)
        sim = self.sim
        q = self.q
        if q is not None and q is not self._range_ok and state.mode not in (st.FAULT, st.SHUTDOWN):
            self._check_range(q)
        twist = self.twist
        twist_fresh = (twist is not None and now - self.twist_rx_ns <= self.twist_timeout_ns
                       and self.twist_rx_ns >= state.epoch_ns and state.holds(twist.lease, now))
        joints_fresh = q is not None and now - self.q_rx_ns <= self.joints_timeout_ns
        qd_prev = self.qd
        mode = state.step(now, twist_fresh, joints_fresh, not qd_prev.any())
        answers = -1
        solved = None
        data = None
        if mode == st.RUNNING:
            solved = self._solve(q, qd_prev, twist)
            if solved is None:
                mode = state.mode
        if solved is not None:
            res, _, health, data = solved
            qd = res.qd
            answers = twist.seq
            self.scale = float(res.scale)
        else:
            qd = ramp_to_rest(qd_prev, self.arm.a_max, self.period_s)
            health = self.health_state
            self._spec = None
        self.mode = mode
        if q is not None:
            if data is None:
                data = self._encode_command(wall, q, qd, answers, health)
                if data is None:  # not encodable: fault, hold
                    solved, answers, mode = None, -1, self.state.mode
                    qd = ramp_to_rest(qd_prev, self.arm.a_max, self.period_s)
                    self.mode = mode
                    data = self._encode_command(wall, q, qd, answers, self.health_state)
            if data is not None:
                self._send_command(data, qd, answers)
        if self.manage_gc and self.tick % GC_YOUNG_EVERY == 0:
            self._collect()
        if solved is not None:
            self._commit(solved[0], solved[1], solved[2])
        else:
            self.scale = 1.0
            self.cap = 1.0
            self.damping = 0.0
            self.limits_active[:] = 0
            self.last_resolution = None
            self._twist_unanswered = False
        for fut, result in replies:  # replies that report a mode report the one this tick runs in
            if type(result) is dict and "mode" in result:
                result["mode"] = mode
            fut.set_result(result)
        if self.tick % self.health_every == 0 and q is not None:
            self._publish_health(wall, q)
        if state.events:
            self._publish_events(wall)
        if self.recorder is not None and q is not None:
            res = self.last_resolution
            self.recorder.push(deadline, wall, self.tick, mode, self.health_state, self.limits_active, q, qd,
                               None if res is None else res.twist_desired,
                               None if res is None else res.twist_achieved, self.scale, self.cap,
                               self.damping, self.sigma_min, self.manipulability)
        if sim is not None:
            sim.command(qd)
            sim.step(self.period_s)
            self.q = sim.q  # the joint state the next tick uses
            self.q_rx_ns = time.monotonic_ns()
        self.qd = qd
        self.tick += 1

    def _collect(self) -> None:
        """One scheduled garbage collection (after the command went out)."""
        k = self._gc_count = self._gc_count + 1
        if k % (GC_MIDDLE_EVERY * GC_FULL_EVERY) == 0:
            gc.collect(2)
        elif k % GC_MIDDLE_EVERY == 0:
            gc.collect(1)
        else:
            gc.collect(0)
        self.counts["gc_collections"] += 1

    def _check_range(self, q: np.ndarray) -> None:
        """Fault when q (n,) is non-finite or beyond a limit by more than JOINT_RANGE_TOLERANCE."""
        if ((q >= self._q_lo) & (q <= self._q_hi)).all():  # NaN compares False: out of range too
            self._range_ok = q
        else:
            self._fault(f"joint state out of range: {self._range_text(q)}")

    def _range_text(self, q: np.ndarray) -> str:
        bad = np.nonzero((q < self._q_lo) | (q > self._q_hi))[0]
        names = self.arm.joint_names
        return ", ".join(f"{names[i]} = {q[i]:.4g} outside [{self.arm.q_min[i]:.4g}, {self.arm.q_max[i]:.4g}]"
                         for i in bad[:3])

    def _fault(self, reason: str) -> None:
        if self.state.mode in (st.FAULT, st.SHUTDOWN):
            return
        self.counts["faults"] += 1
        log.error("fault: %s", reason)
        self.state.fault(reason)

    # -- intake ----------------------------------------------------------------------------------

    def _reject(self, reason: str, now: int, text: str) -> None:
        self.rejected[reason] = self.rejected.get(reason, 0) + 1
        self._rlog.warning(reason, now, f"intake refused ({reason}): {text}")

    def _drain(self, now: int) -> None:
        """Take up to MAX_DRAIN_PER_TICK waiting intake messages (now : monotonic ns, the receive time
        the watchdogs use). Arrival bound: a message taken here was not waiting at the last poll that
        found the queue empty (`_intake_empty_ns`, a clock reading taken just before that poll), so it
        arrived after that instant; the service cannot see when ZeroMQ queued it."""
        sock = self._intake
        n = self.n
        since = self._intake_empty_ns
        polled = now
        for i in range(MAX_DRAIN_PER_TICK):
            if i:
                polled = time.monotonic_ns()
            if not sock.getsockopt(zmq.EVENTS) & zmq.POLLIN:
                self._intake_empty_ns = polled
                return
            frames = sock.recv_multipart()
            try:
                msg = wire.decode_intake(frames, n)
            except WireError as exc:
                self._reject(exc.reason, now, str(exc))
                if frames[0] == wire.TOPIC_JOINTS and self.sim is None and \
                        exc.reason in ("non_finite", "too_large"):
                    self._fault(f"joint state refused: {exc}")
                continue
            if type(msg) is wire.TwistMessage:
                if not self.state.holds(msg.lease, now):
                    self._reject("not_leased", now, f"twist seq {msg.seq} without the current lease")
                    continue
                self.counts["accepted_twist"] += 1
                self.twist = msg
                self.twist_rx_ns = now
                self._twist_since_ns = since
                self._twist_unanswered = True
            else:
                if self.sim is not None:
                    self._reject("unexpected_joints", now, "joint state sent to a service simulating its arm")
                    continue
                self.counts["accepted_joints"] += 1
                self.q = msg.position
                self.q_rx_ns = now

    # -- solve -----------------------------------------------------------------------------------

    def _compute(self, q: np.ndarray, qd_prev: np.ndarray,
                 msg: wire.TwistMessage) -> tuple[Resolution, float]:
        """(resolution, speed-cap factor) for a twist at q: the speed caps, then the solver. May raise."""
        tw = DesiredTwist(msg.linear, msg.angular, msg.frame, msg.point)
        t = self.tunables
        cap = speed_cap_factor(tw.linear, tw.angular, tw.point, t.tool_linear_max, t.angular_max)
        if cap < 1.0:
            tw = DesiredTwist(tw.linear * cap, tw.angular * cap, tw.frame, tw.point)
        t0 = time.monotonic_ns()
        frames, J = self._kinematics(q)
        res, _ = resolve_from_kinematics(self.arm, q, qd_prev, tw, self.period_s, self.options, frames, J)
        self.solve_time.add(time.monotonic_ns() - t0)
        return res, cap

    def _speculate(self, deadline: int) -> None:
        """Before the deadline: solve and encode this tick's command for the inputs at hand, assuming the
        tick will run. At the deadline the tick sends these bytes at once when the inputs are still
        the same objects (no new twist, joint state, rates, options or tunables) and the mode is
        running: same inputs, same functions, computed earlier. Anything unusual (a solver error, a
        non-finite or unencodable result) is left for the tick itself to meet and report."""
        self._spec = None
        s = self.state
        q, qd_prev, msg = self.q, self.qd, self.twist
        if q is None or msg is None or not s.enabled or s.mode in (st.FAULT, st.SHUTDOWN):
            return
        try:
            res, cap = self._compute(q, qd_prev, msg)
            qd = res.qd
            if not np.isfinite(qd).all():
                return
            health = next_state(self.health_state, float(res.singular_values[-1]), self.thresholds)
            wall = time.time_ns() + (deadline - time.monotonic_ns())  # the wall clock at the deadline
            data = wire.encode_command(seq=self._out_seq["command"], stamp_ns=wall, tick=self.tick, rate=qd,
                                        target=q + qd * self.period_s, answers=msg.seq,
                                        scale=min(1.0, max(0.0, float(res.scale))), mode=st.RUNNING,
                                        health=health)
        except Exception:
            return
        self._spec = ((q, qd_prev, msg, self.options, self.tunables, self.tick), res, cap, health, data)

    def _solve(self, q: np.ndarray, qd_prev: np.ndarray,
               msg: wire.TwistMessage) -> tuple[Resolution, float, str, bytes | None] | None:
        """(resolution, speed-cap factor, health state, pre-encoded command or None) for the newest
        twist, or None after a fault (solver error, non-finite rates)."""
        spec, self._spec = self._spec, None
        if spec is not None and all(a is b for a, b in zip(spec[0], (q, qd_prev, msg, self.options,
                                                                       self.tunables), strict=False)) \
                and spec[0][5] == self.tick:
            self.counts["speculation_used"] += 1
            return spec[1], spec[2], spec[3], spec[4]
        try:
            res, cap = self._compute(q, qd_prev, msg)
        except Exception as exc:  # a solver bug must hold the arm, not kill the tick
            self.counts["solver_errors"] += 1
            self._fault(f"solver error: {type(exc).__name__}: {exc}")
            return None
        if not np.isfinite(res.qd).all():
            self._fault("non-finite solver result")
            return None
        return res, cap, next_state(self.health_state, float(res.singular_values[-1]), self.thresholds), None

    def _commit(self, res: Resolution, cap: float, health: str) -> None:
        """Book a tick's resolution (after its command went out)."""
        new_limits = res.limits_active
        if (new_limits & ~self.limits_active).any():
            self.counts["limit_events"] += 1
        self.limits_active = new_limits
        self.cap = cap
        self.scale = float(res.scale)
        self.damping = float(res.damping)
        self.last_resolution = res
        sv = res.singular_values
        self.sigma_min = float(sv[-1])
        self.manipulability = float(np.prod(sv))
        self._set_health(health)

    def _set_health(self, health: str) -> None:
        if health != self.health_state:
            self.emit_event("health", f"{self.health_state} -> {health} (smallest singular value "
                                      f"{self.sigma_min:.4g} m)")
            self.health_state = health

    # -- output ----------------------------------------------------------------------------------

    def _encode_command(self, wall: int, q: np.ndarray, qd: np.ndarray, answers: int,
                        health: str) -> bytes | None:
        """This tick's command, or None (and a fault) when it cannot be encoded (non-finite, too large)."""
        try:
            return wire.encode_command(seq=self._out_seq["command"], stamp_ns=wall, tick=self.tick, rate=qd,
                                        target=q + qd * self.period_s, answers=answers,
                                        scale=min(1.0, max(0.0, self.scale)) if answers >= 0 else 1.0,
                                        mode=self.mode, health=health)
        except InputError as exc:
            self._fault(f"command not encodable: {exc}")
            self.counts["publish_failed"] += 1
            return None

    def _send_command(self, data: bytes, qd: np.ndarray, answers: int) -> None:
        self._output.send_multipart((wire.TOPIC_COMMAND, data))
        published = time.monotonic_ns()
        self.deadline_to_publish.add(published - self._deadline)
        self._out_seq["command"] += 1
        self.counts["commands"] += 1
        if answers >= 0 and self._twist_unanswered:
            self._twist_unanswered = False
            self.arrival_to_publish.add(published - self._twist_since_ns)
            self.send_to_publish.add(time.time_ns() - self.twist.stamp_ns)
        if self.state.mode == st.SHUTDOWN and not qd.any():
            self.final_command_sent = True

    def measure_health(self, q: np.ndarray) -> dict[str, Any]:
        """Health measures at q as encode_health's keyword arguments: from this tick's resolution when
        running, else from the Jacobian at q (which then also drives the health state)."""
        res = self.last_resolution
        if res is None:
            if self._health_q is not None and np.array_equal(q, self._health_q) and self.last_health:
                # at rest: the measures are unchanged (the thresholds may not be)
                self._set_health(next_state(self.health_state, self.sigma_min, self.thresholds))
                return self.last_health
            _, J = self._kinematics(q)
            h = assess(self.arm, q, J, self.options)
            self.sigma_min = h.sigma_min
            self.manipulability = h.manipulability
            self._set_health(next_state(self.health_state, h.sigma_min, self.thresholds))
        else:
            h = assess(self.arm, q, res, self.options)
        self._health_q = q
        return {
            "manipulability": h.manipulability,
            "manipulability_linear": h.manipulability_translational,
            "manipulability_angular": h.manipulability_rotational,
            "singular_values": h.singular_values,
            "inverse_condition": h.inverse_condition,
            # exactly as twistrate.solver.health gives them (docs/protocol.md 7.4)
            "weakest_linear": h.weakest_linear,
            "weakest_angular": h.weakest_angular,
            "limit_margin": h.limit_margin,
        }

    def _publish_health(self, wall: int, q: np.ndarray) -> None:
        try:
            h = self.measure_health(q)
            self.last_health = h
            data = wire.encode_health(seq=self._out_seq["health"], stamp_ns=wall, tick=self.tick,
                                       damping=self.damping, scale=min(1.0, max(0.0, self.scale)),
                                       state=self.health_state, mode=self.mode, rejected=self.rejected,
                                       overruns=self.ticker.overruns, **h)
        except (InputError, np.linalg.LinAlgError, ValueError) as exc:
            self.counts["publish_failed"] += 1
            self._rlog.warning("health", time.monotonic_ns(), f"health not published: {exc}")
            return
        self._output.send_multipart((wire.TOPIC_HEALTH, data))
        self._out_seq["health"] += 1
        self.counts["health_messages"] += 1

    def emit_event(self, name: str, detail: str) -> None:
        """Queue an event for this tick's publish (tick thread only)."""
        self.state.events.append((name, detail))

    def _publish_events(self, wall: int) -> None:
        events = self.state.events
        for name, detail in events:
            seq = self._out_seq["event"]
            data = wire.encode_event(seq=seq, tick=self.tick, event=name, detail=detail, mode=self.mode,
                                      stamp_ns=wall)
            self._output.send_multipart((wire.TOPIC_EVENT, data))
            self._out_seq["event"] = seq + 1
            self.counts["events"] += 1
            log.info("event %s: %s (mode %s)", name, detail, self.mode)
        events.clear()

    # ============================================================================================
    # control operations (run on the tick thread via submit)
    # ============================================================================================

    def control(self, op: str, args: dict[str, Any], now: int) -> dict[str, Any]:
        """Carry out one decoded control op (not `arm`, `counters` or the validation half of `set`,
        which the control plane does itself). Raises ControlError."""
        s = self.state
        if op == "claim":
            lease = s.claim(args["client"], args.get("lease_ms"), now)
            return {"lease": lease.token, "lease_ms": lease.duration_ns // 1_000_000, "client": lease.client}
        if op == "renew":
            lease = s.renew(args["lease"], now)
            return {"lease_ms": lease.duration_ns // 1_000_000}
        if op == "release":
            s.release(args["lease"], now)
            return {}
        if op == "enable":
            s.enable(args["lease"], now)
            return {"mode": s.mode}
        if op == "disable":
            s.disable(args["lease"], now)
            return {"mode": s.mode}
        if op == "clear_fault":
            s.clear_fault(args["lease"], now)
            return {"mode": s.mode}
        if op == "status":
            return self.status(now)
        raise ControlError("internal", f"op: got {op!r}; accepted: an op the tick thread carries out")

    def apply_tunables(self, token: str, tunables: Tunables, now: int) -> dict[str, Any]:
        """Install validated tunables at this tick boundary (needs the lease)."""
        self.state.holder(token, now)
        old = self.tunables
        self.tunables = tunables
        self.options = tunables.solver_options(self._base_options)
        self.thresholds = tunables.health_thresholds()
        changed = [k for k, v in tunables.model_dump().items() if getattr(old, k) != v]
        if changed:
            self.emit_event("parameters", ", ".join(f"{k} = {getattr(tunables, k)!r}" for k in changed))
        return {"params": tunables.model_dump()}

    def status(self, now: int) -> dict[str, Any]:
        s = self.state
        lease = s.lease if s.lease is not None and now < s.lease.expires_ns else None
        q = self.q
        return {
            "mode": self.mode,
            "health": self.health_state,
            "tick": self.tick,
            "tick_hz": self.rate_hz,
            "arm": self.arm.name,
            "n": self.n,
            "holder": None if lease is None else lease.client,
            "lease_remaining_ms": None if lease is None else (lease.expires_ns - now) // 1_000_000,
            "fault": s.fault_reason if s.mode == st.FAULT else None,
            "simulated": self.sim is not None,
            "reduced_speed": self.tunables.reduced_speed,
            "position": [0.0] * self.n if q is None else q.tolist(),
            "twist_age_ms": None if self.twist is None else (now - self.twist_rx_ns) / 1e6,
            "joints_age_ms": None if q is None or self.q_rx_ns == 0 else (now - self.q_rx_ns) / 1e6,
            "realtime": is_realtime(),  # the tick thread's own policy (status runs on it)
        }

    # -- read-only views for other threads ----------------------------------------------------------

    def arm_description(self) -> dict[str, Any]:
        arm = self.arm
        return {
            "name": arm.name,
            "n": arm.n,
            "joints": [{"name": j.name, "kind": j.kind,
                        "position_min": j.position_min if math.isfinite(j.position_min) else None,
                        "position_max": j.position_max if math.isfinite(j.position_max) else None,
                        "velocity_max": j.velocity_max, "acceleration_max": j.acceleration_max}
                       for j in arm.joints],
            "home": arm.q_home.tolist(),
        }

    def counters(self) -> dict[str, int]:
        """Every counter as an int (read from another thread; values may be one tick apart)."""
        out = dict(self.counts)
        out["ticks"] = self.ticker.ticks
        out["overruns"] = self.ticker.overruns
        for reason, count in list(self.rejected.items()):
            out[f"rejected_{reason}"] = count
        out["rejected_total"] = sum(self.rejected.values())
        hists = (("lateness", self.ticker.lateness), ("arrival_to_publish", self.arrival_to_publish),
                 ("send_to_publish", self.send_to_publish), ("tick_work", self.tick_work),
                 ("solve", self.solve_time),
                 ("deadline_to_publish", self.deadline_to_publish))
        for name, hist in hists:
            s = hist.summary()
            out[f"{name}_median_ns"] = int(s["median_us"] * 1000)
            out[f"{name}_p99_ns"] = int(s["p99_us"] * 1000)
            out[f"{name}_max_ns"] = int(s["max_us"] * 1000)
        if self.recorder is not None:
            out["recorder_dropped"] = int(self.recorder.dropped)
        return out
