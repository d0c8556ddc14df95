"""The saturated tick is complete: resolve's task scale equals the scaling LP's optimum whenever the LP
is feasible, on shoulder-elbow-wrist 7-joint arms and on random arms of 2 to 9 joints (prismatic mixed
in); when it is infeasible, the rates are the bounded damped least-squares ones.

Oracles (outside the project): scipy.optimize.linprog with HiGHS for the scaling LP
(Flacco, De Luca & Khatib 2015, IEEE T-RO 31(3): maximise s s.t. J q_dot = s x, bounds) and
scipy.optimize.lsq_linear (method "bvls", Stark & Parker 1995, Comput. Stat. 10) for the bounded
least squares.
"""

from __future__ import annotations

import dataclasses
import math
import warnings

import numpy as np
import pytest
from arm_factory import random_arm
from scipy.optimize import linprog, lsq_linear

from twistrate.solver.arm import REVOLUTE, Arm, Joint
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.limits import plan_bounds, rate_bounds, saturate
from twistrate.solver.load import load_arm
from twistrate.solver.nullspace import project
from twistrate.solver.options import DAMPING_POLICIES, SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.scaling import TRACK_DAMPING_MIN, active_set, max_scale
from twistrate.solver.svd import numerical_rank, rank_tolerance, singular_values, svd_full

T = 0.002
PLAIN = SolverOptions(damping="none", limit_gain=0.0)
FREE = SolverOptions(damping="none", limit_gain=0.0, enforce_limits=False)
L = PLAIN.characteristic_length
W = np.array([1, 1, 1, L, L, L])


