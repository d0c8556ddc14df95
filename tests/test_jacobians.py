"""The Jacobian family against finite differences of the forward kinematics (an independent
derivation: central differences, error O(h^2)), with scipy's rotation code (Virtanen et al. 2020,
"SciPy 1.0", Nature Methods 17) for rotation vectors and Euler angles."""

from __future__ import annotations

import numpy as np
import pytest
from arm_factory import STYLES, dh_arm, random_arm, random_q
from scipy.spatial.transform import Rotation

from twistrate.solver.dh import DHRow
from twistrate.solver.errors import InputError
from twistrate.solver.jacobians import (
    RPY_SINGULARITY_TOLERANCE,
    analytical_jacobian_rpy,
    body_jacobian,
    jacobian_derivative,
    jacobian_dot,
    jacobian_dot_qdot,
    manipulability_gradient,
    manipulability_gradient_geometric,
    offset_point_jacobian,
    offset_point_jacobian_tool,
    rpy_from_rotation,
    rpy_rate_matrix,
    spatial_jacobian,
)
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm

#: Central-difference step (rad or m) and the agreement expected from it (truncation ~ h^2,
#: rounding ~ 1e-16 / h); a second difference uses the larger step.
H = 1e-6
FD_TOL = 1e-7
H2 = 1e-4
FD2_TOL = 1e-5
N_ARMS = 30


def arms_and_configs(n_arms: int = N_ARMS, seed: int = 5):
    """(arm, q, qd) cases: styles cycle, 2..9 joints, prismatic joints mixed in."""
    rng = np.random.default_rng(seed)
    for k in range(n_arms):
        arm = random_arm(rng, n=2 + k % 8, style=STYLES[k % 3])
        yield arm, random_q(rng, arm), rng.normal(size=arm.n)


def jac(arm, q: np.ndarray) -> np.ndarray:
    return geometric_jacobian(arm, forward(arm, q))


def pose(arm, q: np.ndarray) -> np.ndarray:
    return forward(arm, q).T_base_tool


def fd_twist(arm, q: np.ndarray, dq: np.ndarray) -> np.ndarray:
    """(6,) finite-difference twist of the tool along dq: linear from the tool point, angular from
    the rotation vector of R(q + h dq) R(q - h dq)^T / 2h."""
    Tp, Tm = pose(arm, q + H * dq), pose(arm, q - H * dq)
    v = (Tp[:3, 3] - Tm[:3, 3]) / (2 * H)
    w = Rotation.from_matrix(Tp[:3, :3] @ Tm[:3, :3].T).as_rotvec() / (2 * H)
    return np.concatenate([v, w])


def manipulability(J: np.ndarray, row_weights: np.ndarray | None = None) -> float:
    """Yoshikawa 1985: product of the singular values of the (row-weighted) Jacobian."""
    JW = J if row_weights is None else J * row_weights[:, None]
    return float(np.prod(np.linalg.svd(JW, compute_uv=False)))


def test_geometric_jacobian_matches_finite_differences() -> None:
    for arm, q, _ in arms_and_configs():
        J = jac(arm, q)
        for i in range(arm.n):
            np.testing.assert_allclose(J[:, i], fd_twist(arm, q, np.eye(arm.n)[i]), atol=FD_TOL)


def test_body_and_spatial_jacobians_match_their_definitions() -> None:
    """Body twist: tool-point velocity and angular velocity in tool axes; spatial twist: velocity of
    the body point at the base origin, v_s = v - w x p_e (Murray, Li & Sastry 1994, ch. 2)."""
    for arm, q, qd in arms_and_configs(10):
        T = pose(arm, q)
        J = jac(arm, q)
        t = fd_twist(arm, q, qd)
        R, p = T[:3, :3], T[:3, 3]
        np.testing.assert_allclose(body_jacobian(J, T) @ qd, np.concatenate([R.T @ t[:3], R.T @ t[3:]]),
                                   atol=FD_TOL * 10)
        np.testing.assert_allclose(spatial_jacobian(J, T) @ qd,
                                   np.concatenate([t[:3] - np.cross(t[3:], p), t[3:]]), atol=FD_TOL * 10)


