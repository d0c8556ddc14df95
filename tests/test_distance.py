"""Distance kernels (solver/distance.py) against the collision library coal as a test-only oracle
(Pan, Chitta & Manocha 2012, "FCL: a general purpose library for collision and proximity queries",
ICRA, which coal extends; installed with pinocchio from the `test` extra), plus closed forms.

coal's own precision: its capsule-capsule, capsule-sphere and capsule-half-space queries are
closed-form; capsule-box runs GJK, here with gjk_tolerance 1e-12. Separated pairs agree to
ORACLE_TOL (1e-9) in distance and closest points. Penetration is compared where both define it the
same way (capsule-capsule, -sphere, -half-space); for capsule-box our depth is that of the segment's
deepest point (coal's EPA reports the minimum translation instead), checked by closed forms.
"""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.solver.distance import (
    box_signed_distance,
    capsule_box,
    capsule_box_one,
    capsule_capsule,
    capsule_capsule_one,
    capsule_half_space,
    capsule_sphere,
    segment_segment,
)

coal = pytest.importorskip("coal")

ORACLE_TOL = 1e-9
CASES = 400
SEED = 913


def _frame_along(a: np.ndarray, b: np.ndarray):
    """coal placement and half length of the capsule a-b (coal's capsules lie on their local z)."""
    d = b - a
    length = float(np.linalg.norm(d))
    z = d / length if length > 0 else np.array([0.0, 0.0, 1.0])
    x = np.cross(z, [1.0, 0, 0]) if abs(z[0]) < 0.9 else np.cross(z, [0, 1.0, 0])
    x /= np.linalg.norm(x)
    return coal.Transform3s(np.column_stack([x, np.cross(z, x), z]), 0.5 * (a + b)), length / 2


def coal_distance(g1, T1, g2, T2) -> tuple[float, np.ndarray, np.ndarray]:
    """(signed distance, nearest point on 1, on 2) from coal."""
    req = coal.DistanceRequest()
    req.gjk_tolerance = 1e-12
    req.enable_signed_distance = True
    res = coal.DistanceResult()
    d = coal.distance(g1, T1, g2, T2, req, res)
    return d, np.array(res.getNearestPoint1()), np.array(res.getNearestPoint2())


def coal_capsule(a, b, r):
    T, half = _frame_along(a, b)
    return coal.Capsule(r, 2 * half), T


def random_rotation(rng):
    R = np.linalg.qr(rng.normal(size=(3, 3)))[0]
    if np.linalg.det(R) < 0:
        R[:, 0] *= -1
    return R


def one(x):
    return np.asarray(x, dtype=float)[None]


