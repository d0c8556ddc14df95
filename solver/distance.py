"""Exact distances, closest points and normals between capsules and keep-out shapes, vectorised over
pairs (k pairs at once, k >= 0).

Every function takes base-frame arrays (metres) of k pairs, shape (k, 3) per point, (k,) per
radius, and returns a `Contact`: the signed distance d (k,) (negative: penetration depth), the
closest point on shape a (k, 3), the closest point on shape b (k, 3), and the unit normal from b to
a (k, 3), all base frame, so that point_a ~= point_b + d * normal. Shape a is always the capsule.
Kernels trust their input (finite arrays of matching shapes; radii >= 0); validation happens where
shapes are loaded (`twistrate.solver.geometry`, `twistrate.solver.zones`).

Methods (each with its own test against the collision library coal in tests/test_distance.py):
* segment-segment closest points: Ericson 2004, Real-Time Collision Detection, section 5.1.9
  (ClosestPtSegmentSegment), with its degenerate branches (either segment a point) and its
  parallel branch (s = 0, then t and s re-clamped in turn); capsule-capsule distance is the segment
  distance minus both radii (METHODS.md), capsule-sphere the same with a zero-length segment.
* capsule-half-space: the signed distance n^T p - c of the two end points, the smaller one minus
  the radius (exact: the distance of a point to a plane is affine along the segment).
* capsule-box: the exact minimum over the segment of the box's signed distance function (convex
  along the segment because the box is convex), found among a finite candidate set: outside the
  box the squared distance is a piecewise quadratic in the segment parameter t whose pieces end
  where the segment crosses a face plane, so the minimum is a clamped per-piece vertex; inside,
  the signed distance max_i(|x_i| - h_i) is piecewise linear with kinks where two faces tie or a
  coordinate changes sign, so the minimum is at a kink or an end point.
Degenerate normals (touching or crossing shapes, where b - a vanishes) get their own branch: the
direction perpendicular to both segments, else any perpendicular of the capsule's segment, else +z
(capsule-capsule); the deepest face's outward normal (capsule-box).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Squared length (m^2) below which a segment is treated as a point (Ericson's EPSILON branch).
DEGENERATE_SQ_M2 = 1e-24
#: Relative size of a e - b^2 against a e below which two segments are treated as parallel.
PARALLEL_RTOL = 1e-12
#: Distance (m) between closest points below which their difference gives no usable normal.
TOUCH_M = 1e-12


@dataclass(frozen=True, eq=False)
class Contact:
    """Distances and closest points of k pairs (see the module docstring).

    distance : (k,) signed distance between the surfaces, m (negative: penetration depth).
    point_a, point_b : (k, 3) closest points on shape a (the capsule) and shape b, base frame, m.
    normal : (k, 3) unit normal from b to a, base frame.
    """

    distance: np.ndarray
    point_a: np.ndarray
    point_b: np.ndarray
    normal: np.ndarray


def _dot(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Row-wise dot products of (..., 3) arrays."""
    return np.einsum("...i,...i->...", x, y)


def _unit(v: np.ndarray) -> np.ndarray:
    """(..., 3) rows divided by their length (rows must be non-zero)."""
    return v / np.sqrt(_dot(v, v))[..., None]


def _clip01(x: np.ndarray) -> np.ndarray:
    """x clamped to [0, 1] (two ufunc calls: cheaper than np.clip on small arrays)."""
    return np.minimum(np.maximum(x, 0.0), 1.0)


