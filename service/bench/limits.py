"""`twistrate bench limits`: the solver under random use, every bound checked on every tick.

Random episodes on the example arms: each starts at rest (any posture within the limits is reachable
at rest) at a random posture: uniform within the limits, on an exact position limit, or an exact
singularity (joints set so that axes align or the arm is stretched: the smallest singular value of
the Jacobian is zero to rounding; counted as such only when it is below SINGULAR_SV). Then
EPISODE_TICKS ticks of resolve() (a black box: twistrate.solver.resolve.resolve, every feature on)
with random twists, from a calm drift to far beyond the speed caps, held or changed each tick, the
previous rates being the ones resolve() returned, and the posture integrated with them (q += qd T).
On every tick:

* position: q + qd T within [q_min, q_max] (the posture the command aims at);
* velocity: |qd_i| <= v_max_i;
* acceleration: |qd_i - qd_prev_i| <= a_max_i T;
* every output finite (rates, scale, damping, achieved twist, singular values), scale in [0, 1].

Tolerance BOUND_TOL (rounding). Prints the counts and writes JSON; exits 1 on any violation. The test
suite runs a short run (tests/test_bench_limits.py).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

from twistrate.service.commands.help_text import first_paragraph
from twistrate.solver.arm import Arm
from twistrate.solver.errors import TwistrateError
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve

DEFAULT_TICKS = 1_000_000
DEFAULT_ARMS = ("bench6", "reach7")
#: Ticks per episode (a random start at rest, then a run of random twists).
EPISODE_TICKS = 200
#: Tick period, s (500 Hz).
PERIOD_S = 0.002
#: Bound tolerance: rounding of q + qd T and of the rate arithmetic (common practice: a few ulps of
#: values of order 1..10).
BOUND_TOL = 1e-9
#: A start posture counts as an exact singularity when the Jacobian's smallest singular value is below
#: this (m/s per rad/s; rounding of the kinematics).
SINGULAR_SV = 1e-9
#: Every feature on (as `bench solver`).
OPTIONS = SolverOptions(damping="singular_value", characteristic_length=0.3, limit_gain=2.0,
                        manipulability_gain=20.0, posture_gain=0.2, enforce_limits=True)
#: Violations listed in the output at most.
SHOW = 10


def _start(rng: np.random.Generator, arm: Arm) -> tuple[np.ndarray, str]:
    """A start posture and its kind: uniform, on a limit, or singular (zeroed joints)."""
    lo, hi = np.where(np.isfinite(arm.q_min), arm.q_min, -math.pi), np.where(np.isfinite(arm.q_max),
                                                                            arm.q_max, math.pi)
    q = rng.uniform(lo, hi)
    kind = rng.choice(["uniform", "limit", "singular"], p=[0.4, 0.2, 0.4])
    if kind == "limit":
        k = rng.integers(arm.n)
        q[k] = lo[k] if rng.random() < 0.5 else hi[k]
    elif kind == "singular":
        # joints at zero line axes up / stretch the arm (within the limits where zero is not allowed)
        zero = rng.random(arm.n) < 0.6
        q[zero] = np.clip(0.0, lo[zero], hi[zero])
    return q, str(kind)


def _twist(rng: np.random.Generator) -> DesiredTwist:
    scale = float(rng.choice([0.0, 0.02, 0.2, 1.0, 5.0]))
    frame = "tool" if rng.random() < 0.5 else "base"
    point = rng.normal(scale=0.1, size=3) if rng.random() < 0.3 else np.zeros(3)
    return DesiredTwist(rng.normal(scale=scale, size=3), rng.normal(scale=2 * scale, size=3), frame, point)


def _smallest_sv(arm: Arm, q: np.ndarray) -> float:
    J = geometric_jacobian(arm, forward(arm, q))
    return float(np.linalg.svd(J, compute_uv=False)[-1])


def run_limits(ticks: int, seed: int, arms: tuple[str, ...] = DEFAULT_ARMS,
               episode_ticks: int = EPISODE_TICKS) -> dict[str, Any]:
    """Run `ticks` random ticks (split over the arms, episodes of `episode_ticks`); return counts and the
    first violations."""
    rng = np.random.default_rng(seed)
    loaded = [load_arm(name) for name in arms]
    T = PERIOD_S
    out: dict[str, Any] = {"ticks": 0, "episodes": 0, "starts": {"uniform": 0, "limit": 0, "singular": 0},
                           "exact_singular_starts": 0, "violations": {"position": 0, "velocity": 0,
                                                                      "acceleration": 0, "non_finite": 0,
                                                                      "scale": 0, "error": 0},
                           "worst_excess": {"position": 0.0, "velocity": 0.0, "acceleration": 0.0},
                           "examples": [], "seed": seed, "arms": list(arms), "period_s": T}
    t0 = time.perf_counter()
    while out["ticks"] < ticks:
        arm = loaded[out["episodes"] % len(loaded)]
        q, kind = _start(rng, arm)
        out["episodes"] += 1
        out["starts"][kind] += 1
        if _smallest_sv(arm, q) < SINGULAR_SV:
            out["exact_singular_starts"] += 1
        qd_prev = np.zeros(arm.n)
        twist = _twist(rng)
        for _ in range(min(episode_ticks, ticks - out["ticks"])):
            if rng.random() < 0.3:
                twist = _twist(rng)
            out["ticks"] += 1
            try:
                r = resolve(arm, q, qd_prev, twist, T, OPTIONS)
            except TwistrateError as exc:
                _violation(out, "error", arm, q, f"{type(exc).__name__}: {exc}")
                break
            qd = r.qd
            finite = (np.isfinite(qd).all() and np.isfinite(r.twist_achieved).all()
                      and np.isfinite(r.singular_values).all() and math.isfinite(r.scale)
                      and math.isfinite(r.damping))
            if not finite:
                _violation(out, "non_finite", arm, q, "a non-finite output")
                break
            if not 0.0 <= r.scale <= 1.0:
                _violation(out, "scale", arm, q, f"scale {r.scale}")
            q_next = q + qd * T
            excess = {
                "position": float(np.max(np.maximum(arm.q_min - q_next, q_next - arm.q_max))),
                "velocity": float(np.max(np.abs(qd) - arm.v_max)),
                "acceleration": float(np.max(np.abs(qd - qd_prev) - arm.a_max * T)),
            }
            for name, value in excess.items():
                if value > BOUND_TOL:
                    out["worst_excess"][name] = max(out["worst_excess"][name], value)
                    _violation(out, name, arm, q, f"beyond by {value:.3g}")
            q, qd_prev = np.clip(q_next, arm.q_min, arm.q_max), qd
    out["seconds"] = time.perf_counter() - t0
    out["ok"] = not any(out["violations"].values())
    return out


def _violation(out: dict[str, Any], name: str, arm: Arm, q: np.ndarray, text: str) -> None:
    out["violations"][name] += 1
    if len(out["examples"]) < SHOW:
        out["examples"].append({"bound": name, "arm": arm.name, "tick": out["ticks"], "q": q.tolist(),
                                "what": text})


def format_result(r: dict[str, Any]) -> str:
    v = r["violations"]
    lines = [
        f"limits under random use: {r['ticks']} ticks in {r['episodes']} episodes on {', '.join(r['arms'])} "
        f"({r['seconds']:.1f} s, seed {r['seed']}, T = {r['period_s'] * 1e3:g} ms, every feature on)",
        f"  starts            {r['starts']['uniform']} uniform, {r['starts']['limit']} on a limit, "
        f"{r['starts']['singular']} with zeroed joints ({r['exact_singular_starts']} exactly singular: "
        f"smallest singular value < {SINGULAR_SV:g})",
        f"  position bound    {v['position']} violations (worst {r['worst_excess']['position']:.3g})",
        f"  velocity bound    {v['velocity']} violations (worst {r['worst_excess']['velocity']:.3g})",
        f"  acceleration      {v['acceleration']} violations (worst {r['worst_excess']['acceleration']:.3g})",
        f"  finite outputs    {v['non_finite']} non-finite, {v['scale']} scales outside [0, 1], "
        f"{v['error']} errors",
        f"  verdict           {'every bound held' if r['ok'] else 'BOUNDS BROKEN'}",
    ]
    lines += [f"  - {e}" for e in r["examples"]]
    return "\n".join(lines)


def run(argv: list[str] | None = None) -> int:
    """`twistrate bench limits [--ticks N] [--seed S] [--arms A,B] [--json FILE]`."""
    parser = argparse.ArgumentParser(prog="twistrate bench limits", description=first_paragraph(__doc__))
    parser.add_argument("--ticks", type=int, default=DEFAULT_TICKS, help="random ticks in all (default 10^6)")
    parser.add_argument("--seed", type=int, default=11, help="random seed (default 11)")
    parser.add_argument("--arms", default=",".join(DEFAULT_ARMS), help="example arms, comma-separated")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    args = parser.parse_args(argv)
    if not 1 <= args.ticks <= 10**8:
        print(f"twistrate bench limits: --ticks: got {args.ticks}; accepted: 1 to 10^8", file=sys.stderr)
        return 2
    arms = tuple(a.strip() for a in args.arms.split(",") if a.strip())
    r = run_limits(args.ticks, args.seed, arms)
    print(format_result(r), flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps({"benchmark": "limits", **r}, indent=2, default=float))
    return 0 if r["ok"] else 1


if __name__ == "__main__":
    raise SystemExit(run(sys.argv[1:]))
