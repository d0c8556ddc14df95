"""Fixed-rate tick timing: absolute deadlines, sleep-then-spin wake-up, overrun counting, lateness stats.

Policy (documented in docs/operation.md):

* Deadlines are absolute, on one grid: d_k = t0 + k * T (time.monotonic_ns). A tick never drifts
  because the previous one ran long.
* To wake, the thread sleeps until `spin_ns` before the deadline (time.sleep; the kernel wakes it
  tens of microseconds late), then spins on the clock for the rest. Lateness = wake time - deadline,
  recorded for every tick in a 1 µs histogram. The spin margin adapts to the measured sleep
  overshoot (SPIN_QUANTILE of the last SPIN_WINDOW wake-ups before a spin, plus a pad), so the busy
  wait stays short. The wake-up before the prepare counts only in a period whose spin had no sleep
  before it (the prepare ended inside the margin): it is a longer sleep with a heavier tail, and a late
  one never makes the deadline late by itself. A wake-up later than SPIN_MAX_NS is a stall no allowed
  margin could absorb: it is left out, so that a few stalls do not hold the margin (and the CPU spent
  spinning) at its maximum. The time spent spinning is counted (spin_ns_total; CPU, since the thread
  busy-waits).
* Overrun: when the tick's work ends after the next deadline has already passed, every grid slot
  that passed without a tick is counted as one overrun, and the schedule re-anchors to the next
  future slot of the same grid (no burst of catch-up ticks). Overruns are reported in status and
  health; nothing is absorbed silently. Those that follow a period whose sleep ended more than half a
  period late (a stalled wake-up: the machine's) are also counted apart (overruns_after_stalled_wake).
* The thread gives the CPU up every period: each wait() sleeps at least MIN_SLEEP_NS, even when
  the tick is late, so an overrunning tick cannot hold a core (with SCHED_FIFO, nothing of lower
  priority would run on it otherwise).
* Real-time scheduling when permitted: SCHED_FIFO for the tick thread (make_realtime; refusal is not
  an error), a 1 µs timer slack (prctl) so time.sleep wakes closer to its target, and a runaway
  guard (RLIMIT_RTTIME) that ends the process if a real-time thread ever runs RT_RUNAWAY_LIMIT_US
  without blocking once (the tick blocks every period, so only a stuck tick reaches it).
* With real-time scheduling the service also holds a CPU wake-up latency request (Linux PM QoS,
  CPU_LATENCY_FILE, CPU_WAKE_LATENCY_US) for as long as it runs: idle CPUs then wait in a polling
  state instead of halting, so the tick's timer wakes it without the exit from a deep idle state (on a
  virtual machine: without the hypervisor rescheduling a halted virtual CPU, measured at ms here).
"""

from __future__ import annotations

import array
import contextlib
import ctypes
import os
import struct
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

