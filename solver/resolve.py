"""Per-tick rate resolution: desired tool twist -> joint rates (damping, null space, hard limits).

One call of `resolve` per tick (contract: the data types and the signature are fixed):

1. forward kinematics and the geometric Jacobian J at q (`twistrate.solver.kinematics`);
2. the desired twist to the base frame at the tool point: v_tool = v_ref + w x (p_tool - p_ref);
3. weighting: A = S J D with S = diag(1, 1, 1, L, L, L) (task weighting, L the characteristic
   length, so singular values are in m) and D = W^-1/2 (weighted least norm, Chan & Dubey 1995:
   minimising q_dot^T W q_dot is minimising |y|^2 for q_dot = D y);
4. one full SVD of A (`twistrate.solver.svd`), reused for everything below and returned;
5. task rates by the damping policy (`twistrate.solver.damping`), null-space objectives through the
   exact projector I - A+ A = Vh[r:]^T Vh[r:] (`twistrate.solver.nullspace`, plus the O(n)
   manipulability gradient of `twistrate.solver.jacobians`, evaluated with the same SVD), both
   assembled in one product with Vh; the objectives are evaluated only when A has a null space
   (rank r < n) or the limits need them;
6. hard limits (`twistrate.solver.limits` for the bounds, `twistrate.solver.scaling` for the
   solve): if the rates break a bound, the largest task scale, else tracking.

How damping and saturation combine: damping decides which twist the arm is asked for near a
singularity, x_d = A y_task (the "damped twist"; x_d = x when no damping acts and A has full row
rank). The hard limits then realise s * x_d with the largest s in [0, 1] the bounds allow (the
scaling LP, solved exactly on the null-space parametrisation y = s y_task + Vh[r:]^T z, so the scale
is its maximum whenever it is feasible, on every arm), so the reported twist_achieved is s * x_d:
the damped twist scaled along its own direction. Null-space objectives are secondary: among the
rates of maximal scale, the nearest to the objective rates. Damping and bounds work together: when
a joint rests on a position limit (the task pushes it toward a limit it is within one tick of
braking of), the damping policy is applied again to the Jacobian of the other joints, which may be
near a singularity of their own that the whole arm's singular values do not show; where that asks
for more damping, the damped twist is that of those joints alone
(`twistrate.solver.damping.resting_joint_damping`). When no
scale exists (the previous rate cannot reach any rate making a scaled copy of x_d within one tick of
acceleration, e.g. after a step of the asked twist), the rates are the bounded damped least-squares
ones, whose task-weighted twist is nearest the asked one (`Resolution.tracking`, scale 0, the error
in `Resolution.twist_error`); a stop asked for at speed (zero twist) brakes along the previous rate
instead (`twistrate.solver.limits.brake_along`), so the tool keeps its path while it stops.

Non-finite q, qd_prev or twist raises InputError naming the field; finite input always gives
finite output (exactly singular configurations included). Per-(arm, period) constants derived from
the options are computed once and memoised on the options instance (`_PLAN_ATTR`), so the tick
itself does no validation beyond the finiteness check.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.damper import ROW_ACTIVE_TOL, Contacts
from twistrate.solver.damping import resting_joint_damping, task_coefficients
from twistrate.solver.finite import HUGE_SQ, SQUARE_SAFE, check_states, raise_non_finite
from twistrate.solver.jacobians import manipulability_gradient_geometric
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import Frames, forward, geometric_jacobian
from twistrate.solver.limits import (
    LIMIT_ACCELERATION,
    LIMIT_POSITION,
    LIMIT_VELOCITY,
    active_bits,
    brake_along,
    rate_bounds,
    within_bounds,
)
from twistrate.solver.options import SolverOptions
from twistrate.solver.plan import Plan, plan_of
from twistrate.solver.scaling import (
    BOUND_TOL,
    TRACK_DAMPING_MIN,
    bounded_damped_rates,
    bounded_damped_rates_rows,
    max_scale,
    max_scale_one,
    rest_rates,
)
from twistrate.solver.svd import RANK_ATOL, RANK_RTOL, numerical_rank, svd_full
from twistrate.solver.twist import twist_base

__all__ = [
    "LIMIT_ACCELERATION",
    "LIMIT_POSITION",
    "LIMIT_VELOCITY",
    "DesiredTwist",
    "Resolution",
    "resolve",
    "resolve_counted",
    "resolve_from_kinematics",
]

TwistFrame = Literal["base", "tool"]

#: bits of Resolution.limits_active, per joint: LIMIT_POSITION, LIMIT_VELOCITY, LIMIT_ACCELERATION
#: (defined in twistrate.solver.limits, re-exported here).


@dataclass(frozen=True)
class DesiredTwist:
    """A desired rigid-body twist of the tool.

    linear : (3,) m/s, velocity of the reference point.
    angular : (3,) rad/s, angular velocity of the tool.
    frame : "base" or "tool": the frame both vectors (and `point`) are expressed in.
    point : (3,) m, reference point as an offset from the tool origin, expressed in `frame`
        (zeros: the tool point itself).
    """

    linear: np.ndarray
    angular: np.ndarray
    frame: TwistFrame = "base"
    point: np.ndarray = field(default_factory=lambda: np.zeros(3))


@dataclass(frozen=True)
class Resolution:
    """Everything one tick of rate resolution produced.

    qd : (n,) joint rates, rad/s (revolute) or m/s (prismatic), joint order.
    twist_desired : (6,) the desired twist converted to base frame, tool point, rows (v, w).
    twist_achieved : (6,) J @ qd, base frame, tool point, rows (v, w); equals scale * twist_desired
        when no damping acts (and the arm has full row rank: with fewer than 6 joints it is the
        least-squares achievable part); with damping, scale times the damped twist (module
        docstring). Exception: when no scale was feasible (see `twistrate.solver.limits`), the
        joints brake along the previous rate, scale is 0 and twist_achieved reports that motion.
    scale : task scaling factor in [0, 1] applied by the hard limits (1: twist followed fully).
    damping : damping factor lambda applied (0 when none), m; for selective damping the
        equivalent lambda of the most attenuated direction.
    limits_active : (n,) uint8 bit mask per joint, LIMIT_POSITION | LIMIT_VELOCITY |
        LIMIT_ACCELERATION: which bound was saturated this tick.
    frames : forward kinematics at q.
    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    singular_values : (min(6, n),) singular values of the task-weighted Jacobian S J D, descending,
        m (D = W^-1/2 is the identity unless options.joint_weights is set).
    U : (6, min(6, n)) left singular vectors of the task-weighted Jacobian, base frame, (v, w)
        rows (angular rows in the weighted units).
    tracking : True when no scale in [0, 1] was feasible and the rates are the bounded damped
        least-squares ones (`twistrate.solver.scaling.bounded_damped_rates`): scale is 0 and
        twist_achieved is the nearest twist the bounds allow, in nearly the asked direction.
    twist_error (property) : (6,) twist_achieved - twist_desired, base frame, tool point, (v, w),
        m/s and rad/s: what the tick fell short of, from scaling, damping or tracking together.
    contacts : this tick's keep-out contacts (`damper.Contacts`, one per damper row) or None. rows_active :
        (r,) bool, rows met with equality at qd (`damper.ROW_ACTIVE_TOL`); None: no row, or free rates.
    """

    qd: np.ndarray
    twist_desired: np.ndarray
    twist_achieved: np.ndarray
    scale: float
    damping: float
    limits_active: np.ndarray
    frames: Frames
    J: np.ndarray
    singular_values: np.ndarray
    U: np.ndarray
    tracking: bool
    contacts: Contacts | None
    rows_active: np.ndarray | None

    def __init__(
        self,
        qd: np.ndarray,
        twist_desired: np.ndarray,
        twist_achieved: np.ndarray,
        scale: float,
        damping: float,
        limits_active: np.ndarray,
        frames: Frames,
        J: np.ndarray,
        singular_values: np.ndarray,
        U: np.ndarray,
        tracking: bool = False,
        contacts: Contacts | None = None,
        rows_active: np.ndarray | None = None,
    ) -> None:
        # Frozen: fill __dict__ directly, once per tick (cheaper than ten object.__setattr__ calls).
        fields = self.__dict__
        fields["qd"] = qd
        fields["twist_desired"] = twist_desired
        fields["twist_achieved"] = twist_achieved
        fields["scale"] = scale
        fields["damping"] = damping
        fields["limits_active"] = limits_active
        fields["frames"] = frames
        fields["J"] = J
        fields["singular_values"] = singular_values
        fields["U"] = U
        fields["tracking"] = tracking
        fields["contacts"] = contacts
        fields["rows_active"] = rows_active

    @property
    def twist_error(self) -> np.ndarray:
        """(6,) twist_achieved - twist_desired, base frame, tool point, rows (v, w), m/s and rad/s."""
        return self.twist_achieved - self.twist_desired



def resolve(
    arm: Arm,
    q: np.ndarray,
    qd_prev: np.ndarray,
    twist: DesiredTwist,
    period: float,
    options: SolverOptions,
    keepout: KeepOut | None = None,
) -> Resolution:
    """One tick: joint rates for `twist` at configuration q.

    q : (n,) measured joint positions (rad or m). qd_prev : (n,) rates commanded last tick.
    period : tick period T in s (acceleration bounds are per tick). keepout : the arm's keep-out
    pass (`twistrate.solver.keepout.KeepOut`, one tick loop's object) or None; its velocity-damper
    rows A q_dot >= b join the rate bounds of the scaling problem (with enforce_limits only).
    Raises InputError naming the field for non-finite q, qd_prev or twist (or a bad period),
    ConfigError for options that do not fit the arm (checked once per options instance).
    """
    return resolve_counted(arm, q, qd_prev, twist, period, options, keepout)[0]


def resolve_counted(
    arm: Arm,
    q: np.ndarray,
    qd_prev: np.ndarray,
    twist: DesiredTwist,
    period: float,
    options: SolverOptions,
    keepout: KeepOut | None = None,
) -> tuple[Resolution, int]:
    """`resolve`, plus the number of saturation passes of the tick (0: no bound was hit).

    Each saturation pass costs one SVD of a reduced Jacobian (see `twistrate.solver.limits`).
    """
    plan = plan_of(arm, options, period)
    check_states(q, qd_prev, twist)
    frames = forward(arm, q)
    return _rates(plan, q, qd_prev, twist, options, frames, geometric_jacobian(arm, frames), keepout)


def resolve_from_kinematics(
    arm: Arm,
    q: np.ndarray,
    qd_prev: np.ndarray,
    twist: DesiredTwist,
    period: float,
    options: SolverOptions,
    frames: Frames,
    J: np.ndarray,
    keepout: KeepOut | None = None,
) -> tuple[Resolution, int]:
    """`resolve_counted` with forward kinematics and the Jacobian at q supplied by the caller.

    frames : forward kinematics at q; only `frames.T_base_tool` (4, 4) is read (and the object is
        returned in the Resolution). J : (6, n) geometric Jacobian at q, base frame, tool point,
        rows (v, w). Used by `twistrate bench solver` to time the same tick on compiled kinematics.
    """
    plan = plan_of(arm, options, period)
    check_states(q, qd_prev, twist)
    return _rates(plan, q, qd_prev, twist, options, frames, J, keepout)


def _rates(
    plan: Plan,
    q: np.ndarray,
    qd_prev: np.ndarray,
    twist: DesiredTwist,
    options: SolverOptions,
    frames: Frames,
    J: np.ndarray,
    keepout: KeepOut | None = None,
) -> tuple[Resolution, int]:
    """Steps 2-6 of the module docstring, from forward kinematics and J at q (and the keep-out rows)."""
    x = twist_base(twist, frames.T_base_tool)
    xs = x * SQUARE_SAFE
    if not math.isfinite(xsq := xs.dot(xs)) and not np.isfinite(x).all():  # as in check_states
        raise_non_finite(q, qd_prev, twist)
    if xsq > HUGE_SQ:  # |x| > 1e150: products may overflow, to the rest fallback below, silently
        with np.errstate(over="ignore", invalid="ignore"):
            return _solve(plan, q, qd_prev, twist, x, options, frames, J, keepout)
    return _solve(plan, q, qd_prev, twist, x, options, frames, J, keepout)


def _solve(plan: Plan, q: np.ndarray, qd_prev: np.ndarray, twist: DesiredTwist, x: np.ndarray,
           options: SolverOptions, frames: Frames, J: np.ndarray,
           keepout: KeepOut | None) -> tuple[Resolution, int]:
    """`_rates` past its input test; x (6,): the twist in the base frame at the tool point, (v, w)."""
    A = J * plan.weight
    U, s, Vh = svd_full(A)
    n = q.shape[0]
    tol = RANK_RTOL * s.item(0)
    if tol < RANK_ATOL:
        tol = RANK_ATOL
    rank = numerical_rank(s, tol)
    # Task rates y_task = coef @ Vh[:rank] (weighted coordinates), kept in the singular basis.
    x_w = x * plan.task_scale
    coef, lam = task_coefficients(U, s, Vh, rank, x_w, A, options)

    # Null-space objectives, projected with the exact projector: they only act where A has a null
    # space (rank < n); otherwise the slow path evaluates them on demand (`_enforce`).
    y0 = _objective_rates(plan, q, J, U, s, Vh) if rank < n else None
    z = None
    if y0 is not None:
        # y = y_task + (I - A+ A) y0 in one product: with z = Vh y0, (I - A+ A) y0 = Vh[rank:]^T z[rank:],
        # so y = Vh^T z after z[:rank] is replaced by the task coefficients.
        z = Vh.dot(y0)
        z[:rank] = coef
        y = z.dot(Vh)
    else:
        y = coef.dot(Vh[:rank])
    col_scale = plan.col_scale
    qd = y if col_scale is None else y * col_scale

    scale = 1.0
    iterations = 0
    tracking = False
    bplan = plan.bounds
    rows = contacts = active = None
    if keepout is not None and bplan is not None:
        R, r, contacts = keepout.rows(frames, q, J)
        rows = (R, r) if r.shape[0] else None
    if bplan is not None and within_bounds(bplan, q, qd_prev, qd) and (
            rows is None or bool((rows[0].dot(qd) >= rows[1]).all())):
        bits = np.zeros(n, dtype=np.uint8)  # (the test fails for a non-finite qd)
    else:
        if bplan is not None:
            qd, scale, bits, iterations, tracking, lam = _enforce(A, J, U, s, Vh, coef, y0, rank, lam, x_w,
                                                             plan, q, qd_prev, options, rows, z)
        else:
            bits = np.zeros(n, dtype=np.uint8)
        # overflow of a huge (finite) request near a singularity (a sum overflowing alone: the element test)
        if not math.isfinite(qd.sum()) and not np.isfinite(qd).all():  # rates nearest rest, scale 0
            qd, bits = rest_rates(bplan, q, qd_prev) if bplan is not None else (np.zeros(n), bits)
            scale = 0.0
        if rows is not None:  # which damper rows the (limited) rates meet with equality
            active = rows[0].dot(qd) - rows[1] <= ROW_ACTIVE_TOL * (1.0 + np.abs(rows[1]))
    k = s.shape[0]
    # Positional, in field order (qd, twist_desired, twist_achieved, scale, damping, limits_active,
    # frames, J, singular_values, U): keyword passing costs about 0.5 us per tick.
    U_k = U if k == U.shape[1] else U[:, :k]
    return Resolution(qd, x, J.dot(qd), scale, lam, bits, frames, J, s, U_k, tracking, contacts,
                      active), iterations


def _objective_rates(
    plan: Plan, q: np.ndarray, J: np.ndarray, U: np.ndarray, s: np.ndarray, Vh: np.ndarray
) -> np.ndarray | None:
    """(n,) rates y_0 of the null-space objectives in the weighted coordinates (before projection), or
    None when every objective gain is 0: the affine joint-range and posture terms plus the gradient of
    the manipulability of A (Yoshikawa 1985), O(n) from J and the tick's SVD (U, s, Vh) of A."""
    objective = plan.objective
    y0 = None if objective is None else objective.c0 - objective.c1 * q
    if plan.manipulability_scale is not None:
        g = manipulability_gradient_geometric(J, (U, s, Vh), plan.weight)
        g *= plan.manipulability_scale
        if y0 is None:
            return g
        y0 += g  # y0 is this tick's own array
    return y0


def _enforce(
    A: np.ndarray,
    J: np.ndarray,
    U: np.ndarray,
    s: np.ndarray,
    Vh: np.ndarray,
    coef: np.ndarray,
    y0: np.ndarray | None,
    rank: int,
    lam: float,
    x_w: np.ndarray,
    plan: Plan,
    q: np.ndarray,
    qd_prev: np.ndarray,
    options: SolverOptions,
    rows: tuple[np.ndarray, np.ndarray] | None = None,
    z: np.ndarray | None = None,
) -> tuple[np.ndarray, float, np.ndarray, int, bool, float]:
    """Slow path: the scaling problem, else tracking. Returns (qd, scale, bits, passes, tracking,
    damping): damping is lam, or the larger damping of the joints the limits leave free
    (`twistrate.solver.damping.resting_joint_damping`) when that applied.

    A : (6, n) weighted Jacobian, J : (6, n) the geometric Jacobian, (U (6, 6), s, Vh (n, n)) the SVD
    of A, rank its numerical rank; coef : (rank,) task rates in the basis Vh[:rank]; y0 : the
    objective rates when the fast path computed them (rank < n), else None (evaluated here);
    lam : the tick's damping factor (m); x_w : (6,) the asked twist, task-weighted (m/s).
    The largest scale of the damped twist comes from `twistrate.solver.scaling.max_scale` on the
    null-space parametrisation y = s y_task + Vh[rank:]^T z (exact for every rank, so rank < 6 needs
    no special treatment). Passes: 1 for the scaling solve, 2 when tracking followed.
    rows : keep-out rows (R (p, n), r (p,)), R q_dot >= r, or None; they join the scaling LP and the
    bounded least squares (then also for a zero twist, instead of braking along the previous rate).
    z : (n,) the fast path's Vh y0, task coefficients in front (z[rank:] = Vh[rank:] y0), or None.
    """
    bounds = rate_bounds(plan.bounds, q, qd_prev)
    d = plan.col_scale
    n = q.shape[0]
    if y0 is None and rank < n:  # the objectives act only through the null space
        y0 = _objective_rates(plan, q, J, U, s, Vh)
    lo_y, hi_y = (bounds.lo, bounds.hi) if d is None else (bounds.lo / d, bounds.hi / d)
    if rows is not None and d is not None:  # R q_dot = (R D) y
        rows = (rows[0] * d, rows[1])
    tracking = False
    if rank == 0:  # no task direction at all: only the objectives move the arm, clipped
        y: np.ndarray | None = np.minimum(np.maximum(np.zeros(n) if y0 is None else y0, lo_y), hi_y)
        scale = 1.0
        passes = 1
    else:
        Vn = Vh[rank:]
        z_pref = None if y0 is None or rank == n else (Vn.dot(y0) if z is None else z[rank:])
        a = coef.dot(Vh[:rank])
        a, lam = resting_joint_damping(A, a, x_w, lam, bounds.speed, plan.bounds.AT_n, options)
        k1 = rank == n - 1 and rows is None  # one null vector Vh[rank] (7-joint arms): the walk directly
        found = (max_scale_one(a, Vh[rank], lo_y, hi_y, 0.0 if z_pref is None else z_pref.item(0), BOUND_TOL)
                 if k1 else max_scale(a, Vn.T, lo_y, hi_y, z_pref, rows))
        passes = 1
        if found is not None:
            scale, y = found
        else:
            scale, y, passes = 0.0, None, 2
            if rows is not None or any(x_w.tolist()):  # track: the bounded damped least-squares rates
                tracking = True
                mu = max(lam, TRACK_DAMPING_MIN)
                y = (bounded_damped_rates(A, x_w, lo_y, hi_y, mu, None, (U, s, Vh), z_pref) if rows is None
                     else bounded_damped_rates_rows(A, x_w, lo_y, hi_y, mu, np.zeros(n) if z_pref is None
                                                    else Vn.T.dot(z_pref), rows, (U, s, Vh)))
    if y is None:  # a stop asked for with no task-consistent rate in reach: brake along the path
        qd = brake_along(qd_prev, bounds, plan.bounds.AT_n)
    elif d is None and tracking and rows is None:  # the bounded least squares' rates are inside
        qd = y
    else:
        if d is not None:
            y = y * d
        qd = np.minimum(np.maximum(y, bounds.lo), bounds.hi)  # rounding only; y is inside
    # Every joint on a bound is reported: the saturated ones and the one that limits the scale.
    return qd, scale, active_bits(bounds, qd), passes, tracking, lam
