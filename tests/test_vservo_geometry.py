"""Visual servoing geometry against outside references: projection, the point interaction matrix,
the twist transforms (camera to tool, reference point, eye-to-hand) and the position-based error.

Oracles: finite differences of the projection of a moving point, and pinocchio's SE3 / Motion
(`pin.SE3(R, p).action` is the 6x6 twist transform, rows and columns linear first, checked below
against the rigid-body velocity formula; `pin.exp6` integrates a twist of the moving frame).
"""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pinocchio as pin
import pytest

from twistrate.clients.vservo import laws, rigid, transforms
from twistrate.clients.vservo.camera import Intrinsics, camera_points, project, visible
from twistrate.clients.vservo.interaction import DepthChoice, estimate, point_matrix
from twistrate.solver.errors import ConfigError

#: Central differences of a smooth map with step h have error O(h^2); with h = 1e-6 and values of
#: order 1 the truncation is ~1e-12 and rounding ~1e-10, so 1e-7 leaves a wide margin (common practice).
FD_STEP = 1e-6
FD_TOL = 1e-7
#: Agreement of two closed-form computations in float64 (common practice).
EXACT_TOL = 1e-12
INTRINSICS = Intrinsics(fx=600.0, fy=580.0, cx=320.0, cy=240.0, width=640, height=480)


def _random_pose(rng: np.random.Generator) -> pin.SE3:
    return pin.SE3(pin.exp3(rng.normal(size=3)), rng.normal(size=3))


def _points_in_front(rng: np.random.Generator, T_base_cam: np.ndarray, n: int) -> np.ndarray:
    P_cam = np.column_stack([rng.uniform(-0.2, 0.2, n), rng.uniform(-0.2, 0.2, n), rng.uniform(0.3, 1.0, n)])
    return P_cam @ T_base_cam[:3, :3].T + T_base_cam[:3, 3]


def test_pixels_and_normalised_coordinates_round_trip() -> None:
    # u = c_u + f_x x, v = c_v + f_y y (Chaumette & Hutchinson 2006, IBVS section, x = (u - c_u) / f).
    pixels = np.array([[320.0, 240.0], [620.0, 10.0], [0.0, 479.0]])
    xy = INTRINSICS.normalised(pixels)
    np.testing.assert_allclose(xy[1], [(620 - 320) / 600.0, (10 - 240) / 580.0], atol=EXACT_TOL)
    np.testing.assert_allclose(INTRINSICS.pixels(xy), pixels, atol=1e-9)


def test_projection_against_pinocchio_inverse_action() -> None:
    # Oracle: pinocchio's SE3.actInv maps base points to the camera frame; x = X / Z, y = Y / Z.
    rng = np.random.default_rng(1)
    M = _random_pose(rng)
    P = _points_in_front(rng, M.homogeneous, 20)
    xy, Z = project(M.homogeneous, P)
    P_cam = np.array([M.actInv(p) for p in P])
    np.testing.assert_allclose(camera_points(M.homogeneous, P), P_cam, atol=EXACT_TOL)
    np.testing.assert_allclose(Z, P_cam[:, 2], atol=EXACT_TOL)
    np.testing.assert_allclose(xy, P_cam[:, :2] / P_cam[:, 2:], atol=EXACT_TOL)


