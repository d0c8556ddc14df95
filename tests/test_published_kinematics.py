"""Published worked examples of manipulability and kinematic singularities, each with its source.

Arms here are built from DH tables through solver/dh.py (invented lengths), so the examples also
exercise the DH conversion end to end.
"""

from __future__ import annotations

import numpy as np
import pytest
from arm_factory import dh_arm
from scipy.spatial.transform import Rotation

from twistrate.solver.dh import DHRow
from twistrate.solver.jacobians import jacobian_derivative, manipulability_gradient, rpy_rate_matrix
from twistrate.solver.kinematics import forward, geometric_jacobian

#: A singular value below this counts as zero (the arms are ~1 m, J entries ~1).
RANK_TOL = 1e-10
#: A generic configuration must keep every singular value above this.
GENERIC_MIN = 1e-2


def jac(arm, q) -> np.ndarray:
    return geometric_jacobian(arm, forward(arm, np.asarray(q, dtype=float)))


def singular_values(J: np.ndarray) -> np.ndarray:
    return np.linalg.svd(J, compute_uv=False)


def rank(J: np.ndarray) -> int:
    return int(np.sum(singular_values(J) > RANK_TOL))


# ---------------------------------------------------------------------------------------------
# Planar two-link arm: Yoshikawa 1985, "Manipulability of robotic mechanisms", IJRR 4(2):
# w = sqrt(det(J J^T)) = l1 l2 |sin q2| for the 2x2 position Jacobian; singular at q2 = 0, pi;
# best posture q2 = +-90 deg whatever q1, l1, l2.
# ---------------------------------------------------------------------------------------------
L1, L2 = 0.45, 0.3


def planar_two_link(l1: float = L1, l2: float = L2):
    return dh_arm([DHRow(l1, 0.0, 0.0, 0.0), DHRow(l2, 0.0, 0.0, 0.0)], "standard", name="planar2")


def test_two_link_manipulability_is_l1_l2_abs_sin_q2() -> None:
    arm = planar_two_link()
    for q1 in np.linspace(-3.0, 3.0, 7):
        for q2 in np.linspace(-3.1, 3.1, 25):
            Jp = jac(arm, [q1, q2])[:2]  # (v_x, v_y) rows: the planar position Jacobian
            w = np.prod(singular_values(Jp))
            assert w == pytest.approx(L1 * L2 * abs(np.sin(q2)), abs=1e-14)
            assert w == pytest.approx(abs(np.linalg.det(Jp)), abs=1e-14)  # square J: w = |det J|


@pytest.mark.parametrize("q2", [0.0, np.pi, -np.pi])
def test_two_link_singular_when_stretched_or_folded(q2: float) -> None:
    for q1 in (0.0, 0.8, -2.0):
        Jp = jac(planar_two_link(), [q1, q2])[:2]
        assert rank(Jp) == 1
        assert np.prod(singular_values(Jp)) < RANK_TOL


def test_two_link_best_posture_is_q2_90_deg() -> None:
    """Yoshikawa 1985: w is maximal at q2 = +-90 deg (for any q1); with l1 + l2 fixed, maximal for
    l1 = l2 (from memory; follows from w = l1 l2 |sin q2|)."""
    arm = planar_two_link()
    q2 = np.linspace(-np.pi, np.pi, 721)
    w = [np.prod(singular_values(jac(arm, [0.3, a])[:2])) for a in q2]
    assert abs(abs(q2[int(np.argmax(w))]) - np.pi / 2) < 1e-9
    # The analytic gradient agrees: dw/dq2 = l1 l2 cos q2 sign(sin q2), zero at the best posture.
    for a in (0.4, np.pi / 2, 2.5, -1.0):
        J = jac(arm, [0.3, a])
        g = manipulability_gradient(J[:2], jacobian_derivative(J)[:, :2])
        np.testing.assert_allclose(g, [0.0, L1 * L2 * np.cos(a) * np.sign(np.sin(a))], atol=1e-13)
    totals = [np.prod(singular_values(jac(planar_two_link(a, 0.8 - a), [0.0, np.pi / 2])[:2]))
              for a in np.linspace(0.1, 0.7, 61)]
    assert np.argmax(totals) == 30  # l1 = l2 = 0.4


