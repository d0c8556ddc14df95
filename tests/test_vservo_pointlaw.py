"""The servo's plain-float image-based law (clients/vservo/pointlaw.py) against the numpy reference.

Reference: interaction.estimate (eq. (11) of Chaumette and Hutchinson 2006, "Visual servo control,
Part I", IEEE RAM 13(4), checked against finite differences in test_vservo_geometry) and the
pseudo-inverse of numpy (np.linalg.pinv, an SVD) for v = -lambda L_hat^+ e (their eq. (5)); the 6x6
solve against np.linalg.solve; the conditioning gate against np.linalg.cond.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from twistrate.clients.vservo import laws, pointlaw
from twistrate.clients.vservo import servo as vs
from twistrate.clients.vservo.camera import Intrinsics
from twistrate.clients.vservo.features import PointFrame
from twistrate.clients.vservo.interaction import DepthChoice, estimate

INTRINSICS = Intrinsics(fx=600.0, fy=580.0, cx=320.0, cy=240.0, width=640, height=480)
#: The law accepts only tr(A) tr(A^-1) <= 1e8, so cond_2(A) <= 1e8 and the normal equations' relative
#: error is at most about cond_2(A) * 1.1e-16 ~ 1e-8 (Golub & Van Loan 2013, section 5.3.8: the
#: normal equations' sensitivity is cond_2(A) eps); 1e-7 leaves a margin for the sums.
REL_TOL = 1e-7


def _points(rng: np.random.Generator, k: int, spread: float = 0.3) -> tuple[np.ndarray, np.ndarray]:
    """(k, 2) pixels and (k,) depths of points spread about the image centre."""
    xy = rng.uniform(-spread, spread, (k, 2))
    return INTRINSICS.pixels(xy), rng.uniform(0.15, 1.5, k)


def _reference(depth: DepthChoice, pixels: np.ndarray, depths: np.ndarray | None, goal_px: np.ndarray,
               goal_z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(L_hat^+ e (6,), e (2M,)) by the numpy reference."""
    xy, xy_star = INTRINSICS.normalised(pixels), INTRINSICS.normalised(goal_px)
    e = (xy - xy_star).ravel()
    L_hat = estimate(depth, xy, depths, xy_star, goal_z)
    return np.linalg.pinv(L_hat) @ e, e


def _law(goal_px: np.ndarray, goal_z: np.ndarray, depth: DepthChoice) -> pointlaw.PointLaw:
    i = INTRINSICS
    return pointlaw.PointLaw(i.fx, i.fy, i.cx, i.cy, goal_px.tolist(), goal_z.tolist(), depth)


@pytest.mark.parametrize("depth", list(DepthChoice))
def test_the_plain_float_law_is_the_papers_law(depth: DepthChoice) -> None:
    # Goals of 4 to 10 points, views moved off them, with and without current depths, the whole goal
    # in order and subsets of its rows in any order (a partial view): direction = L_hat^+ e and the
    # pixel and normalised errors as numpy computes them.
    rng = np.random.default_rng(3)
    checked = 0
    for trial in range(200):
        k = int(rng.integers(4, 11))
        goal_px, goal_z = _points(rng, k)
        law = _law(goal_px, goal_z, depth)
        rows = np.arange(k) if trial % 2 else rng.permutation(k)[: int(rng.integers(4, k + 1))]
        pixels = goal_px[rows] + rng.normal(0.0, 20.0, (len(rows), 2))
        depths = goal_z[rows] * rng.uniform(0.7, 1.3, len(rows)) if trial % 3 else None
        got = law(pixels.tolist(), None if depths is None else depths.tolist(),
                  None if trial % 2 else rows.tolist())
        direction, e = _reference(depth, pixels, depths, goal_px[rows], goal_z[rows])
        assert got.ok
        distance = np.linalg.norm(pixels - goal_px[rows], axis=1)
        assert got.error_norm == pytest.approx(np.linalg.norm(e), rel=1e-12)
        assert got.mean_px == pytest.approx(distance.mean(), rel=1e-12)
        assert got.max_px == pytest.approx(distance.max(), rel=1e-12)
        if got.direction is None:  # refused as ill-conditioned: only when cond_2(L_hat)^2 may pass 1e8
            xy, xy_star = INTRINSICS.normalised(pixels), INTRINSICS.normalised(goal_px[rows])
            L_hat = estimate(depth, xy, depths, xy_star, goal_z[rows])
            assert np.linalg.cond(L_hat) ** 2 > pointlaw.COND_BOUND / 36.0  # tr tr <= 36 cond_2(A)
            continue
        np.testing.assert_allclose(got.direction, direction, rtol=REL_TOL,
                                   atol=REL_TOL * np.abs(direction).max())
        checked += 1
    assert checked >= 190


def test_the_solve_against_numpy_and_its_refusals() -> None:
    rng = np.random.default_rng(4)
    for _ in range(200):
        M = rng.normal(size=(8, 6))
        A, b = M.T @ M, rng.normal(size=6)
        upper = [A[i, j] for i in range(6) for j in range(i, 6)]
        x = pointlaw._solve(*upper, *b)
        if np.linalg.cond(A) * 36.0 <= pointlaw.COND_BOUND:  # the gate's bound cannot refuse these
            assert x is not None
        if x is not None:
            np.testing.assert_allclose(x, np.linalg.solve(A, b), rtol=1e-8, atol=1e-8 * np.abs(b).max())
            assert np.trace(A) * np.trace(np.linalg.inv(A)) <= pointlaw.COND_BOUND * (1 + 1e-9)
    indefinite = np.diag([1.0, 2.0, -1.0, 3.0, 1.0, 1.0])
    assert pointlaw._solve(*[indefinite[i, j] for i in range(6) for j in range(i, 6)], *np.ones(6)) is None
    ill = np.diag([1.0, 1.0, 1.0, 1.0, 1.0, 1e-9])  # cond 1e9 > 1e8
    assert pointlaw._solve(*[ill[i, j] for i in range(6) for j in range(i, 6)], *np.ones(6)) is None


