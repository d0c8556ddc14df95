"""Hard joint limits per tick: rate bounds from position (with braking), velocity and acceleration
limits, and their enforcement by saturation in the null space with task scaling.

Rate bounds for one tick of period T (joint i; A acceleration, V velocity limit; q_prev_dot the
rate commanded last tick). With d = q - q_min the distance to the lower limit:

    Qmin = max( -min(V, max(0, sqrt(2 B d) - B T / 2)),  q_prev_dot - A T )
    Qmax = min(  min(V, max(0, sqrt(2 B d') - B T / 2)),  q_prev_dot + A T ),   d' = q_max - q

with B = BRAKING_SHARE * A the deceleration the position bound plans with. Planning the stop with
half the joint's acceleration leaves the other joints headroom: when a joint brakes toward its
limit the task scale must shrink with it, and every joint carrying the task must slow down in
proportion within its own acceleration limit. Measured: pushing reach7's shoulder into its limit
had ticks with no feasible scale with B = A and none with B = A / 2 (tests/test_resolve.py).
Pushing reach7's base yaw on (`twistrate bench solver`, 4000 ticks) still has none on 36 % of the
ticks with either value: once that joint rests on its limit, the other six make the pushed twist
alone, the scale falls to the per-mille range near their own singularity, and the ticks alternate
between a tiny scale and braking (measured with the greedy loop; such ticks now track, see
`twistrate.solver.scaling`). Everything below holds for any B <= A; the derivation is written
with A for the braking deceleration.

The braking term is the discrete-time form of -sqrt(2 A d) (Flacco, De Luca & Khatib 2015, IEEE
T-RO 31(3), give the continuous one, from memory). Derivation: moving toward the limit at speed x
this tick, then braking by A T per tick, travels T sum_k max(0, x - k A T) <= x^2/(2A) + xT/2 +
A T^2/8 = (x + A T/2)^2 / (2A); keeping that <= d gives x <= sqrt(2 A d) - A T/2. Consequences
(checked in tests/test_resolve_properties.py):
* recursive feasibility: if this tick obeys the bound, next tick's bound is >= x - A T, so the
  acceleration bound and the braking bound never cross on their own;
* it implies the one-tick position bound (q_min - q)/T <= qd (since sqrt(2Ad) - AT/2 <= d/T for
  all d >= 0: (sqrt(d/T) - sqrt(AT/2))^2 >= 0), so that term is not computed;
* max(0, .) lets a joint rest at (or beyond) its limit; beyond it (d < 0) no motion further out.
Unlimited joints have d = inf and keep only the velocity and acceleration bounds.

Crossing bounds: the position/velocity interval always contains 0 and the acceleration interval
is never empty, but they can be disjoint when the previous rate was already infeasible (a joint
moving faster toward a limit than it can brake, e.g. after a measurement jump or a limit change).
Then the safe choice is the acceleration bound nearest the position/velocity interval: the joint
brakes as hard as it is able to (both bounds set to it). Computed as clip(P, q_prev_dot - AT,
q_prev_dot + AT), which equals max/min of the bounds whenever they do not cross.

Saturation in the null space (SNS; Flacco, De Luca & Khatib 2012, ICRA, "Motion control of
redundant robots under joint constraints: saturation in the null space"; IEEE T-RO 31(3) 2015,
Algorithm 1), `saturate`: the greedy loop saturates the joint that most limits the task scale
(removed from the task, its rate fixed), re-solves with the remaining joints and keeps the best
scale; `saturate(refine=True)` continues with simplex pivots from the loop's last basis (`_refine`).
It is kept here for reference and for its tests (tests/test_limits_lp.py). The per-tick solver no
longer uses it: the loop stops when removing a joint drops the rank of the reduced Jacobian (on a
shoulder-elbow-wrist arm, the six joints other than the elbow have rank 5), and then braked although
a scale existed. `twistrate.solver.resolve` solves the scaling LP exactly instead
(`twistrate.solver.scaling`), on the null-space parametrisation, which forms no reduced Jacobian.

`brake_along` remains the answer to a stop asked for at speed when no task-consistent rate is in
reach: the joints decelerate together along the previous rate as hard as the slowest joint can.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.svd import numerical_rank, svd_full

#: A joint whose task-rate coefficient |a_i| is at most this (weighted rad/s per unit scale) is
#: treated as not moved by the task when computing the task scaling factor.
SCALE_EPS = 1e-12
#: Slack (weighted rad/s) of the bounds in the task scaling test (rounding; the caller clips).
BOUND_TOL = 1e-12
#: Stand-in task coefficient of a free joint the task does not move (see `_scaling`).
_UNMOVED = 1e-20
#: Relative tolerance for reporting which bound a saturated joint sits on.
SOURCE_RTOL = 1e-9
#: Finite stand-in for 2 A d of an unlimited joint in the fused check (any value above e_hi works).
_BIG = 1e300
#: Sided speeds are capped at this (far above any sqrt(e_hi)) before squaring in `within_bounds`.
_SPEED_CAP = 1e150
_ONE = np.ones(1)
_ONE.setflags(write=False)
#: Relative tolerance on shadow prices (and on scale comparisons) in the optimality refinement.
_SHADOW_RTOL = 1e-9
#: The refinement stops after this many passes per joint (Bland's rule terminates much earlier).
_REFINE_MAX_PASSES = 4

#: Share of the acceleration limit the position bound plans its braking with (module docstring).
BRAKING_SHARE = 0.5
LIMIT_POSITION = 1
LIMIT_VELOCITY = 2
LIMIT_ACCELERATION = 4


@dataclass(frozen=True)
class BoundPlan:
    """Per (arm, period) constants of the rate bounds. "Sided" arrays are (2n,): entries [:n] the
    lower side (speed toward q_min, sign -1), [n:] the upper side (speed toward q_max).

    period : T, s. G : (2n, n) [-I; I], so G @ qd are the sided speeds.
    e0 : (2n,) 2A * [-q_min; q_max] (inf for unlimited joints); G2A : (2n, n) 2A * G, so
        e0 - G2A @ q = 2 A d, d the distances to the limits (m or rad).
    e_lo, e_hi : (2n,) clamp of 2 A d: (A T / 2)^2 (braking speed 0) and (V + A T / 2)^2 (speed V).
    half_AT, AT : (2n,) A T / 2 and A T (rad/s or m/s). AT_n : (n,) A T.
    check : (6n, 3n + 1) matrix of the fused per-tick test: check @ [q; qd; qd_prev; 1] stacks
        min(2 A d, BIG), G qd + A T / 2 and A T - G (qd - qd_prev), each (2n,) (see `within_bounds`).
    """

    period: float
    G: np.ndarray
    e0: np.ndarray
    G2A: np.ndarray
    e_lo: np.ndarray
    e_hi: np.ndarray
    half_AT: np.ndarray
    AT: np.ndarray
    AT_n: np.ndarray
    check: np.ndarray


class RateBounds(NamedTuple):
    """Rate bounds of one tick, crossing resolved. lo, hi : (n,) rad/s or m/s, lo <= hi.
    (An immutable named tuple: built on every saturated tick, cheaper than a frozen dataclass.)

    speed : (2n,) sided position/velocity speed bound (lower side [:n], upper [n:]), >= 0, <= V.
    velocity_bound : (2n,) bool, True where `speed` is the velocity limit (not braking).
    acc_lo, acc_hi : (n,) acceleration bounds q_prev_dot -/+ A T.
    """

    lo: np.ndarray
    hi: np.ndarray
    speed: np.ndarray
    velocity_bound: np.ndarray
    acc_lo: np.ndarray
    acc_hi: np.ndarray


@dataclass(frozen=True)
class Saturation:
    """Outcome of `saturate`. y : (n,) weighted rates with A y = scale * x, or None when no scale in
    [0, 1] was feasible. saturated : (n,) bool joints fixed at a bound. iterations : loop passes
    (each pass costs one SVD of the reduced Jacobian)."""

    y: np.ndarray | None
    scale: float
    saturated: np.ndarray
    iterations: int


def plan_bounds(arm: Arm, period: float) -> BoundPlan:
    """Constants of the per-tick rate bounds of `arm` at tick period `period` (s, > 0)."""
    n = arm.n
    A2 = np.concatenate((arm.a_max, arm.a_max))
    B2 = BRAKING_SHARE * A2  # deceleration the position bound plans with (module docstring)
    V2 = np.concatenate((arm.v_max, arm.v_max))
    G = np.concatenate((-np.eye(n), np.eye(n)))
    e0 = 2.0 * B2 * np.concatenate((-arm.q_min, arm.q_max))
    half_AT = 0.5 * B2 * period
    e_hi = (V2 + half_AT) ** 2
    check = np.zeros((6 * n, 3 * n + 1))
    check[: 2 * n, :n] = -2.0 * B2[:, None] * G
    check[: 2 * n, -1] = np.minimum(e0, _BIG)  # unlimited joints: a finite stand-in above e_hi
    check[2 * n: 4 * n, n: 2 * n] = G
    check[2 * n: 4 * n, -1] = half_AT
    check[4 * n:, n: 2 * n] = -G
    check[4 * n:, 2 * n: 3 * n] = G
    check[4 * n:, -1] = A2 * period
    return BoundPlan(
        period=float(period), G=G, e0=e0, G2A=2.0 * B2[:, None] * G, e_lo=half_AT * half_AT, e_hi=e_hi,
        half_AT=half_AT, AT=A2 * period, AT_n=arm.a_max * period, check=check,
    )


def _speed_bound(plan: BoundPlan, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sided position/velocity speed bound (2n,) and the raw 2 A d (2n,) it came from."""
    e_raw = plan.e0 - plan.G2A @ q
    e = np.maximum(e_raw, plan.e_lo)
    np.minimum(e, plan.e_hi, out=e)
    np.sqrt(e, out=e)
    e -= plan.half_AT
    return e, e_raw