def test_points_behind_the_camera_are_not_visible_and_give_no_warning() -> None:
    T = np.eye(4)
    P = np.array([[0.0, 0.0, -1.0], [0.0, 0.0, 0.0], [0.0, 0.0, 1.0], [5.0, 0.0, 1.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        xy, Z = project(T, P)
        seen = visible(INTRINSICS, xy, Z)
    assert seen.tolist() == [False, False, True, False]  # the last one projects to u = 3320 px


def test_intrinsics_refuse_bad_values_naming_the_field() -> None:
    with pytest.raises(ConfigError, match=r"intrinsics\.fx"):
        Intrinsics(fx=0.0, fy=1.0, cx=0.0, cy=0.0, width=10, height=10)
    with pytest.raises(ConfigError, match=r"intrinsics\.width"):
        Intrinsics(fx=1.0, fy=1.0, cx=0.0, cy=0.0, width=0, height=10)


def test_rigid_helpers_against_pinocchio() -> None:
    # Oracle: pin.exp3 / log3 / exp6 (pinocchio's Lie group maps, Motion linear first).
    rng = np.random.default_rng(2)
    for _ in range(20):
        w = rng.normal(size=3)
        np.testing.assert_allclose(rigid.exp_so3(w), pin.exp3(w), atol=EXACT_TOL)
        R = pin.exp3(w)
        np.testing.assert_allclose(rigid.log_so3(R), pin.log3(R), atol=1e-9)
        V = rng.normal(size=6)
        np.testing.assert_allclose(rigid.exp_se3(V), pin.exp6(pin.Motion(V)).homogeneous, atol=1e-11)
    # The small-angle and near-pi branches (their own cases): tiny rotations and a half turn.
    special = (np.array([1e-9, -2e-9, 0.0]), np.array([0.0, np.pi - 1e-8, 0.0]),
               np.array([0.6, 0.0, 0.8]) * np.pi)
    for w in special:
        R = rigid.exp_so3(w)
        np.testing.assert_allclose(rigid.exp_so3(rigid.log_so3(R)), R, atol=1e-7)
        np.testing.assert_allclose(R, pin.exp3(w), atol=EXACT_TOL)


def _moved_projection(T_base_cam: np.ndarray, P_base: np.ndarray, V: np.ndarray, h: float) -> np.ndarray:
    # The camera moves with twist V (its own frame) for time h: T(h) = T exp6(V h) (pinocchio).
    T = T_base_cam @ pin.exp6(pin.Motion(V * h)).homogeneous
    return project(T, P_base)[0].ravel()


def test_interaction_matrix_against_finite_differences_of_a_moving_point() -> None:
    # Chaumette & Hutchinson 2006, eq. (11): s_dot = L_x v_c for a point fixed in the world and the
    # camera twist v_c = (v, w) in the camera frame. Oracle: central differences of the projection.
    rng = np.random.default_rng(3)
    for _ in range(10):
        T = _random_pose(rng).homogeneous
        P = _points_in_front(rng, T, 5)
        xy, Z = project(T, P)
        L = point_matrix(xy, Z)
        assert L.shape == (10, 6)
        for V in np.eye(6):  # every column separately: a wrong sign in one column cannot hide
            fd = (_moved_projection(T, P, V, FD_STEP) - _moved_projection(T, P, V, -FD_STEP)) / (2 * FD_STEP)
            np.testing.assert_allclose(L @ V, fd, atol=FD_TOL)


def test_depth_choices_use_the_matching_view() -> None:
    # Chaumette & Hutchinson 2006, "Approximating the interaction matrix": L_e (current), L_e* (desired),
    # and (L_e + L_e*) / 2. Each is checked against finite differences at its own view.
    rng = np.random.default_rng(4)
    T_now, T_star = _random_pose(rng).homogeneous, None
    T_star = T_now @ pin.exp6(pin.Motion(rng.normal(size=6) * 0.05)).homogeneous
    P = _points_in_front(rng, T_now, 4)
    xy, Z = project(T_now, P)
    xy_s, Z_s = project(T_star, P)

    def fd(T: np.ndarray) -> np.ndarray:
        return np.column_stack([(_moved_projection(T, P, V, FD_STEP) - _moved_projection(T, P, V, -FD_STEP))
                                / (2 * FD_STEP) for V in np.eye(6)])

    np.testing.assert_allclose(estimate(DepthChoice.CURRENT, xy, Z, xy_s, Z_s), fd(T_now), atol=FD_TOL)
    np.testing.assert_allclose(estimate(DepthChoice.DESIRED, xy, Z, xy_s, Z_s), fd(T_star), atol=FD_TOL)
    np.testing.assert_allclose(estimate(DepthChoice.MEAN, xy, Z, xy_s, Z_s), 0.5 * (fd(T_now) + fd(T_star)),
                               atol=FD_TOL)
    # Without current depths the desired depths stand in (the paper's Z ~ Z* approximation).
    np.testing.assert_allclose(estimate(DepthChoice.CURRENT, xy, None, xy_s, Z_s), point_matrix(xy, Z_s),
                               atol=EXACT_TOL)


def test_adjoint_is_pinocchio_action_and_the_rigid_velocity_formula() -> None:
    # Oracle 1: pin.SE3(R, p).action, linear first ([[R, [p]x R], [0, R]]).
    # Oracle 2: the rigid-body velocity v_a = R v_b + (R w_b) x (a - b)... written out by hand below.
    rng = np.random.default_rng(5)
    for _ in range(10):
        M = _random_pose(rng)
        np.testing.assert_allclose(transforms.adjoint(M.homogeneous), M.action, atol=EXACT_TOL)
        V = rng.normal(size=6)
        R, p = M.rotation, M.translation
        w_a = R @ V[3:]
        v_a = R @ V[:3] + np.cross(w_a, np.zeros(3) - p)  # velocity of a's origin: b's origin sits at p
        np.testing.assert_allclose(transforms.adjoint(M.homogeneous) @ V, np.concatenate([v_a, w_a]),
                                   atol=EXACT_TOL)


def test_camera_to_tool_twist_against_finite_differences_of_the_carried_tool() -> None:
    # Independent computation: move the camera with V (its frame) for +-h, carry the tool rigidly
    # (T_base_tool = T_base_cam inv(T_tool_cam)), and read the tool's body twist with pin.log6.
    rng = np.random.default_rng(6)
    for _ in range(10):
        T_base_cam = _random_pose(rng).homogeneous
        T_tool_cam = _random_pose(rng).homogeneous
        V = rng.normal(size=6)
        T_tool_base = np.linalg.inv(T_base_cam @ np.linalg.inv(T_tool_cam))

        def tool_after(h: float, V: np.ndarray = V, T_base_cam: np.ndarray = T_base_cam,
                       T_tool_cam: np.ndarray = T_tool_cam) -> np.ndarray:
            return T_base_cam @ pin.exp6(pin.Motion(V * h)).homogeneous @ np.linalg.inv(T_tool_cam)

        body = [pin.log6(pin.SE3(T_tool_base @ tool_after(h))).vector for h in (FD_STEP, -FD_STEP)]
        fd = (body[0] - body[1]) / (2 * FD_STEP)
        np.testing.assert_allclose(transforms.camera_to_tool(V, T_tool_cam), fd, atol=1e-6)


def test_camera_point_twist_is_the_tool_twist_moved_to_the_camera() -> None:
    # The service takes a twist at a point of the tool: (R v, R w) at t must describe the same motion
    # as the adjoint's twist at the tool origin (v_o = v_p + w x (o - p), rigid-body kinematics).
    rng = np.random.default_rng(7)
    T_tool_cam = _random_pose(rng).homogeneous
    V = rng.normal(size=6)
    linear, angular, point = transforms.camera_point_twist(V, T_tool_cam)
    np.testing.assert_allclose(point, T_tool_cam[:3, 3], atol=EXACT_TOL)
    at_origin = transforms.shift_point(np.concatenate([linear, angular]), point, np.zeros(3))
    np.testing.assert_allclose(at_origin, transforms.camera_to_tool(V, T_tool_cam), atol=EXACT_TOL)


def test_shift_point_against_pinocchio_translation_action() -> None:
    # A twist at point p (same axes) seen at the origin is pin.SE3(I, p).action applied to it.
    rng = np.random.default_rng(8)
    p, q, V = rng.normal(size=3), rng.normal(size=3), rng.normal(size=6)
    np.testing.assert_allclose(transforms.shift_point(V, p, np.zeros(3)), pin.SE3(np.eye(3), p).action @ V,
                               atol=EXACT_TOL)
    there = transforms.shift_point(V, p, q)
    np.testing.assert_allclose(transforms.shift_point(there, q, p), V, atol=EXACT_TOL)


def test_eye_to_hand_twist_moves_the_image_as_the_camera_twist_would() -> None:
    # Chaumette & Hutchinson 2007 (Part II, eye-to-hand): the image sees only the relative motion, so
    # moving the tool with the returned twist must change the features by L v_c, L from eq. (11) of
    # Part I. Independent check: apply the base-frame twist at its point with pin.exp6 (moved to the
    # base origin with pin.SE3(I, p).action) and difference the projection of the carried dots.
    rng = np.random.default_rng(9)
    T_base_cam = pin.SE3(pin.exp3(np.array([np.pi, 0.0, 0.0])), np.array([0.5, 0.0, 1.2])).homogeneous
    T_base_tool = pin.SE3(pin.exp3(rng.normal(size=3) * 0.3), np.array([0.45, 0.05, 0.5])).homogeneous
    P_tool = np.column_stack([rng.uniform(-0.05, 0.05, 5), rng.uniform(-0.05, 0.05, 5), np.zeros(5)])
    P_base = P_tool @ T_base_tool[:3, :3].T + T_base_tool[:3, 3]
    xy, Z = project(T_base_cam, P_base)
    L = point_matrix(xy, Z)
    for V in np.eye(6):
        linear, angular, point = transforms.eye_to_hand_twist(V, T_base_cam, T_base_tool[:3, 3])
        at_base = pin.SE3(np.eye(3), T_base_tool[:3, 3] + point).action @ np.concatenate([linear, angular])

        def seen(h: float, at_base: np.ndarray = at_base) -> np.ndarray:
            T = pin.exp6(pin.Motion(at_base * h)).homogeneous @ T_base_tool  # spatial twist: left
            P = P_tool @ T[:3, :3].T + T[:3, 3]
            return project(T_base_cam, P)[0].ravel()

        fd = (seen(FD_STEP) - seen(-FD_STEP)) / (2 * FD_STEP)
        np.testing.assert_allclose(L @ V, fd, atol=FD_TOL)


def _L_theta_u(theta_u: np.ndarray) -> np.ndarray:
    # d(theta u)/dt = L_theta_u w for theta u of c*R_c and w in the current camera frame (R_dot = R [w]x).
    # Derived here as the inverse right Jacobian of SO(3): I + theta/2 [u]x + (1 - sinc(theta) /
    # sinc^2(theta / 2)) [u]x^2. The [u]x^2 coefficient is Chaumette & Hutchinson 2006 (PBVS section)
    # verbatim; their first-order term reads -theta/2 [u]x, which holds for the opposite rotation
    # convention. Either way L_theta_u theta u = theta u, so the law w = -lambda theta u is the same;
    # finite differences below decide the sign for our convention (np.sinc is normalised: /pi).
    theta = np.linalg.norm(theta_u)
    K = rigid.skew(theta_u / theta)
    sinc = lambda a: np.sinc(a / np.pi)  # noqa: E731
    return np.eye(3) + theta / 2 * K + (1 - sinc(theta) / sinc(theta / 2) ** 2) * K @ K


def test_pbvs_error_derivative_matches_the_paper_interaction_matrix() -> None:
    # Chaumette & Hutchinson 2006, PBVS with s = (c*t_c, theta u): L_e = [[R, 0], [0, L_theta_u]],
    # R = c*R_c, for the camera twist in the current camera frame. Oracle: finite differences of the
    # error while the camera moves with pin.exp6 (the target fixed): T_cam_target(h) = exp6(-V h) T.
    rng = np.random.default_rng(10)
    T_camstar_target = pin.SE3(pin.exp3(np.array([np.pi, 0, 0])), np.array([0.0, 0.0, 0.3])).homogeneous
    T_cam_target = (pin.exp6(pin.Motion(rng.normal(size=6) * 0.3)).homogeneous @ T_camstar_target)
    t, theta_u = laws.pbvs_error(T_cam_target, T_camstar_target)
    R = (T_camstar_target @ np.linalg.inv(T_cam_target))[:3, :3]
    L = np.zeros((6, 6))
    L[:3, :3], L[3:, 3:] = R, _L_theta_u(theta_u)
    for V in np.eye(6):
        def err(h: float, V: np.ndarray = V) -> np.ndarray:
            moved = pin.exp6(pin.Motion(-V * h)).homogeneous @ T_cam_target
            return np.concatenate(laws.pbvs_error(moved, T_camstar_target))

        fd = (err(FD_STEP) - err(-FD_STEP)) / (2 * FD_STEP)
        np.testing.assert_allclose(L @ V, fd, atol=1e-6)
    # The law is -lambda L_e^-1 e, which for this L_e is (-lambda R^T t, -lambda theta u) because
    # L_theta_u^-1 theta u = theta u (the paper's remark after its eq. (24)).
    twist = laws.pbvs_twist(T_cam_target, T_camstar_target, 0.7)
    np.testing.assert_allclose(twist, -0.7 * np.linalg.solve(L, np.concatenate([t, theta_u])), atol=1e-10)


def test_saturation_keeps_the_direction_and_the_bounds() -> None:
    rng = np.random.default_rng(11)
    for _ in range(50):
        V = rng.normal(size=6) * rng.uniform(0.01, 10.0)
        S = laws.saturate(V, 0.05, 0.3)
        assert np.linalg.norm(S[:3]) <= 0.05 * (1 + 1e-12) and np.linalg.norm(S[3:]) <= 0.3 * (1 + 1e-12)
        factor = S @ V / (V @ V)
        np.testing.assert_allclose(S, factor * V, atol=EXACT_TOL)  # parallel, same sense
        assert 0.0 < factor <= 1.0
    small = np.array([0.01, 0, 0, 0, 0.1, 0])
    np.testing.assert_array_equal(laws.saturate(small, 0.05, 0.3), small)


def test_gain_schedule_limits_and_monotone() -> None:
    g = laws.GainSchedule(near=4.0, far=1.0, knee=0.05)
    assert g(0.0) == 4.0
    assert abs(g(1e3) - 1.0) < 1e-6
    assert g(0.05) == pytest.approx(2.5)  # the knee is halfway
    values = [g(e) for e in np.linspace(0.0, 1.0, 200)]
    assert all(a >= b for a, b in itertools.pairwise(values))
    assert laws.GainSchedule.constant(2.0)(0.3) == 2.0
    with pytest.raises(ConfigError, match=r"gain\.near"):
        laws.GainSchedule(near=0.0, far=1.0)


def test_degenerate_point_set_gives_a_bounded_finite_twist() -> None:
    # Four coincident points: L has rank 2; the pseudo-inverse drops the null directions (own branch).
    xy = np.tile([[0.1, -0.05]], (4, 1))
    L = point_matrix(xy, np.full(4, 0.5))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        V = laws.ibvs_twist(L, np.tile([0.01, 0.0], 4), 1.0)
    assert np.isfinite(V).all() and np.linalg.norm(V) < 1.0


def test_a_given_desired_matrix_is_used_as_is() -> None:
    rng = np.random.default_rng(12)
    xy, xy_s = rng.normal(size=(4, 2)) * 0.1, rng.normal(size=(4, 2)) * 0.1
    Z, Z_s = rng.uniform(0.3, 1.0, 4), rng.uniform(0.3, 1.0, 4)
    L_s = point_matrix(xy_s, Z_s)
    for choice in DepthChoice:
        np.testing.assert_array_equal(estimate(choice, xy, Z, xy_s, Z_s, L_s),
                                      estimate(choice, xy, Z, xy_s, Z_s))