# ---------------------------------------------------------------------------------------------
# Planar three-link arm. Independent derivation (Cauchy-Binet): the 2x2 minors of the position
# Jacobian are cross products of the vectors from the joints to the tool, so
# det(J J^T) = (l1 l2 s2 + l1 l3 s23)^2 + (l1 l3 s23 + l2 l3 s3)^2 + (l2 l3 s3)^2.
# With the orientation row (x, y, phi) J is square and det J = l1 l2 s2 (column operations reduce
# it to the two-link determinant; cf. Siciliano, Sciavicco, Villani & Oriolo 2009, "Robotics:
# Modelling, Planning and Control", sec. 3.3, two-link a1 a2 s2 -- section from memory).
# ---------------------------------------------------------------------------------------------
LINKS3 = (0.4, 0.3, 0.15)


def planar_three_link():
    return dh_arm([DHRow(a, 0.0, 0.0, 0.0) for a in LINKS3], "standard", name="planar3")


def test_three_link_position_manipulability_closed_form() -> None:
    arm = planar_three_link()
    l1, l2, l3 = LINKS3
    rng = np.random.default_rng(17)
    for _ in range(100):
        q = rng.uniform(-np.pi, np.pi, 3)
        s2, s3, s23 = np.sin(q[1]), np.sin(q[2]), np.sin(q[1] + q[2])
        expected = np.sqrt((l1 * l2 * s2 + l1 * l3 * s23) ** 2 + (l1 * l3 * s23 + l2 * l3 * s3) ** 2
                           + (l2 * l3 * s3) ** 2)
        J = jac(arm, q)
        assert np.prod(singular_values(J[:2])) == pytest.approx(expected, abs=1e-14)
        assert rank(J[:2]) == 2
        Jxyphi = J[[0, 1, 5]]
        assert np.linalg.det(Jxyphi) == pytest.approx(l1 * l2 * s2, abs=1e-14)


def test_three_link_stretched_out_is_singular() -> None:
    """Stretched out (q2 = q3 = 0): every column of the position Jacobian is normal to the arm, so
    rank 1 and w = 0; the (x, y, phi) Jacobian has rank 2."""
    arm = planar_three_link()
    for q1 in (0.0, 1.2, -2.5):
        J = jac(arm, [q1, 0.0, 0.0])
        assert rank(J[:2]) == 1
        assert np.prod(singular_values(J[:2])) < RANK_TOL
        assert rank(J[[0, 1, 5]]) == 2
        radial = np.array([np.cos(q1), np.sin(q1)])
        np.testing.assert_allclose(radial @ J[:2], 0.0, atol=1e-15)


# ---------------------------------------------------------------------------------------------
# Six-joint anthropomorphic arm with a spherical wrist (invented lengths; DH standard).
# Siciliano et al. 2009, sec. 3.3 "Kinematic singularities" (decoupling into arm and wrist
# singularities; elbow, shoulder and wrist singularities of the anthropomorphic arm) and Spong,
# Hutchinson & Vidyasagar 2006, "Robot Modeling and Control", ch. 4 (singularities; section
# numbers from memory). Positions of the singularities for this table: independent derivation.
# In frame 1 the wrist centre is (a2 c2 + d4 s23, a2 s2 - d4 c23, 0), so
#   elbow: |p_w| = sqrt(a2^2 + d4^2 + 2 a2 d4 s3) extremal -> q3 = +-pi/2 (stretched / folded);
#   shoulder: wrist centre on axis 1 -> a2 c2 + d4 s23 = 0;
#   wrist: q5 = 0 puts axes 4 and 6 on one line (z5 = z3).
# ---------------------------------------------------------------------------------------------
D1, A2, D4, D6 = 0.30, 0.40, 0.35, 0.10
WRIST_ROWS = [
    DHRow(0.0, np.pi / 2, D1, 0.0), DHRow(A2, 0.0, 0.0, 0.0), DHRow(0.0, np.pi / 2, 0.0, 0.0),
    DHRow(0.0, -np.pi / 2, D4, 0.0), DHRow(0.0, np.pi / 2, 0.0, 0.0), DHRow(0.0, 0.0, D6, 0.0),
]
GENERIC = np.array([0.3, 0.5, 0.4, 0.6, 0.7, -0.5])


def wrist_arm():
    return dh_arm(WRIST_ROWS, "standard", name="wrist6")


def test_spherical_wrist_arm_generic_configuration_has_full_rank() -> None:
    s = singular_values(jac(wrist_arm(), GENERIC))
    assert s[-1] > GENERIC_MIN
    assert rank(jac(wrist_arm(), GENERIC)) == 6


