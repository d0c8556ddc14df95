"""Tick timing logic with a simulated clock: absolute deadlines, overrun counting and re-anchoring, a
sleep in every period, lateness histogram percentiles (against numpy.percentile as the reference);
real-time scheduling, its fallback, the runaway guard and the CPU wake-up latency request."""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys

import numpy as np
import pytest

from twistrate.service import tick
from twistrate.service.tick import (
    CPU_LATENCY_FILE,
    DEFAULT_RT_PRIORITY,
    MIN_SLEEP_NS,
    SPIN_MAX_NS,
    SPIN_MIN_NS,
    SPIN_PAD_NS,
    SPIN_WINDOW,
    LatencyHistogram,
    Ticker,
    cpu_wake_latency_in_force_us,
    hold_cpu_wake_latency,
    is_realtime,
    make_realtime,
    probe_realtime,
    release_cpu_wake_latency,
)


class FakeClock:
    """Monotonic ns clock that advances by `read_cost` on every read and by the slept time on sleep,
    plus a scripted oversleep (what the kernel adds)."""

    def __init__(self, start=1_000_000_000, read_cost=1_000, oversleep=30_000):
        self.t = start
        self.read_cost = read_cost
        self.oversleep = oversleep
        self.sleeps = []

    def __call__(self):
        self.t += self.read_cost
        return self.t

    def sleep(self, s):
        self.sleeps.append(s)
        self.t += int(s * 1e9) + self.oversleep


