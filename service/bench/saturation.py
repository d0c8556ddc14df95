"""Scenario runs of the saturated tick at solver level, and their figures (pure functions returning dicts).

Two closed-loop runs (q += q_dot T at the tick rate, optionally through the simulated arm's first-order
lag, `twistrate.service.simarm`), each returning plain figures for `twistrate bench solver` and the demo
report:

* `push_through_wrist`: a constant base-frame twist that drives the wrist bend of an example arm
  through its aligned (singular) posture and back (bench6: wrist_bend, reach7: wrist_pitch);
* `demo_replay`: the demo's own scripted pass (`SCENARIO` of the demo command, its `scripted_twist`
  passed in: base-frame twists sampled at the source's 100 Hz), with the demo config's solver options,
  speed caps and simulated lag.

Figures (`motion_figures`), over the running ticks (asked twist nonzero):
* `scale_zero_fraction`: ticks at scale 0 (no scale of the damped twist was feasible), split into
  `tracking_fraction` (bounded damped least squares) and `braking_fraction` (a stop asked at speed),
  and `scale_zero_after_step_fraction`: those within STEP_WINDOW_S after a step of the asked twist
  (`asked_steps` of them), where no rate within one tick of acceleration can follow;
* `below_half_fraction`: ticks with scale < 0.5;
* `stalled_fraction`: ticks whose achieved twist is below STALL_SHARE of the asked one (weighted
  norm): what an operator sees as braking;
* `sign_changes`: per joint, how often the commanded rate changes sign (with a dead band of
  SIGN_DEADBAND of the joint's velocity limit, so rounding around 0 does not count), and
  `asked_direction_changes`: how often the asked twist turns by more than TURN_DEG from the direction
  it had at its last counted turn. The chatter criterion compares each joint with the same run
  without hard limits (`free_sign_changes`, `extra_sign_changes`, see `chatter`): the rates of a
  redundant arm following a curved path cross zero on their own, more often than the asked twist
  turns (the demo pass without limits: up to 10 sign changes per joint against 8 turns), so "no more
  sign changes than asked turns" cannot hold even without limits; what the limits must not do is add
  sign changes of their own;
* `peak_acceleration_ratio`: max over ticks and joints of |q_dot_k - q_dot_(k-1)| / (a_max T) (<= 1
  means within the acceleration limit on every tick); `peak_velocity_ratio` likewise |q_dot| / v_max;
* `twist_error_max_m_s`, `twist_error_mean_m_s`: task-weighted norm of achieved - asked (the solved,
  i.e. ramped, twist); `ramp_error_mean_m_s`: that of the ramped twist - the operator's (the ramp's lag).
Steps and direction changes are counted on the operator's twist (before the ramp).

`tick_cost` times the free and the saturated 7-joint tick in one process (median, p99, ratio).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from twistrate.service.motion import speed_cap_factor
from twistrate.service.shaping import TwistRamp
from twistrate.service.simarm import SimArm
from twistrate.solver.arm import Arm
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve, resolve_counted

#: Tick period of the runs, s (500 Hz, the demo's rate).
PERIOD_S = 0.002
#: Rate of the demo's scripted source, Hz (twists are held between its samples).
SOURCE_HZ = 100.0
#: The demo config's solver options (configs/service/demo.toml, [solver]).
DEMO_OPTIONS = SolverOptions(damping="singular_value", damping_max=0.04, singular_value_threshold=0.08,
                             characteristic_length=0.3, limit_gain=1.0, enforce_limits=True)
#: The demo config's speed caps ([speed]): linear m/s, angular rad/s.
DEMO_LINEAR_MAX = 0.5
DEMO_ANGULAR_MAX = math.radians(60.0)
#: The demo config's simulated lag, s ([simulation] lag_s).
DEMO_LAG_S = 0.02
#: The demo config's ramp of the asked twist ([speed] linear_accel_max m/s^2, angular_accel_max rad/s^2).
DEMO_RAMP = TwistRamp(0.5, 1.5, 0.002)
#: Sign dead band, share of each joint's velocity limit.
SIGN_DEADBAND = 1e-3
#: A turn of the asked twist by more than this from its last counted direction counts as a change.
TURN_DEG = 30.0
#: A running tick is stalled when its achieved twist is below this share of the asked one.
STALL_SHARE = 0.05
#: A change of the asked twist between consecutive ticks above this (weighted norm, m/s) is a step; the
#: scale-0 ticks within STEP_WINDOW_S after one are counted apart (`scale_zero_after_step_fraction`).
STEP_JUMP_M_S = 0.02
STEP_WINDOW_S = 0.3
#: Wrist joint pushed through its aligned posture, per example arm, and the start angle (rad).
WRIST_JOINT = {"bench6": 4, "reach7": 5}
WRIST_START = 0.35

Twist = tuple[np.ndarray, np.ndarray]


def run_closed_loop(arm: Arm, options: SolverOptions, twist_at: Callable[[float], Twist], seconds: float,
                    q0: np.ndarray, lag_s: float = 0.0, linear_max: float = math.inf,
                    angular_max: float = math.inf, ramp: TwistRamp | None = None,
                    keepout: KeepOut | None = None) -> dict[str, np.ndarray]:
    """Run resolve in closed loop for `seconds` and record every tick.

    twist_at : t (s) -> (linear (3,) m/s, angular (3,) rad/s), base frame, tool point. q0 : (n,) start.
    lag_s : first-order lag of the simulated arm (0: q += q_dot T exactly). linear_max, angular_max : the
    service's tool speed caps applied to the twist first. ramp : the service's ramp of the asked twist
    (`twistrate.service.shaping`, as the pipeline calls it) or None. keepout : the keep-out pass of a
    service config, or None. Returns arrays per tick: asked (N, 6) the solved twist (ramped), asked_raw
    (N, 6) the capped twist before the ramp, achieved (N, 6), qd (N, n), scale (N,), tracking (N,)
    bool, keepout_held (N,) bool (a keep-out damper row binds), damping (N,), sigma_min (N,).
    """
    n = arm.n
    ticks = round(seconds / PERIOD_S)
    sim = SimArm.from_arm(arm, lag_s=lag_s, q0=q0) if lag_s > 0.0 else None
    q = np.array(q0, dtype=float)
    qd = np.zeros(n)
    last = None
    out = {"asked": np.zeros((ticks, 6)), "asked_raw": np.zeros((ticks, 6)),
           "achieved": np.zeros((ticks, 6)), "qd": np.zeros((ticks, n)),
           "scale": np.zeros(ticks), "tracking": np.zeros(ticks, dtype=bool),
           "keepout_held": np.zeros(ticks, dtype=bool), "damping": np.zeros(ticks),
           "sigma_min": np.zeros(ticks)}
    for k in range(ticks):
        linear, angular = twist_at(k * PERIOD_S)
        linear, angular = np.asarray(linear, dtype=float), np.asarray(angular, dtype=float)
        cap = speed_cap_factor(linear, angular, np.zeros(3), linear_max, angular_max)
        tw = DesiredTwist(linear * cap, angular * cap)
        out["asked_raw"][k, :3], out["asked_raw"][k, 3:] = tw.linear, tw.angular
        if ramp is not None:
            frames = forward(arm, q)
            tw = ramp.shape(tw, frames, geometric_jacobian(arm, frames), qd, last, linear_max, angular_max)
        r = resolve(arm, q, qd, tw, PERIOD_S, options, keepout)
        last = r
        out["keepout_held"][k] = r.rows_active is not None and bool(np.any(r.rows_active))
        out["asked"][k] = r.twist_desired
        out["achieved"][k] = r.twist_achieved
        out["qd"][k] = r.qd
        out["scale"][k] = r.scale
        out["tracking"][k] = r.tracking
        out["damping"][k] = r.damping
        out["sigma_min"][k] = r.singular_values[-1]
        qd = r.qd
        if sim is None:
            q = q + qd * PERIOD_S
        else:
            sim.command(qd)
            sim.step(PERIOD_S)
            q = sim.q
    return out


def _sign_changes(x: np.ndarray, band: float) -> int:
    """Sign changes of x (N,) outside the dead band [-band, band] (a value inside keeps the last sign)."""
    signs = np.where(x > band, 1, np.where(x < -band, -1, 0))
    signs = signs[signs != 0]
    return int(np.count_nonzero(signs[1:] != signs[:-1]))


def _direction_changes(asked: np.ndarray, weight: np.ndarray) -> int:
    """Turns of the asked twist by more than TURN_DEG from its direction at the last counted turn."""
    limit = math.cos(math.radians(TURN_DEG))
    anchor = None
    count = 0
    for x in asked * weight:
        norm = float(np.linalg.norm(x))
        if norm == 0.0:
            continue
        u = x / norm
        if anchor is None:
            anchor = u
        elif float(u @ anchor) < limit:
            count += 1
            anchor = u
    return count


def motion_figures(arm: Arm, run: dict[str, np.ndarray], characteristic_length: float) -> dict[str, Any]:
    """The figures of the module docstring from a `run_closed_loop` record."""
    L = characteristic_length
    weight = np.array([1.0, 1.0, 1.0, L, L, L])
    asked, achieved, qd, scale = run["asked"], run["achieved"], run["qd"], run["scale"]
    raw = run.get("asked_raw", asked)  # the operator's (capped) twist, before any ramp
    running = np.abs(asked).max(axis=1) > 0.0
    count = max(1, int(running.sum()))
    held = run.get("keepout_held", np.zeros(scale.shape[0], dtype=bool))
    # A scale held at 0 by a keep-out zone is the stop asked for (the arm pressed against the bench), not
    # a saturation: counted apart (scale_zero_keepout_fraction), outside the scale-0 share.
    zero = running & (scale == 0.0) & ~held
    asked_w = np.linalg.norm(asked * weight, axis=1)
    err = np.linalg.norm((achieved - asked) * weight, axis=1)
    stalled = running & (np.linalg.norm(achieved * weight, axis=1) < STALL_SHARE * asked_w)
    jumps = np.linalg.norm(np.diff(raw * weight, axis=0, prepend=0.0), axis=1) > STEP_JUMP_M_S
    ramp_err = np.linalg.norm((asked - raw) * weight, axis=1)
    after_step = np.zeros(scale.shape[0], dtype=bool)
    window = round(STEP_WINDOW_S / PERIOD_S)
    for k in np.flatnonzero(jumps):
        after_step[k: k + window] = True
    prev = np.vstack((np.zeros((1, arm.n)), qd[:-1]))
    acc_ratio = np.abs(qd - prev) / (arm.a_max * PERIOD_S)
    return {
        "ticks": int(scale.shape[0]),
        "running_ticks": int(running.sum()),
        "scale_zero_fraction": float(zero.sum()) / count,
        "scale_zero_keepout_fraction": float((running & (scale == 0.0) & held).sum()) / count,
        "tracking_fraction": float((zero & run["tracking"]).sum()) / count,
        "braking_fraction": float((zero & ~run["tracking"]).sum()) / count,
        "scale_zero_after_step_fraction": float((zero & after_step).sum()) / count,
        "asked_steps": int(jumps.sum()),
        "below_half_fraction": float((running & (scale < 0.5)).sum()) / count,
        "stalled_fraction": float(stalled.sum()) / count,
        "sign_changes": [_sign_changes(qd[:, j], SIGN_DEADBAND * float(arm.v_max[j])) for j in range(arm.n)],
        "asked_direction_changes": _direction_changes(raw, weight),
        "peak_acceleration_ratio": float(acc_ratio.max()) if acc_ratio.size else 0.0,
        "peak_velocity_ratio": float((np.abs(qd) / arm.v_max).max()) if qd.size else 0.0,
        "twist_error_max_m_s": float(err[running].max()) if running.any() else 0.0,
        "twist_error_mean_m_s": float(err[running].mean()) if running.any() else 0.0,
        "ramp_error_mean_m_s": float(ramp_err[running].mean()) if running.any() else 0.0,
    }


def recording_figures(arm: Arm, header: dict[str, Any], rec: np.ndarray,
                      characteristic_length: float) -> dict[str, Any]:
    """The saturation figures of a service recording (`twistrate.service.recorder`: header and records),
    as the demo's report prints them: of the running ticks (mode running, a non-zero desired twist),
    the shares at scale 0 (a keep-out hold included: the recording does not tell it apart) and below
    half; the peak joint acceleration over its limit (|qd_k - qd_k-1| / (a_max T), consecutive ticks
    only); sign changes per joint (dead band SIGN_DEADBAND of v_max) and turns of the desired twist."""
    L = characteristic_length
    weight = np.array([1.0, 1.0, 1.0, L, L, L])
    period = 1.0 / float(header["tick_hz"])
    asked = np.nan_to_num(rec["twist_desired"].astype(float), nan=0.0, posinf=0.0, neginf=0.0)
    qd, scale = rec["qd"].astype(float), rec["scale"].astype(float)
    running = (rec["mode"] == header["modes"].index("running")) & (np.abs(asked).max(axis=1) > 0.0)
    count = max(1, int(running.sum()))
    step = np.diff(rec["tick"].astype(np.int64)) == 1  # pairs of consecutive ticks
    acc = np.abs(np.diff(qd, axis=0))[step] / (arm.a_max * period)
    return {
        "running_ticks": int(running.sum()),
        "scale_zero_fraction": float((running & (scale == 0.0)).sum()) / count,
        "below_half_fraction": float((running & (scale < 0.5)).sum()) / count,
        "peak_acceleration_ratio": float(acc.max()) if acc.size else 0.0,
        "sign_changes": [_sign_changes(qd[:, j], SIGN_DEADBAND * float(arm.v_max[j])) for j in range(arm.n)],
        "asked_direction_changes": _direction_changes(asked[running], weight),
    }


def chatter(sign_changes: list[int], free_sign_changes: list[int]) -> dict[str, Any]:
    """The chatter criterion of one run (module docstring): per joint, the sign changes beyond those of
    the same run without hard limits. Returns {"extra": (n,) max(0, with - without) per joint,
    "joints_over": the joints (indices) with extra sign changes, "met": none has any}."""
    extra = [max(0, a - b) for a, b in zip(sign_changes, free_sign_changes, strict=True)]
    over = [j for j, e in enumerate(extra) if e > 0]
    return {"extra": extra, "joints_over": over, "met": not over}


def _with_reference(figures: dict[str, Any], free_run: dict[str, np.ndarray], arm: Arm,
                    characteristic_length: float) -> dict[str, Any]:
    """`figures` plus the sign changes of the same run without hard limits and the chatter criterion."""
    free = motion_figures(arm, free_run, characteristic_length)["sign_changes"]
    figures["free_sign_changes"] = free
    verdict = chatter(figures["sign_changes"], free)
    figures["extra_sign_changes"] = verdict["extra"]
    figures["chatter_met"] = verdict["met"]
    return figures


def _free(options: SolverOptions) -> SolverOptions:
    """`options` without hard limits (the reference of the chatter criterion)."""
    return SolverOptions(**{**_fields(options), "enforce_limits": False})


def push_through_wrist(name: str, options: SolverOptions | None = None, seconds: float = 4.0,
                       speed: float = 0.3, ramp_s: float = 0.25, lag_s: float = 0.0,
                       ramp: TwistRamp | None = None, reference: bool = False) -> dict[str, Any]:
    """Scripted push through the wrist singularity of example arm `name` (bench6 or reach7).

    From home with the wrist joint at +WRIST_START rad, the base-frame twist that the wrist joint alone
    would make at `speed` rad/s toward 0 is asked for seconds / 2, then its opposite (one reversal), so
    the tool passes the aligned wrist posture twice. Like a jog command, each half ramps its magnitude
    in and out over `ramp_s` (a half-cosine); ramp_s = 0 asks for steps (start and reversal at full
    speed, which no rate within one tick of acceleration can follow); `ramp` then applies the service's
    ramp of the asked twist (`twistrate.service.shaping`). Returns `motion_figures` plus the run's
    settings; with `reference`, also the sign changes of the same run without hard limits and the
    chatter criterion (`free_sign_changes`, `extra_sign_changes`, `chatter_met`).
    """
    arm = load_arm(name)
    options = DEMO_OPTIONS if options is None else options
    j = WRIST_JOINT[name]
    q0 = np.array(arm.q_home, dtype=float)
    q0[j] = WRIST_START
    J = geometric_jacobian(arm, forward(arm, q0))
    linear, angular = -speed * J[:3, j], -speed * J[3:, j]
    half = 0.5 * seconds

    def twist_at(t: float) -> Twist:
        sign = 1.0 if t < half else -1.0
        u = t if t < half else t - half
        edge = min(u, half - u)
        f = 1.0
        if ramp_s > 0.0 and edge < ramp_s:
            f = 0.5 * (1.0 - math.cos(math.pi * max(edge, 0.0) / ramp_s))
        return sign * f * linear, sign * f * angular

    run = run_closed_loop(arm, options, twist_at, seconds, q0, lag_s, ramp=ramp)
    figures = motion_figures(arm, run, options.characteristic_length)
    figures.update({"run": f"push through the wrist singularity ({name}, joint {j})", "seconds": seconds,
                    "ramp_s": ramp_s, "lag_s": lag_s, "sigma_min_lowest_m": float(run["sigma_min"].min())})
    if reference:
        free_run = run_closed_loop(arm, _free(options), twist_at, seconds, q0, lag_s, ramp=ramp)
        _with_reference(figures, free_run, arm, options.characteristic_length)
    return figures


def demo_replay(scripted: Callable[[float], tuple[str, Any, Any]], options: SolverOptions | None = None,
                seconds: float = 29.8, lag_s: float = DEMO_LAG_S, reference: bool = True,
                ramp: TwistRamp | None = DEMO_RAMP, keepout: KeepOut | None = None) -> dict[str, Any]:
    """The demo's scripted pass on reach7 at solver level (module docstring).

    scripted : the demo command's `scripted_twist`, t (s) -> (phase name, linear (3,) m/s, angular (3,)
    rad/s), base frame (passed in: the service core does not import the commands). ramp : the asked
    twist's ramp (default the demo config's, `DEMO_RAMP`; None: off). keepout : the demo config's
    keep-out pass (its bench top and wall: the pass presses the tool toward the bench), or None. With
    `reference`,
    the sign changes of the same pass without hard limits are reported too (`free_sign_changes`: the
    zero crossings the kinematics itself asks for), with the chatter criterion (`extra_sign_changes`,
    `chatter_met`; module docstring)."""
    arm = load_arm("reach7")
    options = DEMO_OPTIONS if options is None else options

    def twist_at(t: float) -> Twist:
        _, linear, angular = scripted(math.floor(t * SOURCE_HZ) / SOURCE_HZ)
        return np.asarray(linear, dtype=float), np.asarray(angular, dtype=float)

    q0 = np.array(arm.q_home, dtype=float)
    caps = (DEMO_LINEAR_MAX, DEMO_ANGULAR_MAX)
    run = run_closed_loop(arm, options, twist_at, seconds, q0, lag_s, *caps, ramp=ramp, keepout=keepout)
    figures = motion_figures(arm, run, options.characteristic_length)
    figures.update({"run": "demo pass (reach7)", "seconds": seconds, "lag_s": lag_s})
    if reference:
        ref = run_closed_loop(arm, _free(options), twist_at, seconds, q0, lag_s, *caps, ramp=ramp,
                              keepout=keepout)
        _with_reference(figures, ref, arm, options.characteristic_length)
    return figures


def _fields(options: SolverOptions) -> dict[str, Any]:
    return {name: getattr(options, name) for name in options.__dataclass_fields__}


def tick_cost(name: str = "reach7", ticks: int = 2000, block: int = 40, repeats: int = 3,
              options: SolverOptions | None = None) -> dict[str, Any]:
    """Free and saturated tick of example arm `name`, timed in one process, interleaved in blocks.

    Free: a smooth trajectory from home on which no bound binds. Saturated: joint 0 pushed into its
    limit by the twist it alone makes at 0.3 rad/s (the saturated states only: ticks whose rates
    broke a bound; `tracking_share` of them had no feasible scale). Every feature on unless `options`
    says otherwise (the solver benchmark's set). Each state is timed `repeats` times (blocks of both
    kinds alternating); medians and p99 (us) are over all timings, and `*_min_median_us` over the
    per-state minimum (less sensitive to a shared machine's load), also split into the ticks with a
    feasible scale (`scaled_min_median_us`) and the tracking ones. Wall time per call
    (time.perf_counter_ns); a guide for development, not a published figure.
    """
    arm = load_arm(name)
    options = options if options is not None else SolverOptions(
        damping="singular_value", characteristic_length=0.3, limit_gain=2.0, manipulability_gain=20.0,
        posture_gain=0.2, enforce_limits=True)
    free = _record(arm, options, ticks, _smooth_twist, np.array(arm.q_home, dtype=float))
    q0 = np.array(arm.q_home, dtype=float)
    q0[0] = arm.q_min[0] + 0.05 * (arm.q_max[0] - arm.q_min[0])
    J = geometric_jacobian(arm, forward(arm, q0))
    push = DesiredTwist(-0.3 * J[:3, 0], -0.3 * J[3:, 0])
    limits = [state for state in _record(arm, options, 4 * ticks, lambda k: push, q0) if state[3] > 0][:ticks]
    count = min(len(free), len(limits))
    times = {"free": np.zeros((repeats, count)), "saturated": np.zeros((repeats, count))}
    clock = time.perf_counter_ns
    for rep in range(repeats):
        for start in range(0, count, block):
            for label, states in (("free", free), ("saturated", limits)):
                row = times[label][rep]
                for i in range(start, min(count, start + block)):
                    q, qd, tw, _ = states[i]
                    t0 = clock()
                    resolve_counted(arm, q, qd, tw, PERIOD_S, options)
                    row[i] = clock() - t0
    out: dict[str, Any] = {"arm": name, "states": count, "repeats": repeats,
                           "tracking_share": sum(1 for s in limits[:count] if s[3] >= 2) / max(1, count)}
    for label, t in times.items():
        us = t / 1e3
        out[f"{label}_median_us"] = float(np.median(us))
        out[f"{label}_p99_us"] = float(np.percentile(us, 99))
        out[f"{label}_min_median_us"] = float(np.median(us.min(axis=0)))
        out[f"{label}_min_p99_us"] = float(np.percentile(us.min(axis=0), 99))
    track = np.array([s[3] >= 2 for s in limits[:count]])
    per_state = times["saturated"].min(axis=0) / 1e3
    for label, sel in (("scaled", ~track), ("tracking", track)):
        out[f"{label}_min_median_us"] = float(np.median(per_state[sel])) if sel.any() else None
    out["saturated_to_free"] = out["saturated_median_us"] / out["free_median_us"]
    out["saturated_to_free_min"] = out["saturated_min_median_us"] / out["free_min_median_us"]
    return out


def _smooth_twist(k: int) -> DesiredTwist:
    t = k * PERIOD_S
    ramp = min(1.0, k / 300) ** 2
    lin = 0.04 * ramp * np.array([np.sin(0.9 * t), np.cos(0.7 * t), 0.6 * np.sin(0.5 * t + 1.0)])
    ang = 0.15 * ramp * np.array([np.sin(0.4 * t), 0.5 * np.cos(0.3 * t), np.sin(0.6 * t + 0.5)])
    return DesiredTwist(lin, ang)


def _record(arm: Arm, options: SolverOptions, ticks: int, twist_at: Callable[[int], DesiredTwist],
            q0: np.ndarray) -> list[tuple[np.ndarray, np.ndarray, DesiredTwist, int]]:
    """Closed loop q += q_dot T: (q, qd_prev, twist, saturation passes) of each tick."""
    q, qd = q0.copy(), np.zeros(arm.n)
    states = []
    for k in range(ticks):
        tw = twist_at(k)
        r, passes = resolve_counted(arm, q, qd, tw, PERIOD_S, options)
        states.append((q, qd, tw, passes))
        qd = r.qd
        q = q + qd * PERIOD_S
    return states