def within_bounds(plan: BoundPlan, q: np.ndarray, qd_prev: np.ndarray, qd: np.ndarray) -> bool:
    """Fast per-tick test: True when rates qd (n,) obey every bound at q (n,) after qd_prev (n,).

    Sided speeds u = G qd must satisfy u <= sqrt(clip(2 A d, e_lo, e_hi)) - A T / 2, tested without
    the square root as max(u + A T/2, 0)^2 <= min(2 A d, e_hi): exact wherever 2 A d >= e_lo, and
    stricter (a False sends the tick to the exact slow path) within A T^2 / 8 of a limit or beyond
    it; and G (qd - qd_prev) <= A T. One matrix product gives every linear term. A non-finite qd
    fails the test.
    """
    n2 = 2 * q.shape[0]
    r = plan.check @ np.concatenate((q, qd, qd_prev, _ONE))
    e = r[:n2]
    u = r[n2: 2 * n2]
    np.minimum(e, plan.e_hi, out=e)
    np.maximum(u, 0.0, out=u)
    np.minimum(u, _SPEED_CAP, out=u)  # a huge (finite) request squares without overflow
    u *= u
    e -= u
    np.minimum(e, r[2 * n2:], out=e)
    return bool(e[e.argmin()] >= 0.0)


def rate_bounds(plan: BoundPlan, q: np.ndarray, qd_prev: np.ndarray) -> RateBounds:
    """Per-joint rate bounds lo <= hi (n,) of one tick, with crossing resolved (module docstring)."""
    n = q.shape[0]
    speed, e_raw = _speed_bound(plan, q)
    acc_lo = qd_prev - plan.AT_n
    acc_hi = qd_prev + plan.AT_n
    lo = np.minimum(np.maximum(-speed[:n], acc_lo), acc_hi)
    hi = np.minimum(np.maximum(speed[n:], acc_lo), acc_hi)
    return RateBounds(lo, hi, speed, e_raw >= plan.e_hi, acc_lo, acc_hi)