def test_elbow_singularity_arm_stretched() -> None:
    arm = wrist_arm()
    for q3 in (np.pi / 2, -np.pi / 2):
        q = GENERIC.copy()
        q[2] = q3
        f = forward(arm, q)
        # p_base[4] is the origin of joint 5's frame: the wrist centre; p_base[1] is on axis 2.
        reach = np.linalg.norm(f.p_base[4] - f.p_base[1])
        assert reach == pytest.approx(A2 + D4 if q3 > 0 else abs(A2 - D4), abs=1e-12)
        assert rank(jac(arm, q)) == 5
        assert singular_values(jac(arm, q))[-1] < RANK_TOL


def test_shoulder_singularity_wrist_centre_on_axis_one() -> None:
    arm = wrist_arm()
    q = GENERIC.copy()
    q[2] = 0.25
    # a2 c2 + d4 sin(q2 + q3) = 0, solved for q2 by Newton from 1.6 rad (root near 2.0).
    q2 = 1.6
    for _ in range(50):
        q2 -= (A2 * np.cos(q2) + D4 * np.sin(q2 + q[2])) / (-A2 * np.sin(q2) + D4 * np.cos(q2 + q[2]))
    q[1] = q2
    f = forward(arm, q)
    np.testing.assert_allclose(np.cross(f.z_base[0], f.p_base[4] - f.p_base[0]), 0.0, atol=1e-12)
    assert rank(jac(arm, q)) == 5
    assert singular_values(jac(arm, q))[-1] < RANK_TOL


def test_wrist_singularity_q5_zero_aligns_axes_four_and_six() -> None:
    arm = wrist_arm()
    q = GENERIC.copy()
    q[4] = 0.0
    f = forward(arm, q)
    np.testing.assert_allclose(np.cross(f.z_base[3], f.z_base[5]), 0.0, atol=1e-15)
    J = jac(arm, q)
    assert rank(J) == 5
    # The lost direction: joints 4 and 6 turn the tool about the same line (columns equal).
    np.testing.assert_allclose(J[:, 3], J[:, 5], atol=1e-12)


def test_rank_recovers_next_to_each_singularity() -> None:
    """A small step off each singular configuration restores rank 6 (the singularity is isolated)."""
    arm = wrist_arm()
    for joint, value in ((2, np.pi / 2), (4, 0.0)):
        q = GENERIC.copy()
        q[joint] = value + 1e-3
        s = singular_values(jac(arm, q))
        assert RANK_TOL < s[-1] < 1e-2


# ---------------------------------------------------------------------------------------------
# Roll-pitch-yaw rates, R = Rz(yaw) Ry(pitch) Rx(roll): w = E(rpy) rpy_dot with
# E = [[cp cy, -sy, 0], [cp sy, cy, 0], [-sp, 0, 1]] and det E = cos(pitch): a representation
# singularity at pitch = +-90 deg. Independent derivation (w = yaw_dot z + pitch_dot Rz y +
# roll_dot Rz Ry x); checked here against scipy's rotations (Virtanen et al. 2020, "SciPy 1.0").
# Cf. Siciliano et al. 2009, sec. 3.6 "Analytical Jacobian" (ZYZ worked there; section from memory).
# ---------------------------------------------------------------------------------------------
def rotation(rpy: np.ndarray) -> np.ndarray:
    return Rotation.from_euler("ZYX", [rpy[2], rpy[1], rpy[0]]).as_matrix()


def test_rpy_rate_matrix_maps_rates_to_angular_velocity(rng: np.random.Generator) -> None:
    h = 1e-6
    for _ in range(100):
        rpy = rng.uniform([-np.pi, -1.5, -np.pi], [np.pi, 1.5, np.pi])
        rate = rng.normal(size=3)
        # skew(w) = R_dot R^T, here from the rotation vector of R(t + h) R(t - h)^T.
        w = Rotation.from_matrix(rotation(rpy + h * rate) @ rotation(rpy - h * rate).T).as_rotvec() / (2 * h)
        np.testing.assert_allclose(rpy_rate_matrix(rpy) @ rate, w, atol=1e-8)
        assert np.linalg.det(rpy_rate_matrix(rpy)) == pytest.approx(np.cos(rpy[1]), abs=1e-14)


@pytest.mark.parametrize("pitch", [np.pi / 2, -np.pi / 2])
def test_rpy_rate_matrix_is_singular_at_pitch_90_deg(pitch: float) -> None:
    E = rpy_rate_matrix(np.array([0.4, pitch, -1.1]))
    assert abs(np.linalg.det(E)) < 1e-15
    s = singular_values(E)
    assert s[1] > 0.5 and s[2] < 1e-15  # rank 2: roll and yaw rates act about the same axis
    np.testing.assert_allclose(np.cross(E[:, 0], E[:, 2]), 0.0, atol=1e-15)
