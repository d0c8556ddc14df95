"""End to end under load: the stop after a silent twist source stays within its bound with real-time
scheduling off and two CPU-burning processes beside the service on this 2-core machine; an intake flood
at the highest rate a local process can send leaves the tick its rate.

Stopping bound (kinematics of constant deceleration, common practice): from rates qd0, the most
constrained joint needs max_i |qd0_i| / a_max_i to reach rest at a_max_i; the service ramps by the time
that really passed since its last command (service/motion.py ramp_to_rest), so late ticks do not add
to it: the arm is at rest within the twist timeout + the deceleration time + one period of the last
twist's receipt, plus what the scheduler adds to the tick that sees the twist stale and the one that
commands rest.
"""

from __future__ import annotations

import contextlib
import itertools
import subprocess
import sys
import time
from collections.abc import Iterator

import numpy as np
import pytest
from service_harness import collect_commands, make_config, running_service, stream_until

pytestmark = pytest.mark.timeout(120)

#: Scheduling allowance, s: with normal scheduling and both cores busy, the wake-up delay of the tick
#: that detects the stale twist and of the one that commands rest (measured up to several ms each
#: here). 25 ms, as in tests/test_e2e_watchdog.py: a quarter of the twist timeout, small against the
#: 4 to 11 missed ticks (8 to 22 ms at 500 Hz) a tick-counted ramp added under the same load.
ALLOWANCE_S = 0.025
#: Wall stamps and the monotonic clock the ramp uses are read a few microseconds apart; a speculative
#: command's stamp is its deadline's wall time, at most the tick's lateness before it was sent, s.
CLOCK_SLACK_S = 1e-4
#: A burner stops by itself after this long, s (bounded even if the test process dies).
BURN_LIMIT_S = 90.0

FAST = ([0.25, 0.0, -0.1], [0.0, 0.3, 0.2])
SLOW = ([0.02, 0.0, 0.0], [0.0, 0.0, 0.05])
#: How long the flood runs, s.
FLOOD_S = 3.0


@contextlib.contextmanager
def cpu_burners(count: int = 2) -> Iterator[list[subprocess.Popen]]:
    """`count` processes that spin on a core each (bounded in time), stopped at exit by their own ids."""
    code = f"import time\nend = time.monotonic() + {BURN_LIMIT_S}\nwhile time.monotonic() < end:\n    pass\n"
    procs = [subprocess.Popen([sys.executable, "-c", code]) for _ in range(count)]
    try:
        time.sleep(0.3)  # let them reach their spin
        yield procs
    finally:
        for proc in procs:
            proc.kill()
            proc.wait(10)


def test_the_stop_after_a_silent_source_keeps_its_bound_without_realtime_beside_two_busy_processes():
    cfg = make_config(watchdog={"twist_timeout_ms": 100.0})
    with running_service(cfg, realtime_priority=0) as run, cpu_burners(2):
        assert not run.service.scheduling.realtime
        link = run.link()
        link.claim("test")
        link.enable()
        arm, period = run.service.arm, run.service.period_s
        stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 100 and
                     np.abs(cs[-1].rate).max() > 0.05)
        t_last_send = time.time_ns()
        last_seq = link.send_twist(*FAST)
        cs = collect_commands(link, lambda cs: any(c.answers == -1 for c in cs) and not cs[-1].rate.any())
        # the service received the last twist before the first command answering it (its stamp): the
        # bound runs from there; the trip before it (the sender and ZeroMQ's I/O thread under load) is
        # transport, printed beside
        t_received = next(c.stamp_ns for c in cs if c.answers == last_seq)
        first = next(i for i, c in enumerate(cs) if c.answers == -1)
        last = next(i for i in range(first, len(cs)) if not cs[i].rate.any())
        ramp = cs[first - 1:last + 1]
        qd0 = ramp[0].rate  # the last rates answering a twist
        stop_s = float(np.max(np.abs(qd0) / arm.a_max))
        for a, b in itertools.pairwise(ramp):  # each step within a_max times the time between
            dt = (b.stamp_ns - a.stamp_ns) / 1e9
            assert np.all(np.abs(b.rate - a.rate) <= arm.a_max * (dt + CLOCK_SLACK_S)), (dt, a.rate, b.rate)
        elapsed = (ramp[-1].stamp_ns - t_received) / 1e9
        missed = sum(b.tick - a.tick - 1 for a, b in itertools.pairwise(ramp))
        print(f"stop {elapsed * 1e3:.1f} ms after the last twist was answered "
              f"({(ramp[-1].stamp_ns - t_last_send) / 1e6:.1f} ms after it was sent) against "
              f"{(0.100 + stop_s + period) * 1e3:.1f} ms (+{ALLOWANCE_S * 1e3:.0f} ms allowance), "
              f"{missed} ticks missed in the ramp")
        assert elapsed <= 0.100 + stop_s + period + ALLOWANCE_S
        assert ramp[-1].mode in ("stopping", "holding")