def test_derivative_tensor_matches_finite_differences_of_J() -> None:
    for arm, q, _ in arms_and_configs():
        dJ = jacobian_derivative(jac(arm, q))
        assert dJ.shape == (arm.n, 6, arm.n)
        for j in range(arm.n):
            e = np.eye(arm.n)[j]
            fd = (jac(arm, q + H * e) - jac(arm, q - H * e)) / (2 * H)
            np.testing.assert_allclose(dJ[j], fd, atol=FD_TOL)


def test_jacobian_dot_matches_finite_differences_along_qd() -> None:
    for arm, q, qd in arms_and_configs():
        J = jac(arm, q)
        fd = (jac(arm, q + H * qd) - jac(arm, q - H * qd)) / (2 * H)
        np.testing.assert_allclose(jacobian_dot(J, qd), fd, atol=FD_TOL * 10)
        dJ = jacobian_derivative(J)
        np.testing.assert_array_equal(jacobian_dot(J, qd, dJ), jacobian_dot(J, qd))


def test_jacobian_dot_qdot_is_the_tool_acceleration_at_zero_qdd() -> None:
    """Along q(t) = q + t qd (qdd = 0) the tool-point acceleration is J_dot qd (linear rows; second
    difference of the position) and the angular acceleration is d/dt (J_w qd) (first difference of
    the finite-difference angular velocity)."""
    for arm, q, qd in arms_and_configs():
        J = jac(arm, q)
        a = jacobian_dot_qdot(J, qd)
        p = [pose(arm, q + s * H2 * qd)[:3, 3] for s in (-1, 0, 1)]
        np.testing.assert_allclose(a[:3], (p[2] - 2 * p[1] + p[0]) / H2**2, atol=FD2_TOL * 10)
        w_plus = fd_twist(arm, q + H2 * qd, qd)[3:]
        w_minus = fd_twist(arm, q - H2 * qd, qd)[3:]
        np.testing.assert_allclose(a[3:], (w_plus - w_minus) / (2 * H2), atol=FD2_TOL * 10)


def test_prismatic_columns_of_the_derivative() -> None:
    """Own derivation for prismatic joints (jacobians.jacobian_derivative docstring): a prismatic
    column is (z, 0) and z rotates only with proximal revolute joints; every prismatic derivative
    (w = 0) is zero in its own row block; checked against finite differences on an all-prismatic
    arm (J constant) and one prismatic joint between revolute ones."""
    rng = np.random.default_rng(11)
    arm = random_arm(rng, n=3, style="origin_axis")
    while arm.all_revolute or not any(arm.revolute):
        arm = random_arm(rng, n=3, style="origin_axis")
    rows = [DHRow(0.1, 0.4, 0.2, 0.0, True), DHRow(0.3, -0.7, 0.1, 0.2, True),
            DHRow(0.2, 1.1, 0.0, 0.5, True)]
    rail = dh_arm(rows, "standard")
    for a in (arm, rail):
        q = random_q(rng, a)
        dJ = jacobian_derivative(jac(a, q))
        for j in range(a.n):
            e = np.eye(a.n)[j]
            np.testing.assert_allclose(dJ[j], (jac(a, q + H * e) - jac(a, q - H * e)) / (2 * H), atol=FD_TOL)
    np.testing.assert_allclose(jacobian_derivative(jac(rail, random_q(rng, rail))), 0.0, atol=1e-15)