def test_degenerate_views_go_to_the_svd_and_stay_bounded() -> None:
    # Four coincident points (L_hat of rank 2), two coincident pairs (rank 4) and four collinear points
    # at one depth (rank 5; singular values by np.linalg.svd): the law leaves the direction to the SVD
    # reference, and the servo's twist is laws.ibvs_twist's (the null directions dropped).
    goal_z = np.full(4, 0.5)
    settings = vs.Settings(INTRINSICS, laws.GainSchedule.constant(1.0), 0.01, depth=DepthChoice.MEAN,
                           linear_max=10.0, angular_max=10.0)
    line = np.column_stack([np.linspace(100.0, 500.0, 4), np.linspace(100.0, 300.0, 4)])
    pairs = np.array([[100.0, 100.0], [100.0, 100.0], [400.0, 300.0], [400.0, 300.0]])
    for goal_pixels in (np.tile([[250.0, 200.0]], (4, 1)), pairs, line):
        goal = vs.PointGoal(np.arange(4), goal_pixels, goal_z)
        law = _law(goal_pixels, goal_z, DepthChoice.MEAN)
        pixels = goal_pixels + 3.0
        assert law(pixels.tolist(), None).direction is None
        step = vs.Servo(settings, goal).step(PointFrame(np.arange(4), pixels, None, 0.0), 0.0, 0.0)
        xy, xy_star = INTRINSICS.normalised(pixels), INTRINSICS.normalised(goal_pixels)
        L_hat = estimate(DepthChoice.MEAN, xy, None, xy_star, goal_z)
        expected = laws.ibvs_twist(L_hat, (xy - xy_star).ravel(), 1.0)
        assert step.state.value == "tracking" and np.isfinite(step.twist).all()
        np.testing.assert_allclose(step.twist, expected, rtol=1e-12, atol=1e-15)


def test_values_that_are_not_finite_or_depths_not_positive_are_flagged() -> None:
    rng = np.random.default_rng(7)
    goal_px, goal_z = _points(rng, 5)
    law = _law(goal_px, goal_z, DepthChoice.CURRENT)
    pixels, depths = (goal_px + 1.0).tolist(), goal_z.tolist()
    assert law(pixels, depths).ok
    for bad in (math.nan, math.inf, -math.inf):
        broken = [list(p) for p in pixels]
        broken[2][1] = bad
        assert not law(broken, depths).ok
    for bad in (0.0, -0.2, math.nan, math.inf):
        assert not law(pixels, [*depths[:4], bad]).ok


def test_the_servo_takes_decoded_tuples_as_it_takes_arrays() -> None:
    # feed.decode_features gives ids, pixels and depths as tuples; the servo's step must be the same as
    # for the arrays of the reference decoder, in the goal's order, shuffled, or with a point bad.
    rng = np.random.default_rng(8)
    goal_px, goal_z = _points(rng, 5)
    ids = np.array([21, 22, 23, 24, 25], dtype=np.int64)
    goal = vs.PointGoal(ids, goal_px, goal_z)
    settings = vs.Settings(INTRINSICS, laws.GainSchedule(1.5, 0.8), 0.01)
    pixels, depths = goal_px + rng.normal(0.0, 15.0, (5, 2)), goal_z * 1.1
    bad = pixels.copy()
    bad[3, 0] = math.nan
    for order, px, z in ((np.arange(5), pixels, depths), (np.array([4, 0, 3, 1, 2]), pixels, None),
                         (np.arange(5), bad, depths)):
        arrays = PointFrame(ids[order], px[order], None if z is None else z[order], 0.0)
        tuples = PointFrame(tuple(ids[order].tolist()), tuple(map(tuple, px[order].tolist())),
                            None if z is None else tuple(z[order].tolist()), 0.0)
        a = vs.Servo(settings, goal).step(arrays, 0.0, 0.0)
        b = vs.Servo(settings, goal).step(tuples, 0.0, 0.0)
        assert (a.state, a.points) == (b.state, b.points) and a.points == (4 if px is bad else 5)
        assert a.twist == b.twist and a.error_px_mean == b.error_px_mean and a.error_norm == b.error_norm


def test_wire_twist_is_the_transforms_of_the_reference() -> None:
    # servo.wire_twist on plain floats against transforms.camera_point_twist / eye_to_hand_twist (numpy;
    # checked against pinocchio and finite differences in test_vservo_geometry).
    from twistrate.clients.vservo import rigid, transforms

    rng = np.random.default_rng(9)
    for _ in range(50):
        T = rigid.transform(rigid.exp_so3(rng.normal(size=3)), rng.normal(size=3))
        V, p_tool = rng.normal(size=6), rng.normal(size=3)
        tool = vs.wire_twist(tuple(V), vs.Mount("tool", T))
        linear, angular, point = transforms.camera_point_twist(V, T)
        assert tool["frame"] == "tool"
        for key, ref in (("linear", linear), ("angular", angular), ("point", point)):
            np.testing.assert_allclose(tool[key], ref, rtol=1e-13, atol=1e-15)
        cell = vs.wire_twist(tuple(V), vs.Mount("cell", T), p_tool)
        linear, angular, point = transforms.eye_to_hand_twist(V, T, p_tool)
        assert cell["frame"] == "base"
        for key, ref in (("linear", linear), ("angular", angular), ("point", point)):
            np.testing.assert_allclose(cell[key], ref, rtol=1e-13, atol=1e-15)