def segment_segment(p1: np.ndarray, q1: np.ndarray, p2: np.ndarray, q2: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Closest points of segments p1-q1 and p2-q2 (Ericson 2004, section 5.1.9), k pairs at once.

    p1, q1, p2, q2 : (k, 3) end points, any common frame, m.
    Returns (s, t, c1, c2): s, t (k,) in [0, 1] the parameters of the closest points
    c1 = p1 + s (q1 - p1) and c2 = p2 + t (q2 - p2), each (k, 3) in the input frame.
    Branches: both segments points (s = t = 0); the first a point (s = 0, t the projection); the
    second a point (t = 0, s the projection); parallel (a e - b^2 <= PARALLEL_RTOL a e: s = 0, then
    t and s re-clamped, which gives a closest pair because every s on the overlap is one);
    otherwise the unconstrained minimiser clamped to the square, in Ericson's order.
    """
    V = np.stack([q1 - p1, q2 - p2, p1 - p2], axis=1)  # rows d1, d2, r: (k, 3, 3)
    G = V @ V.transpose(0, 2, 1)  # Gram matrix of d1, d2, r
    a, b, c, e, f = G[:, 0, 0], G[:, 0, 1], G[:, 0, 2], G[:, 1, 1], G[:, 1, 2]
    a_safe = np.maximum(a, DEGENERATE_SQ_M2)
    e_safe = np.maximum(e, DEGENERATE_SQ_M2)
    ae = a * e
    denom = ae - b * b
    parallel = denom <= PARALLEL_RTOL * ae
    s = _clip01((b * f - c * e) / np.where(parallel, 1.0, denom))
    s[parallel] = 0.0
    # General and parallel branches: t from s, clamped; where clamped, s recomputed from t.
    t = (b * s + f) / e_safe
    t_clamped = _clip01(t)
    s = np.where(t == t_clamped, s, _clip01((b * t_clamped - c) / a_safe))
    t = t_clamped
    point1 = a <= DEGENERATE_SQ_M2
    point2 = e <= DEGENERATE_SQ_M2
    if point1.any() or point2.any():  # Ericson's first three cases
        s = np.where(point1, 0.0, np.where(point2, _clip01(-c / a_safe), s))
        t = np.where(point2, 0.0, np.where(point1, _clip01(f / e_safe), t))
    return s, t, p1 + V[:, 0] * s[:, None], p2 + V[:, 1] * t[:, None]


def _perpendicular(u: np.ndarray) -> np.ndarray:
    """(k, 3) a unit vector perpendicular to each row of u (k, 3); +z where u is zero."""
    pick_y = np.abs(u[:, 0]) >= np.abs(u[:, 1])
    seed = np.zeros_like(u)
    seed[pick_y, 1] = 1.0
    seed[~pick_y, 0] = 1.0
    w = np.cross(u, seed)
    n2 = _dot(w, w)
    out = np.zeros_like(u)
    out[:, 2] = 1.0
    ok = n2 > DEGENERATE_SQ_M2
    out[ok] = w[ok] / np.sqrt(n2[ok])[:, None]
    return out


def capsule_capsule(a0: np.ndarray, a1: np.ndarray, ra: np.ndarray,
                    b0: np.ndarray, b1: np.ndarray, rb: np.ndarray) -> Contact:
    """Capsule a (segment a0-a1, radius ra) against capsule b (b0-b1, rb), k pairs.

    a0, a1, b0, b1 : (k, 3) segment end points, base frame, m; ra, rb : (k,) radii, m.
    Returns a Contact; distance = |c_a - c_b| - ra - rb with c_a, c_b the segments' closest points
    (Ericson 2004, 5.1.9). Where the segments touch or cross (|c_a - c_b| < TOUCH_M) the normal is
    the unit cross product of the two directions, else a perpendicular of segment a (or of b when a
    is a point), else +z.
    """
    _, _, ca, cb = segment_segment(a0, a1, b0, b1)
    gap = ca - cb
    length = np.sqrt(_dot(gap, gap))
    touching = length < TOUCH_M
    normal = gap / np.where(touching, 1.0, length)[:, None]
    if np.any(touching):
        da, db = (a1 - a0)[touching], (b1 - b0)[touching]
        cross = np.cross(da, db)
        fallback = _perpendicular(np.where((_dot(da, da) > DEGENERATE_SQ_M2)[:, None], da, db))
        ok = (_dot(cross, cross) > DEGENERATE_SQ_M2)[:, None]
        normal[touching] = np.where(ok, cross / np.sqrt(np.maximum(_dot(cross, cross), 1e-300))[:, None],
                                    fallback)
    return Contact(length - ra - rb, ca - normal * ra[:, None], cb + normal * rb[:, None], normal)


def capsule_sphere(a0: np.ndarray, a1: np.ndarray, ra: np.ndarray, center: np.ndarray,
                   radius: np.ndarray) -> Contact:
    """Capsule a (a0-a1, ra) against a sphere b (center (k, 3), radius (k,)), base frame, m.

    A sphere is a capsule of zero length: `capsule_capsule` with b0 = b1 = center (its degenerate
    branch: t = 0 and s the clamped projection of the centre on segment a).
    """
    return capsule_capsule(a0, a1, ra, center, center, radius)


def capsule_half_space(a0: np.ndarray, a1: np.ndarray, ra: np.ndarray,
                       normal: np.ndarray, offset: np.ndarray) -> Contact:
    """Capsule a (a0-a1, ra) against the half-space b = {x : normal^T x <= offset}, k pairs.

    normal : (k, 3) unit normal of the boundary plane, pointing out of the half-space (into free
        space), base frame; offset : (k,) plane offset c, m (the plane is normal^T x = c).
    Returns a Contact: distance = min(n^T a0, n^T a1) - c - ra (METHODS.md; exact, as the plane
    distance is affine along the segment); point_a the capsule surface point below the nearer end,
    point_b that end projected on the plane, normal the plane normal. Ties (a segment parallel to
    the plane) take a0.
    """
    s0 = _dot(normal, a0) - offset
    s1 = _dot(normal, a1) - offset
    take1 = s1 < s0
    end = np.where(take1[:, None], a1, a0)
    s = np.where(take1, s1, s0)
    return Contact(s - ra, end - normal * ra[:, None], end - normal * s[:, None], normal.copy())


def _box_tables() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Constant tables of `_box_candidates`.

    D, S : (21, 3): the crossings t = (D h - S a) / (S u): face planes a_i + u_i t = +-h_i (6),
        sign changes a_i + u_i t = 0 (3), and ties of two faces sigma_i x_i - h_i = sigma_j x_j - h_j
        (3 axis pairs x 4 sign pairs = 12).
    ACT, SIG : (27, 3): every outside configuration per axis (below: -1, inside: 0, above: +1) as
        its active mask and signs; the vertex of its quadratic is
        t = -(ACT (u a) - SIG (u h)) / (ACT u^2).
    """
    D, S = [], []
    for i in range(3):
        for sign in (1.0, -1.0):
            D.append(np.eye(3)[i] * sign)
            S.append(np.eye(3)[i])
    for i in range(3):
        D.append(np.zeros(3))
        S.append(np.eye(3)[i])
    for i, j in ((0, 1), (0, 2), (1, 2)):
        for si in (1.0, -1.0):
            for sj in (1.0, -1.0):
                d = np.zeros(3)
                d[i], d[j] = 1.0, -1.0
                s = np.zeros(3)
                s[i], s[j] = si, -sj
                D.append(d)
                S.append(s)
    sig = np.array([[x, y, z] for x in (-1.0, 0.0, 1.0) for y in (-1.0, 0.0, 1.0) for z in (-1.0, 0.0, 1.0)])
    out = (np.array(D).T.copy(), np.array(S).T.copy(), np.abs(sig).T.copy(), sig.T.copy())
    for arr in out:
        arr.setflags(write=False)
    return out


_BOX_D, _BOX_S, _BOX_ACT, _BOX_SIG = _box_tables()


def _box_candidates(a: np.ndarray, u: np.ndarray, h: np.ndarray) -> np.ndarray:
    """(k, 50) candidate segment parameters in [0, 1] for `capsule_box` (box frame inputs).

    a : (k, 3) segment start, u : (k, 3) segment direction (end - start), h : (k, 3) half extents.
    The set holds the end points 0 and 1, every crossing of `_box_tables` (the ends of the outside
    quadratic pieces and the inside kinks) and the vertex of every outside configuration's quadratic:
    the minimiser of the (convex) signed distance along the segment is one of them, because it is an
    end point, a piece end or kink, or the vertex of the piece it lies in. Candidates whose
    denominator vanishes are replaced by 0 (a feasible point, so the minimum is unaffected).
    """
    den = u @ _BOX_S
    num = h @ _BOX_D - a @ _BOX_S
    cross = np.divide(num, den, out=np.zeros_like(num), where=den != 0.0)
    uu = (u * u) @ _BOX_ACT
    vnum = (u * h) @ _BOX_SIG - (u * a) @ _BOX_ACT
    vertex = np.divide(vnum, uu, out=np.zeros_like(vnum), where=uu > DEGENERATE_SQ_M2)
    ends = np.zeros((len(a), 2))
    ends[:, 1] = 1.0
    return _clip01(np.concatenate([ends, cross, vertex], axis=1))


def box_signed_distance(x: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Signed distance (...,) of points x (..., 3) to the box |x_i| <= h_i, box frame, m: the outside
    Euclidean distance, or minus the depth below the nearest face inside (common practice)."""
    q = np.abs(x) - h
    outside = np.sqrt((np.maximum(q, 0.0) ** 2).sum(axis=-1))
    return outside + np.minimum(q.max(axis=-1), 0.0)


def capsule_box(a0: np.ndarray, a1: np.ndarray, ra: np.ndarray, center: np.ndarray,
                R_base_box: np.ndarray, half: np.ndarray) -> Contact:
    """Capsule a (a0-a1, ra) against a solid box b, k pairs.

    center : (k, 3) box centre, base frame, m; R_base_box : (k, 3, 3) box axes (columns) in the base
        frame; half : (k, 3) half edge lengths along the box axes, m.
    Returns a Contact: distance = min over the segment of the box's signed distance, minus ra (exact;
    see the module docstring); point_b the nearest box surface point, normal outward from it (the
    deepest face's normal when the segment touches or enters the box).
    """
    k = len(a0)
    a = np.einsum("kji,kj->ki", R_base_box, a0 - center)
    u = np.einsum("kji,kj->ki", R_base_box, a1 - a0)
    t = _box_candidates(a, u, half)
    x = a[:, None, :] + u[:, None, :] * t[:, :, None]
    sdf = box_signed_distance(x, half[:, None, :])
    best = np.argmin(sdf, axis=1)
    rows = np.arange(k)
    xs = x[rows, best]
    d = sdf[rows, best]
    y = np.clip(xs, -half, half)
    gap = xs - y
    length = np.sqrt(_dot(gap, gap))
    outside = length >= TOUCH_M
    n_box = gap / np.where(outside, length, 1.0)[:, None]
    if not np.all(outside):
        inner = ~outside
        depth = np.abs(xs[inner]) - half[inner]
        axis = np.argmax(depth, axis=1)
        sign = np.where(xs[inner, axis] < 0.0, -1.0, 1.0)
        face = np.zeros((int(inner.sum()), 3))
        face[np.arange(len(axis)), axis] = sign
        n_box[inner] = face
        y_in = xs[inner].copy()
        y_in[np.arange(len(axis)), axis] = sign * half[inner, axis]
        y[inner] = y_in
    normal = np.einsum("kij,kj->ki", R_base_box, n_box)
    point_b = center + np.einsum("kij,kj->ki", R_base_box, y)
    point_a = center + np.einsum("kij,kj->ki", R_base_box, xs) - normal * ra[:, None]
    return Contact(d - ra, point_a, point_b, normal)


def capsule_capsule_one(a0: list[float], a1: list[float], ra: float,
                        b0: list[float], b1: list[float], rb: float
                        ) -> tuple[float, list[float], list[float], list[float]]:
    """One capsule pair in plain floats: `capsule_capsule` for k = 1 without numpy's per-call cost
    (about 20 times cheaper for a single pair; the per-tick pass uses it for a few pairs).

    a0, a1, b0, b1 : 3 floats each, base frame, m; ra, rb : radii, m.
    Returns (distance m, point_a, point_b, normal from b to a), the lists of 3 floats each; the same
    branches as `segment_segment` (Ericson 2004, 5.1.9), written as his scalar code. Where the
    segments touch (|c_a - c_b| < TOUCH_M) it defers to `capsule_capsule` for the normal.
    """
    p1x, p1y, p1z = a0
    p2x, p2y, p2z = b0
    d1x, d1y, d1z = a1[0] - p1x, a1[1] - p1y, a1[2] - p1z
    d2x, d2y, d2z = b1[0] - p2x, b1[1] - p2y, b1[2] - p2z
    rx, ry, rz = p1x - p2x, p1y - p2y, p1z - p2z
    a = d1x * d1x + d1y * d1y + d1z * d1z
    e = d2x * d2x + d2y * d2y + d2z * d2z
    f = d2x * rx + d2y * ry + d2z * rz
    if a <= DEGENERATE_SQ_M2 and e <= DEGENERATE_SQ_M2:
        s = t = 0.0
    elif a <= DEGENERATE_SQ_M2:
        s, t = 0.0, min(max(f / e, 0.0), 1.0)
    else:
        c = d1x * rx + d1y * ry + d1z * rz
        if e <= DEGENERATE_SQ_M2:
            s, t = min(max(-c / a, 0.0), 1.0), 0.0
        else:
            b = d1x * d2x + d1y * d2y + d1z * d2z
            denom = a * e - b * b
            s = min(max((b * f - c * e) / denom, 0.0), 1.0) if denom > PARALLEL_RTOL * a * e else 0.0
            t = (b * s + f) / e
            if t < 0.0:
                s, t = min(max(-c / a, 0.0), 1.0), 0.0
            elif t > 1.0:
                s, t = min(max((b - c) / a, 0.0), 1.0), 1.0
    cax, cay, caz = p1x + d1x * s, p1y + d1y * s, p1z + d1z * s
    cbx, cby, cbz = p2x + d2x * t, p2y + d2y * t, p2z + d2z * t
    gx, gy, gz = cax - cbx, cay - cby, caz - cbz
    length = math.sqrt(gx * gx + gy * gy + gz * gz)
    if length < TOUCH_M:
        a0_, a1_, b0_, b1_ = (np.array([v], dtype=float) for v in (a0, a1, b0, b1))
        c = capsule_capsule(a0_, a1_, np.array([ra]), b0_, b1_, np.array([rb]))
        return float(c.distance[0]), c.point_a[0].tolist(), c.point_b[0].tolist(), c.normal[0].tolist()
    nx, ny, nz = gx / length, gy / length, gz / length
    return (length - ra - rb, [cax - nx * ra, cay - ny * ra, caz - nz * ra],
            [cbx + nx * rb, cby + ny * rb, cbz + nz * rb], [nx, ny, nz])


def capsule_box_one(a0: list[float], a1: list[float], ra: float, center: list[float],
                    R_base_box: list[list[float]], half: list[float]
                    ) -> tuple[float, list[float], list[float], list[float]] | None:
    """One separated capsule-box pair in plain floats (`capsule_box` for k = 1, cheaper for a few
    pairs), or None when the segment touches or enters the box (the caller then uses
    `capsule_box`, whose candidate set also covers the inside).

    a0, a1 : segment end points, base frame, m; ra : radius, m; center : box centre, base frame;
    R_base_box : 3 rows of 3, box axes as columns; half : half edge lengths, m.
    Returns (distance, point_a, point_b, normal from b to a), as `capsule_box`.
    Method: outside the box the squared distance along the segment is a convex piecewise quadratic
    whose pieces end where the segment crosses a face plane; on each piece (active faces read at
    its mid-point) the quadratic's vertex, clamped to the piece, is its minimum; the least of them
    is the minimum over the segment (the same argument as `capsule_box`, without the inside part).
    """
    (r00, r01, r02), (r10, r11, r12), (r20, r21, r22) = R_base_box
    a0x, a0y, a0z = a0
    cx, cy, cz = center
    px, py, pz = a0x - cx, a0y - cy, a0z - cz
    vx, vy, vz = a1[0] - a0x, a1[1] - a0y, a1[2] - a0z
    # segment in box coordinates: a + t u, t in [0, 1] (written out per axis: the same float operations
    # as a loop over the axes, without its per-iteration overhead)
    ax, ay, az = (r00 * px + r10 * py + r20 * pz, r01 * px + r11 * py + r21 * pz,
                  r02 * px + r12 * py + r22 * pz)
    ux, uy, uz = (r00 * vx + r10 * vy + r20 * vz, r01 * vx + r11 * vy + r21 * vz,
                  r02 * vx + r12 * vy + r22 * vz)
    hx, hy, hz = half
    ts = [0.0, 1.0]
    if ux != 0.0:
        t = (hx - ax) / ux
        if 0.0 < t < 1.0:
            ts.append(t)
        t = (-hx - ax) / ux
        if 0.0 < t < 1.0:
            ts.append(t)
    if uy != 0.0:
        t = (hy - ay) / uy
        if 0.0 < t < 1.0:
            ts.append(t)
        t = (-hy - ay) / uy
        if 0.0 < t < 1.0:
            ts.append(t)
    if uz != 0.0:
        t = (hz - az) / uz
        if 0.0 < t < 1.0:
            ts.append(t)
        t = (-hz - az) / uz
        if 0.0 < t < 1.0:
            ts.append(t)
    ts.sort()
    uxx, uyy, uzz = ux * ux, uy * uy, uz * uz
    best_f, best_t = math.inf, 0.0
    lo = ts[0]
    for hi in ts[1:]:
        mid = 0.5 * (lo + hi)
        num = den = 0.0
        x = ax + ux * mid
        if x > hx:
            num += ux * (ax - hx)
            den += uxx
        elif x < -hx:
            num += ux * (ax + hx)
            den += uxx
        x = ay + uy * mid
        if x > hy:
            num += uy * (ay - hy)
            den += uyy
        elif x < -hy:
            num += uy * (ay + hy)
            den += uyy
        x = az + uz * mid
        if x > hz:
            num += uz * (az - hz)
            den += uzz
        elif x < -hz:
            num += uz * (az + hz)
            den += uzz
        t = min(max(-num / den, lo), hi) if den > DEGENERATE_SQ_M2 else lo
        ex = ax + ux * t
        ey = ay + uy * t
        ez = az + uz * t
        ex = ex - hx if ex > hx else (ex + hx if ex < -hx else 0.0)
        ey = ey - hy if ey > hy else (ey + hy if ey < -hy else 0.0)
        ez = ez - hz if ez > hz else (ez + hz if ez < -hz else 0.0)
        f = ex * ex + ey * ey + ez * ez
        if f < best_f:
            best_f, best_t = f, t
        lo = hi
    if best_f < TOUCH_M * TOUCH_M:
        return None
    xx, xy, xz = ax + ux * best_t, ay + uy * best_t, az + uz * best_t
    yx, yy, yz = min(max(xx, -hx), hx), min(max(xy, -hy), hy), min(max(xz, -hz), hz)
    length = math.sqrt(best_f)
    nx, ny, nz = (xx - yx) / length, (xy - yy) / length, (xz - yz) / length
    normal = [r00 * nx + r01 * ny + r02 * nz, r10 * nx + r11 * ny + r12 * nz, r20 * nx + r21 * ny + r22 * nz]
    point_b = [cx + r00 * yx + r01 * yy + r02 * yz, cy + r10 * yx + r11 * yy + r12 * yz,
               cz + r20 * yx + r21 * yy + r22 * yz]
    point_a = [a0x + (a1[0] - a0x) * best_t - normal[0] * ra, a0y + (a1[1] - a0y) * best_t - normal[1] * ra,
               a0z + (a1[2] - a0z) * best_t - normal[2] * ra]
    return length - ra, point_a, point_b, normal
