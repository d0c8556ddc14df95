"""The machine's own floor for `twistrate bench service`: a bare tick loop with the service's rate,
scheduling, timer slack, CPU wake-up latency request and wake-up pattern (the same Ticker, waking for
an empty prepare as early as the service does), and no work.

`python -m twistrate.service.bench.floor RATE_HZ SECONDS RT_PRIORITY` prints one JSON line: ticks,
overruns, lateness (median, p99, max in us), whether it ran real-time and the wake-up request in force.
On a virtual machine stalls of several ms come from the host (DEVELOPERS.md); an overrun figure of the
service means something only beside this floor, measured in the same run.
"""

from __future__ import annotations

import json
import sys
import time

from twistrate.service.runtime import PREPARE_FRACTION, PREPARE_NS
from twistrate.service.tick import (
    Ticker,
    cpu_wake_latency_in_force_us,
    guard_runaway,
    hold_cpu_wake_latency,
    make_realtime,
    release_cpu_wake_latency,
    set_timer_slack,
)

#: A floor run never lasts longer than this, s.
FLOOR_LIMIT_S = 3600.0


def bare_loop(rate_hz: float, seconds: float, rt_priority: int) -> dict:
    """Tick for `seconds` doing nothing; return the figures (same keys as the service's where shared)."""
    period = round(1e9 / rate_hz)
    set_timer_slack(1_000)
    sched = make_realtime(rt_priority)
    fd = None
    if sched.realtime:
        guard_runaway()
        fd = hold_cpu_wake_latency()
    try:
        ticker = Ticker(period, adaptive=True)
        prepare_ns = min(PREPARE_NS, int(PREPARE_FRACTION * period))
        ticker.start()
        end = time.monotonic_ns() + int(min(seconds, FLOOR_LIMIT_S) * 1e9)

        def nothing(deadline: int) -> None:
            return None

        while ticker.deadline < end:
            ticker.wait(nothing, prepare_ns)
        s = ticker.lateness.summary()
        wake = cpu_wake_latency_in_force_us()
    finally:
        release_cpu_wake_latency(fd)
    return {"rate_hz": rate_hz, "seconds": seconds, "ticks": ticker.ticks, "overruns": ticker.overruns,
            "overrun_fraction": ticker.overruns / max(1, ticker.ticks),
            "lateness_median_us": s["median_us"], "lateness_p99_us": s["p99_us"],
            "lateness_max_us": s["max_us"],
            "realtime": sched.realtime, "cpu_wake_latency_us": wake}


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 3:
        print("usage: python -m twistrate.service.bench.floor RATE_HZ SECONDS RT_PRIORITY", file=sys.stderr)
        return 2
    print(json.dumps(bare_loop(float(args[0]), float(args[1]), int(args[2]))), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
