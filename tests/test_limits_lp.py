"""The task scale of saturation in the null space is maximal: cross-check against a linear program.

Claim checked (Flacco, De Luca & Khatib 2015, IEEE T-RO 31(3), "Control of redundant robots under
hard joint constraints: saturation in the null space"): for one task, the largest s in [0, 1] with
J q_dot = s x and Qmin <= q_dot <= Qmax is the optimum of the linear program

    maximise s  subject to  A y = s x,  lo <= y <= hi,  0 <= s <= 1,

solved here with scipy.optimize.linprog (HiGHS) as the independent reference.

What our experiments show, and what is asserted:
* the greedy saturation loop alone (Algorithm 1: saturate the most critical joint, keep the best
  scale) is NOT always maximal; `test_greedy_loop_alone_is_not_always_maximal` keeps a seeded
  counterexample. The shortfall comes from joints saturated early that the optimum keeps inside.
* with the refinement of `twistrate.solver.limits._refine` (shadow-price test and simplex pivots
  from the loop's last basis, Opt-SNS in spirit) the scale equals the LP optimum whenever the loop
  finds any feasible scale: s_sns >= s_lp - 1e-9 on every case below.
* weaker claim when rest is outside the bounds (previous rate faster than one tick of
  acceleration can cancel): the loop can miss feasibility although the LP is feasible
  (`test_loop_can_miss_feasibility_when_rest_is_outside_the_bounds`, seeded counterexample);
  `resolve` therefore also starts from the previous rate, which covers the cases met along
  trajectories (`test_infeasible_ticks_along_a_trajectory_are_infeasible_for_the_lp`).
"""

from __future__ import annotations

import numpy as np
import pytest
from arm_factory import random_arm
from scipy.optimize import linprog

from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.limits import plan_bounds, rate_bounds, saturate
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.svd import numerical_rank, rank_tolerance, svd_full

T = 0.002
TOL = 1e-9


