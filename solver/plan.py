"""The per-tick constants of rate resolution for one (arm, options, period): validated and derived once,
memoised on the options instance (an attribute outside the dataclass fields), so a tick only reads them."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.errors import ConfigError, InputError, field_error
from twistrate.solver.limits import BoundPlan, plan_bounds
from twistrate.solver.nullspace import LinearObjective, linear_objective
from twistrate.solver.options import DAMPING_POLICIES, SolverOptions

#: Attribute of a SolverOptions instance holding the memoised `Plan` of the last (arm, period).
PLAN_ATTR = "_resolve_plan"


@dataclass(frozen=True)
class Plan:
    """Constants of one (arm, options, period), derived and validated once.

    task_scale : (6,) S = (1, 1, 1, L, L, L). col_scale : (n,) D = W^-1/2, or None for W = I.
    weight : (6, n) multiplier with A = J * weight.
    objective : the affine null-space objectives, or None.
    manipulability_scale : the objective's factor on dw/dq in the weighted coordinates: the gain,
        times D when joint weights are set (y_0 = D q_dot_0 with q_dot_0 = gain * dw/dq); None
        when the gain is 0 (the gradient is then skipped).
    bounds : rate-bound constants, or None when limits are not enforced.
    """

    arm: Arm
    period: float
    task_scale: np.ndarray
    col_scale: np.ndarray | None
    weight: np.ndarray
    objective: LinearObjective | None
    manipulability_scale: float | np.ndarray | None
    bounds: BoundPlan | None


def _positive(name: str, value: float, zero_ok: bool = False) -> float:
    v = float(value)
    if not (math.isfinite(v) and (v >= 0.0 if zero_ok else v > 0.0)):
        accepted = "a finite number >= 0" if zero_ok else "a finite number > 0"
        raise field_error(ConfigError, name, value, accepted)
    return v


def _vector(name: str, value: object, n: int, positive: bool) -> np.ndarray:
    try:
        v = np.asarray(value, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        v = np.zeros(0)
    ok = v.shape == (n,) and bool(np.all(np.isfinite(v))) and (not positive or bool(np.all(v > 0.0)))
    if not ok:
        raise field_error(ConfigError, name, value, f"{n} finite numbers" + (" > 0" if positive else ""))
    return v


def prepare_plan(arm: Arm, options: SolverOptions, period: float) -> Plan:
    """Validate `options` and `period` for `arm` and derive the per-tick constants (not per tick)."""
    n = arm.n
    if not (isinstance(period, (int, float)) and math.isfinite(period) and period > 0.0):
        raise field_error(InputError, "period", period, "a finite tick period > 0 s")
    if options.damping not in DAMPING_POLICIES:
        raise field_error(ConfigError, "damping", options.damping, ", ".join(DAMPING_POLICIES))
    _positive("damping_max", options.damping_max, zero_ok=True)
    _positive("manipulability_threshold", options.manipulability_threshold)
    _positive("singular_value_threshold", options.singular_value_threshold)
    _positive("selective_step_max", options.selective_step_max)
    L = _positive("characteristic_length", options.characteristic_length)
    for name in ("limit_gain", "manipulability_gain", "posture_gain"):
        _positive(name, getattr(options, name), zero_ok=True)
    task_scale = np.array([1.0, 1.0, 1.0, L, L, L])
    if options.joint_weights is None:
        col_scale = None
        weight = np.repeat(task_scale[:, None], n, axis=1)  # same shape as J: no broadcasting per tick
        d = np.ones(n)
    else:
        w = _vector("joint_weights", options.joint_weights, n, positive=True)
        col_scale = 1.0 / np.sqrt(w)
        weight = task_scale[:, None] * col_scale[None, :]
        d = col_scale
    posture = arm.q_home if options.posture is None else _vector("posture", options.posture, n, False)
    objective = linear_objective(arm, options.limit_gain, options.posture_gain, posture, d)
    bounds = plan_bounds(arm, float(period)) if options.enforce_limits else None
    gain = float(options.manipulability_gain)
    manipulability_scale = None if gain == 0.0 else gain if col_scale is None else gain * col_scale
    return Plan(arm, float(period), task_scale, col_scale, weight, objective, manipulability_scale, bounds)


def plan_of(arm: Arm, options: SolverOptions, period: float) -> Plan:
    """The memoised constants of (arm, options, period), derived on first use or change."""
    plan = options.__dict__.get(PLAN_ATTR)
    if plan is None or plan.arm is not arm or plan.period != period:
        plan = prepare_plan(arm, options, period)
        object.__setattr__(options, PLAN_ATTR, plan)
    return plan