def check_contact_consistent(c):
    """point_a = point_b + d n for every row, |n| = 1 (the Contact contract)."""
    np.testing.assert_allclose(np.linalg.norm(c.normal, axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(c.point_a, c.point_b + c.distance[:, None] * c.normal, atol=1e-12)


def test_capsule_pairs_match_coal():
    rng = np.random.default_rng(SEED)
    worst = 0.0
    for _ in range(CASES):
        a0, a1, b0, b1 = rng.normal(size=(4, 3)) * 0.4
        ra, rb = rng.uniform(0.0, 0.15, 2)
        ga, Ta = coal_capsule(a0, a1, ra)
        gb, Tb = coal_capsule(b0, b1, rb)
        d, pa, pb = coal_distance(ga, Ta, gb, Tb)
        c = capsule_capsule(one(a0), one(a1), one(ra), one(b0), one(b1), one(rb))
        check_contact_consistent(c)
        assert abs(c.distance[0] - d) < ORACLE_TOL
        if d > 1e-6:  # nearest points are unique for separated capsules
            np.testing.assert_allclose(c.point_a[0], pa, atol=ORACLE_TOL)
            np.testing.assert_allclose(c.point_b[0], pb, atol=ORACLE_TOL)
        scalar = capsule_capsule_one(a0.tolist(), a1.tolist(), ra, b0.tolist(), b1.tolist(), rb)
        assert abs(scalar[0] - c.distance[0]) < 1e-12
        np.testing.assert_allclose(scalar[3], c.normal[0], atol=1e-9)
        worst = max(worst, abs(c.distance[0] - d))
    assert worst < ORACLE_TOL


def test_vectorised_batch_equals_one_at_a_time():
    """The kernels are row-wise: a batch gives the same rows as single calls."""
    rng = np.random.default_rng(SEED + 1)
    a0, a1, b0, b1 = rng.normal(size=(4, 50, 3))
    ra, rb = rng.uniform(0.01, 0.1, (2, 50))
    batch = capsule_capsule(a0, a1, ra, b0, b1, rb)
    for k in (0, 17, 49):
        single = capsule_capsule(a0[k:k + 1], a1[k:k + 1], ra[k:k + 1], b0[k:k + 1], b1[k:k + 1], rb[k:k + 1])
        np.testing.assert_array_equal(batch.distance[k], single.distance[0])


@pytest.mark.parametrize("tilt", [0.0, 1e-14, 1e-10, 1e-7, 1e-4])
def test_parallel_and_near_parallel_segments(tilt):
    """Ericson's parallel branch (Ericson 2004, 5.1.9: denominator 0, s = 0 then re-clamped) and its
    neighbourhood: overlapping, disjoint and reversed parallel segments, against coal."""
    rng = np.random.default_rng(SEED + 2)
    for _ in range(40):
        u = rng.normal(size=3)
        u /= np.linalg.norm(u)
        off = np.cross(u, rng.normal(size=3))
        off *= rng.uniform(0.05, 0.3) / np.linalg.norm(off)
        a0 = rng.normal(size=3) * 0.2
        a1 = a0 + u * rng.uniform(0.1, 0.5)
        shift = rng.uniform(-0.6, 0.6)
        w = u + tilt * np.cross(u, off) / np.linalg.norm(off)
        b0 = a0 + off + u * shift
        b1 = b0 + w * rng.choice([-1.0, 1.0]) * rng.uniform(0.1, 0.5)
        ga, Ta = coal_capsule(a0, a1, 0.02)
        gb, Tb = coal_capsule(b0, b1, 0.03)
        d, _, _ = coal_distance(ga, Ta, gb, Tb)
        c = capsule_capsule(one(a0), one(a1), one(0.02), one(b0), one(b1), one(0.03))
        assert abs(c.distance[0] - d) < ORACLE_TOL
        s = capsule_capsule_one(a0.tolist(), a1.tolist(), 0.02, b0.tolist(), b1.tolist(), 0.03)
        assert abs(s[0] - d) < ORACLE_TOL


def test_degenerate_segments_points():
    """Ericson's degenerate branches: a point against a segment, a segment against a point, two
    points; the closed form is the point-segment (or point-point) distance."""
    rng = np.random.default_rng(SEED + 3)
    for _ in range(50):
        p, a0, a1 = rng.normal(size=(3, 3))
        t = np.clip((p - a0) @ (a1 - a0) / ((a1 - a0) @ (a1 - a0)), 0, 1)
        expected = np.linalg.norm(p - (a0 + t * (a1 - a0)))  # projection, clamped (closed form)
        s, tt, c1, c2 = segment_segment(one(p), one(p), one(a0), one(a1))
        assert s[0] == 0.0 and abs(np.linalg.norm(c1 - c2) - expected) < 1e-12
        s, tt, c1, c2 = segment_segment(one(a0), one(a1), one(p), one(p))
        assert tt[0] == 0.0 and abs(np.linalg.norm(c1 - c2) - expected) < 1e-12
        s, tt, c1, c2 = segment_segment(one(p), one(p), one(a0), one(a0))
        assert abs(np.linalg.norm(c1 - c2) - np.linalg.norm(p - a0)) < 1e-12


def test_crossing_segments_get_a_perpendicular_normal():
    """Touching branch: crossing segments have no gap direction; the normal is the unit cross
    product of the directions, and the distance is minus both radii."""
    c = capsule_capsule(one([-1, 0, 0]), one([1, 0, 0]), one(0.1), one([0, -1, 0]), one([0, 1, 0]), one(0.2))
    assert abs(c.distance[0] + 0.3) < 1e-15
    np.testing.assert_allclose(np.abs(c.normal[0]), [0, 0, 1], atol=1e-15)
    # Collinear overlapping segments: no cross product either; any perpendicular of a.
    c = capsule_capsule(one([0, 0, 0]), one([1, 0, 0]), one(0.1), one([0.5, 0, 0]), one([2, 0, 0]), one(0.1))
    assert abs(c.normal[0] @ [1, 0, 0]) < 1e-15 and abs(np.linalg.norm(c.normal[0]) - 1) < 1e-15
    one_pair = capsule_capsule_one([0, 0, 0], [1, 0, 0], 0.1, [0.5, 0, 0], [2, 0, 0], 0.1)
    assert abs(one_pair[0] + 0.2) < 1e-15


def test_capsule_sphere_matches_coal():
    rng = np.random.default_rng(SEED + 4)
    for _ in range(CASES):
        a0, a1, ctr = rng.normal(size=(3, 3)) * 0.4
        ra, rs = rng.uniform(0.0, 0.2, 2)
        ga, Ta = coal_capsule(a0, a1, ra)
        d, _, pb = coal_distance(ga, Ta, coal.Sphere(rs), coal.Transform3s(np.eye(3), ctr))
        c = capsule_sphere(one(a0), one(a1), one(ra), one(ctr), one(rs))
        assert abs(c.distance[0] - d) < ORACLE_TOL
        if d > 1e-6:
            np.testing.assert_allclose(c.point_b[0], pb, atol=ORACLE_TOL)


def test_capsule_half_space_closed_form_and_coal():
    """Closed form (METHODS.md; the distance of a point to the plane n^T x = c is n^T p - c):
    d = min(n^T a0, n^T a1) - c - r, normal n, point_b the projection of the nearer end."""
    rng = np.random.default_rng(SEED + 5)
    for _ in range(CASES):
        a0, a1 = rng.normal(size=(2, 3)) * 0.4
        r = rng.uniform(0.0, 0.2)
        n = rng.normal(size=3)
        n /= np.linalg.norm(n)
        c0 = rng.normal() * 0.3
        c = capsule_half_space(one(a0), one(a1), one(r), one(n), one(c0))
        expected = min(n @ a0, n @ a1) - c0 - r
        assert abs(c.distance[0] - expected) < 1e-15
        assert abs(n @ c.point_b[0] - c0) < 1e-15
        check_contact_consistent(c)
        ga, Ta = coal_capsule(a0, a1, r)
        d, _, _ = coal_distance(ga, Ta, coal.Halfspace(n, c0), coal.Transform3s())
        assert abs(c.distance[0] - d) < ORACLE_TOL


def test_capsule_half_space_parallel_takes_first_end():
    c = capsule_half_space(one([0, 0, 0.5]), one([1, 0, 0.5]), one(0.1), one([0, 0, 1.0]), one(0.0))
    np.testing.assert_allclose(c.point_a[0], [0, 0, 0.4])
    assert c.distance[0] == pytest.approx(0.4, abs=1e-15)


def test_capsule_box_separated_matches_coal():
    rng = np.random.default_rng(SEED + 6)
    checked = 0
    for _ in range(CASES):
        a0, a1 = rng.normal(size=(2, 3)) * 0.5
        r = rng.uniform(0.0, 0.1)
        R = random_rotation(rng)
        size = rng.uniform(0.02, 0.8, 3)
        ctr = rng.normal(size=3) * 0.3
        ga, Ta = coal_capsule(a0, a1, r)
        d, _, pb = coal_distance(ga, Ta, coal.Box(*size), coal.Transform3s(R, ctr))
        c = capsule_box(one(a0), one(a1), one(r), one(ctr), R[None], one(size / 2))
        if d <= 0:
            continue
        checked += 1
        check_contact_consistent(c)
        assert abs(c.distance[0] - d) < ORACLE_TOL
        if d > 1e-6:
            np.testing.assert_allclose(c.point_b[0], pb, atol=1e-8)
    assert checked > CASES // 3


@pytest.mark.parametrize("axis_aligned", [True, False])
def test_capsule_box_edge_and_face_cases(axis_aligned):
    """Segments parallel to faces and edges (zero direction components: the denominators of the
    candidate set vanish) against coal."""
    rng = np.random.default_rng(SEED + 7)
    for _ in range(60):
        R = np.eye(3) if axis_aligned else random_rotation(rng)
        h = rng.uniform(0.05, 0.3, 3)
        a = rng.normal(size=3) * 0.5
        u = np.zeros(3)
        u[rng.integers(3)] = rng.uniform(-0.6, 0.6)
        a0, a1 = R @ a, R @ (a + u)
        ga, Ta = coal_capsule(a0, a1, 0.01) if np.linalg.norm(u) > 0 else (coal.Sphere(0.01),
                                                                           coal.Transform3s(np.eye(3), a0))
        d, _, _ = coal_distance(ga, Ta, coal.Box(*(2 * h)), coal.Transform3s(R, np.zeros(3)))
        c = capsule_box(one(a0), one(a1), one(0.01), one(np.zeros(3)), R[None], one(h))
        if d > 0:
            assert abs(c.distance[0] - d) < ORACLE_TOL


def test_capsule_box_penetration_closed_forms():
    """Inside the box the depth is that of the segment's deepest point below the nearest face
    (closed form for a segment along the box's x axis through a 0.4 x 0.2 x 0.1 box: the centre is
    0.05 below the z faces), and the normal is that face's outward normal."""
    h = one([0.2, 0.1, 0.05])
    c = capsule_box(one([-1, 0, 0]), one([1, 0, 0]), one(0.01), one([0, 0, 0]), np.eye(3)[None], h)
    assert c.distance[0] == pytest.approx(-0.05 - 0.01, abs=1e-15)
    np.testing.assert_allclose(np.abs(c.normal[0]), [0, 0, 1])
    # Vertical capsule dipping 3 cm into the top face, 1 cm radius: depth 4 cm, normal +z.
    c = capsule_box(one([0.05, 0, 0.02]), one([0.05, 0, 0.5]), one(0.01), one([0, 0, 0]), np.eye(3)[None], h)
    assert c.distance[0] == pytest.approx(-0.04, abs=1e-15)
    np.testing.assert_allclose(c.normal[0], [0, 0, 1])
    np.testing.assert_allclose(c.point_b[0], [0.05, 0, 0.05])
    # Touching the surface exactly: distance 0 and the face normal.
    c = capsule_box(one([0, 0, 0.06]), one([0, 0, 0.5]), one(0.01), one([0, 0, 0]), np.eye(3)[None], h)
    assert c.distance[0] == pytest.approx(0.0, abs=1e-15)
    np.testing.assert_allclose(c.normal[0], [0, 0, 1])


def test_box_signed_distance_closed_form():
    """Outside: Euclidean distance to the box; inside: minus the depth below the nearest face."""
    h = np.array([0.2, 0.1, 0.05])
    pts = np.array([[0.0, 0.0, 0.0], [0.3, 0.0, 0.0], [0.3, 0.2, 0.0], [0.19, 0.0, 0.0]])
    np.testing.assert_allclose(box_signed_distance(pts, h), [-0.05, 0.1, np.hypot(0.1, 0.1), -0.01],
                               atol=1e-15)


def test_capsule_box_one_matches_coal_when_separated():
    """The plain-float capsule-box (pieces of the outside quadratic) against coal, and None exactly
    when the segment touches or enters the box (then the vectorised kernel takes over)."""
    rng = np.random.default_rng(SEED + 8)
    separated = 0
    for k in range(CASES):
        a0, a1 = rng.normal(size=(2, 3)) * 0.5
        R = random_rotation(rng)
        size = rng.uniform(0.02, 0.8, 3)
        ctr = rng.normal(size=3) * 0.3
        if k % 5 == 0:
            a1 = a0 + R[:, k % 3] * 0.3  # parallel to a box axis: closest points not unique
        r = rng.uniform(0.0, 0.1)
        one_pair = capsule_box_one(a0.tolist(), a1.tolist(), r, ctr.tolist(), R.tolist(), (size / 2).tolist())
        vec = capsule_box(one(a0), one(a1), one(r), one(ctr), R[None], one(size / 2))
        segment_inside = vec.distance[0] + r <= 1e-12
        assert (one_pair is None) == segment_inside
        if one_pair is None:
            continue
        separated += 1
        ga, Ta = coal_capsule(a0, a1, r)
        d, _, _ = coal_distance(ga, Ta, coal.Box(*size), coal.Transform3s(R, ctr))
        assert abs(one_pair[0] - d) < ORACLE_TOL
        np.testing.assert_allclose(one_pair[3], vec.normal[0], atol=1e-9)
        pa, pb, n = (np.array(v) for v in one_pair[1:])
        np.testing.assert_allclose(pa, pb + one_pair[0] * n, atol=1e-12)
        assert box_signed_distance(R.T @ (pb - ctr), size / 2) == pytest.approx(0.0, abs=1e-12)
    assert separated > CASES // 3
