"""Foresight: the rate of the smallest task-weighted singular value along the joint rates, the time to
the pinched threshold, and the time of each joint to its position limit.

Outside references: central finite differences of numpy.linalg.svd along simulated motion; the closed
form of a planar two-link arm's singular values (sigma_1 sigma_2 = |det J| = l1 l2 |sin q2| and
sigma_1^2 + sigma_2^2 = |J|_F^2 = l1^2 + 2 l2^2 + 2 l1 l2 cos q2, common practice for a 2x2 matrix;
Yoshikawa 1985 for det J of the two-link arm).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from arm_factory import random_arm, random_q

from twistrate.solver.arm import REVOLUTE, Arm, Joint
from twistrate.solver.foresight import (
    foresight,
    limit_times_s,
    sigma_min_rate,
    task_joint_weight,
    time_to_threshold_s,
)
from twistrate.solver.jacobians import jacobian_dot
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve

L1, L2 = 0.4, 0.3


def _two_link() -> Arm:
    """Planar two-link arm (invented): joint axes along z, links along x, lengths L1 and L2."""
    z = np.array([0.0, 0.0, 1.0])
    T2 = np.eye(4)
    T2[0, 3] = L1
    tool = np.eye(4)
    tool[0, 3] = L2
    joints = [Joint("shoulder", REVOLUTE, np.eye(4), z, -3.0, 3.0, 2.0, 10.0),
              Joint("elbow", REVOLUTE, T2, z, -3.0, 3.0, 2.0, 10.0)]
    return Arm.build("two-link", joints, np.eye(4), tool)


def _sigma2_closed(q2: float) -> float:
    """Smaller singular value of the planar two-link position Jacobian (module docstring)."""
    F = L1 * L1 + 2 * L2 * L2 + 2 * L1 * L2 * math.cos(q2)
    D = L1 * L2 * math.sin(q2)
    return math.sqrt(max(0.0, (F - math.sqrt(F * F - 4 * D * D)) / 2))


def _q2_at_threshold(th: float) -> float:
    """q2 in (0, pi) where sigma_2 = th, from th^4 - F th^2 + D^2 = 0, a quadratic in cos q2."""
    a = (L1 * L2) ** 2
    b = 2 * L1 * L2 * th * th
    c = (L1 * L1 + 2 * L2 * L2) * th * th - th ** 4 - a
    cos_q2 = (-b + math.sqrt(b * b - 4 * a * c)) / (2 * a)
    return math.acos(cos_q2)


def _planar(q: np.ndarray, qd: np.ndarray):
    arm = _two_link()
    J = geometric_jacobian(arm, forward(arm, q))
    A, A_dot = J[:2], jacobian_dot(J, qd)[:2]  # the (v_x, v_y) rows: the position Jacobian
    U, s, _ = np.linalg.svd(A)
    return A, A_dot, U, s


def test_planar_two_link_rate_matches_the_closed_form() -> None:
    omega = 0.5  # elbow straightening at constant rate, rad/s
    for q2 in (1.5, 1.0, 0.5, 0.2, 0.05):
        q, qd = np.array([0.3, q2]), np.array([0.0, -omega])
        A, A_dot, U, s = _planar(q, qd)
        assert s[-1] == pytest.approx(_sigma2_closed(q2), rel=1e-12)
        h = 1e-6
        closed_rate = -omega * (_sigma2_closed(q2 + h) - _sigma2_closed(q2 - h)) / (2 * h)
        assert sigma_min_rate(A, A_dot, U, s) == pytest.approx(closed_rate, rel=1e-6)


def test_planar_two_link_time_to_threshold_converges_to_the_closed_form() -> None:
    # sigma_2(q2(t)) with q2(t) = q2_0 - omega t reaches th at t* = (q2_0 - q2_th) / omega exactly; the
    # first-order estimate's error shrinks quadratically as t* -> 0.
    omega, th = 0.5, 0.015
    q2_th = _q2_at_threshold(th)
    assert _sigma2_closed(q2_th) == pytest.approx(th, rel=1e-9)
    errors = []
    for t_star in (0.4, 0.2, 0.1, 0.05):
        q2 = q2_th + omega * t_star
        A, A_dot, U, s = _planar(np.array([0.0, q2]), np.array([0.0, -omega]))
        est = time_to_threshold_s(float(s[-1]), sigma_min_rate(A, A_dot, U, s), th)
        assert est is not None
        errors.append(abs(est - t_star))
    assert errors[-1] < 0.02 * 0.05
    for bigger, smaller in itertools.pairwise(errors):
        assert smaller < 0.35 * bigger  # roughly quadratic: a factor 4 per halving


def _smin(arm: Arm, q: np.ndarray, weight: np.ndarray) -> float:
    return float(np.linalg.svd(geometric_jacobian(arm, forward(arm, q)) * weight, compute_uv=False)[-1])


def test_rate_matches_finite_differences_along_simulated_motion() -> None:
    # reach7 driven by resolve (every feature on) and random arms: d sigma_min / dt against central
    # differences of numpy's SVD along q + h q_dot, with the solver's task weighting.
    options = SolverOptions(limit_gain=1.0)
    arm = load_arm("reach7")
    weight = task_joint_weight(arm.n, options.characteristic_length, None)
    q = np.array(arm.q_home, dtype=float)
    qd = np.zeros(arm.n)
    tw = DesiredTwist(np.array([0.05, -0.03, 0.02]), np.array([0.1, 0.2, -0.3]))
    checked = 0
    for k in range(300):
        r = resolve(arm, q, qd, tw, 0.002, options)
        qd = r.qd
        if k % 30 == 29:
            f = foresight(arm, q, qd, r.J, r.U, r.singular_values, weight, 0.015)
            h = 1e-6
            fd = (_smin(arm, q + h * qd, weight) - _smin(arm, q - h * qd, weight)) / (2 * h)
            assert f.sigma_min_rate_m_s == pytest.approx(fd, rel=1e-5, abs=1e-9)
            checked += 1
        q = q + qd * 0.002
    assert checked == 10
    rng = np.random.default_rng(4)
    for _ in range(30):
        arm = random_arm(rng, n=int(rng.integers(2, 10)))
        q, qd = random_q(rng, arm), rng.normal(size=arm.n)
        weight = task_joint_weight(arm.n, 0.3, None)
        J = geometric_jacobian(arm, forward(arm, q))
        U, s, _ = np.linalg.svd(J * weight)
        f = foresight(arm, q, qd, J, U, s[: min(6, arm.n)], weight, 0.015)
        if f.sigma_min_rate_m_s is None:
            continue
        h = 1e-6
        fd = (_smin(arm, q + h * qd, weight) - _smin(arm, q - h * qd, weight)) / (2 * h)
        assert f.sigma_min_rate_m_s == pytest.approx(fd, rel=1e-4, abs=1e-8)


def test_undefined_and_receding_cases_have_their_own_answers() -> None:
    U = np.eye(3)
    A = np.diag([1.0, 0.5, 0.5])  # repeated smallest singular value: the values may cross
    assert sigma_min_rate(A, np.ones((3, 3)), U, np.array([1.0, 0.5, 0.5])) is None
    A0 = np.diag([1.0, 0.5, 0.0])  # exactly singular: |sigma| has a kink
    assert sigma_min_rate(A0, np.ones((3, 3)), U, np.array([1.0, 0.5, 0.0])) is None
    assert time_to_threshold_s(0.1, 0.02, 0.015) is None  # moving away
    assert time_to_threshold_s(0.1, 0.0, 0.015) is None  # steady
    assert time_to_threshold_s(0.01, -0.5, 0.015) == 0.0  # already pinched
    assert time_to_threshold_s(0.1, -0.5, 0.015) == pytest.approx(0.17)
    # straightening the planar arm's elbow the other way (bending it) moves away from the singularity
    A, A_dot, U2, s = _planar(np.array([0.0, 0.5]), np.array([0.0, 0.5]))
    assert sigma_min_rate(A, A_dot, U2, s) > 0.0


def test_time_to_limit_per_joint_and_the_first_joint() -> None:
    arm = load_arm("bench6")  # flange_roll (joint 5) is unlimited
    q = np.array(arm.q_home, dtype=float)
    qd = np.array([0.1, -0.2, 0.0, 0.5, -0.5, 3.0])
    t = limit_times_s(arm, q, qd)
    np.testing.assert_allclose(t[0], (arm.q_max[0] - q[0]) / 0.1)
    np.testing.assert_allclose(t[1], (arm.q_min[1] - q[1]) / -0.2)
    assert t[2] == math.inf and t[5] == math.inf
    J = geometric_jacobian(arm, forward(arm, q))
    weight = task_joint_weight(6, 0.3, None)
    U, s, _ = np.linalg.svd(J * weight)
    f = foresight(arm, q, qd, J, U, s, weight, 0.015)
    finite = np.where(np.isfinite(t), t, np.inf)
    assert f.first_limit_joint == int(finite.argmin())
    assert f.time_to_first_limit_s == pytest.approx(finite.min())
    q_beyond = q.copy()
    q_beyond[0] = arm.q_max[0] + 0.01
    assert limit_times_s(arm, q_beyond, qd)[0] == 0.0  # beyond the limit, moving outward
    rest = foresight(arm, q, np.zeros(6), J, U, s, weight, 0.015)
    assert rest.first_limit_joint is None and rest.time_to_first_limit_s is None
    assert rest.time_to_pinched_s is None
