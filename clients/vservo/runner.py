"""The live camera loop: newest frame in, the servo's twist out to the service, a terminal line, a log.

A client like any other: it claims the lease, enables motion and streams twists through the client
library (twistrate.clients.link). One twist goes out per new frame, at once (so a frame's twist reaches
the service's next tick), and at `run.rate_hz` while no frame arrives (the same law on the newest
frame, or zero when the gate says stale / missing / too few). Stops on convergence unless `track`,
after `seconds`, on `stop`, or when the service refuses it; always ends with a zero twist, disable
and release.
"""

from __future__ import annotations

import csv
import gc
import os
import sys
import threading
import time
from array import array
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TextIO

import numpy as np

from twistrate.clients.link import Link, LinkTimeoutError
from twistrate.clients.threads import thread_ids
from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo.errorlog import ErrorLog
from twistrate.clients.vservo.features import ServoState
from twistrate.clients.vservo.feed import FeatureInput, to_frame
from twistrate.clients.vservo.sched import realtime
from twistrate.clients.vservo.servo import ZERO, Servo, Step, wire_twist
from twistrate.clients.vservo.toolpose import ToolPose
from twistrate.service import wire
from twistrate.service.wire import EventMessage, HealthMessage
from twistrate.solver.errors import TwistrateError

#: Terminal line refreshes per second.
DISPLAY_HZ = 4.0
#: Zero twists sent before letting go, so the arm is told to stop even if one is lost.
FINAL_ZEROS = 3
#: Garbage collection during the loop (as the service does, docs/operation.md "Threads"): what exists at
#: the start is frozen (never scanned again), automatic collection is off, and the loop collects right
#: after a twist went out: the young generation every GC_YOUNG_EVERY steps, the middle one every
#: GC_MIDDLE_EVERY young collections, everything every GC_FULL_EVERY middle ones. An automatic collection
#: would otherwise land wherever an allocation crosses a threshold, between a frame and its twist.
GC_YOUNG_EVERY = 10
GC_MIDDLE_EVERY = 10
GC_FULL_EVERY = 100


@dataclass
class Outcome:
    """How a run ended and what it saw. reason: settled, time, stopped, service (refused or lost)."""

    reason: str = "stopped"
    t0: float = 0.0  # time.monotonic() at the start of the loop; `times` count from it
    detail: str = ""
    frames: int = 0
    twists: int = 0
    settled_at_s: float | None = None
    states: dict[str, int] = field(default_factory=dict)
    last: Step | None = None
    times: list[float] = field(default_factory=list)
    errors: list[float | None] = field(default_factory=list)
    timeline: list[str] = field(default_factory=list)  # the state of every step, in step order
    scheduling: str = "normal scheduling (real-time not requested)"  # the loop's ([run] realtime_priority)


class Timings:
    """What `Runner(on_sent=..., on_wait=...)` reports, kept in memory and written after the run (nothing
    on the path: `waiting` is called before each wait, the call after the twist went out): per twist
    that answered a new frame, the frame's seq, the twist's seq, when the frame was taken off the socket
    and when its twist had gone out (wall clock, ns since 1970 UTC; the benchmark compares them with the
    sender's and the service's stamps on the same machine), and how long threads waited for a CPU
    (runnable but not running, ns; Linux schedstat, its second field; -1 where unavailable) from the
    start of the wait in which the frame came to the twist sent: `cpu_wait_ns` the loop's thread,
    `cpu_wait_all_ns` every thread of the process (the loop's and ZeroMQ's I/O threads, which take the
    frame off the connection first; threads that wait at the same time add up). That window holds the
    frame's wake-up and its whole path: a stall there that these waits cover is the machine's load, not
    the client's work. proc: where procfs is mounted."""

    COLUMNS = ("features_seq", "twist_seq", "received_ns", "sent_ns", "cpu_wait_ns", "cpu_wait_all_ns")

    def __init__(self, proc: str = "/proc") -> None:
        self.proc = proc
        self.rows: tuple[array, ...] = tuple(array("q") for _ in self.COLUMNS)
        self._own: int | None = None  # /proc/thread-self/schedstat of the reporting thread, opened by it
        self._all: list[int] = []  # every thread's, opened then too
        self._before = (-1, -1)

    def _open(self) -> None:
        try:
            self._own = os.open(f"{self.proc}/thread-self/schedstat", os.O_RDONLY)
            for tid in thread_ids(proc=self.proc) or ():
                self._all.append(os.open(f"{self.proc}/self/task/{tid}/schedstat", os.O_RDONLY))
        except OSError:
            self._own = -1

    def _waited_ns(self) -> tuple[int, int]:
        """(the reporting thread's, all threads') cumulative run-queue wait, ns, or -1."""
        if self._own is None:
            self._open()
        if self._own < 0:
            return -1, -1
        try:
            own = int(os.pread(self._own, 100, 0).split()[1])
            return own, sum(int(os.pread(fd, 100, 0).split()[1]) for fd in self._all)
        except (OSError, ValueError, IndexError):
            return -1, -1

    def waiting(self) -> None:
        """Called right before the loop waits for a frame."""
        self._before = self._waited_ns()

    def __call__(self, features_seq: int, twist_seq: int, received_ns: int, sent_ns: int) -> None:
        a, b, c, d, e, f = self.rows
        a.append(features_seq)
        b.append(twist_seq)
        c.append(received_ns)
        d.append(sent_ns)
        own, every = self._waited_ns()
        ok = own >= 0 and self._before[0] >= 0
        e.append(own - self._before[0] if ok else -1)
        f.append(every - self._before[1] if ok else -1)

    def write(self, path: str) -> None:
        """A CSV file (RFC 4180, one header row): the COLUMNS, one row per answered frame."""
        for fd in (self._own, *self._all):
            if fd is not None and fd >= 0:
                os.close(fd)
        self._own, self._all = None, []
        with open(path, "w", newline="") as f:
            out = csv.writer(f, lineterminator="\n")
            out.writerow(self.COLUMNS)
            out.writerows(zip(*self.rows, strict=True))