def _lp_scale(A: np.ndarray, x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> float | None:
    """max s s.t. A y = s x, lo <= y <= hi, 0 <= s <= 1 (scipy.optimize.linprog, HiGHS).

    Returns None when the LP is infeasible."""
    m, n = A.shape
    res = linprog(
        np.r_[np.zeros(n), -1.0], A_eq=np.hstack([A, -x[:, None]]), b_eq=np.zeros(m),
        bounds=[*zip(lo, hi, strict=True), (0.0, 1.0)], method="highs",
    )
    return float(res.x[-1]) if res.status == 0 else None


def _sns(A: np.ndarray, x: np.ndarray, lo: np.ndarray, hi: np.ndarray, refine: bool = True):
    """Run the saturation loop the way resolve does (task restricted to the range of A)."""
    U, s, Vh = svd_full(A)
    tol = rank_tolerance(s)
    r = numerical_rank(s, tol)
    a0 = ((x @ U[:, :r]) / s[:r]) @ Vh[:r]
    Ur = U[:, :r]
    return saturate(Ur.T @ A, Ur.T @ x, a0, np.zeros(A.shape[1]), None, lo, hi, r, tol, refine=refine)


def _random_case(rng: np.random.Generator, rest_inside: bool):
    n = int(rng.integers(3, 8))
    m = int(rng.integers(2, min(n, 6) + 1))
    A = rng.normal(size=(m, n))
    if rng.random() < 0.25:
        A[-1] = rng.normal() * A[0]  # rank deficient
    x = A @ rng.normal(size=n)  # in the range of A
    a0 = np.linalg.pinv(A) @ x
    half = np.abs(a0) * rng.uniform(0.05, 1.2, n) + 1e-3
    c = rng.uniform(-1.5, 1.5, n) * half
    lo, hi = c - half, c + half
    if rest_inside:
        lo, hi = np.minimum(lo, 0.0), np.maximum(hi, 0.0)
    return A, x, lo, hi, a0


def test_scale_is_maximal_when_rest_is_inside_the_bounds() -> None:
    rng = np.random.default_rng(11)
    checked = 0
    while checked < 400:
        A, x, lo, hi, a0 = _random_case(rng, rest_inside=True)
        if np.all((a0 >= lo) & (a0 <= hi)):
            continue  # no bound binds
        sat = _sns(A, x, lo, hi)
        s_lp = _lp_scale(A, x, lo, hi)
        assert s_lp is not None and sat.y is not None
        assert sat.scale >= s_lp - TOL
        assert np.all(sat.y >= lo - TOL) and np.all(sat.y <= hi + TOL)
        np.testing.assert_allclose(A @ sat.y, sat.scale * x, atol=1e-8)
        checked += 1


def test_scale_is_maximal_whenever_the_loop_finds_a_feasible_scale() -> None:
    rng = np.random.default_rng(12)
    checked = 0
    while checked < 400:
        A, x, lo, hi, a0 = _random_case(rng, rest_inside=False)
        if np.all((a0 >= lo) & (a0 <= hi)):
            continue
        sat = _sns(A, x, lo, hi)
        s_lp = _lp_scale(A, x, lo, hi)
        if sat.y is None:
            continue  # see the weaker claim below
        assert s_lp is not None and sat.scale >= s_lp - TOL
        assert sat.scale <= s_lp + TOL  # and feasible, so never above the optimum
        checked += 1


def test_greedy_loop_alone_is_not_always_maximal() -> None:
    # Counterexample search over seeded cases: the plain loop (no refinement) falls short of the LP.
    rng = np.random.default_rng(13)
    worst = 0.0
    for _ in range(300):
        A, x, lo, hi, a0 = _random_case(rng, rest_inside=True)
        if np.all((a0 >= lo) & (a0 <= hi)):
            continue
        greedy = _sns(A, x, lo, hi, refine=False)
        worst = max(worst, _lp_scale(A, x, lo, hi) - greedy.scale)
    assert worst > 0.05


def test_loop_can_miss_feasibility_when_rest_is_outside_the_bounds() -> None:
    # Counterexample search: the loop from the minimum-norm start finds no feasible scale, the LP does.
    rng = np.random.default_rng(14)
    found = 0
    for _ in range(800):
        A, x, lo, hi, a0 = _random_case(rng, rest_inside=False)
        if np.all((a0 >= lo) & (a0 <= hi)):
            continue
        if _sns(A, x, lo, hi).y is None and _lp_scale(A, x, lo, hi) is not None:
            found += 1
    assert found > 0


@pytest.mark.parametrize("n", [3, 4, 5, 6, 7])
def test_resolve_scale_is_maximal_on_random_arms(n: int) -> None:
    # End to end: resolve's scale against the LP over the same weighted Jacobian, bounds from
    # rate_bounds, and the achievable (least-squares) part of the twist; previous rate 0 so that rest
    # is inside the bounds; joints placed near their limits so that bounds bind.
    rng = np.random.default_rng(100 + n)
    options = SolverOptions(damping="none", limit_gain=0.0)
    free = SolverOptions(damping="none", limit_gain=0.0, enforce_limits=False)
    L = options.characteristic_length
    W = np.array([1, 1, 1, L, L, L])
    checked = 0
    while checked < 25:
        arm = random_arm(rng, n=n)
        q = arm.q_min + (arm.q_max - arm.q_min) * rng.choice([0.001, 0.01, 0.5, 0.99, 0.999], size=n)
        qd_prev = rng.uniform(-1, 1, size=n) * arm.a_max * T
        tw = DesiredTwist(rng.normal(scale=0.5, size=3), rng.normal(scale=1.0, size=3))
        r = resolve(arm, q, qd_prev, tw, T, options)
        if r.scale == 1.0:
            continue
        x_d = resolve(arm, q, qd_prev, tw, T, free).twist_achieved * W  # the achievable twist
        J = geometric_jacobian(arm, forward(arm, q))
        b = rate_bounds(plan_bounds(arm, T), q, qd_prev)
        s_lp = _lp_scale(J * W[:, None], x_d, b.lo, b.hi)
        assert s_lp is not None
        assert r.scale >= s_lp - 1e-7
        checked += 1


def test_infeasible_ticks_along_a_trajectory_are_infeasible_for_the_lp() -> None:
    # reach7's shoulder driven at speed, then the twist reversed (as in tests/test_resolve.py): on
    # every tick where resolve reports no feasible scale (scale 0 with the tool still moving), the LP
    # is infeasible too, so the previous-rate start leaves no feasible scale undiscovered along this
    # trajectory; on every scaled tick the scale is the LP's maximum.
    arm = load_arm("reach7")
    plan = plan_bounds(arm, T)
    options = SolverOptions(damping="none", limit_gain=0.0)
    L = options.characteristic_length
    W = np.array([1, 1, 1, L, L, L])
    q = np.array(arm.q_home, dtype=float)
    q[1] = np.radians(-60.0)
    qd = np.zeros(arm.n)
    J0 = geometric_jacobian(arm, forward(arm, q))
    tw = DesiredTwist(-0.3 * J0[:3, 1], -0.3 * J0[3:, 1])
    infeasible = 0
    for k in range(400):
        if k == 200:
            tw = DesiredTwist(-tw.linear, -tw.angular)
        r = resolve(arm, q, qd, tw, T, options)
        if r.scale == 0.0 and np.linalg.norm(r.twist_achieved) > 1e-9:
            infeasible += 1
            b = rate_bounds(plan, q, qd)
            assert _lp_scale(r.J * W[:, None], r.twist_desired * W, b.lo, b.hi) is None
        elif r.scale < 1.0:
            b = rate_bounds(plan, q, qd)
            s_lp = _lp_scale(r.J * W[:, None], r.twist_desired * W, b.lo, b.hi)
            assert s_lp is not None and r.scale >= s_lp - 1e-7
        qd = r.qd
        q = q + qd * T
    assert infeasible > 0
