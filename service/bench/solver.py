"""`twistrate bench solver`: the per-tick cost of rate resolution.

`twistrate bench solver [--json FILE] [--ticks N] [--rounds R] [--arms NAMES] [--period S]` measures,
per example arm and in one run, with every solver feature on (singular-value damping, task weighting,
joint-range, manipulability and posture objectives, hard limits):

* `resolve()` per tick along a smooth moving trajectory on which no limit binds: median and p99 (us);
* the same ticks through a straightforward numpy loop written here, of the kind teams hand-write (a new
  4x4 per link from np.array of lists every tick, np.cross columns, explicit np.linalg.pinv and inverse,
  explicit projector; it has no manipulability gradient and no saturation, so it does less work):
  `speedup_vs_straightforward` = its median / ours;
* the same ticks with forward kinematics and the Jacobian from the compiled pinocchio library (when
  importable, else null) and our rate pipeline after it: `ratio_to_compiled` = our median / that median;
* a trajectory pushing a joint into its limit: the cost of ticks where the saturation loop runs (median,
  p99, and the extra median over free ticks timed alongside them) and its mean number of passes.

How the figures are kept honest:
* every trajectory is recorded first (states, twists, previous rates); the timed loops only replay it,
  so generating twists or integrating the motion never falls inside a timed region;
* each variant replays the same states in short blocks taken in turn (rotating order), so that load
  changes on a shared machine hit all variants alike; the first calls of each block are untimed;
* a tick is wall-clock time (time.perf_counter_ns) around one call; the same loop around a call that
  does nothing gives `timer_floor_us`, the part of every figure that is the loop's own;
* the garbage collector stays on (the service runs with it), but the benchmark's own long-lived objects
  (recorded trajectories, timing lists) are frozen out of its scans (gc.freeze), so they do not make
  collections slower than in the service;
* the machine is measured as it is: its BLAS settings (e.g. OPENBLAS_CORETYPE) are reported, never
  changed, and the load average (os.getloadavg) at the start and the end is printed and written.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import platform
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from twistrate.service.bench.compiled import pinocchio_model
from twistrate.service.bench.keepout_tick import keepout_figures, print_keepout
from twistrate.service.bench.saturation_report import format_saturation, saturation_section
from twistrate.service.bench.straightforward import check_plain, plain_model, straightforward_tick
from twistrate.solver.arm import Arm
from twistrate.solver.kinematics import Frames
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve_counted, resolve_from_kinematics

#: Example arms benchmarked by default: the 6- and the 7-joint arm.
DEFAULT_ARMS = ("bench6", "reach7")
DEFAULT_TICKS = 10_000
DEFAULT_ROUNDS = 5
DEFAULT_PERIOD_S = 0.002
#: Fewest timed ticks accepted by --ticks (figures from fewer are noise; use them for smoke tests only).
MIN_TICKS = 100
#: Ticks run before timing starts (the trajectory ramps in; caches warm up).
WARMUP_TICKS = 300
#: States per replay block, and untimed calls of a variant at the start of each of its blocks.
REPLAY_BLOCK = 40
WARMUP_REPLAY = 3
#: Most states of the limits-active trajectory.
LIMITS_TICKS = 4000
#: Targets for the 7-joint arm with no limit active (stated by the project; ratio_to_compiled: the free
#: tick at most 1.3x the one built on the compiled library's FK + J in the same run).
TARGETS = {"median_us": 50.0, "p99_us": 150.0, "speedup_vs_straightforward": 4.0, "ratio_to_compiled": 1.3}
#: Every feature on.
BENCH_OPTIONS = SolverOptions(
    damping="singular_value", characteristic_length=0.3, limit_gain=2.0, manipulability_gain=20.0,
    posture_gain=0.2, enforce_limits=True,
)
#: Joint pushed into its limit on the limits-active trajectory, per arm (index, start as a fraction of
#: the range from the nearer limit); other arms use joint 0.
PUSHED_JOINT = {"bench6": (1, 0.12), "reach7": (0, 0.05)}

#: A variant of the tick under test: called with (q, qd_prev, twist) of one recorded state.
Tick = Callable[[np.ndarray, np.ndarray, DesiredTwist], object]


@dataclass
class Track:
    """Recorded inputs of a trajectory: q (N, n), qd_prev (N, n), twists, plus our per-tick results of
    the recording run: passes (N,) saturation passes, scales (N,), braking (N,) bool: no scale was
    feasible and the joints braked along the previous rate (scale 0 with the tool still moving)."""

    q: np.ndarray
    qd_prev: np.ndarray
    twists: list[DesiredTwist]
    passes: np.ndarray
    scales: np.ndarray
    braking: np.ndarray


#: (name, tick, recorded states it replays).
Variant = tuple[str, Tick, Track]
#: Per timed tick: (index of the replayed state (N,), wall time in ns (N,)).
Timings = tuple[np.ndarray, np.ndarray]


def run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(
        prog="twistrate bench solver",
        description="Time one tick of rate resolution (every feature on) on the example arms, against a "
                    "straightforward numpy loop and compiled kinematics, free and with limits active.",
    )
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE")
    parser.add_argument("--ticks", type=int, default=DEFAULT_TICKS, help="timed ticks per variant and "
                        f"trajectory (default %(default)s; at least {MIN_TICKS}, for smoke tests only)")
    parser.add_argument("--rounds", type=int, default=DEFAULT_ROUNDS,
                        help="replays of the free trajectory (default %(default)s)")
    parser.add_argument("--arms", default=",".join(DEFAULT_ARMS),
                        help="comma-separated arm files or example names (default: %(default)s)")
    parser.add_argument("--no-saturation", action="store_true",
                        help="skip the saturated-tick section (the scripted pushes, the demo pass, its cost)")
    parser.add_argument("--period", type=float, default=DEFAULT_PERIOD_S,
                        help="tick period, s (default %(default)s)")
    ns = parser.parse_args(argv)
    if ns.ticks < MIN_TICKS:
        parser.error(f"--ticks: got {ns.ticks}; accepted: at least {MIN_TICKS}")
    if ns.rounds < 1:
        parser.error(f"--rounds: got {ns.rounds}; accepted: at least 1")
    if not (ns.period > 0):
        parser.error(f"--period: got {ns.period}; accepted: a tick period > 0 s")
    report: dict[str, Any] = {"machine": _machine(), "period_s": ns.period, "ticks": ns.ticks,
                              "rounds": ns.rounds,
                              "options": _options_summary(BENCH_OPTIONS), "targets_7_joint": TARGETS,
                              "arms": {}}
    print(f"load average at start: {_fmt_load(report['machine']['load_average'])}\n")
    for name in ns.arms.split(","):
        arm = load_arm(name.strip())
        figures = bench_arm(arm, name.strip(), ns.ticks, ns.period, ns.rounds)
        report["arms"][arm.name] = figures
        _print_arm(arm, figures)
    if not ns.no_saturation:
        report["saturation"] = saturation_section()
        print(format_saturation(report["saturation"]) + "\n")
    report["keepout"] = keepout_figures(ns.ticks)
    print_keepout(report["keepout"])
    report["load_average_end"] = _load_average()
    print(f"load average at end: {_fmt_load(report['load_average_end'])}")
    if ns.json:
        with open(ns.json, "w", encoding="utf-8") as fh:
            json.dump(report, fh, indent=2)
            fh.write("\n")
        print(f"wrote {ns.json}")
    return 0


def bench_arm(arm: Arm, source: str, ticks: int, period: float, rounds: int = 5) -> dict[str, Any]:
    """Every figure of one arm (see the module docstring).

    A free trajectory of ticks // rounds states is recorded first, then replayed `rounds` times by
    each variant (ours, straightforward, compiled, and the empty call; interleaved in short blocks, see
    `_interleave`). Medians and p99 are over all timed ticks; each ratio is the median over rounds of
    the per-round ratio of medians, and `round_medians_us` shows the spread of the machine's speed.
    """
    options = BENCH_OPTIONS
    free = _run_free(arm, options, max(MIN_TICKS, ticks // rounds), period)
    limits = _run_limits(arm, options, min(ticks, LIMITS_TICKS), period)
    plain = plain_model(arm, source)
    check_plain(arm, plain, free.q[0])

    def ours(q: np.ndarray, qd: np.ndarray, tw: DesiredTwist) -> object:
        return resolve_counted(arm, q, qd, tw, period, options)

    def straightforward(q: np.ndarray, qd: np.ndarray, tw: DesiredTwist) -> object:
        return straightforward_tick(plain, q, qd, tw, period, options)

    def floor(q: np.ndarray, qd: np.ndarray, tw: DesiredTwist) -> object:
        return None

    variants: list[Variant] = [("ours", ours, free), ("straightforward", straightforward, free)]
    compiled = _compiled_tick(arm, options, period)
    if compiled is not None:
        variants.append(("compiled", compiled, free))
    variants.append(("floor", floor, free))

    gc.collect()
    gc.freeze()  # the tracks and everything built so far: out of the collector's scans (module docstring)
    try:
        per_round = [_interleave(variants, r) for r in range(rounds)]
        limit_times = _interleave([("free", ours, free), ("limits", ours, limits)], 0)
    finally:
        gc.unfreeze()
    names = [name for name, _, _ in variants]
    times = {name: np.concatenate([r[name][1] for r in per_round]) for name in names}
    medians = {name: [float(np.median(r[name][1])) / 1e3 for r in per_round] for name in names}
    ours_summary = _summary(times["ours"])
    figures: dict[str, Any] = {
        "joints": arm.n,
        "median_us": ours_summary["median_us"],
        "p99_us": ours_summary["p99_us"],
        "mean_us": ours_summary["mean_us"],
        "round_medians_us": medians["ours"],
        "free_ticks_with_limit_active": int(np.count_nonzero(free.passes)),
        "timer_floor_us": _summary(times["floor"])["median_us"],
    }
    ratio = lambda a, b: float(np.median(np.array(medians[a]) / np.array(medians[b])))  # noqa: E731
    figures["straightforward_median_us"] = _summary(times["straightforward"])["median_us"]
    figures["speedup_vs_straightforward"] = ratio("straightforward", "ours")
    has_compiled = "compiled" in times
    figures["compiled_median_us"] = _summary(times["compiled"])["median_us"] if has_compiled else None
    figures["ratio_to_compiled"] = ratio("ours", "compiled") if has_compiled else None
    figures["limits"] = _limits_figures(arm, limits, limit_times)
    return figures


def _interleave(variants: list[Variant], round_index: int) -> dict[str, Timings]:
    """Per-tick wall times of each variant over its recorded states: {name: (state index (N,), ns (N,))}.

    Each track is cut into blocks of REPLAY_BLOCK states; block b of every variant is replayed in turn
    (the order rotating from block to block and round to round; a shorter track starts over), its first
    WARMUP_REPLAY calls untimed. Blocks keep a variant on its own warm caches, while the fine
    interleaving makes machine-load changes (seconds) hit every variant alike. Only the call sits
    between the two clock readings; the states are fetched before.
    """
    k = len(variants)
    blocks = max(-(-len(track.twists) // REPLAY_BLOCK) for _, _, track in variants)
    index: dict[str, list[int]] = {name: [] for name, _, _ in variants}
    times: dict[str, list[int]] = {name: [] for name, _, _ in variants}
    clock = time.perf_counter_ns
    for b in range(blocks):
        j = (b + round_index) % k
        for name, f, track in variants[j:] + variants[:j]:
            count = len(track.twists)
            start = (b % -(-count // REPLAY_BLOCK)) * REPLAY_BLOCK
            stop = min(count, start + REPLAY_BLOCK)
            Q, QD, TW = track.q, track.qd_prev, track.twists
            for i in range(start, min(stop, start + WARMUP_REPLAY)):
                f(Q[i], QD[i], TW[i])
            out, at = times[name], index[name]
            for i in range(start, stop):
                q, qd, tw = Q[i], QD[i], TW[i]
                t0 = clock()
                f(q, qd, tw)
                t1 = clock()
                out.append(t1 - t0)
                at.append(i)
    return {name: (np.array(index[name], dtype=np.int64), np.array(times[name], dtype=np.int64))
            for name in times}


def _run_free(arm: Arm, options: SolverOptions, ticks: int, period: float) -> Track:
    """Smooth trajectory from home: twists of a few cm/s and tenths of rad/s, ramped in, so that no
    bound binds; returns the ticks after WARMUP_TICKS."""
    def twist(k: int) -> DesiredTwist:
        t = k * period
        ramp = min(1.0, k / WARMUP_TICKS) ** 2
        lin = 0.04 * ramp * np.array([np.sin(0.9 * t), np.cos(0.7 * t), 0.6 * np.sin(0.5 * t + 1.0)])
        ang = 0.15 * ramp * np.array([np.sin(0.4 * t), 0.5 * np.cos(0.3 * t), np.sin(0.6 * t + 0.5)])
        return DesiredTwist(lin, ang)
    return _record(arm, options, ticks, period, np.array(arm.q_home, dtype=float), twist)


def _record(arm: Arm, options: SolverOptions, ticks: int, period: float, q0: np.ndarray,
            twist_at: Callable[[int], DesiredTwist]) -> Track:
    """Run the closed loop (q += qd T) for WARMUP_TICKS + ticks ticks and record the last `ticks` states."""
    n = arm.n
    q = q0.copy()
    qd = np.zeros(n)
    Q, QD = np.empty((ticks, n)), np.empty((ticks, n))
    twists: list[DesiredTwist] = []
    passes = np.empty(ticks, dtype=np.int64)
    scales = np.empty(ticks)
    braking = np.zeros(ticks, dtype=bool)
    for k in range(WARMUP_TICKS + ticks):
        tw = twist_at(k)
        res, count = resolve_counted(arm, q, qd, tw, period, options)
        i = k - WARMUP_TICKS
        if i >= 0:
            Q[i], QD[i] = q, qd
            twists.append(tw)
            passes[i], scales[i] = count, res.scale
            braking[i] = res.scale == 0.0 and float(np.abs(res.twist_achieved).max()) > 1e-9
        qd = res.qd
        q = q + qd * period
    return Track(Q, QD, twists, passes, scales, braking)


def _summary(ns_: np.ndarray) -> dict[str, float]:
    us = ns_ / 1e3
    return {"median_us": float(np.median(us)), "p99_us": float(np.percentile(us, 99)),
            "mean_us": float(np.mean(us))}


# ---------------------------------------------------------------- compiled kinematics

def _compiled_tick(arm: Arm, options: SolverOptions, period: float) -> Tick | None:
    """The tick on compiled kinematics: pinocchio FK + frame Jacobian (LOCAL_WORLD_ALIGNED: base
    axes, tool point, rows (v, w), as ours), then our rate pipeline; None without pinocchio."""
    try:
        model, fid = pinocchio_model(arm)
        import pinocchio as pin
    except ImportError:
        return None
    data = model.createData()
    world = pin.LOCAL_WORLD_ALIGNED
    empty44 = np.empty((0, 4, 4))  # only T_base_tool is read by the rate pipeline
    oMf = data.oMf
    jacobian = pin.computeFrameJacobian

    def tick(q: np.ndarray, qd_prev: np.ndarray, tw: DesiredTwist) -> object:
        J = jacobian(model, data, q, fid, world)  # also updates oMf (forward kinematics)
        frames = Frames(empty44, oMf[fid].homogeneous)
        return resolve_from_kinematics(arm, q, qd_prev, tw, period, options, frames, J)

    return tick


# ---------------------------------------------------------------- limits active

def _run_limits(arm: Arm, options: SolverOptions, ticks: int, period: float) -> Track:
    """Push one joint into its nearer limit with the twist that joint alone makes at 0.3 rad/s."""
    from twistrate.solver.kinematics import forward, geometric_jacobian

    joint, frac = PUSHED_JOINT.get(arm.name, (0, 0.05))
    q0 = np.array(arm.q_home, dtype=float)
    lo, hi = arm.q_min[joint], arm.q_max[joint]
    span = hi - lo if np.isfinite(hi - lo) else 2 * np.pi
    q0[joint] = (lo if np.isfinite(lo) else -np.pi) + frac * span
    J = geometric_jacobian(arm, forward(arm, q0))
    push = DesiredTwist(-0.3 * J[:3, joint], -0.3 * J[3:, joint])
    return _record(arm, options, ticks, period, q0, lambda k: push)


def _limits_figures(arm: Arm, track: Track, times: dict[str, Timings]) -> dict[str, Any]:
    """Figures of the limits-active trajectory from its replay interleaved with the free one (`times`:
    `_interleave` output with variants "free" and "limits")."""
    joint, _ = PUSHED_JOINT.get(arm.name, (0, 0.05))
    active = track.passes > 0
    out: dict[str, Any] = {"pushed_joint": arm.joints[joint].name, "ticks": int(track.passes.size),
                           "ticks_with_limits_active": int(active.sum()),
                           "ticks_without_feasible_scale": int(np.count_nonzero(track.braking)),
                           "mean_scale": float(track.scales.mean())}
    at, ns_ = times["limits"]
    timed_active = active[at]
    if timed_active.any():
        s = _summary(ns_[timed_active])
        free_median = _summary(times["free"][1])["median_us"]
        out.update({"median_us": s["median_us"], "p99_us": s["p99_us"], "free_median_us": free_median,
                    "extra_median_us": s["median_us"] - free_median,
                    "mean_passes": float(track.passes[active].mean()),
                    "max_passes": int(track.passes[active].max())})
    return out


# ---------------------------------------------------------------- report

def _load_average() -> list[float] | None:
    """1, 5 and 15 minute load averages (runnable processes), or None where the OS has none."""
    return list(os.getloadavg()) if hasattr(os, "getloadavg") else None


def _fmt_load(load: list[float] | None) -> str:
    return "n/a" if load is None else " ".join(f"{v:.2f}" for v in load) + " (1, 5, 15 min)"


def _machine() -> dict[str, Any]:
    return {
        "python": platform.python_version(), "numpy": np.__version__, "cpu_count": os.cpu_count(),
        "processor": platform.processor() or platform.machine(),
        "OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
        "load_average": _load_average(),
    }


def _options_summary(o: SolverOptions) -> dict[str, Any]:
    return {"damping": o.damping, "damping_max_m": o.damping_max,
            "characteristic_length_m": o.characteristic_length, "limit_gain": o.limit_gain,
            "manipulability_gain": o.manipulability_gain, "posture_gain": o.posture_gain,
            "enforce_limits": o.enforce_limits}


def _fmt(v: float | None, unit: str = "") -> str:
    return "n/a (pinocchio not importable)" if v is None else f"{v:.1f}{unit}"


def _print_arm(arm: Arm, f: dict[str, Any]) -> None:
    print(f"{arm.name} ({arm.n} joints), every feature on, no limit active "
          f"({f['free_ticks_with_limit_active']} ticks had one):")
    spread = ", ".join(f"{m:.1f}" for m in f["round_medians_us"])
    print(f"  resolve per tick      median {f['median_us']:.1f} us   p99 {f['p99_us']:.1f} us   "
          f"mean {f['mean_us']:.1f} us   (round medians {spread}; timer floor {f['timer_floor_us']:.2f} us)")
    print(f"  straightforward loop  median {f['straightforward_median_us']:.1f} us   "
          f"speedup_vs_straightforward {f['speedup_vs_straightforward']:.2f}x")
    print(f"  compiled FK + J       median {_fmt(f['compiled_median_us'], ' us')}   "
          f"ratio_to_compiled {_fmt(f['ratio_to_compiled'], 'x')}")
    lim = f["limits"]
    print(f"  pushing {lim['pushed_joint']} into its limit: {lim['ticks_with_limits_active']}/{lim['ticks']} "
          f"ticks with limits active, {lim['ticks_without_feasible_scale']} without a feasible scale, "
          f"mean scale {lim['mean_scale']:.2f}")
    if "median_us" in lim:
        print(f"    saturation ticks    median {lim['median_us']:.1f} us   p99 {lim['p99_us']:.1f} us   "
              f"extra median {lim['extra_median_us']:.1f} us (free ticks alongside: median "
              f"{lim['free_median_us']:.1f} us)   passes mean {lim['mean_passes']:.2f} "
              f"max {lim['max_passes']}")
    if arm.n == 7:
        checks = [("median_us", f["median_us"], "<="), ("p99_us", f["p99_us"], "<="),
                  ("speedup_vs_straightforward", f["speedup_vs_straightforward"], ">="),
                  ("ratio_to_compiled", f["ratio_to_compiled"], "<=")]
        parts = []
        for key, value, op in checks:
            if value is None:
                parts.append(f"{key} n/a")
                continue
            ok = value <= TARGETS[key] if op == "<=" else value >= TARGETS[key]
            parts.append(f"{key} {value:.2f} {op} {TARGETS[key]:g}: {'met' if ok else 'MISSED'}")
        print("  targets: " + "; ".join(parts))
    print()


if __name__ == "__main__":
    raise SystemExit(run(sys.argv[1:]))
