"""The service runtime: the tick thread and its sockets, scheduling, garbage collection and life cycle.

Threads (docs/operation.md, "Threads"):

* The tick thread owns the intake SUB and output PUB sockets and runs the pipeline (service/pipeline.py)
  on absolute deadlines (service/tick.py): prepare before each deadline, the command at it, then a
  scheduled garbage collection, then the rest of the tick.
* The control plane (service/control.py) runs on an asyncio/uvloop loop in another thread. It never
  touches tick state: it submits a function to `Service.submit`, which the tick thread runs at the
  start of its next tick and whose result comes back through a concurrent.futures.Future. Counters are
  read directly (plain ints and histograms; a torn read only shifts a count); everything else another
  thread wants to know is in the pipeline's Snapshot, replaced after every tick.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import gc
import logging
import os
import sys
import threading
from collections.abc import Callable
from typing import Any

import zmq

from twistrate.service import wire
from twistrate.service.config import ServiceConfig
from twistrate.service.pipeline import Pipeline
from twistrate.service.state import E_SHUTDOWN
from twistrate.service.telemetry import Snapshot, arm_description
from twistrate.service.tick import (
    TICK_THREAD_OS_NAME,
    Scheduling,
    Ticker,
    guard_runaway,
    hold_cpu_wake_latency,
    make_realtime,
    name_thread,
    probe_realtime,
    release_cpu_wake_latency,
    rt_throttling,
    set_timer_slack,
)
from twistrate.solver.arm import Arm
from twistrate.solver.errors import ControlError

log = logging.getLogger("twistrate.service")

#: GIL switch interval the service sets at start, s (Python's default is 5 ms: a busy control thread
#: could hold the GIL that long when the tick wakes). See DEVELOPERS.md for the measurement.
SWITCH_INTERVAL_S = 0.0005
#: The tick thread wakes this long before each deadline to prepare (Pipeline.prepare), ns; at most
#: PREPARE_FRACTION of the period.
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


class Service:
    """One arm's streaming service: the tick thread, its sockets, the pipeline, the recorder hook.

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
        self.realtime_priority = (config.tick.realtime_priority if realtime_priority is None
                                  else realtime_priority)
        self.switch_interval_s = switch_interval_s
        self.recorder = recorder
        self.manage_gc = manage_gc
        self._gc_was_enabled = gc.isenabled()
        self._gc_count = 0
        self._own_context = context is None
        self.context = context or zmq.Context()
        self.ticker = Ticker(round(1e9 / config.tick.rate_hz), adaptive=True)
        self.pipeline = Pipeline(config, self.arm, self.ticker, recorder=recorder)
        #: the endpoints as bound (a configured port * becomes the one the operating system picked)
        self.endpoints: dict[str, str] = {}
        self.scheduling = Scheduling(False, 0, self.realtime_priority, "not started")
        self._thread: threading.Thread | None = None
        self._ready = threading.Event()
        self._done = threading.Event()
        self._start_error: BaseException | None = None
        #: the CPU wake-up latency request held while the tick runs real-time (tick.hold_cpu_wake_latency)
        self._cpu_latency_fd: int | None = None
        self._auth: Any = None
        self._sockets: tuple[zmq.Socket, zmq.Socket] | None = None
        self.curve_keys: tuple[bytes, bytes] | None = None
        self._done_callbacks: list[Callable[[], None]] = []

    # -- read-only views for other threads -----------------------------------------------------------

    @property
    def snapshot(self) -> Snapshot:
        """The service as its last tick left it."""
        return self.pipeline.snapshot

    @property
    def rate_hz(self) -> float:
        return self.pipeline.rate_hz

    @property
    def period_s(self) -> float:
        return self.pipeline.period_s

    def counters(self) -> dict[str, int]:
        """Every counter as an int (values may be one tick apart)."""
        return self.pipeline.telemetry.counters(self.recorder)

    def arm_description(self) -> dict[str, Any]:
        return arm_description(self.arm)

    # -- life cycle (any thread) ---------------------------------------------------------------------

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
        or exception. Thread-safe; the only way other threads change tick state."""
        if self._done.is_set():
            fut: concurrent.futures.Future = concurrent.futures.Future()
            fut.set_exception(ControlError(E_SHUTDOWN, "service: stopped; accepted: none"))
            return fut
        return self.pipeline.submit(fn)

    def shutdown(self, why: str = "shutdown requested") -> None:
        """Ask the tick thread to ramp to rest, publish a final zero command and stop (thread-safe)."""
        if self.pipeline.shutdown_why is None:
            self.pipeline.shutdown_why = why

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

    # -- sockets (tick thread) -----------------------------------------------------------------------

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

    def bind(self, sock: zmq.Socket, name: str) -> None:
        """Bind `sock` to the configured endpoint `name` and record where it is bound."""
        sock.bind(getattr(self.config.endpoints, name))
        self.endpoints[name] = sock.getsockopt_string(zmq.LAST_ENDPOINT)

    def _open_sockets(self) -> None:
        intake = self.context.socket(zmq.SUB)
        output = self.context.socket(zmq.PUB)
        try:
            self.configure_socket(intake)
            self.configure_socket(output)
            for topic in wire.INTAKE_TOPICS:
                intake.setsockopt(zmq.SUBSCRIBE, topic)
            self.bind(intake, "intake")
            self.bind(output, "output")
        except BaseException:
            intake.close(0)
            output.close(0)
            raise
        self._sockets = (intake, output)
        # Frame by frame rather than recv_multipart/send_multipart, whose per-call checks cost more than
        # the transfer here (measured: a [topic, map] publish after a 1 ms sleep, median 22 us with
        # send_multipart, 12 us with two send calls).
        events, pollin, more = zmq.EVENTS, zmq.POLLIN, zmq.RCVMORE
        getsockopt, recv = intake.getsockopt, intake.recv

        def poll() -> list[bytes] | None:
            if not getsockopt(events) & pollin:
                return None
            frames = [recv()]
            while getsockopt(more):
                frames.append(recv())
            return frames

        send, sndmore = output.send, zmq.SNDMORE

        def publish(topic: bytes, data: bytes) -> None:
            send(topic, sndmore)
            send(data)

        self.pipeline.bind(poll, publish)

    def _close_sockets(self) -> None:
        if self._sockets is not None:
            intake, output = self._sockets
            intake.close(0)
            output.close(FINAL_LINGER_MS)
            self._sockets = None

    # -- the tick loop (tick thread) -----------------------------------------------------------------

    def _run(self) -> None:
        p = self.pipeline
        bind_ns = p.clock()  # nothing can arrive before the bind
        try:
            self._open_sockets()
            if self.recorder is not None and not self.recorder.is_open:
                self.recorder.open()  # only once bound: a service that cannot start touches no file
        except BaseException as exc:  # reported to start()
            self._close_sockets()
            self._start_error = exc
            self._done.set()
            self._ready.set()
            return
        name_thread(TICK_THREAD_OS_NAME)
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
        p.start(bind_ns)
        self._ready.set()
        log.info("tick %g Hz on %s (%s%s); intake %s, output %s", p.rate_hz, self.arm.name, sched.text,
                 "; idle CPUs poll" if self._cpu_latency_fd is not None else "",
                 self.endpoints["intake"], self.endpoints["output"])
        shutdown_deadline = None
        clock = p.clock
        prepare_ns = min(PREPARE_NS, int(PREPARE_FRACTION * p.period_ns))
        work = p.telemetry.hist["tick_work"]
        try:
            while True:
                deadline = ticker.wait(p.prepare, prepare_ns)
                p.command(deadline)
                if self.manage_gc and p.tick % GC_YOUNG_EVERY == 0:
                    self._collect()
                p.finish()
                work.add(clock() - deadline)
                if p.shutdown_why is not None:
                    if shutdown_deadline is None:
                        shutdown_deadline = clock() + int(SHUTDOWN_TIMEOUT_S * 1e9)
                    if p.final_command_sent or p.intake.q is None or clock() > shutdown_deadline:
                        break
        except BaseException:  # the tick must not die silently: log, hold, stop
            log.exception("tick thread failed; stopping")
        finally:
            self._finish()

    def _finish(self) -> None:
        release_cpu_wake_latency(self._cpu_latency_fd)
        self._cpu_latency_fd = None
        self._close_sockets()
        self.pipeline.cancel_pending()
        if self.recorder is not None:
            self.recorder.close()
        self._done.set()
        for fn in self._done_callbacks:
            fn()
        log.info("tick stopped after %d ticks, %d overruns", self.ticker.ticks, self.ticker.overruns)

    def _collect(self) -> None:
        """One scheduled garbage collection (after the command went out)."""
        k = self._gc_count = self._gc_count + 1
        if k % (GC_MIDDLE_EVERY * GC_FULL_EVERY) == 0:
            gc.collect(2)
        elif k % GC_MIDDLE_EVERY == 0:
            gc.collect(1)
        else:
            gc.collect(0)
        self.pipeline.telemetry.counts["gc_collections"] += 1