def read_timings(path: str) -> dict[str, list[int]]:
    """The columns of a file Timings.write wrote, as lists of int."""
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return {name: [int(r[i]) for r in rows[1:]] for i, name in enumerate(rows[0])}


def status_line(t_s: float, step: Step, twist: dict, mode: str, health: str, frames: int,
                refused: int) -> str:
    """One terminal line: time, state, feature error (pixels and normalised), twist sent, service."""
    if step.error_px_mean is not None:
        err = f"err {step.error_px_mean:7.2f} px ({step.error_norm:.4f})"
    elif step.error_m is not None:
        err = f"err {step.error_m * 1000:6.2f} mm {step.error_rad * 1000:6.2f} mrad"
    else:
        err = "err      -"
    v = " ".join(f"{c:+.3f}" for c in twist["linear"])
    w = " ".join(f"{c:+.3f}" for c in twist["angular"])
    tail = f" refused {refused}" if refused else ""
    return (f"t {t_s:6.2f} s  {step.state.value:<8} {step.points} pts  {err}  v [{v}] m/s  w [{w}] rad/s"
            f" ({twist['frame']})  service {mode}/{health}  frames {frames}{tail}")


class Runner:
    """One vservo run against a service. tool_origin: a callable giving the tool origin (3,) m, base
    frame, needed only for a camera in the cell; by default the newest `state` message the link
    receives (subscribe it to b"state"; until one arrives the twist is zero and the state `stale`).
    on_sent(features_seq, twist_seq, received_ns, sent_ns) is called for every twist sent in answer to a
    new frame, after the send (wall clock, time.time_ns(): when the frame was taken off the socket and
    when its twist had gone out; the benchmark splits the latency with them); on_start(t0) when the loop
    starts (t0: time.monotonic(), the origin of the run's times); on_wait() right before each wait for
    a frame (off the path; Timings.waiting)."""

    def __init__(self, config: vc.VservoConfig, link: Link, feed: FeatureInput, *, track: bool = False,
                 log: ErrorLog | None = None, out: TextIO | None = sys.stdout,
                 tool_origin: Callable[[], np.ndarray | None] | None = None,
                 on_sent: Callable[[int, int, int, int], None] | None = None,
                 on_start: Callable[[float], None] | None = None,
                 on_wait: Callable[[], None] | None = None) -> None:
        self.config = config
        self.link = link
        self.feed = feed
        self.track = track
        self.log = log
        self.out = out
        self.mount = vc.mount(config)
        self.poses = ToolPose()
        if self.mount.kind == "cell" and tool_origin is None:
            tool_origin = self.poses.origin  # fed by the link's `state` messages (subscribe to b"state")
        self.tool_origin = tool_origin
        self.on_sent = on_sent
        self.on_start = on_start
        self.on_wait = on_wait
        self.servo = Servo(vc.settings(config), vc.goal(config), vc.convergence(config))
        self.mode = "?"
        self.health = "?"
        self.stop_event = threading.Event()

    def stop(self) -> None:
        self.stop_event.set()

    def _watch_service(self) -> None:
        """Take the newest health / event messages queued (mode and health state)."""
        while True:
            try:
                message = self.link.receive(0.0)
            except LinkTimeoutError:
                return
            if isinstance(message, HealthMessage):
                self.mode, self.health = message.mode, message.state
            elif isinstance(message, EventMessage):
                self.mode = message.mode
            elif isinstance(message, wire.StateMessage):
                self.poses.update_message(message)

    def _send(self, step: Step) -> tuple[int, dict, Step]:
        """Send the step's twist; returns its seq, the wire fields and the step sent (a camera in the cell
        without a tool pose yet sends a zero twist, state `stale`)."""
        origin = self.tool_origin() if self.tool_origin is not None else None
        if self.mount.kind == "cell" and origin is None:
            step = Step(ServoState.STALE, ZERO)  # no tool pose yet: nothing safe to send
            origin = (0.0, 0.0, 0.0)
        twist = wire_twist(step.twist, self.mount, origin)
        seq = self.link.send_twist(twist["linear"], twist["angular"], twist["frame"], twist["point"])
        return seq, twist, step

    def run(self, seconds: float | None = None) -> Outcome:
        """Claim, enable, servo until done; then zero twists, disable, release. Returns the outcome."""
        outcome = Outcome()
        link, cfg = self.link, self.config
        link.wait_ready(timeout_s=10.0)
        link.claim("vservo", lease_ms=cfg.run.lease_ms)
        try:
            link.enable()
            self._loop(seconds, outcome)
        except TwistrateError as exc:
            outcome.reason, outcome.detail = "service", str(exc)
        finally:
            self._let_go()
        outcome.frames = self.feed.received
        return outcome

    def _loop(self, seconds: float | None, outcome: Outcome) -> None:
        was_enabled = gc.isenabled()
        gc.collect()
        gc.freeze()
        gc.disable()
        rt = realtime(self.config.run.realtime_priority)  # this thread and ZeroMQ's I/O threads, if asked
        outcome.scheduling = rt.text
        try:
            self._servo_loop(seconds, outcome)
        finally:
            rt.restore()  # from this thread: the loop's own policy is its caller's again
            gc.unfreeze()
            if was_enabled:
                gc.enable()

    def _collect(self, steps: int) -> None:
        """The scheduled collection after step number `steps` (its twist is out)."""
        if steps % GC_YOUNG_EVERY:
            return
        young = steps // GC_YOUNG_EVERY
        gc.collect(2 if young % (GC_MIDDLE_EVERY * GC_FULL_EVERY) == 0 else 1 if young % GC_MIDDLE_EVERY == 0
                   else 0)

    def _servo_loop(self, seconds: float | None, outcome: Outcome) -> None:
        period = 1.0 / self.config.run.rate_hz
        kind = self.config.law.kind
        t0 = outcome.t0 = time.monotonic()
        if self.on_start is not None:
            self.on_start(t0)
        next_send = next_show = t0
        frame, arrived, pending = None, t0, None
        while not self.stop_event.is_set():
            now = time.monotonic()
            if seconds is not None and now - t0 >= seconds:
                outcome.reason = "time"
                return
            if self.on_wait is not None:
                self.on_wait()
            got = self.feed.newest(min(max(0.0, next_send - now), 0.05))
            if got is not None:
                pending, arrived = got
                frame = to_frame(pending, arrived, kind)
            now = time.monotonic()
            if got is None and now < next_send:
                continue
            step = self.servo.step(frame, arrived, now)
            if self.mount.kind == "cell":
                self._watch_service()  # the newest tool origin before the twist goes out
            seq, twist, step = self._send(step)
            if got is not None and self.on_sent is not None:
                self.on_sent(pending.seq, seq, self.feed.arrived_ns, time.time_ns())
            outcome.twists += 1
            next_send = now + period
            outcome.states[step.state.value] = outcome.states.get(step.state.value, 0) + 1
            outcome.last = step
            outcome.times.append(now - t0)
            outcome.errors.append(step.error_norm if step.moving else None)
            outcome.timeline.append(step.state.value)
            settled = step.state is ServoState.SETTLED
            if settled and outcome.settled_at_s is None:
                outcome.settled_at_s = now - t0
            if self.log is not None:
                self.log.row(now - t0, step.state.value, step.points, step.error_px_mean, step.error_px_max,
                             step.error_norm, step.error_m, step.error_rad, step.twist, step.gain, settled)
            if now >= next_show:
                self._watch_service()
                self._show(now - t0, step, twist)
                next_show = now + 1.0 / DISPLAY_HZ
            if settled and not self.track:
                self._show(now - t0, step, twist)
                outcome.reason = "settled"
                return
            self._collect(outcome.twists)

    def _show(self, t_s: float, step: Step, twist: dict) -> None:
        if self.out is None:
            return
        line = status_line(t_s, step, twist, self.mode, self.health, self.feed.received,
                           sum(self.feed.refused.values()))
        if self.out.isatty():
            self.out.write("\r" + line[:200] + "\x1b[K")
        else:
            self.out.write(line + "\n")
        self.out.flush()

    def _let_go(self) -> None:
        try:
            for _ in range(FINAL_ZEROS):
                self.link.send_twist([0.0] * 3, [0.0] * 3)
            self.link.disable()
            self.link.release()
        except TwistrateError:
            pass  # the lease lapsed or the service went: its watchdog brings the arm to rest
        if self.out is not None and self.out.isatty():
            self.out.write("\n")