def test_deadlines_are_absolute_grid_and_wake_is_on_time():
    clk = FakeClock()
    tk = Ticker(2_000_000, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    t0 = tk.deadline
    for k in range(1, 51):
        d = tk.wait()
        assert d == t0 + k * 2_000_000
        clk.t += 300_000  # the tick's work
    assert tk.overruns == 0
    # The spin absorbs the 30 µs oversleep: lateness is one clock read at most.
    assert tk.lateness.max_ns <= 2 * clk.read_cost
    assert all(s > 0 for s in clk.sleeps)


def test_overrun_counts_missed_slots_and_reanchors_to_the_next_future_slot():
    clk = FakeClock(read_cost=10)
    period = 1_000_000
    tk = Ticker(period, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    t0 = tk.deadline
    assert tk.wait() == t0 + period
    clk.t += 3_500_000  # work ran 3.5 periods: deadlines t0+2T, +3T, +4T passed
    d = tk.wait()
    assert tk.overruns == 3
    assert d == t0 + 5 * period  # same grid, next future slot
    assert d > clk.t - 1_000
    clk.t += 100_000
    assert tk.wait() == t0 + 6 * period
    assert tk.overruns == 3


def test_prepare_runs_once_ahead_of_the_deadline_then_the_wait_completes():
    clk = FakeClock(read_cost=100, oversleep=20_000)
    tk = Ticker(2_000_000, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    calls = []

    def prepare(deadline):
        calls.append((deadline, clk.t))
        clk.t += 150_000  # the preparation's own work

    d = tk.wait(prepare, prepare_ns=500_000)
    assert len(calls) == 1 and calls[0][0] == d
    assert d - 500_000 <= calls[0][1] < d - 300_000  # woke about prepare_ns early (plus the oversleep)
    assert tk.lateness.max_ns <= 2 * clk.read_cost
    clk.t = d + 1_900_000  # work left less than prepare_ns: prepare runs at once
    d2 = tk.wait(prepare, prepare_ns=500_000)
    assert len(calls) == 2 and calls[1][1] < d2 and d2 == d + 2_000_000
    assert tk.overruns == 0


def test_adaptive_spin_follows_the_sleep_overshoot():
    clk = FakeClock(read_cost=100, oversleep=30_000)
    tk = Ticker(1_000_000, spin_ns=300_000, clock=clk, sleep=clk.sleep, adaptive=True)
    tk.start()
    for _ in range(SPIN_WINDOW):
        tk.wait()
        clk.t += 100_000
    # overshoot = 30 us oversleep + one clock read; margin = that + pad
    assert tk.spin_ns == pytest.approx(30_000 + SPIN_PAD_NS, abs=200)
    clk.oversleep = 1_000
    for _ in range(SPIN_WINDOW):
        tk.wait()
        clk.t += 100_000
    assert tk.spin_ns == SPIN_MIN_NS
    assert tk.overruns == 0 and tk.lateness.max_ns <= 2 * clk.read_cost


def test_stalls_beyond_the_maximum_margin_do_not_hold_the_spin_margin_up():
    """A few wake-ups later than SPIN_MAX_NS (stalls no margin absorbs) are left out of the quantile: the
    margin follows the ordinary overshoot, not the stalls."""
    clk = FakeClock(read_cost=100, oversleep=30_000)
    tk = Ticker(1_000_000, spin_ns=300_000, clock=clk, sleep=clk.sleep, adaptive=True)
    tk.start()
    for k in range(2 * SPIN_WINDOW):
        clk.oversleep = 2 * SPIN_MAX_NS if k % 50 == 0 else 30_000  # 2 % stalls: above the 99th percentile
        tk.wait()
        clk.t += 100_000
    assert tk.spin_ns == pytest.approx(30_000 + SPIN_PAD_NS, abs=200)


def test_the_margin_adapts_from_the_wake_up_before_the_prepare_too():
    """A prepare that ends inside the spin margin leaves no second sleep: the wake-up before the prepare
    still feeds the margin, so a large one comes down."""
    clk = FakeClock(read_cost=100, oversleep=20_000)
    tk = Ticker(1_000_000, spin_ns=SPIN_MAX_NS, clock=clk, sleep=clk.sleep, adaptive=True)
    tk.start()

    def prepare(deadline):
        clk.t = deadline - 100_000  # the work ends 100 us before the deadline: inside a 400 us margin

    tk.wait(prepare, prepare_ns=500_000)
    assert len(clk.sleeps) == 1  # only the sleep before the prepare
    for _ in range(SPIN_WINDOW):
        tk.wait(prepare, prepare_ns=500_000)
        clk.t += 100_000
    assert tk.spin_ns == pytest.approx(max(SPIN_MIN_NS, 20_000 + SPIN_PAD_NS), abs=300)


class TwoOversleeps(FakeClock):
    """The wake-up before the prepare (the first sleep of each wait) oversleeps by `first`, the one
    before the spin by `oversleep`."""

    def __init__(self, first, **kw):
        super().__init__(**kw)
        self.first = first

    def sleep(self, s):
        self.sleeps.append(s)
        self.t += int(s * 1e9) + (self.first if len(self.sleeps) % 2 == 1 else self.oversleep)


def test_the_margin_follows_the_wake_up_before_the_spin_and_the_spin_is_counted():
    """With a sleep before the spin, only that wake-up sets the margin: the prepare's (a longer sleep,
    here oversleeping 150 us) cannot make the deadline late and does not widen the busy wait. The time
    spent spinning is what the margin leaves after the wake-up: margin - (oversleep + a clock read)."""
    clk = TwoOversleeps(first=150_000, read_cost=100, oversleep=30_000)
    tk = Ticker(1_000_000, spin_ns=100_000, clock=clk, sleep=clk.sleep, adaptive=True)
    tk.start()

    def prepare(deadline):
        clk.t += 100_000  # the prepare's work

    for _ in range(SPIN_WINDOW):
        tk.wait(prepare, prepare_ns=600_000)
        clk.t += 100_000
    assert len(clk.sleeps) == 2 * SPIN_WINDOW  # a sleep before the prepare and one before the spin
    assert tk.spin_ns == pytest.approx(30_000 + SPIN_PAD_NS, abs=300)
    before = tk.spin_ns_total
    tk.wait(prepare, prepare_ns=600_000)
    spun = tk.spin_ns_total - before
    assert spun == pytest.approx(tk.spin_ns - 30_000, abs=3 * clk.read_cost)
    assert tk.overruns == 0 and tk.lateness.max_ns <= 2 * clk.read_cost


def test_overruns_after_a_stalled_wake_up_are_counted_apart_from_long_work():
    """A sleep that ends 2.5 ms late at 1 kHz (a stalled wake-up) makes the next tick's work end past the
    following deadlines: those overruns are the stall's. Work of 2.5 periods after an on-time wake-up
    overruns too, and is not."""
    clk = FakeClock(read_cost=100, oversleep=20_000)
    tk = Ticker(1_000_000, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    tk.wait()
    clk.oversleep = 2_500_000  # the next sleeps stall
    tk.wait()
    clk.oversleep = 20_000
    clk.t += 100_000  # ordinary work
    tk.wait()
    # woke 2.4 ms after its deadline, worked 0.1 ms: the next two deadlines passed
    assert tk.overruns == 2 and tk.overruns_after_stalled_wake == 2
    clk.t += 2_500_000  # work of 2.5 periods after an on-time wake-up
    tk.wait()
    assert tk.overruns == 4 and tk.overruns_after_stalled_wake == 2


def test_work_ending_exactly_on_deadline_is_an_overrun():
    clk = FakeClock(read_cost=0, oversleep=0)
    tk = Ticker(1_000_000, spin_ns=0, clock=clk, sleep=clk.sleep)
    tk.start()
    t0 = tk.deadline
    tk.wait()
    clk.t = t0 + 2_000_000
    assert tk.wait() == t0 + 3_000_000
    assert tk.overruns == 1


def test_histogram_percentiles_match_numpy_within_one_bin():
    rng = np.random.default_rng(7)
    samples = rng.gamma(2.0, 20_000.0, size=5000).astype(np.int64)  # ns, ~40 µs mean
    h = LatencyHistogram()
    for v in samples:
        h.add(int(v))
    for p in (50.0, 90.0, 99.0):
        ref = np.percentile(samples, p, method="inverted_cdf") / 1000.0  # numpy as reference
        assert abs(h.percentile_us(p) - ref) <= 1.0 + 1e-9
    assert h.max_ns == samples.max()
    s = h.summary()
    assert s["count"] == 5000
    assert s["mean_us"] == pytest.approx(samples.mean() / 1000.0)


def test_histogram_summary_matches_numpy_with_stalls_far_above_the_bulk():
    # The summary reads the bins only up to the max's: with stalls of 12 ms and 80 ms (the last bin) among
    # 40 us wake-ups, its median and p99 are still numpy's (inverted CDF, the reference) within one bin.
    rng = np.random.default_rng(11)
    for stall in (12_000_000, 80_000_000):
        samples = np.concatenate([rng.gamma(2.0, 20_000.0, size=3000), [stall] * 40]).astype(np.int64)
        h = LatencyHistogram()
        for v in rng.permutation(samples):
            h.add(int(v))
        s = h.summary()
        for key, p in (("median_us", 50.0), ("p99_us", 99.0)):
            assert abs(s[key] - np.percentile(samples, p, method="inverted_cdf") / 1000.0) <= 1.0 + 1e-9
        assert h.percentiles_us((99.9, 100.0)) == [stall / 1000.0, stall / 1000.0]


def test_histogram_percentiles_never_exceed_the_max():
    # A percentile of a sample lies between its min and max (definition of the empirical quantile,
    # common practice); every duration below one bin (sub-µs lateness on a quiet machine) is the case
    # where the upper bin edge would overshoot.
    h = LatencyHistogram()
    for v in (120, 692, 300, 0):
        h.add(v)
    s = h.summary()
    assert 0.0 <= s["median_us"] <= s["p99_us"] <= s["max_us"] == 0.692
    h.reset()
    h.add(0)
    assert h.percentile_us(50.0) == 0.0 == h.summary()["max_us"]


def test_histogram_overflow_reports_the_max():
    h = LatencyHistogram(bins=10)
    for v in (1_000, 2_000, 500_000_000):
        h.add(v)
    assert h.percentile_us(100.0) == 500_000.0
    h.reset()
    assert h.percentile_us(99.0) == 0.0 and h.count == 0


def test_every_wait_sleeps_even_when_the_work_overruns():
    # A runaway tick (work longer than the period) must still give the CPU up once per period: with
    # SCHED_FIFO nothing of lower priority runs on its core otherwise (sched(7), common practice).
    clk = FakeClock(read_cost=100, oversleep=10_000)
    period = 1_000_000
    tk = Ticker(period, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    d = tk.wait()
    for _ in range(20):
        # the work overran and ended just before a grid slot: no time left to sleep before that deadline
        clk.t = d + 2 * period - 30_000
        before = len(clk.sleeps)
        d = tk.wait(lambda d: None, prepare_ns=450_000)
        assert sum(clk.sleeps[before:]) >= MIN_SLEEP_NS / 1e9 - 1e-12
    assert tk.overruns == 20 and tk.forced_sleeps == 20


def test_a_tick_that_leaves_no_time_sleeps_and_is_recorded_late():
    clk = FakeClock(read_cost=100, oversleep=10_000)
    period = 1_000_000
    tk = Ticker(period, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    d = tk.wait()
    clk.t = d + period - 60_000  # the work ended 60 us before the next deadline: inside the spin margin
    d2 = tk.wait()
    assert d2 == d + period and tk.overruns == 0 and tk.forced_sleeps == 1
    assert clk.sleeps[-1] == pytest.approx(MIN_SLEEP_NS / 1e9)
    assert tk.lateness.max_ns >= MIN_SLEEP_NS + clk.oversleep - 60_000  # the cost is visible as lateness


def test_a_long_preparation_after_a_full_sleep_needs_no_second_sleep():
    clk = FakeClock(read_cost=100, oversleep=10_000)
    period = 2_000_000
    tk = Ticker(period, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()

    def prepare(deadline):
        clk.t = deadline + 5_000  # the preparation itself ran past the deadline

    d = tk.wait(prepare, prepare_ns=700_000)
    assert len(clk.sleeps) == 1 and clk.sleeps[0] * 1e9 >= MIN_SLEEP_NS  # the period's sleep happened
    assert tk.forced_sleeps == 0 and tk.lateness.max_ns >= 5_000 and d == tk.deadline


def test_on_time_ticks_do_not_force_a_sleep():
    clk = FakeClock(read_cost=100, oversleep=10_000)
    tk = Ticker(2_000_000, spin_ns=100_000, clock=clk, sleep=clk.sleep)
    tk.start()
    for _ in range(20):
        tk.wait(lambda d: None, prepare_ns=700_000)
        clk.t += 500_000
    assert tk.forced_sleeps == 0 and tk.lateness.max_ns <= 2 * clk.read_cost


def test_realtime_not_requested_is_a_no_op():
    sched = make_realtime(0)
    assert not sched.realtime and sched.requested == 0 and "not requested" in sched.text


def test_realtime_refused_falls_back_to_normal_scheduling(monkeypatch):
    def refuse(*args):
        raise PermissionError(errno.EPERM, "Operation not permitted")

    monkeypatch.setattr(os, "sched_setscheduler", refuse)
    sched = make_realtime(10)
    assert (sched.realtime, sched.priority, sched.requested) == (False, 0, 10)
    assert "refused" in sched.text and "not permitted" in sched.text


def test_probe_leaves_the_callers_scheduling_alone():
    before = os.sched_getscheduler(0), os.sched_getparam(0).sched_priority
    probe = probe_realtime(DEFAULT_RT_PRIORITY)
    assert (os.sched_getscheduler(0), os.sched_getparam(0).sched_priority) == before
    assert not is_realtime()
    if probe.realtime:
        assert probe.priority == DEFAULT_RT_PRIORITY


_RUNAWAY = """
import sys, time
from twistrate.service.tick import guard_runaway, is_realtime, make_realtime
assert make_realtime(5).realtime and is_realtime()
assert guard_runaway(200_000)  # 0.2 s of real-time CPU without blocking
print("guarded", flush=True)
if sys.argv[1] == "sleeps":  # the tick's pattern: busy, then a sleep, every period; 0.6 s of CPU in all
    for _ in range(1200):
        end = time.monotonic() + 0.0005
        while time.monotonic() < end:
            pass
        time.sleep(0.00005)
    print("survived", flush=True)
else:  # stuck: never blocks
    while True:
        pass
"""


@pytest.mark.timeout(60)
@pytest.mark.skipif(not probe_realtime(1).realtime, reason="this process may not use SCHED_FIFO")
def test_runaway_guard_ends_a_real_time_thread_that_never_blocks():
    # setrlimit(2), RLIMIT_RTTIME: a real-time task that uses the limit's CPU time without a blocking
    # system call gets SIGKILL at the hard limit; sleeping resets the count.
    stuck = subprocess.run([sys.executable, "-c", _RUNAWAY, "stuck"], capture_output=True, text=True,
                           timeout=30)
    assert stuck.stdout.split() == ["guarded"] and stuck.returncode == -signal.SIGKILL
    sleeps = subprocess.run([sys.executable, "-c", _RUNAWAY, "sleeps"], capture_output=True, text=True,
                            timeout=30)
    assert sleeps.stdout.split() == ["guarded", "survived"] and sleeps.returncode == 0, sleeps.stderr


def test_bad_period_rejected():
    with pytest.raises(ValueError, match="period_ns"):
        Ticker(0)


@pytest.mark.skipif(not os.access(CPU_LATENCY_FILE, os.W_OK), reason="no writable PM QoS CPU latency file")
def test_cpu_wake_latency_request_is_in_force_while_held_and_ends_on_release():
    # Linux PM QoS (Documentation/power/pm_qos_interface.rst): reading the file gives the aggregated
    # request in force, a 32-bit value in µs; the smallest request held wins.
    before = cpu_wake_latency_in_force_us()
    assert before is not None and before >= 0
    fd = hold_cpu_wake_latency(0)
    assert fd is not None
    try:
        assert cpu_wake_latency_in_force_us() == 0  # the smallest request wins
    finally:
        release_cpu_wake_latency(fd)
    assert cpu_wake_latency_in_force_us() == before


def test_cpu_wake_latency_request_refused_is_none(monkeypatch, tmp_path):
    monkeypatch.setattr(tick, "CPU_LATENCY_FILE", tmp_path / "absent" / "cpu_dma_latency")
    assert hold_cpu_wake_latency(0) is None
    assert cpu_wake_latency_in_force_us() is None
    release_cpu_wake_latency(None)  # nothing to release: no error