#: The arrival bound the service is held to: a twist's first command goes out at most one tick period plus
#: this long after the twist arrived, us (measured by `twistrate bench service`, reported by the demo).
ARRIVAL_TARGET_EXTRA_US = 300.0
#: Default spin margin before each deadline, ns. Measured here: time.sleep overshoots by a median
#: ~30 µs (1 µs timer slack) to ~90 µs (default 50 µs slack), p99 ~80-160 µs on a loaded machine.
DEFAULT_SPIN_NS = 150_000
#: Adaptive spin margin (Ticker(adaptive=True)): every SPIN_WINDOW wake-ups the margin becomes the
#: SPIN_QUANTILE of the last SPIN_WINDOW sleep overshoots at most SPIN_MAX_NS plus SPIN_PAD_NS, within
#: [SPIN_MIN_NS, SPIN_MAX_NS]. A tight margin saves CPU (the spin is busy waiting); a wake-up later than
#: the margin shows as lateness. Measured here (bare loop at 500 Hz with 300 us of work, 6 s): counting
#: every overshoot and only the wake-up before the spin, the margin sat at its 400 us maximum (held there
#: by a few stalls; once the prepare ended inside it, nothing fed the window) and waiting took 14 % of a
#: core; with stalls left out and both wake-ups counted, 5.1-5.5 % (margin ~80 us, lateness p99 2-12 us).
#: The 99th percentile plus 10 us (at least 30 us) gave 3.7-3.9 % but p99 13-21 us: not taken, lateness
#: first. Counting the wake-up before the prepare only when no sleep came before the spin (replayed on
#: 9,594 wake-ups recorded from the service at 1 kHz, load average 7 on 2 cores): spin per tick 96 -> 68
#: us, wake-ups later than the margin 1.22 -> 1.30 % (stalls beyond 400 us alone were 1.2 %).
SPIN_WINDOW = 256
SPIN_QUANTILE = 99.5
SPIN_PAD_NS = 20_000
SPIN_MIN_NS = 40_000
SPIN_MAX_NS = 400_000
#: Histogram resolution and range: 1 µs bins up to 50 ms; larger values land in the last bin.
HIST_BIN_NS = 1_000
HIST_BINS = 50_000
#: prctl option numbers of PR_SET_TIMERSLACK and PR_SET_NAME (linux/prctl.h).
PR_SET_TIMERSLACK = 29
PR_SET_NAME = 15
#: The tick thread's operating-system name (`twistrate bench service` reports its CPU by this name).
TICK_THREAD_OS_NAME = "twistrate-tick"
#: Every Ticker.wait() sleeps at least this long, ns, late or not: a tick whose work overruns still
#: gives its core up once per period (5 % of a 1 kHz period).
MIN_SLEEP_NS = 50_000
#: Default SCHED_FIFO priority of the tick thread ([tick] realtime_priority). Modest: below the
#: kernel's threaded interrupt handlers (priority 50) and its watchdog threads (99) (common practice:
#: Linux defaults, `ps -eLo rtprio,comm`), above every normally scheduled process.
DEFAULT_RT_PRIORITY = 10
#: Runaway guard, µs: RLIMIT_RTTIME (Linux, setrlimit(2)) is the CPU time a real-time thread may use
#: without one blocking system call; beyond it the kernel kills the process (soft = hard: SIGKILL).
#: The tick sleeps every period, so only a tick stuck in one call for a whole second reaches it; the
#: robot driver's own command watchdog then stops the arm.
RT_RUNAWAY_LIMIT_US = 1_000_000
#: Kernel real-time throttling (sched-rt-group): real-time threads get at most sched_rt_runtime_us of
#: every sched_rt_period_us on each CPU (defaults 950000 of 1000000: 5 % stays for normal threads);
#: -1 disables it.
RT_RUNTIME_FILE = Path("/proc/sys/kernel/sched_rt_runtime_us")
#: Linux PM QoS CPU latency request (Documentation/power/pm_qos_interface.rst): while a process holds
#: this file open with a 32-bit value written to it, no CPU enters an idle state whose exit latency
#: exceeds that many µs (common practice for real-time Linux: latency test tools hold it at 0).
CPU_LATENCY_FILE = Path("/dev/cpu_dma_latency")
#: The wake-up latency the service requests, µs: 0, idle CPUs poll. Measured on this 2-core virtual
#: machine (SCHED_FIFO loop sleeping to 1 ms deadlines, 5 s): wake-up lateness median/p90 75/363 µs and
#: 265 wake-ups over 1 ms late without the request, 37-42/49 µs and 23-64 over 1 ms with it.
CPU_WAKE_LATENCY_US = 0


