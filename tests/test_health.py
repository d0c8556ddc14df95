"""Health measures and the health state machine."""

from __future__ import annotations

import numpy as np
import pytest
from arm_factory import dh_arm, random_arm, random_q

from twistrate.solver.dh import DHRow
from twistrate.solver.health import (
    CLEAR,
    NARROW,
    PINCHED,
    assess,
    limit_margins,
    manipulability,
    next_state,
    weakest_direction,
)
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.options import HealthThresholds, SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve

TH = HealthThresholds(narrow_below=0.06, pinched_below=0.015, release_margin=0.2)


def test_manipulability_of_known_matrices(rng: np.random.Generator) -> None:
    # Yoshikawa 1985 (IJRR 4(2)): w = sqrt(det(J J^T)); computed independently with numpy.linalg.det.
    for shape in ((6, 7), (6, 6), (3, 5), (2, 2)):
        J = rng.normal(size=shape)
        assert manipulability(J) == pytest.approx(np.sqrt(np.linalg.det(J @ J.T)), rel=1e-9)
    assert manipulability(np.diag([2.0, 3.0, 0.5])) == pytest.approx(3.0)
    # square: |det J| (Yoshikawa 1985)
    J = rng.normal(size=(6, 6))
    assert manipulability(J) == pytest.approx(abs(np.linalg.det(J)), rel=1e-9)
    # rows outnumber joints: det(J J^T) = 0, the product of the n singular values is reported
    J = rng.normal(size=(6, 3))
    assert np.linalg.det(J @ J.T) == pytest.approx(0.0, abs=1e-12)
    assert manipulability(J) == pytest.approx(np.sqrt(np.linalg.det(J.T @ J)), rel=1e-9)


def test_two_link_planar_manipulability_closed_form() -> None:
    # Yoshikawa 1985 worked example: a two-link planar arm with links l1, l2 has w = l1 l2 |sin q2|
    # for its 2 x 2 planar translational Jacobian.
    l1, l2 = 0.4, 0.3
    arm = dh_arm([DHRow(l1, 0.0, 0.0, 0.0), DHRow(l2, 0.0, 0.0, 0.0)], "standard")
    for q2 in (0.0, 0.3, 1.2, np.pi / 2, 2.5):
        J = geometric_jacobian(arm, forward(arm, np.array([0.7, q2])))
        assert manipulability(J[:2]) == pytest.approx(l1 * l2 * abs(np.sin(q2)), abs=1e-12)


def test_weakest_direction_is_the_smallest_left_singular_vector(rng: np.random.Generator) -> None:
    # The weakest task direction is the left singular vector of the smallest singular value
    # (Yoshikawa 1985, manipulability ellipsoid's shortest axis), compared with numpy.linalg.svd.
    for _ in range(5):
        arm = random_arm(rng, n=7)
        q = random_q(rng, arm)
        J = geometric_jacobian(arm, forward(arm, q))
        L = 0.4
        h = assess(arm, q, J, options=SolverOptions(characteristic_length=L))
        U = np.linalg.svd(np.diag([1, 1, 1, L, L, L]) @ J)[0]
        u = U[:, 5] * np.sign(U[np.argmax(np.abs(U[:, 5])), 5])
        np.testing.assert_allclose(h.weakest_linear, u[:3], atol=1e-9)
        np.testing.assert_allclose(h.weakest_angular, u[3:] / L, atol=1e-9)


def test_weakest_direction_sign_normalisation_is_deterministic() -> None:
    U = np.linalg.qr(np.random.default_rng(3).normal(size=(6, 6)))[0]
    a_lin, a_ang = weakest_direction(U, 6, 0.5)
    b_lin, b_ang = weakest_direction(-U, 6, 0.5)
    np.testing.assert_array_equal(a_lin, b_lin)
    np.testing.assert_array_equal(a_ang, b_ang)
    v = np.concatenate((a_lin, a_ang * 0.5))
    assert v[np.argmax(np.abs(v))] > 0 and np.linalg.norm(v) == pytest.approx(1.0)


