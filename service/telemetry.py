"""What the service reports about itself: counters, latency histograms, the rate-limited log, the arm's
description, and the snapshot of the last tick that other threads (the demo, a monitor) read.

The tick thread writes counters and histograms (plain ints and numpy bins: a torn read from another
thread shifts a count by one at most) and publishes a new immutable `Snapshot` at the health rate and on
every change of mode, by swapping one reference; nothing outside the tick thread reads tick state in any
other way.
"""

from __future__ import annotations

import logging
import math
from typing import Any, NamedTuple

import numpy as np

from twistrate.service.tick import LatencyHistogram, Ticker
from twistrate.service.wire import REASONS
from twistrate.solver.arm import Arm

#: Counters every service has from the start (docs/operation.md "Counters").
COUNTER_NAMES = ("accepted_twist", "accepted_joints", "superseded", "joints_frozen", "commands",
                 "health_messages", "state_messages", "events", "faults", "limit_events", "publish_failed",
                 "solver_errors", "speculation_used", "gc_collections")
#: Every reason an intake message can be refused for: the codec's (but `unknown_op`, a control reason)
#: and the service's own.
INTAKE_REASONS = tuple(r for r in (*REASONS, "not_leased", "unexpected_joints", "second_source")
                       if r != "unknown_op")
#: Latency histograms (name -> what it measures), reported as NAME_median_ns / _p99_ns / _max_ns.
HISTOGRAMS = {
    "lateness": "tick wake-up after its deadline",
    "arrival_to_publish": "twist arrival (upper bound) to the publish of the first command answering it",
    "send_to_publish": "the twist's send stamp (sender's wall clock) to that publish",
    "tick_work": "deadline to the end of the tick's work",
    "solve": "kinematics and rate resolution of one tick",
    "deadline_to_publish": "deadline to the command's publish",
}


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


class Snapshot(NamedTuple):
    """The service as a recent tick left it (immutable; arrays are never written after publication).

    tick : ticks run; t_s : tick * period, s. mode, health_state : names (wire.MODES, HEALTH_STATES).
    q : (n,) joint positions the tick used (rad or m), or None before the first joint state.
    qd : (n,) commanded rates (rad/s or m/s). scale : task scale applied in [0, 1]. cap : speed-cap factor
    in (0, 1] applied to the desired twist. damping : lambda, m. sigma_min : smallest task-weighted singular
    value, m. manipulability : task-weighted Yoshikawa measure. limits_active : (n,) uint8, 1 where a
    limit bound the rate. limit_margin : (n,) fractions of each joint's range to its nearer limit (+inf
    unlimited), from the last health report. twist_desired, twist_achieved : (6,) (v, w) base frame of
    the last solved tick, or None.
    """

    tick: int
    t_s: float
    mode: str
    health_state: str
    q: np.ndarray | None
    qd: np.ndarray
    scale: float
    cap: float
    damping: float
    sigma_min: float
    manipulability: float
    limits_active: np.ndarray
    limit_margin: np.ndarray | None
    twist_desired: np.ndarray | None
    twist_achieved: np.ndarray | None


class Telemetry:
    """Counters and histograms of one service (written by the tick thread only)."""

    def __init__(self, ticker: Ticker) -> None:
        self.ticker = ticker
        self.counts: dict[str, int] = dict.fromkeys(COUNTER_NAMES, 0)
        #: refused intake messages per reason key
        self.rejected: dict[str, int] = {}
        self.hist: dict[str, LatencyHistogram] = {
            name: ticker.lateness if name == "lateness" else LatencyHistogram() for name in HISTOGRAMS}
        #: next seq of each output kind
        self.out_seq = {"command": 0, "health": 0, "event": 0, "state": 0}

    def reject(self, reason: str) -> None:
        self.rejected[reason] = self.rejected.get(reason, 0) + 1

    def counters(self, recorder: Any = None) -> dict[str, int]:
        """Every counter as an int (read from another thread; values may be one tick apart)."""
        out = dict(self.counts)
        out["ticks"] = self.ticker.ticks
        out["overruns"] = self.ticker.overruns
        out["spin_ns"] = self.ticker.spin_ns_total  # busy waiting before the deadlines (tick.py)
        out["overruns_after_stalled_wake"] = self.ticker.overruns_after_stalled_wake
        rejected = dict(self.rejected)
        for reason in INTAKE_REASONS:  # every reason from the start, 0 until its first refusal
            out[f"rejected_{reason}"] = 0
        for reason, count in rejected.items():
            out[f"rejected_{reason}"] = count
        out["rejected_total"] = sum(rejected.values())
        for name, hist in self.hist.items():
            s = hist.summary()
            out[f"{name}_median_ns"] = int(s["median_us"] * 1000)
            out[f"{name}_p99_ns"] = int(s["p99_us"] * 1000)
            out[f"{name}_max_ns"] = int(s["max_us"] * 1000)
        if recorder is not None:
            out["recorder_dropped"] = int(recorder.dropped)
            out["recorder_stopped"] = int(recorder.stopped is not None)  # write error or size cap
        return out


def arm_description(arm: Arm) -> dict[str, Any]:
    """The `arm` control op's result: name, joint count, joints with kinds and limits (SI), home."""
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