@pytest.mark.parametrize("weighted", [False, True])
def test_manipulability_gradient_matches_finite_differences(weighted: bool) -> None:
    """dw/dq by finite differences of w(q) = prod(svd(W J)) for n < 6, n = 6, n > 6."""
    for arm, q, _ in arms_and_configs():
        W = np.array([1, 1, 1, 0.4, 0.4, 0.4]) if weighted else None

        def w(qq, W=W, arm=arm):
            return manipulability(jac(arm, qq), W)

        g = manipulability_gradient(jac(arm, q), row_weights=W)
        fd = np.array([(w(q + H * e) - w(q - H * e)) / (2 * H) for e in np.eye(arm.n)])
        np.testing.assert_allclose(g, fd, atol=FD_TOL, rtol=1e-6)


def test_manipulability_gradient_accepts_the_callers_svd() -> None:
    """The per-tick caller passes its own SVD of W J (full or thin); the result is the same."""
    W = np.array([1, 1, 1, 0.3, 0.3, 0.3])
    for arm, q, _ in arms_and_configs(16):
        J = jac(arm, q)
        dJ = jacobian_derivative(J)
        ref = manipulability_gradient(J, row_weights=W)
        for full in (True, False):
            U, s, Vt = np.linalg.svd(J * W[:, None], full_matrices=full)
            np.testing.assert_allclose(manipulability_gradient(J, dJ, W, (U, s, Vt)), ref, atol=1e-13)


def test_manipulability_gradient_of_a_row_subset() -> None:
    """Rows chosen by the caller (translation only): pass those rows of J and of dJ."""
    for arm, q, _ in arms_and_configs(10):
        g = manipulability_gradient(jac(arm, q)[:3], jacobian_derivative(jac(arm, q))[:, :3])
        fd = np.array([(manipulability(jac(arm, q + H * e)[:3]) - manipulability(jac(arm, q - H * e)[:3]))
                       / (2 * H) for e in np.eye(arm.n)])
        np.testing.assert_allclose(g, fd, atol=FD_TOL)


def planar_two_link(l1: float = 0.5, l2: float = 0.3):
    return dh_arm([DHRow(l1, 0.0, 0.0, 0.0), DHRow(l2, 0.0, 0.0, 0.0)], "standard", name="planar2")


def test_manipulability_gradient_near_a_singular_configuration() -> None:
    """Planar two-link arm, 2-row position Jacobian: w = l1 l2 |sin q2| (Yoshikawa 1985), so near
    q2 = 0 the gradient is (0, l1 l2 cos q2 sign q2): finite, no blow-up as s_min -> 0."""
    arm, l1, l2 = planar_two_link(), 0.5, 0.3
    for q2 in (1e-3, -1e-5, 1e-9, np.pi - 1e-6):
        q = np.array([0.7, q2])
        J = jac(arm, q)
        g = manipulability_gradient(J[:2], jacobian_derivative(J)[:, :2])
        np.testing.assert_allclose(g, [0.0, l1 * l2 * np.cos(q2) * np.sign(np.sin(q2))], atol=1e-12)
        if abs(q2) > 1e-6:  # finite differences need the step inside the smooth region
            h = min(H, abs(np.sin(q2)) / 10)
            fd = [(manipulability(jac(arm, q + h * e)[:2]) - manipulability(jac(arm, q - h * e)[:2]))
                  / (2 * h) for e in np.eye(2)]
            np.testing.assert_allclose(g, fd, atol=1e-7)