def test_margins_as_fraction_of_the_range() -> None:
    arm = load_arm("bench6")  # its flange roll is unlimited
    q = np.array(arm.q_home, dtype=float)
    q[0] = arm.q_min[0] + 0.25 * (arm.q_max[0] - arm.q_min[0])
    q[1] = 0.5 * (arm.q_min[1] + arm.q_max[1])
    q[2] = arm.q_max[2]
    q[3] = arm.q_min[3] - 0.1 * (arm.q_max[3] - arm.q_min[3])
    m = limit_margins(arm, q)
    assert m[0] == pytest.approx(0.25)
    assert m[1] == pytest.approx(0.5)
    assert m[2] == pytest.approx(0.0, abs=1e-15)
    assert m[3] == pytest.approx(-0.1)
    assert np.isinf(m[5]) and m[5] > 0


@pytest.mark.parametrize(
    ("sequence", "expected"),
    [
        # straight down and back up, one level per update, with hysteresis on the way back
        ([0.1, 0.05, 0.01, 0.016, 0.0181, 0.05, 0.0719, 0.0721],
         [CLEAR, NARROW, PINCHED, PINCHED, NARROW, NARROW, NARROW, CLEAR]),
        # a sudden drop escalates immediately; a sudden rise recovers one level at a time
        ([0.2, 0.005, 0.5, 0.5, 0.5], [CLEAR, PINCHED, NARROW, CLEAR, CLEAR]),
        # hovering at a threshold does not chatter
        ([0.061, 0.059, 0.061, 0.059, 0.061], [CLEAR, NARROW, NARROW, NARROW, NARROW]),
    ],
)
def test_state_machine_hysteresis(sequence: list[float], expected: list[str]) -> None:
    state = None
    seen = []
    for value in sequence:
        state = next_state(state, value, TH)
        seen.append(state)
    assert seen == expected


def test_health_from_resolution_and_from_jacobian_agree(rng: np.random.Generator) -> None:
    options = SolverOptions(characteristic_length=0.25)
    for _ in range(5):
        arm = random_arm(rng, n=7)
        q = random_q(rng, arm)
        r = resolve(arm, q, np.zeros(7), DesiredTwist(np.full(3, 0.01), np.zeros(3)), 0.002, options)
        a = assess(arm, q, r, options=options)
        b = assess(arm, q, r.J, options=options)
        np.testing.assert_allclose(a.singular_values, b.singular_values, rtol=1e-12)
        assert a.manipulability == pytest.approx(b.manipulability, rel=1e-12)
        np.testing.assert_allclose(a.weakest_linear, b.weakest_linear, atol=1e-9)
        np.testing.assert_allclose(a.weakest_angular, b.weakest_angular, atol=1e-9)
        assert (a.damping, a.scale) == (r.damping, r.scale) and (b.damping, b.scale) == (None, None)
        # whole manipulability is that of diag(1,1,1,L,L,L) J (Yoshikawa 1985; det via numpy)
        A = np.diag([1, 1, 1, 0.25, 0.25, 0.25]) @ r.J
        assert a.manipulability == pytest.approx(np.sqrt(np.linalg.det(A @ A.T)), rel=1e-8)
        assert a.manipulability_translational == pytest.approx(np.sqrt(np.linalg.det(r.J[:3] @ r.J[:3].T)))
        assert a.inverse_condition == pytest.approx(a.singular_values[-1] / a.singular_values[0])


def test_health_at_an_exact_singularity_holds() -> None:
    arm = load_arm("bench6")
    q = np.array(arm.q_home, dtype=float)
    q[4] = 0.0  # spherical wrist singularity (common practice)
    J = geometric_jacobian(arm, forward(arm, q))
    h = assess(arm, q, J, previous=CLEAR, thresholds=TH)
    assert h.sigma_min < 1e-12 and h.inverse_condition < 1e-10 and h.state == PINCHED
    assert h.manipulability < 1e-12
    assert np.all(np.isfinite(h.weakest_linear)) and np.all(np.isfinite(h.weakest_angular))