def active_bits(bounds: RateBounds, qd: np.ndarray, mask: np.ndarray | None = None) -> np.ndarray:
    """(n,) uint8 LIMIT_* bits of the joints in `mask` (bool (n,); None: every joint) for the bounds
    qd sits on.

    A joint on its position/velocity bound gets LIMIT_VELOCITY when that side's bound is the
    velocity limit, else LIMIT_POSITION; on its acceleration bound LIMIT_ACCELERATION. A joint
    whose bounds crossed (pinned at the braking acceleration bound) gets LIMIT_ACCELERATION plus
    the position/velocity bit of the side it could not meet.
    """
    n = qd.shape[0]
    # Python floats: a few comparisons per joint (cheaper than two dozen numpy calls on n values)
    q_l, sp, vb = qd.tolist(), bounds.speed.tolist(), bounds.velocity_bound.tolist()
    acc_lo, acc_hi = bounds.acc_lo.tolist(), bounds.acc_hi.tolist()
    on = None if mask is None else mask.tolist()
    bits = [0] * n
    for i in range(n):
        if on is not None and not on[i]:
            continue
        v = q_l[i]
        tol = SOURCE_RTOL * (1.0 + abs(v))
        b = 0
        if v <= -sp[i] + tol:
            b |= LIMIT_VELOCITY if vb[i] else LIMIT_POSITION
        if v >= sp[n + i] - tol:
            b |= LIMIT_VELOCITY if vb[n + i] else LIMIT_POSITION
        if abs(v - acc_lo[i]) <= tol or abs(v - acc_hi[i]) <= tol:
            b |= LIMIT_ACCELERATION
        bits[i] = b
    return np.array(bits, dtype=np.uint8)