def test_manipulability_gradient_at_an_exact_singularity() -> None:
    """Own branch (jacobians.manipulability_gradient docstring): at q2 = 0, w = l1 l2 |sin q2| has a
    kink; the value is the one-sided slope l1 l2 of either side (sign from the SVD), finite, and a
    small step along it raises w. With two zero singular values the gradient is 0."""
    arm, l1, l2 = planar_two_link(), 0.5, 0.3
    q = np.array([0.4, 0.0])
    J = jac(arm, q)
    g = manipulability_gradient(J[:2], jacobian_derivative(J)[:, :2])
    assert np.all(np.isfinite(g))
    np.testing.assert_allclose(np.abs(g), [0.0, l1 * l2], atol=1e-12)
    assert manipulability(jac(arm, q + 1e-3 * g)[:2]) > manipulability(J[:2]) + 1e-6
    # Six-joint arm stretched (q3 = pi/2) straight up (q2 = pi/2, so the wrist centre is on axis 1):
    # elbow and shoulder singular at once, rank 4, w of second order, gradient 0.
    arm6 = dh_arm(SPHERICAL_WRIST_ROWS, "standard", name="wrist6")
    q6 = np.array([0.3, np.pi / 2, np.pi / 2, 0.4, 0.7, -0.5])
    J6 = jac(arm6, q6)
    assert np.linalg.svd(J6, compute_uv=False)[-2] < 1e-12
    np.testing.assert_allclose(manipulability_gradient(J6), 0.0, atol=1e-12)


#: Task-row weights, one per row block (common practice: angular rows times a characteristic
#: length, here 0.3 m), the same with the angular block switched off, and weights that differ within
#: a block (the public function then takes the tensor form; see its docstring).
BLOCK_WEIGHTS = np.array([1.0, 1.0, 1.0, 0.3, 0.3, 0.3])
LINEAR_ONLY = np.array([1.0, 1.0, 1.0, 0.0, 0.0, 0.0])
ROW_WEIGHTS = np.array([1.0, 0.5, 2.0, 0.3, 0.7, 1.1])


def weighted_manipulability(arm, q: np.ndarray, S: np.ndarray, d: np.ndarray) -> float:
    """Yoshikawa 1985: product of the singular values of S J(q) D, S (6,) and D (n,) diagonals."""
    return float(np.prod(np.linalg.svd(jac(arm, q) * S[:, None] * d, compute_uv=False)))


def gradient_scale(J: np.ndarray, svd, weight: np.ndarray) -> float:
    """Magnitude of the gradient's terms: max cofactor c_r = prod_{j != r} s_j times |J| |S J D|."""
    s = svd[1]
    c = max(float(np.prod(np.delete(s, r))) for r in range(s.size))
    return c * float(np.abs(J).max() * np.abs(J * weight).max()) + 1e-300


@pytest.mark.parametrize("s", [
    [2.0, 1.5, 0.7, 0.3, 0.1, 0.05],  # w normal: the division branch
    [1e-100, 1e-100, 1e-100, 1e-100, 2.0, 1.0],  # w underflows to 0 while the cofactors are normal
    [3.0, 2.0, 1.0, 0.5, 1e-200, 1e-200],  # w underflows, two tiny values
    [3.0, 2.0, 0.0],  # exactly singular: one zero
    [3.0, 0.0, 0.0],  # two zeros: every cofactor 0
    [1e200, 1e200, 1e-10],  # w overflows
])
def test_cofactors_of_the_singular_values_in_both_branches(s: list[float]) -> None:
    """c_r = prod_{j != r} s_j (the factor of ds_r in dw, Park, Chung & Youm 1999), against the
    explicit product; each branch of jacobians._cofactors (division while w is a finite normal
    float, multiplied out otherwise) included."""
    from twistrate.solver.jacobians import _cofactors

    sv = np.array(s)
    with np.errstate(over="ignore"):  # the last case's cofactor 1e400 is inf either way
        expected = [float(np.prod(np.delete(sv, r))) for r in range(sv.size)]
        np.testing.assert_allclose(_cofactors(sv), expected, rtol=1e-14, atol=0.0)


