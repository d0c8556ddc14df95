"""`twistrate bench keepout`: the cost of the keep-out pass against the free tick.

`twistrate bench keepout [--ticks N] [--json FILE]` records reach7 (8 capsules)
along a smooth free trajectory (no joint limit binds) in a cell of 3 zones (a table and a wall as
half-spaces, a fixture box), then replays it and times, per state and in turn:

* `resolve()` (every solver feature on: the free tick the keep-out pass is added to);
* the keep-out pass given that tick's forward kinematics and Jacobian (which resolve computes
  anyway): `KeepOut.rows` (distances, early-out, damper rows).

Two cells: `none_near` (every pair beyond the influence distance on every tick: the early-out
case) and `two_active` (a wall in front of the tool and a bench top under it, so that dampers are
active on most ticks: the tool against both, at times the wrist too).
Figures: medians and p99 (us), the ratio of the pass's median to resolve's median, rows per tick.
The keep-out pass keeps state between ticks (its early-out), so states are replayed in their
recorded order, one resolve and one pass per state. Wall-clock ratios on a shared machine swing; the
lead measures published figures on a quiet one."""

from __future__ import annotations

import argparse
import json
import sys
import time
from typing import Any

import numpy as np

from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.zones import parse_keepout

#: Every feature on, as `twistrate bench solver` runs it.
OPTIONS = SolverOptions(damping="singular_value", characteristic_length=0.3, limit_gain=2.0,
                        manipulability_gain=20.0, posture_gain=0.2, enforce_limits=True)
PERIOD_S = 0.002
WARMUP_TICKS = 300
#: The two cells (invented): base frame, m. reach7 stands on a 5 cm riser at the base origin.
CELLS: dict[str, dict[str, Any]] = {
    "none_near": {"influence_m": 0.10, "security_m": 0.02, "gain_m_s": 0.3, "zone": [
        {"name": "table", "kind": "half_space", "point_m": [0.0, 0.0, -0.02], "normal": [0.0, 0.0, 1.0]},
        {"name": "wall", "kind": "half_space", "point_m": [-0.55, 0.0, 0.0], "normal": [1.0, 0.0, 0.0]},
        {"name": "fixture", "kind": "box", "center_m": [0.1, -0.75, 0.3], "size_m": [0.3, 0.2, 0.6]}]},
    "two_active": {"influence_m": 0.10, "security_m": 0.02, "gain_m_s": 0.3, "zone": [
        {"name": "table", "kind": "half_space", "point_m": [0.0, 0.0, -0.02], "normal": [0.0, 0.0, 1.0]},
        {"name": "wall", "kind": "half_space", "point_m": [0.75, 0.0, 0.0], "normal": [-1.0, 0.0, 0.0]},
        {"name": "bench", "kind": "box", "center_m": [0.6, 0.0, 0.40], "size_m": [0.5, 0.8, 0.1]}]},
}


def _track(arm, ticks: int) -> tuple[np.ndarray, np.ndarray, list[DesiredTwist]]:
    """Closed loop from home under slow twists (cm/s, tenths of rad/s), ramped in; the states
    (q (N, n), qd_prev (N, n)) and twists after WARMUP_TICKS."""
    q, qd = np.array(arm.q_home, dtype=float), np.zeros(arm.n)
    Q, QD, TW = [], [], []
    for k in range(WARMUP_TICKS + ticks):
        t = k * PERIOD_S
        ramp = min(1.0, k / WARMUP_TICKS) ** 2
        lin = 0.04 * ramp * np.array([np.sin(0.9 * t), np.cos(0.7 * t), 0.6 * np.sin(0.5 * t + 1.0)])
        ang = 0.15 * ramp * np.array([np.sin(0.4 * t), 0.5 * np.cos(0.3 * t), np.sin(0.6 * t + 0.5)])
        tw = DesiredTwist(lin, ang)
        if k >= WARMUP_TICKS:
            Q.append(q.copy())
            QD.append(qd.copy())
            TW.append(tw)
        qd = resolve(arm, q, qd, tw, PERIOD_S, OPTIONS).qd
        q = q + qd * PERIOD_S
    return np.array(Q), np.array(QD), TW


def measure(ticks: int = 4000) -> dict[str, Any]:
    """Figures of both cells (see the module docstring)."""
    arm = load_arm("reach7")
    Q, QD, TW = _track(arm, ticks)
    frames = [forward(arm, q) for q in Q]
    jacobians = [geometric_jacobian(arm, f) for f in frames]
    clock = time.perf_counter_ns
    out: dict[str, Any] = {"arm": arm.name, "capsules": len(arm.geometry.capsules), "ticks": ticks}
    for name, section in CELLS.items():
        cfg = parse_keepout(section)
        ko = KeepOut(arm, cfg)
        t_res, t_ko, rows = [], [], []
        for q, qd, tw, fr, J in zip(Q, QD, TW, frames, jacobians, strict=True):
            t0 = clock()
            resolve(arm, q, qd, tw, PERIOD_S, OPTIONS)
            t1 = clock()
            _, b, _ = ko.rows(fr, q, J)
            t2 = clock()
            t_res.append(t1 - t0)
            t_ko.append(t2 - t1)
            rows.append(len(b))
        r, k = np.array(t_res) / 1e3, np.array(t_ko) / 1e3
        n_rows = np.array(rows)
        out[name] = {
            "zones": len(section["zone"]), "pairs": ko.pair_count,
            "resolve_median_us": float(np.median(r)), "pass_median_us": float(np.median(k)),
            "pass_p99_us": float(np.percentile(k, 99)), "pass_mean_us": float(k.mean()),
            "ratio_median": float(np.median(k) / np.median(r)),
            "ticks_with_rows": int(np.count_nonzero(n_rows)), "rows_median": float(np.median(n_rows)),
            "rows_max": int(n_rows.max()),
        }
    return out


def run(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate bench keepout",
                                     description="Time the keep-out pass against the free tick.")
    parser.add_argument("--ticks", type=int, default=4000)
    parser.add_argument("--json", metavar="FILE")
    args = parser.parse_args(argv)
    if args.ticks < 10:
        print(f"--ticks: got {args.ticks}; accepted: an integer >= 10", file=sys.stderr)
        return 2
    figures = measure(args.ticks)
    print(json.dumps(figures, indent=1))
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(figures, fh, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(run())