def _scaling(
    a: np.ndarray, b: np.ndarray, lo: np.ndarray, hi: np.ndarray, lo_t: np.ndarray, hi_t: np.ndarray,
    free: np.ndarray,
) -> tuple[float, float, int, float, int, float]:
    """Task scaling factor range of y(s) = b + s a within [lo, hi] (Flacco et al. 2015, the task
    scaling factor, from memory).

    lo_t, hi_t : the bounds widened by BOUND_TOL, used for the scale limits (rounding slack; the
    bound values returned are the exact lo, hi). Returns (s_min, s_max, j_max, bound_j_max, j_min,
    bound_j_min): j_max is the joint whose upper scale limit is smallest (the most critical joint)
    and bound_j_max the rate bound it meets there; j_min likewise for the largest lower scale limit.
    A free joint the task does not move (|a_i| <= SCALE_EPS) is given a = _UNMOVED: its scale limits
    are then beyond +-1e8 (no limit) when b_i is inside its widened bounds, and exclude every s in
    [0, 1] when b_i is outside (the bound it meets is then the one b_i broke). Saturated joints
    (free False) never limit the scale.
    """
    a = np.where(np.abs(a) > SCALE_EPS, a, _UNMOVED)
    up = a > 0.0
    d_hi = hi_t - b
    d_lo = lo_t - b
    s_upper = np.where(up, d_hi, d_lo)
    s_upper /= a
    s_lower = np.where(up, d_lo, d_hi)
    s_lower /= a
    saturated = ~free
    s_upper[saturated] = np.inf
    s_lower[saturated] = -np.inf
    j_max = int(s_upper.argmin())
    j_min = int(s_lower.argmax())
    bound_max = hi[j_max] if up[j_max] else lo[j_max]
    bound_min = lo[j_min] if up[j_min] else hi[j_min]
    return (float(s_lower[j_min]), float(s_upper[j_max]), j_max, float(bound_max), j_min, float(bound_min))