def test_geometric_gradient_matches_the_tensor_form_with_joint_weights() -> None:
    """The O(n) chain form (independent derivation in jacobians.manipulability_gradient_geometric)
    against the tensor form sum_r c_r u_r^T S (dJ/dq_i) D v_r (Park, Chung & Youm 1999; Yoshikawa
    1985) with dJ/dq checked above, for A = S J D, full and thin SVD, revolute and prismatic joints."""
    rng = np.random.default_rng(21)
    for arm, q, _ in arms_and_configs(48, seed=9):
        J = jac(arm, q)
        d = rng.uniform(0.3, 3.0, size=arm.n)
        dJ = jacobian_derivative(J) * d  # d(S J D)/dq_i = S (dJ/dq_i) D
        for S in (np.ones(6), BLOCK_WEIGHTS, LINEAR_ONLY):
            weight = S[:, None] * d
            for full in (True, False):
                svd = np.linalg.svd(J * weight, full_matrices=full)
                ref = manipulability_gradient(J, dJ, S, svd)
                got = manipulability_gradient_geometric(J, svd, weight)
                np.testing.assert_allclose(got, ref, rtol=0, atol=1e-13 * gradient_scale(J, svd, weight))


def test_geometric_gradient_matches_finite_differences_with_joint_weights() -> None:
    """dw/dq of w(q) = prod svd(S J(q) D) by central differences (an independent check of the
    O(n) form), n < 6, n = 6 and n > 6, with prismatic joints mixed in."""
    rng = np.random.default_rng(22)
    for arm, q, _ in arms_and_configs(24, seed=10):
        d = rng.uniform(0.3, 3.0, size=arm.n)
        J = jac(arm, q)
        weight = BLOCK_WEIGHTS[:, None] * d
        g = manipulability_gradient_geometric(J, np.linalg.svd(J * weight), weight)
        fd = np.array([(weighted_manipulability(arm, q + H * e, BLOCK_WEIGHTS, d)
                        - weighted_manipulability(arm, q - H * e, BLOCK_WEIGHTS, d)) / (2 * H)
                       for e in np.eye(arm.n)])
        np.testing.assert_allclose(g, fd, atol=FD_TOL, rtol=1e-6)


def test_gradient_with_weights_differing_within_a_block_matches_finite_differences() -> None:
    """Row weights that differ inside the linear or angular block (the public function takes the
    tensor form there): still the finite-difference gradient of prod svd(W J)."""
    for arm, q, _ in arms_and_configs(16, seed=11):
        g = manipulability_gradient(jac(arm, q), row_weights=ROW_WEIGHTS)
        ones = np.ones(arm.n)
        fd = np.array([(weighted_manipulability(arm, q + H * e, ROW_WEIGHTS, ones)
                        - weighted_manipulability(arm, q - H * e, ROW_WEIGHTS, ones)) / (2 * H)
                       for e in np.eye(arm.n)])
        np.testing.assert_allclose(g, fd, atol=FD_TOL, rtol=1e-6)


def test_geometric_gradient_of_the_planar_two_link_arm() -> None:
    """Full 6-row Jacobian with the angular rows weighted 0: w = l1 l2 |sin q2| (Yoshikawa 1985), so
    dw/dq = (0, l1 l2 cos q2 sign(sin q2)) near the stretched singularity, and at q2 = 0 exactly
    the one-sided slope of magnitude l1 l2 (sign from the SVD), finite."""
    arm, l1, l2 = planar_two_link(), 0.5, 0.3
    weight = LINEAR_ONLY[:, None] * np.ones(2)
    for q2 in (0.8, 1e-3, -1e-5, 1e-9, np.pi - 1e-6):
        J = jac(arm, np.array([0.7, q2]))
        g = manipulability_gradient_geometric(J, np.linalg.svd(J * weight), weight)
        np.testing.assert_allclose(g, [0.0, l1 * l2 * np.cos(q2) * np.sign(np.sin(q2))], atol=1e-12)
    J = jac(arm, np.array([0.4, 0.0]))
    g = manipulability_gradient_geometric(J, np.linalg.svd(J * weight), weight)
    np.testing.assert_allclose(np.abs(g), [0.0, l1 * l2], atol=1e-12)


