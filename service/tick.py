"""Fixed-rate tick timing: absolute deadlines, sleep-then-spin wake-up, overrun counting, lateness stats.

Policy (documented in docs/operation.md):

* Deadlines are absolute, on one grid: d_k = t0 + k * T (time.monotonic_ns). A tick never drifts
  because the previous one ran long.
* To wake, the thread sleeps until `spin_ns` before the deadline (time.sleep; the kernel wakes it
  tens of microseconds late), then spins on the clock for the rest. Lateness = wake time - deadline,
  recorded for every tick in a 1 µs histogram. The spin margin adapts to the measured sleep
  overshoot (SPIN_QUANTILE of the last SPIN_WINDOW, plus a pad), so the busy wait stays short.
* Overrun: when the tick's work ends after the next deadline has already passed, every grid slot
  that passed without a tick is counted as one overrun, and the schedule re-anchors to the next
  future slot of the same grid (no burst of catch-up ticks). Overruns are reported in status and
  health; nothing is absorbed silently.
* Optional real-time scheduling: SCHED_FIFO for the tick thread when the process is permitted,
  and a 1 µs timer slack (prctl) so time.sleep wakes closer to its target.
"""

from __future__ import annotations

import ctypes
import os
import time
from collections.abc import Callable

import numpy as np

#: Default spin margin before each deadline, ns. Measured here: time.sleep overshoots by a median
#: ~30 µs (1 µs timer slack) to ~90 µs (default 50 µs slack), p99 ~80-160 µs on a loaded machine.
DEFAULT_SPIN_NS = 150_000
#: Adaptive spin margin (Ticker(adaptive=True)): every SPIN_WINDOW ticks the margin becomes the
#: SPIN_QUANTILE of the last SPIN_WINDOW sleep overshoots plus SPIN_PAD_NS, within [SPIN_MIN_NS, SPIN_MAX_NS].
#: A tight margin saves CPU (the spin is busy waiting); a wake-up later than the margin shows as lateness.
SPIN_WINDOW = 256
SPIN_QUANTILE = 99.5
SPIN_PAD_NS = 20_000
SPIN_MIN_NS = 40_000
SPIN_MAX_NS = 400_000
#: Histogram resolution and range: 1 µs bins up to 50 ms; larger values land in the last bin.
HIST_BIN_NS = 1_000
HIST_BINS = 50_000
#: prctl option number of PR_SET_TIMERSLACK (linux/prctl.h).
PR_SET_TIMERSLACK = 29


class LatencyHistogram:
    """Counts of durations in 1 µs bins (0 .. 50 ms, overflow in the last bin), plus max and sum.

    add() is the per-tick call (cheap, no allocation); summaries may be read from another thread
    (a torn read shifts a count by one, which statistics tolerate).
    """

    def __init__(self, bins: int = HIST_BINS) -> None:
        self.counts = np.zeros(bins + 1, dtype=np.int64)
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
        self.counts[:] = 0
        self.count = 0
        self.max_ns = 0
        self.total_ns = 0

    def percentile_us(self, p: float) -> float:
        """Upper edge (µs) of the bin holding the p-th percentile (0 < p <= 100); 0 when empty."""
        counts = self.counts.copy()
        total = int(counts.sum())
        if total == 0:
            return 0.0
        rank = max(1, int(np.ceil(p / 100.0 * total)))
        i = int(np.searchsorted(np.cumsum(counts), rank))
        if i >= self._last:
            return self.max_ns / 1000.0
        return min((i + 1) * HIST_BIN_NS, max(self.max_ns, HIST_BIN_NS)) / 1000.0

    def summary(self) -> dict[str, float]:
        """{count, median_us, p99_us, max_us, mean_us}."""
        n = self.count
        return {
            "count": n,
            "median_us": self.percentile_us(50.0),
            "p99_us": self.percentile_us(99.0),
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
        """
        clock = self._clock
        period = self.period_ns
        d = self.deadline + period
        now = clock()
        if now >= d:
            # The work ran past the next deadline: count the passed slots, re-anchor on the grid.
            missed = (now - d) // period + 1
            self.overruns += missed
            d += missed * period
        if prepare is not None:
            early = d - now - prepare_ns
            if early > 0:
                self._sleep(early / 1e9)
            prepare(d)
            now = clock()
        remaining = d - now - self.spin_ns
        if remaining > 0:
            self._sleep(remaining / 1e9)
            if self.adaptive:
                self._adapt(clock() - (d - self.spin_ns))
        while clock() < d:
            pass
        self.lateness.add(clock() - d)
        self.deadline = d
        self.ticks += 1
        return d


    def _adapt(self, overshoot_ns: int) -> None:
        k = self._n_over
        self._overshoot[k % SPIN_WINDOW] = overshoot_ns
        self._n_over = k + 1
        if self._n_over % SPIN_WINDOW == 0:
            q = int(np.percentile(self._overshoot, SPIN_QUANTILE))
            self.spin_ns = min(SPIN_MAX_NS, max(SPIN_MIN_NS, q + SPIN_PAD_NS))


def set_timer_slack(ns: int = 1_000) -> bool:
    """Set the calling thread's timer slack (Linux prctl); True when applied."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(PR_SET_TIMERSLACK, ctypes.c_ulong(ns), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def make_realtime(priority: int) -> str:
    """Try SCHED_FIFO at `priority` (1..99) for the calling thread; return what happened, for logs.

    priority <= 0 leaves the normal scheduler. Refusal (no permission, no support) is not an error.
    """
    if priority <= 0:
        return "normal scheduling (real-time not requested)"
    if not hasattr(os, "sched_setscheduler"):
        return "normal scheduling (no SCHED_FIFO on this platform)"
    try:
        top = os.sched_get_priority_max(os.SCHED_FIFO)
        prio = max(1, min(int(priority), top))
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(prio))
    except (OSError, PermissionError) as exc:
        return f"normal scheduling (SCHED_FIFO refused: {exc.strerror or exc})"
    return f"SCHED_FIFO priority {prio}"