def _inside(y: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> bool:
    return bool(np.all(y >= lo) and np.all(y <= hi))


def saturate(
    A: np.ndarray,
    x: np.ndarray,
    a0: np.ndarray,
    b0: np.ndarray,
    y0: np.ndarray | None,
    lo: np.ndarray,
    hi: np.ndarray,
    rank: int,
    tol: float,
    refine: bool = False,
) -> Saturation:
    """Saturation in the null space with task scaling (Flacco, De Luca & Khatib 2012; 2015 Alg. 1).

    A : (m, n) weighted Jacobian; x : (m,) task to realise (weighted units, in the range of A).
    a0 : (n,) A+ x; b0 : (n,) (I - A+ A) y0 (zeros when y0 is None): the unconstrained solution
        a0 + b0 is known to break a bound.
    y0 : (n,) null-space objective rates of the free joints, or None.
    lo, hi : (n,) rate bounds, lo <= hi. rank, tol : numerical rank of A and its absolute tolerance.
    refine : when the greedy loop ends below scale 1 with A of full row rank, continue from its
        last basis with `_refine` (release saturated joints whose shadow price has the wrong sign)
        until the scale is maximal.
    All rates in the weighted coordinates y. See the module docstring for the algorithm.
    """
    m, n = A.shape
    lo_t, hi_t = lo - BOUND_TOL, hi + BOUND_TOL  # the scaling test's slack (the caller clips)
    free = np.ones(n, dtype=bool)
    yN = np.zeros(n) if y0 is None else y0.copy()
    a, b = a0, b0
    best_s = -1.0
    best_y: np.ndarray | None = None
    best_free = free
    basis: tuple[np.ndarray, np.ndarray, float, int, float] | None = None
    iterations = 0
    while True:
        iterations += 1
        s_min, s_max, j_max, bound_max, j_min, bound_min = _scaling(a, b, lo, hi, lo_t, hi_t, free)
        feasible = s_min <= s_max and s_max >= 0.0 and s_min <= 1.0
        if feasible:
            s = min(1.0, s_max)
            if s >= 1.0:  # the unscaled task fits (to rounding; the caller clips)
                return Saturation(a + b, 1.0, ~free, iterations)
            if s > best_s:
                best_s, best_y, best_free = s, b + s * a, free.copy()
            if refine and rank == m and int(free.sum()) == m:
                basis = (free.copy(), yN.copy(), s, j_max, bound_max)
        if s_max < 1.0:
            j, bound = j_max, bound_max
        else:
            j, bound = j_min, bound_min
        free[j] = False
        yN[j] = bound
        if not free.any():
            break
        Uw, sw, Vhw = svd_full(A[:, free])
        rw = numerical_rank(sw, tol)
        if rw < rank:
            break
        Ur, Vr, sr = Uw[:, :rw], Vhw[:rw], sw[:rw]
        a = np.zeros(n)
        a[free] = ((x @ Ur) / sr) @ Vr
        b = yN.copy()
        b[free] -= (((A @ yN) @ Ur) / sr) @ Vr
        y = a + b
        if _inside(y, lo, hi):
            return Saturation(y, 1.0, ~free, iterations)
    if basis is not None:
        refined = _refine(A, x, lo, hi, lo_t, hi_t, *basis)
        iterations += refined.iterations
        if refined.y is not None and refined.scale > best_s:
            return Saturation(refined.y, refined.scale, refined.saturated, iterations)
    if best_y is not None:
        return Saturation(best_y, best_s, ~best_free, iterations)
    return Saturation(None, 0.0, ~free, iterations)


def _refine(
    A: np.ndarray, x: np.ndarray, lo: np.ndarray, hi: np.ndarray, lo_t: np.ndarray, hi_t: np.ndarray,
    free: np.ndarray, yN: np.ndarray, s: float, k: int, bound_k: float,
) -> Saturation:
    """Raise the task scale from a basis of the saturation loop to its maximum (simplex pivots).

    The task-scaling problem is the linear program: maximise s subject to A y = s x,
    lo <= y <= hi, s <= 1. A state of the saturation loop with m free joints (A_F square and
    regular), the others saturated at bounds, and the scale limited by the free joint k at its
    bound, is a basis of that LP. It is optimal iff each saturated joint's shadow price
    d_j = lambda^T A_j, with lambda^T A_F = e_k^T / (a_k) (lambda orthogonal to the other free
    columns, lambda^T x = 1), has the right sign: d_j >= 0 for a joint on its upper bound, <= 0 on
    its lower bound (d_j = ds/dy_j: moving y_j into its range would raise s otherwise). This is the
    optimality test of Opt-SNS (Flacco, De Luca & Khatib 2015, IEEE T-RO 31(3), from memory:
    "shadow prices"). Otherwise the first such joint (lowest index, Bland's rule against cycling)
    is released, k is saturated in its place, and the scale is recomputed with the new square
    free set. Each pass costs two small linear solves.
    free : (n,) bool, m True; yN : (n,) saturated values (entries of free joints ignored).
    lo_t, hi_t : the bounds widened by BOUND_TOL (see `_scaling`).
    """
    m, n = A.shape
    free = free.copy()
    yN = yN.copy()
    iterations = 0
    y_best: np.ndarray | None = None
    s_best = s
    sat_best = ~free
    for _ in range(_REFINE_MAX_PASSES * n):
        iterations += 1
        A_F = A[:, free]
        local_k = int(np.count_nonzero(free[:k]))
        e_k = np.zeros(m)
        e_k[local_k] = 1.0
        try:
            r = np.linalg.solve(A_F.T, e_k)
        except np.linalg.LinAlgError:
            break
        rx = float(r @ x)
        if rx == 0.0:
            break
        d = (r @ A) / rx
        pinned = lo >= hi
        upper = (yN >= hi) & ~free & ~pinned
        lower = (yN <= lo) & ~free & ~pinned
        dtol = _SHADOW_RTOL * (1.0 + float(np.abs(d).max()))
        wrong = (upper & (d < -dtol)) | (lower & (d > dtol))
        if not wrong.any():
            break
        j = int(wrong.argmax())
        free[j] = True
        free[k] = False
        yN[k] = bound_k
        A_F = A[:, free]
        rhs = np.stack((x, -(A[:, ~free] @ yN[~free])), axis=1)
        try:
            sol = np.linalg.solve(A_F, rhs)
        except np.linalg.LinAlgError:
            break
        a = np.zeros(n)
        b = yN.copy()
        b[free] = 0.0
        a[free] = sol[:, 0]
        b[free] = sol[:, 1]
        s_min, s_max, j_max, bound_max, _, _ = _scaling(a, b, lo, hi, lo_t, hi_t, free)
        if not (s_min <= s_max + _SHADOW_RTOL and s_max >= s_best - _SHADOW_RTOL):
            break  # numerical trouble: keep the best so far
        if s_max >= 1.0:
            return Saturation(a + b, 1.0, ~free, iterations)
        s_new = max(s_max, s_min)
        if s_new > s_best:
            s_best, y_best, sat_best = s_new, b + s_new * a, ~free
        k, bound_k = j_max, bound_max
    return Saturation(y_best, s_best if y_best is not None else 0.0, sat_best, iterations)


def brake_along(qd_prev: np.ndarray, bounds: RateBounds, AT_n: np.ndarray) -> np.ndarray:
    """Fallback rates (n,) when no task scale is feasible: c * qd_prev clipped into the bounds.

    c in [0, 1] is the smallest common factor every joint can reach within one tick of
    acceleration (c = max_i(1 - A_i T / |qd_prev_i|), at least 0), so the joints decelerate
    together along the previous rate (the tool keeps its path while braking) as hard as the
    slowest joint allows.
    """
    speed = np.abs(qd_prev)
    with np.errstate(divide="ignore"):
        need = 1.0 - AT_n / speed
    c = max(0.0, float(need.max())) if need.size else 0.0
    return np.minimum(np.maximum(c * qd_prev, bounds.lo), bounds.hi)