def _lp_scale(A: np.ndarray, x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> float | None:
    """max s s.t. A y = s x, lo <= y <= hi, 0 <= s <= 1 (linprog, HiGHS); None if infeasible."""
    m, n = A.shape
    res = linprog(np.r_[np.zeros(n), -1.0], A_eq=np.hstack([A, -x[:, None]]), b_eq=np.zeros(m),
                  bounds=[*zip(lo, hi, strict=True), (0.0, 1.0)], method="highs")
    return float(res.x[-1]) if res.status == 0 else None


def sew_arm(rng: np.random.Generator) -> Arm:
    """A random shoulder-elbow-wrist arm (invented test data): yaw, pitch, roll meeting at the shoulder,
    an elbow pitch (the only joint that changes the shoulder-to-wrist distance), roll, pitch, roll meeting
    at the wrist; random upper and lower arm lengths, limits, speeds and accelerations."""
    upper, lower = rng.uniform(0.25, 0.5, 2)
    z, y = np.array([0.0, 0.0, 1.0]), np.array([0.0, 1.0, 0.0])
    offsets = [0.3, 0.0, 0.0, upper, 0.0, lower, 0.0]
    axes = [z, y, z, y, z, y, z]
    joints = []
    for i in range(7):
        Tf = np.eye(4)
        Tf[2, 3] = offsets[i]
        lim = rng.uniform(1.5, 3.0)
        lo, hi = (-0.1, 2.6) if i == 3 else (-lim, lim)
        joints.append(Joint(f"j{i}", REVOLUTE, Tf, axes[i], lo, hi, float(rng.uniform(1.5, 3.0)),
                            float(rng.uniform(4.0, 12.0))))
    tool = np.eye(4)
    tool[2, 3] = 0.1
    return Arm.build("sew7", joints, np.eye(4), tool)


def _check_against_lp(arm: Arm, q: np.ndarray, qd_prev: np.ndarray, tw: DesiredTwist) -> str:
    """resolve vs the LP at one state: 'free', 'scaled' or 'tracking'. Asserts the claims."""
    r = resolve(arm, q, qd_prev, tw, T, PLAIN)
    b = rate_bounds(plan_bounds(arm, T), q, qd_prev)
    assert np.all(r.qd >= b.lo - 1e-12) and np.all(r.qd <= b.hi + 1e-12)
    x_d = resolve(arm, q, qd_prev, tw, T, FREE).twist_achieved * W  # the achievable (damped) twist
    s_lp = _lp_scale(r.J * W[:, None], x_d, b.lo, b.hi)
    if s_lp is None:
        assert r.scale == 0.0 and (r.tracking or not np.any(r.twist_desired))
        return "tracking"
    assert not r.tracking
    assert r.scale == pytest.approx(s_lp, abs=1e-7)
    np.testing.assert_allclose(r.twist_achieved * W, r.scale * x_d, atol=1e-8 * (1 + np.abs(x_d).max()))
    return "free" if r.scale == 1.0 and not r.limits_active.any() else "scaled"


@pytest.mark.parametrize("seed", range(4))
def test_scale_equals_the_lp_optimum_on_shoulder_elbow_wrist_arms(seed: int) -> None:
    rng = np.random.default_rng(500 + seed)
    kinds: dict[str, int] = {}
    for _ in range(60):
        arm = sew_arm(rng)
        frac = rng.choice([0.002, 0.02, 0.5, 0.98, 0.998], size=7)
        q = arm.q_min + (arm.q_max - arm.q_min) * frac
        qd_prev = rng.uniform(-1, 1, 7) * arm.a_max * T * rng.choice([0.5, 3.0, 20.0])
        tw = DesiredTwist(rng.normal(scale=0.6, size=3), rng.normal(scale=1.5, size=3))
        kind = _check_against_lp(arm, q, qd_prev, tw)
        kinds[kind] = kinds.get(kind, 0) + 1
    assert kinds.get("scaled", 0) > 10  # the bounds bind on many of the cases


@pytest.mark.parametrize("n", [2, 3, 4, 5, 6, 8, 9])
def test_scale_equals_the_lp_optimum_on_random_arms(n: int) -> None:
    rng = np.random.default_rng(700 + n)
    kinds: dict[str, int] = {}
    for _ in range(40):
        arm = random_arm(rng, n=n)
        frac = rng.choice([0.002, 0.02, 0.5, 0.98, 0.998], size=n)
        q = arm.q_min + (arm.q_max - arm.q_min) * frac
        qd_prev = rng.uniform(-1, 1, n) * arm.a_max * T * rng.choice([0.5, 3.0])
        tw = DesiredTwist(rng.normal(scale=0.5, size=3), rng.normal(scale=1.0, size=3))
        kind = _check_against_lp(arm, q, qd_prev, tw)
        kinds[kind] = kinds.get(kind, 0) + 1
    assert kinds.get("scaled", 0) > 5


def test_general_active_set_agrees_with_the_lp() -> None:
    # k >= 2 null-space dimensions use the active-set method; k <= 1 closed forms. All against HiGHS.
    rng = np.random.default_rng(31)
    for _ in range(300):
        n = int(rng.integers(3, 10))
        m = int(rng.integers(1, min(n, 6) + 1))
        A = rng.normal(size=(m, n))
        x = A @ rng.normal(size=n)
        _, s, Vh = np.linalg.svd(A)
        r = int(np.count_nonzero(s > 1e-10 * s[0]))
        a = np.linalg.pinv(A) @ x
        half = np.abs(a) * rng.uniform(0.05, 1.2, n) + 1e-3
        c = rng.uniform(-1.5, 1.5, n) * half
        lo, hi = c - half, c + half
        found = max_scale(a, Vh[r:].T, lo, hi, None)
        s_lp = _lp_scale(A, x, lo, hi)
        assert (found is None) == (s_lp is None)
        if found is not None:
            assert found[0] == pytest.approx(s_lp, abs=1e-8)
            y = found[1]
            assert np.all(y >= lo - 1e-9) and np.all(y <= hi + 1e-9)
            np.testing.assert_allclose(A @ y, found[0] * x, atol=1e-8)


def test_active_set_least_distance_matches_a_projection() -> None:
    # Least-distance QP onto a box written as G w <= h: the answer is the clip (common practice).
    rng = np.random.default_rng(5)
    for _ in range(50):
        d = int(rng.integers(1, 5))
        lo, hi = -rng.uniform(0.1, 1, d), rng.uniform(0.1, 1, d)
        G = np.concatenate((np.eye(d), -np.eye(d)))
        target = rng.normal(scale=2.0, size=d)
        w = active_set(G, np.concatenate((hi, -lo)), np.zeros(d), target=target)
        np.testing.assert_allclose(w, np.clip(target, lo, hi), atol=1e-12)


def _sew_home() -> tuple[Arm, np.ndarray]:
    arm = load_arm("reach7")  # a shoulder-elbow-wrist arm: elbow (joint 3) alone changes the reach
    return arm, np.array(arm.q_home, dtype=float)


def _issue_state(seed: int, crossing: bool):
    """A state of the kind issue 12 describes, on reach7 (seeded; found by a search in which the greedy
    loop of `limits.saturate` with its second start returned no scale while the LP had one): a random
    configuration around home and previous rates of 1 to 10 ticks of acceleration; with `crossing`, the
    elbow beyond its lower limit still moving outward (bounds crossed, pinned at maximum braking). The
    twist is A y / s0 for a rate y inside the bounds, the elbow on one of its bounds half the time."""
    arm, q = _sew_home()
    rng = np.random.default_rng(seed)
    q = q + rng.uniform(-0.5, 0.5, 7)
    qd_prev = rng.uniform(-1, 1, 7) * arm.a_max * T * rng.choice([1, 3, 10])
    if crossing:
        q[3] = arm.q_min[3] - rng.uniform(0.0005, 0.01)
        qd_prev[3] = -rng.uniform(0.1, 0.8)
    J = geometric_jacobian(arm, forward(arm, q))
    b = rate_bounds(plan_bounds(arm, T), q, qd_prev)
    s0 = rng.uniform(0.2, 0.9)
    y = rng.uniform(b.lo, b.hi)
    if rng.random() < 0.5:
        y[3] = b.hi[3] if rng.random() < 0.5 else b.lo[3]
    x = J @ y / s0
    return arm, q, qd_prev, J, b, x


def _greedy_scale(J: np.ndarray, x: np.ndarray, lo: np.ndarray, hi: np.ndarray, y_prev: np.ndarray):
    """The saturation loop as resolve called it before (refinement on, second start from y_prev)."""
    A, xw = J * W[:, None], x * W
    U, s, Vh = svd_full(A)
    tol = rank_tolerance(s)
    r = numerical_rank(s, tol)
    y_task = ((xw @ U[:, :r]) / s[:r]) @ Vh[:r]
    sat = saturate(A, xw, y_task, np.zeros(7), None, lo, hi, r, tol, refine=True)
    near = saturate(A, xw, y_task, project(Vh, r, y_prev), y_prev, lo, hi, r, tol, refine=True)
    return None if sat.y is None and near.y is None else max(sat.scale, near.scale)


def test_elbow_bounds_crossing_state_keeps_the_lp_scale() -> None:
    # Issue 12, first state: the elbow's bounds cross (pinned at maximum braking); the six other joints
    # have rank 5 without it, which stopped the greedy loop.
    arm, q, qd_prev, J, b, x = _issue_state(148, crossing=True)
    assert b.lo[3] == b.hi[3]  # pinned
    s_lp = _lp_scale(J * W[:, None], x * W, b.lo, b.hi)
    assert s_lp is not None and s_lp > 0.25
    assert _greedy_scale(J, x, b.lo, b.hi, qd_prev) is None  # the old loop braked here
    r = resolve(arm, q, qd_prev, DesiredTwist(x[:3], x[3:]), T, PLAIN)
    assert r.scale == pytest.approx(s_lp, abs=1e-7) and not r.tracking
    np.testing.assert_allclose(r.twist_achieved, r.scale * x, atol=1e-9)


def test_elbow_on_its_acceleration_bound_far_from_limits_keeps_the_lp_scale() -> None:
    # Issue 12, second state: no joint near a position limit (every position-side bound is the velocity
    # limit, the nearest limit over 60 degrees away); the optimum has the elbow on its acceleration bound.
    arm, q, qd_prev, J, b, x = _issue_state(370, crossing=False)
    assert b.velocity_bound.all()
    assert np.degrees(np.minimum(q - arm.q_min, arm.q_max - q)).min() > 60.0
    s_lp = _lp_scale(J * W[:, None], x * W, b.lo, b.hi)
    assert s_lp is not None and s_lp > 0.2
    assert _greedy_scale(J, x, b.lo, b.hi, qd_prev) is None  # the old loop braked here
    r = resolve(arm, q, qd_prev, DesiredTwist(x[:3], x[3:]), T, PLAIN)
    assert r.scale == pytest.approx(s_lp, abs=1e-7) and not r.tracking
    assert min(abs(r.qd[3] - b.acc_lo[3]), abs(r.qd[3] - b.acc_hi[3])) < 1e-9  # elbow on its acc. bound
    np.testing.assert_allclose(r.twist_achieved, r.scale * x, atol=1e-9)


def test_no_scale_gives_the_bounded_least_squares_rates() -> None:
    # A reversal asked at speed: no task-consistent rate is in reach. The rates are the bounded damped
    # least-squares ones (scipy lsq_linear, bvls, on [A; mu I]) and bend less than braking would.
    arm, q = _sew_home()
    J = geometric_jacobian(arm, forward(arm, q))
    rng = np.random.default_rng(9)
    checked = 0
    for _ in range(40):
        qd_prev = rng.uniform(-0.5, 0.5, 7)
        x = -J @ qd_prev * rng.uniform(0.5, 2.0) + rng.normal(scale=0.02, size=6)
        r = resolve(arm, q, qd_prev, DesiredTwist(x[:3], x[3:]), T, PLAIN)
        if not r.tracking:
            continue
        b = rate_bounds(plan_bounds(arm, T), q, qd_prev)
        assert _lp_scale(J * W[:, None], x * W, b.lo, b.hi) is None
        mu = TRACK_DAMPING_MIN
        ref = lsq_linear(np.vstack([J * W[:, None], mu * np.eye(7)]), np.r_[x * W, np.zeros(7)],
                         bounds=(b.lo, b.hi), method="bvls", tol=1e-14)
        np.testing.assert_allclose(r.qd, ref.x, atol=1e-9)
        assert r.scale == 0.0
        np.testing.assert_allclose(r.twist_error, r.twist_achieved - r.twist_desired)
        braked = np.clip(qd_prev * max(0.0, float(np.max(1 - arm.a_max * T / np.abs(qd_prev)))), b.lo, b.hi)
        assert np.linalg.norm((J @ r.qd - x) * W) <= np.linalg.norm((J @ braked - x) * W) + 1e-12
        checked += 1
    assert checked > 10


@pytest.mark.parametrize("name", ["reach7", "bench6", "planar3", "rail4"])
def test_huge_twists_raise_no_numpy_warning(name: str) -> None:
    # Nothing on the tick path may warn (project rule); magnitudes up to the largest double.
    # Up to 1.7e308 (each component |c| <= mag / 3, so the base-frame conversion stays finite), at home
    # and at the all-zero posture (singular on these arms: tiny singular values divide the huge twist).
    arm = load_arm(name)
    rng = np.random.default_rng(3)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for q in (np.array(arm.q_home, dtype=float), np.zeros(arm.n)):
            for mag in (1e100, 1e154, 1e155, 1e200, 1e300, 1e307, 1.7e308):
                for policy in DAMPING_POLICIES:
                    for limits in (True, False):
                        options = SolverOptions(damping=policy, enforce_limits=limits,
                                                manipulability_gain=1.0,
                                                posture_gain=0.5)
                        lin, ang = (np.clip(rng.normal(size=3), -1.0, 1.0) * (mag / 3) for _ in range(2))
                        r = resolve(arm, q, rng.normal(size=arm.n) * 0.1, DesiredTwist(lin, ang), T, options)
                        assert np.all(np.isfinite(r.qd)) and 0.0 <= r.scale <= 1.0
                        assert np.all(np.isfinite(r.twist_achieved)) and math.isfinite(r.damping)


def test_values_only_svd_matches_numpy() -> None:
    rng = np.random.default_rng(8)
    for shape in ((6, 7), (6, 6), (6, 3), (3, 5)):
        A = rng.normal(size=shape)
        np.testing.assert_allclose(singular_values(A), np.linalg.svd(A, compute_uv=False), rtol=1e-12)


def test_a_joint_resting_on_its_limit_brings_the_damping_of_the_others() -> None:
    # The demo's state at 18.5 s (reach7, wrist pitch on its 120 deg limit, camera roll asked): the whole
    # arm is far from singular (no damping by the policy, Chiaverini 1997), but without the wrist pitch
    # the other six joints are nearly singular; the policy applied to their Jacobian damps the task.
    arm = load_arm("reach7")
    q = np.radians([-16.5, 85.0, 87.8, 21.3, -14.1, 120.0, -99.3])
    options = SolverOptions(damping="singular_value", damping_max=0.04, singular_value_threshold=0.05,
                            limit_gain=0.0)
    J = geometric_jacobian(arm, forward(arm, q))
    A = J * W[:, None]
    assert np.linalg.svd(A, compute_uv=False)[-1] > options.singular_value_threshold
    assert np.linalg.svd(np.delete(A, 5, axis=1), compute_uv=False)[-1] < 0.01
    tw = DesiredTwist(np.zeros(3), np.array([0.0, 0.0, 0.8]))
    qd_prev = np.zeros(7)
    free = resolve(arm, q, qd_prev, tw, T, dataclasses.replace(options, enforce_limits=False))
    assert free.damping == 0.0 and free.qd[5] > 0.0  # the free tick would drive the wrist pitch on
    r = resolve(arm, q, qd_prev, tw, T, options)
    assert r.damping > 0.0
    b = rate_bounds(plan_bounds(arm, T), q, qd_prev)
    assert np.all(r.qd >= b.lo - 1e-12) and np.all(r.qd <= b.hi + 1e-12)