def test_geometric_gradient_at_exact_singularities_of_a_six_joint_arm() -> None:
    """Own branch (jacobians.manipulability_gradient docstring). bench6 with the wrist bend at 0
    (spherical wrist singularity, common practice): one zero singular value, w = 0 has a kink, and
    the value is a slope along which w grows both ways, to first order by h |g|^2 (w = |f| for a
    smooth f there). The spherical-wrist arm stretched and straight up has two zero singular values:
    w is of second order and the gradient is 0. Joint weights set in both."""
    d6 = np.array([1.0, 0.5, 2.0, 1.5, 0.8, 1.2])
    weight = BLOCK_WEIGHTS[:, None] * d6
    arm = load_arm("bench6")
    q = np.array(arm.q_home, dtype=float)
    q[4] = 0.0
    J = jac(arm, q)
    svd = np.linalg.svd(J * weight)
    assert svd[1][-1] < 1e-12 * svd[1][0]
    g = manipulability_gradient_geometric(J, svd, weight)
    assert np.all(np.isfinite(g)) and g @ g > 1e-6
    np.testing.assert_allclose(g, manipulability_gradient(J, jacobian_derivative(J) * d6, BLOCK_WEIGHTS, svd),
                               atol=1e-13 * gradient_scale(J, svd, weight))
    h = 1e-7 / np.sqrt(g @ g)
    for sign in (1.0, -1.0):
        rise = weighted_manipulability(arm, q + sign * h * g, BLOCK_WEIGHTS, d6) - weighted_manipulability(
            arm, q, BLOCK_WEIGHTS, d6)
        np.testing.assert_allclose(rise / h, g @ g, rtol=1e-4)
    arm6 = dh_arm(SPHERICAL_WRIST_ROWS, "standard", name="wrist6")
    J6 = jac(arm6, np.array([0.3, np.pi / 2, np.pi / 2, 0.4, 0.7, -0.5]))
    svd6 = np.linalg.svd(J6 * weight)
    assert svd6[1][-2] < 1e-12
    np.testing.assert_allclose(manipulability_gradient_geometric(J6, svd6, weight), 0.0, atol=1e-12)


#: Anthropomorphic arm with a spherical wrist (invented lengths, DH standard), as in
#: tests/test_published_kinematics.py: elbow stretched at q3 = pi/2, wrist singular at q5 = 0.
SPHERICAL_WRIST_ROWS = [
    DHRow(0.0, np.pi / 2, 0.30, 0.0), DHRow(0.40, 0.0, 0.0, 0.0), DHRow(0.0, np.pi / 2, 0.0, 0.0),
    DHRow(0.0, -np.pi / 2, 0.35, 0.0), DHRow(0.0, np.pi / 2, 0.0, 0.0), DHRow(0.0, 0.0, 0.10, 0.0),
]


def test_rpy_extraction_matches_scipy(rng: np.random.Generator) -> None:
    """R = Rz(yaw) Ry(pitch) Rx(roll) is scipy's intrinsic "ZYX" with angles (yaw, pitch, roll)."""
    for _ in range(200):
        roll, yaw = rng.uniform(-np.pi, np.pi, 2)
        pitch = rng.uniform(-np.pi / 2 + 1e-3, np.pi / 2 - 1e-3)
        R = Rotation.from_euler("ZYX", [yaw, pitch, roll]).as_matrix()
        np.testing.assert_allclose(rpy_from_rotation(R), [roll, pitch, yaw], atol=1e-9)


def test_rpy_gimbal_lock_branch_reconstructs_the_rotation() -> None:
    """Own branch at |cos(pitch)| < tolerance: yaw = 0 and roll carries the locked rotation."""
    for pitch in (np.pi / 2, -np.pi / 2):
        for roll, yaw in ((0.3, 0.9), (-2.0, 1.1), (0.0, 0.0)):
            R = Rotation.from_euler("ZYX", [yaw, pitch, roll]).as_matrix()
            rpy = rpy_from_rotation(R)
            assert rpy[2] == 0.0
            back = Rotation.from_euler("ZYX", [rpy[2], rpy[1], rpy[0]]).as_matrix()
            np.testing.assert_allclose(back, R, atol=1e-12)