class LatencyHistogram:
    """Counts of durations in 1 µs bins (0 .. 50 ms, overflow in the last bin), plus max and sum.

    add() is the per-tick call (cheap, no allocation: the bins are an array.array of 64-bit integers,
    whose item update costs about half a numpy array's, measured 0.26 against 0.48 µs, while a summary
    still reads them at numpy speed, without the 2 ms a Python list's conversion takes); summaries may be
    read from another thread (a torn read shifts a count by one, which statistics tolerate).
    """

    def __init__(self, bins: int = HIST_BINS) -> None:
        self.counts = array.array("q", bytes(8 * (bins + 1)))
        self._last = bins
        self.count = 0
        self.max_ns = 0
        self.total_ns = 0

    def add(self, ns: int) -> None:
        """Record one duration in ns (negative values count as 0)."""
        if ns < 0:
            ns = 0
        i = ns // HIST_BIN_NS
        self.counts[i if i < self._last else self._last] += 1
        self.count += 1
        self.total_ns += ns
        if ns > self.max_ns:
            self.max_ns = ns

    def reset(self) -> None:
        self.counts = array.array("q", bytes(8 * len(self.counts)))
        self.count = 0
        self.max_ns = 0
        self.total_ns = 0

    def percentile_us(self, p: float) -> float:
        """Upper edge (µs) of the bin holding the p-th percentile (0 < p <= 100), never above the max;
        0 when empty."""
        return self.percentiles_us((p,))[0]

    def percentiles_us(self, ps: tuple[float, ...]) -> list[float]:
        """percentile_us of each of `ps`, from one pass over the bins up to the max's (read in place: no
        copy of the 50,000 bins, whose copy and cumulative sum took 4 ms a `counters` op on this loaded
        machine, on the control thread, beside the tick)."""
        last = self._last
        top = min(self.max_ns // HIST_BIN_NS, last) + 1
        cum = np.cumsum(np.frombuffer(self.counts, dtype=np.int64, count=top))
        total = int(cum[-1])  # no bin above the max's holds a count
        out = []
        for p in ps:
            if total == 0:
                out.append(0.0)
                continue
            rank = max(1, int(np.ceil(p / 100.0 * total)))
            i = int(np.searchsorted(cum, rank))
            edge = self.max_ns if i >= last else min((i + 1) * HIST_BIN_NS, self.max_ns)
            out.append(edge / 1000.0)
        return out

    def summary(self) -> dict[str, float]:
        """{count, median_us, p99_us, max_us, mean_us}."""
        n = self.count
        median, p99 = self.percentiles_us((50.0, 99.0))
        return {
            "count": n,
            "median_us": median,
            "p99_us": p99,
            "max_us": self.max_ns / 1000.0,
            "mean_us": (self.total_ns / n / 1000.0) if n else 0.0,
        }


class Ticker:
    """Absolute-deadline scheduler for the calling thread.

    period_ns : tick period T, ns (> 0). spin_ns : spin margin before each deadline, ns (>= 0).
    clock, sleep : injectable for tests (time.monotonic_ns, time.sleep in seconds).
    adaptive : adapt spin_ns to the measured sleep overshoot (see SPIN_WINDOW).
    """

    def __init__(self, period_ns: int, spin_ns: int = DEFAULT_SPIN_NS,
                 clock: Callable[[], int] = time.monotonic_ns,
                 sleep: Callable[[float], None] = time.sleep, adaptive: bool = False) -> None:
        if period_ns <= 0:
            raise ValueError(f"period_ns: got {period_ns!r}; accepted: > 0")
        self.period_ns = int(period_ns)
        self.spin_ns = max(0, int(spin_ns))
        self._clock = clock
        self._sleep = sleep
        self.deadline = 0
        self.ticks = 0
        self.overruns = 0
        #: waits that slept MIN_SLEEP_NS past the point where the spin should have started
        self.forced_sleeps = 0
        #: wall time spent spinning before the deadlines, ns (busy waiting: CPU time of the thread)
        self.spin_ns_total = 0
        #: overruns that followed a period whose sleep ended more than half a period after it was due (a
        #: wake-up stalled: the machine's, not the work's); the other overruns followed work that ran long
        #: (or was itself stalled while working)
        self.overruns_after_stalled_wake = 0
        self._stalled = False
        self.lateness = LatencyHistogram()
        self.adaptive = adaptive
        self._overshoot = np.zeros(SPIN_WINDOW, dtype=np.int64)
        self._n_over = 0

    def start(self, now_ns: int | None = None) -> None:
        """Anchor the grid: the first deadline is one period from now."""
        now = self._clock() if now_ns is None else now_ns
        self.deadline = now

    def set_period(self, period_ns: int) -> None:
        """Change T; the new grid starts at the current deadline (call between ticks)."""
        if period_ns <= 0:
            raise ValueError(f"period_ns: got {period_ns!r}; accepted: > 0")
        self.period_ns = int(period_ns)

    def wait(self, prepare: Callable[[int], object] | None = None, prepare_ns: int = 0) -> int:
        """Block until the next deadline; return it (ns). Counts overruns, records lateness.

        prepare : called once with the deadline (ns), about `prepare_ns` before it (or at once when
            less time is left), for work ahead of the tick (draining the intake, kinematics at the
            newest joint state); then the wait continues to the deadline as usual.

        Every call sleeps at least MIN_SLEEP_NS in all (the prepare sleep counts); when less time is
        left before the spin margin, it sleeps MIN_SLEEP_NS anyway and wakes late (forced_sleeps).
        """
        clock = self._clock
        period = self.period_ns
        d = self.deadline + period
        now = clock()
        if now >= d:
            # The work ran past the next deadline: count the passed slots, re-anchor on the grid.
            missed = (now - d) // period + 1
            self.overruns += missed
            if self._stalled:
                self.overruns_after_stalled_wake += missed
            d += missed * period
        slept = 0
        first = -1  # overshoot of the wake-up before the prepare (-1: no such sleep)
        if prepare is not None:
            early = d - now - prepare_ns
            if early > 0:
                self._sleep(early / 1e9)
                slept = early
                first = clock() - (d - prepare_ns)
            prepare(d)
            now = clock()
        remaining = d - now - self.spin_ns
        short = MIN_SLEEP_NS - slept  # still owed this period
        second = -1  # overshoot of the wake-up before the spin
        if remaining > 0 and remaining >= short:
            self._sleep(remaining / 1e9)
            now = clock()
            second = now - (d - self.spin_ns)
            if self.adaptive:
                self._adapt(second)
        else:
            if self.adaptive and first >= 0:
                self._adapt(first)  # no wake-up before the spin this period: keep the window moving
            if short > 0:
                # Late or nearly (the work ran long): sleep anyway, so the thread gives its core up once per
                # period whatever the work takes. The lateness this costs is recorded like any other.
                self._sleep(short / 1e9)
                self.forced_sleeps += 1
                now = clock()
        t = now
        while t < d:
            t = clock()
        self.spin_ns_total += t - now
        self._stalled = first > period // 2 or second > period // 2
        self.lateness.add(t - d)
        self.deadline = d
        self.ticks += 1
        return d

    def _adapt(self, overshoot_ns: int) -> None:
        if overshoot_ns > SPIN_MAX_NS:  # a stall: no allowed margin absorbs it
            return
        k = self._n_over
        self._overshoot[k % SPIN_WINDOW] = overshoot_ns
        self._n_over = k + 1
        if self._n_over % SPIN_WINDOW == 0:
            q = int(np.percentile(self._overshoot, SPIN_QUANTILE))
            self.spin_ns = min(SPIN_MAX_NS, max(SPIN_MIN_NS, q + SPIN_PAD_NS))


def name_thread(name: str) -> bool:
    """Give the calling thread its operating-system name (Linux prctl PR_SET_NAME, at most 15 bytes
    kept), seen in /proc/PID/task/TID/comm and by process monitors; True when applied."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(PR_SET_NAME, ctypes.c_char_p(name.encode()[:15]), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def set_timer_slack(ns: int = 1_000) -> bool:
    """Set the calling thread's timer slack (Linux prctl); True when applied."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(PR_SET_TIMERSLACK, ctypes.c_ulong(ns), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


@dataclass(frozen=True)
class Scheduling:
    """How a thread is scheduled. realtime : SCHED_FIFO applied; priority : its priority (0 when
    not real-time); requested : the priority asked for (0: none); text : one line for logs."""

    realtime: bool
    priority: int
    requested: int
    text: str


def make_realtime(priority: int) -> Scheduling:
    """Try SCHED_FIFO at `priority` (1..99, clamped to the platform's maximum) for the calling thread.

    priority <= 0 leaves the normal scheduler. Refusal (EPERM without root, CAP_SYS_NICE or an
    RLIMIT_RTPRIO allowance; no support) is not an error: the result says what happened. The policy
    carries SCHED_RESET_ON_FORK, so a process started from this thread is scheduled normally.
    """
    if priority <= 0:
        return Scheduling(False, 0, 0, "normal scheduling (real-time not requested)")
    if not hasattr(os, "sched_setscheduler"):
        return Scheduling(False, 0, priority, "normal scheduling (no SCHED_FIFO on this platform)")
    try:
        top = os.sched_get_priority_max(os.SCHED_FIFO)
        prio = max(1, min(int(priority), top))
        os.sched_setscheduler(0, os.SCHED_FIFO | getattr(os, "SCHED_RESET_ON_FORK", 0), os.sched_param(prio))
    except OSError as exc:
        why = exc.strerror or str(exc)
        return Scheduling(False, 0, priority, f"normal scheduling (SCHED_FIFO refused: {why})")
    return Scheduling(True, prio, priority, f"SCHED_FIFO priority {prio}")


def probe_realtime(priority: int) -> Scheduling:
    """make_realtime(priority) on a short-lived thread: whether this process may use SCHED_FIFO,
    without changing the caller's scheduling."""
    out: list[Scheduling] = []
    probe = threading.Thread(target=lambda: out.append(make_realtime(priority)), name="twistrate-rt-probe")
    probe.start()
    probe.join()
    return out[0]


def is_realtime() -> bool:
    """True when the calling thread runs under SCHED_FIFO or SCHED_RR."""
    try:
        policy = os.sched_getscheduler(0) & ~getattr(os, "SCHED_RESET_ON_FORK", 0)
    except (OSError, AttributeError):
        return False
    return policy in (getattr(os, "SCHED_FIFO", -1), getattr(os, "SCHED_RR", -1))


def guard_runaway(limit_us: int = RT_RUNAWAY_LIMIT_US) -> bool:
    """Bound RLIMIT_RTTIME to limit_us (soft = hard; a lower limit already in force is kept); True when
    a limit is in force afterwards. Process-wide (inherited by child processes), it concerns only
    real-time threads, and is left in place."""
    try:
        import resource

        soft, hard = resource.getrlimit(resource.RLIMIT_RTTIME)
        limit = limit_us if hard == resource.RLIM_INFINITY else min(limit_us, hard)
        if soft == resource.RLIM_INFINITY or soft > limit:
            resource.setrlimit(resource.RLIMIT_RTTIME, (limit, limit))
        return True
    except (ImportError, AttributeError, OSError, ValueError):
        return False


def hold_cpu_wake_latency(latency_us: int = CPU_WAKE_LATENCY_US) -> int | None:
    """Request a CPU wake-up latency of at most latency_us (>= 0) through CPU_LATENCY_FILE; return the
    open file descriptor that holds the request (release_cpu_wake_latency ends it; so does the
    process's exit), or None when refused (no such file, not permitted: root only by default)."""
    try:
        fd = os.open(CPU_LATENCY_FILE, os.O_WRONLY | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        os.write(fd, struct.pack("=i", max(0, int(latency_us))))
    except OSError:
        os.close(fd)
        return None
    return fd


def cpu_wake_latency_in_force_us() -> int | None:
    """The CPU wake-up latency request in force on this machine, µs (the smallest of all held; the
    kernel reports 2_000_000_000 when none is held), or None when it cannot be read (root only by
    default)."""
    try:
        with open(CPU_LATENCY_FILE, "rb") as f:
            raw = f.read(4)
    except OSError:
        return None
    return struct.unpack("=i", raw)[0] if len(raw) == 4 else None


def release_cpu_wake_latency(fd: int | None) -> None:
    """End a request made by hold_cpu_wake_latency (None: nothing to do)."""
    if fd is not None:
        with contextlib.suppress(OSError):
            os.close(fd)


def rt_throttling() -> bool | None:
    """Whether the kernel's real-time throttling is on (RT_RUNTIME_FILE not -1); None when unknown."""
    try:
        return int(RT_RUNTIME_FILE.read_text().split()[0]) >= 0
    except (OSError, ValueError, IndexError):
        return None