def test_a_flood_at_full_rate_leaves_the_tick_its_rate_and_everything_taken_is_counted():
    """A local PUB sends well-formed twists under a lease nobody holds as fast as one process can (each
    costs a full decode before its refusal) while the holder streams at 100 Hz: the tick keeps its rate
    (the drain is bounded in time, service/intake.py), the holder's twists are still answered, and what
    the service took is counted as refused or superseded, never more than was sent."""
    cfg = make_config()
    with running_service(cfg) as run:
        link = run.link()
        link.claim("test", lease_ms=60_000)  # the control plane shares the CPU with the flood
        link.enable()
        stream_until(link, *SLOW, lambda cs: sum(c.answers >= 0 for c in cs) > 50)
        # the same window without the flood first: the machine's own rate now (it is shared)
        q0, t_q = link.counters(), time.monotonic()
        stream_until(link, *SLOW, lambda cs: time.monotonic() - t_q >= FLOOD_S, limit_s=FLOOD_S + 20.0)
        q1, t_q1 = link.counters(), time.monotonic()
        quiet_rate = (q1["ticks"] - q0["ticks"]) / (t_q1 - t_q)
        c0, t0 = link.counters(), time.monotonic()
        flood = subprocess.Popen([sys.executable, "-m", "twistrate.service.bench.flood", run.endpoints.intake,
                                  str(FLOOD_S)], stdout=subprocess.PIPE, text=True)
        try:
            assert flood.stdout.readline().strip() == "flooding"  # started (slow on a loaded machine)
            c0, t0 = link.counters(), time.monotonic()
            cs = stream_until(link, *SLOW, lambda cs: flood.poll() is not None, limit_s=FLOOD_S + 20.0)
            sent = int(flood.communicate(timeout=20)[0])
        finally:
            if flood.poll() is None:
                flood.kill()
                flood.wait(10)
        c1, t1 = link.counters(), time.monotonic()
    d = {k: c1.get(k, 0) - c0.get(k, 0) for k in ("ticks", "overruns", "rejected_not_leased", "superseded",
                                                  "accepted_twist")}
    expected_ticks = (t1 - t0) * quiet_rate
    print(f"flood: {sent} sent, {d['rejected_not_leased']} refused not_leased, {d['superseded']} superseded; "
          f"ticks {d['ticks']} against {expected_ticks:.0f} at the rate without it ({quiet_rate:.0f} Hz), "
          f"{d['overruns']} overruns; {sum(c.answers >= 0 for c in cs)} of {len(cs)} commands answering")
    assert sent > 10_000 and d["rejected_not_leased"] > 0 and d["superseded"] > 0
    assert d["rejected_not_leased"] + d["superseded"] <= sent
    # the tick kept its rate (against the same service's rate just before, on this shared machine): the
    # issue measured 90 to 230 Hz of 500 under the same flood before; the drain before the time budget
    # gave 60 % of the ticks here under the flood beside 93 % after it
    assert d["ticks"] >= 0.8 * expected_ticks
    assert any(c.answers >= 0 for c in cs[len(cs) // 2:])  # the holder still moves the arm