def test_analytical_jacobian_matches_finite_differences_of_rpy() -> None:
    for arm, q, _ in arms_and_configs():
        T = pose(arm, q)
        rpy = rpy_from_rotation(T[:3, :3])
        if np.cos(rpy[1]) < 0.05:  # keep away from the representation singularity for differences
            continue
        JA, rpy_out = analytical_jacobian_rpy(jac(arm, q), T)
        np.testing.assert_array_equal(rpy_out, rpy)
        for i in range(arm.n):
            e = np.eye(arm.n)[i]
            d = rpy_from_rotation(pose(arm, q + H * e)[:3, :3]) - rpy_from_rotation(
                pose(arm, q - H * e)[:3, :3])
            d = (d + np.pi) % (2 * np.pi) - np.pi  # unwrap across +-pi
            np.testing.assert_allclose(JA[3:, i], d / (2 * H), atol=FD_TOL * 10)
            np.testing.assert_allclose(JA[:3, i], jac(arm, q)[:3, i])


def test_analytical_jacobian_rate_matrix_inverse() -> None:
    """E^-1 in analytical_jacobian_rpy is the inverse of E (rpy_rate_matrix)."""
    J = np.vstack([np.zeros((3, 3)), np.eye(3)])
    for pitch in (-1.5, -0.4, 0.0, 0.9, 1.55):
        R = Rotation.from_euler("ZYX", [0.7, pitch, -0.2]).as_matrix()
        T = np.eye(4)
        T[:3, :3] = R
        JA, rpy = analytical_jacobian_rpy(J, T)
        np.testing.assert_allclose(rpy_rate_matrix(rpy) @ JA[3:], np.eye(3), atol=1e-12)


def test_analytical_jacobian_raises_at_the_representation_singularity() -> None:
    J = np.vstack([np.eye(3), np.eye(3)])
    for pitch in (np.pi / 2, -np.pi / 2, np.pi / 2 - 0.5 * RPY_SINGULARITY_TOLERANCE):
        T = np.eye(4)
        T[:3, :3] = Rotation.from_euler("ZYX", [0.2, pitch, 0.1]).as_matrix()
        with pytest.raises(InputError, match=r"^pitch: got .*deg.*accepted: \|cos\(pitch\)\|"):
            analytical_jacobian_rpy(J, T)
    # Just outside the tolerance it still answers, with E^-1 entries of order 1 / cos(pitch).
    T = np.eye(4)
    T[:3, :3] = Rotation.from_euler("ZYX", [0.2, np.pi / 2 - 10 * RPY_SINGULARITY_TOLERANCE, 0.1]).as_matrix()
    JA, _ = analytical_jacobian_rpy(J, T)
    assert np.all(np.isfinite(JA)) and np.abs(JA).max() > 1e4


def test_offset_point_jacobians_match_finite_differences() -> None:
    """A point fixed to the tool at r_tool: its velocity by finite differences of p_e + R r_tool."""
    rng = np.random.default_rng(3)
    for arm, q, _ in arms_and_configs(20):
        r_tool = rng.normal(scale=0.2, size=3)
        T = pose(arm, q)
        J = jac(arm, q)
        Jt = offset_point_jacobian_tool(J, T, r_tool)
        np.testing.assert_allclose(offset_point_jacobian(J, T[:3, :3] @ r_tool), Jt, atol=1e-15)
        np.testing.assert_array_equal(Jt[3:], J[3:])
        for i in range(arm.n):
            e = np.eye(arm.n)[i]
            Tp, Tm = pose(arm, q + H * e), pose(arm, q - H * e)
            fd = (Tp[:3, 3] + Tp[:3, :3] @ r_tool - Tm[:3, 3] - Tm[:3, :3] @ r_tool) / (2 * H)
            np.testing.assert_allclose(Jt[:3, i], fd, atol=FD_TOL)
