"""Tick timing logic with a simulated clock: absolute deadlines, overrun counting and re-anchoring,
lateness histogram percentiles (against numpy.percentile as the reference)."""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.service.tick import (
    SPIN_MIN_NS,
    SPIN_PAD_NS,
    SPIN_WINDOW,
    LatencyHistogram,
    Ticker,
    make_realtime,
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


def test_histogram_overflow_reports_the_max():
    h = LatencyHistogram(bins=10)
    for v in (1_000, 2_000, 500_000_000):
        h.add(v)
    assert h.percentile_us(100.0) == 500_000.0
    h.reset()
    assert h.percentile_us(99.0) == 0.0 and h.count == 0


def test_realtime_not_requested_is_a_no_op():
    assert "not requested" in make_realtime(0)


def test_bad_period_rejected():
    with pytest.raises(ValueError, match="period_ns"):
        Ticker(0)
