"""The image-based law of a frame's points on plain Python floats: the servo's per-frame path.

Same law as interaction.estimate + laws.ibvs_twist (the numpy reference, checked against finite
differences): e = s - s* in normalised coordinates, L_hat = w_c L_e(x, y, Z) + w_d L_e*(x*, y*, Z*)
(Chaumette & Hutchinson 2006, eq. (11) and "Approximating the interaction matrix"; (w_c, w_d) = (1, 0)
`current`, (0, 1) `desired`, (1/2, 1/2) `mean`), and the camera twist direction L_hat^+ e, here as the
solution of the normal equations (L_hat^T L_hat) x = L_hat^T e by Cholesky (Golub & Van Loan,
"Matrix Computations", 4th ed. 2013, algorithm 4.2.1 and section 5.3.3).

Why not numpy: with 4 to 10 points every numpy call costs more in dispatch than its arithmetic, and
after the process has waited for a frame (a cold cache) far more: on the 2-core test machine the numpy
path (about 40 calls, one SVD) took about 50 us back to back and 0.65 to 1 ms after a 50 ms sleep,
this one about 17 us and 65 us (bench vservo's docstring, docs/vision.md section 6).

The normal equations square the condition number, so they are used only where that is harmless: the
law refuses (returns None for the direction; the caller then uses the SVD reference) unless
tr(A) tr(A^-1) <= COND_BOUND with A = L_hat^T L_hat. Since cond_2(A) <= tr(A) tr(A^-1), that keeps
cond_2(L_hat) below 1e4, where the solution's relative error is about cond_2(A) * 1.1e-16 <= 1e-8 and
the reference drops no singular value (laws.PINV_RCOND = 1e-6).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

from twistrate.clients.vservo.interaction import DepthChoice

#: Largest tr(A) tr(A^-1) accepted (an upper bound of cond_2(A) = cond_2(L_hat)^2; see the docstring).
COND_BOUND = 1e8
_WEIGHTS = {DepthChoice.CURRENT: (1.0, 0.0), DepthChoice.DESIRED: (0.0, 1.0), DepthChoice.MEAN: (0.5, 0.5)}


class PointErrors(NamedTuple):
    """One frame's law: direction (6,) = L_hat^+ e as a tuple (v, w) of the camera frame (multiply by
    -lambda for the twist, m/s and rad/s), or None (ill-conditioned: use the SVD reference); error_norm
    |e| (normalised, unitless); mean_px / max_px: mean and largest pixel distance |p - p*|; ok False when
    a pixel or depth was not finite (or a depth not > 0): nothing else is then meaningful."""

    direction: tuple[float, ...] | None
    error_norm: float
    mean_px: float
    max_px: float
    ok: bool


class PointLaw:
    """The law for one goal: fx, fy, cx, cy (px); goal pixels (K, 2) px and depths (K,) m (> 0) as
    sequences, in the goal's order; depth: which interaction matrix estimate."""

    def __init__(self, fx: float, fy: float, cx: float, cy: float, goal_pixels: Sequence[Sequence[float]],
                 goal_depths: Sequence[float], depth: DepthChoice) -> None:
        self._ifx, self._ify, self._cx, self._cy = 1.0 / fx, 1.0 / fy, float(cx), float(cy)
        wc, wd = _WEIGHTS[DepthChoice(depth)]
        self._wc = wc
        rows = []
        for (us, vs), zs in zip(goal_pixels, goal_depths, strict=True):
            us, vs, zs = float(us), float(vs), float(zs)
            x, y, a = (us - cx) / fx, (vs - cy) / fy, 1.0 / zs
            # u*, v*, Z*, and w_d times the entries of the desired point's rows of eq. (11) that vary
            rows.append((us, vs, zs, wd * a, wd * x * a, wd * y * a, wd * x * y, wd * x * x, wd * y * y,
                         wd * x, wd * y))
        self._rows = tuple(rows)

    @property
    def size(self) -> int:
        return len(self._rows)

    def __call__(self, pixels: Sequence[Sequence[float]], depths: Sequence[float] | None,
                 rows: Sequence[int] | None = None) -> PointErrors:
        """The law for M >= 1 points: pixels (M, 2) (u, v) px, depths (M,) m or None (the goal's depths
        are used at the current points, as interaction.estimate does), rows (M,): the goal row of each
        point (None: the whole goal in its order)."""
        ifx, ify, cx, cy, wc = self._ifx, self._ify, self._cx, self._cy, self._wc
        goal = self._rows if rows is None else [self._rows[k] for k in rows]
        if depths is None:
            depths = [g[2] for g in goal]
        # A = L^T L (upper triangle; A01 = 0: column 0 is zero in y rows, column 1 in x rows), b = L^T e
        a00 = a02 = a03 = a04 = a05 = a11 = a12 = a13 = a14 = a15 = 0.0
        a22 = a23 = a24 = a25 = a33 = a34 = a35 = a44 = a45 = a55 = 0.0
        b0 = b1 = b2 = b3 = b4 = b5 = 0.0
        ee = dsum = dmax = 0.0
        ok = True
        for (u, v), z, (us, vs, _, sa, sxa, sya, sxy, sxx, syy, sx, sy) in zip(pixels, depths, goal,
                                                                              strict=True):
            if not 0.0 < z < math.inf:
                ok = False
                break
            du, dv = u - us, v - vs
            dist = math.sqrt(du * du + dv * dv)
            dsum += dist
            if dist > dmax:
                dmax = dist
            ex, ey = du * ifx, dv * ify
            ee += ex * ex + ey * ey
            x, y = (u - cx) * ifx, (v - cy) * ify
            h = wc / z
            xy = wc * x * y
            # the x row (l0, 0, l2, l3, l4, l5) and the y row (0, l0, m2, m3, -l3, m5) of L_hat
            l0 = -(h + sa)
            l2 = x * h + sxa
            l3 = xy + sxy
            l4 = -(1.0 + wc * x * x + sxx)
            l5 = wc * y + sy
            m2 = y * h + sya
            m3 = 1.0 + wc * y * y + syy
            m5 = -(wc * x + sx)
            a00 += l0 * l0
            a02 += l0 * l2
            a03 += l0 * l3
            a04 += l0 * l4
            a05 += l0 * l5
            a11 += l0 * l0
            a12 += l0 * m2
            a13 += l0 * m3
            a14 -= l0 * l3
            a15 += l0 * m5
            a22 += l2 * l2 + m2 * m2
            a23 += l2 * l3 + m2 * m3
            a24 += l2 * l4 - m2 * l3
            a25 += l2 * l5 + m2 * m5
            a33 += l3 * l3 + m3 * m3
            a34 += l3 * l4 - m3 * l3
            a35 += l3 * l5 + m3 * m5
            a44 += l4 * l4 + l3 * l3
            a45 += l4 * l5 - l3 * m5
            a55 += l5 * l5 + m5 * m5
            b0 += l0 * ex
            b1 += l0 * ey
            b2 += l2 * ex + m2 * ey
            b3 += l3 * ex + m3 * ey
            b4 += l4 * ex - l3 * ey
            b5 += l5 * ex + m5 * ey
        n = len(goal)
        if not ok or not math.isfinite(dsum) or n == 0:
            return PointErrors(None, math.nan, math.nan, math.nan, False)
        direction = None
        if 2 * n >= 6:
            direction = _solve(a00, 0.0, a02, a03, a04, a05, a11, a12, a13, a14, a15, a22, a23, a24, a25, a33,
                               a34, a35, a44, a45, a55, b0, b1, b2, b3, b4, b5)
        return PointErrors(direction, math.sqrt(ee), dsum / n, dmax, True)


def _solve(a00, a01, a02, a03, a04, a05, a11, a12, a13, a14, a15,
           a22, a23, a24, a25, a33, a34, a35, a44, a45, a55,
           b0, b1, b2, b3, b4, b5) -> tuple[float, ...] | None:
    """x (6,) with A x = b for a symmetric (6, 6) A given by its upper triangle a_ij (i <= j), by
    Cholesky A = R^T R (R upper triangular); None when A is not positive definite or tr(A) tr(A^-1) >
    COND_BOUND, with tr(A^-1) = |W|_F^2, W = R^-1. Straight-line code (generated; a loop over the indices
    costs three times more here): r_ij = R[i][j], w_ij = W[i][j]; x = W (W^T b)."""
    s = a00
    if not s > 0.0:
        return None
    r00 = math.sqrt(s)
    w00 = 1.0 / r00
    r01 = a01 * w00
    r02 = a02 * w00
    r03 = a03 * w00
    r04 = a04 * w00
    r05 = a05 * w00
    s = a11 - r01 * r01
    if not s > 0.0:
        return None
    r11 = math.sqrt(s)
    w11 = 1.0 / r11
    r12 = (a12 - r01 * r02) * w11
    r13 = (a13 - r01 * r03) * w11
    r14 = (a14 - r01 * r04) * w11
    r15 = (a15 - r01 * r05) * w11
    s = a22 - r02 * r02 - r12 * r12
    if not s > 0.0:
        return None
    r22 = math.sqrt(s)
    w22 = 1.0 / r22
    r23 = (a23 - r02 * r03 - r12 * r13) * w22
    r24 = (a24 - r02 * r04 - r12 * r14) * w22
    r25 = (a25 - r02 * r05 - r12 * r15) * w22
    s = a33 - r03 * r03 - r13 * r13 - r23 * r23
    if not s > 0.0:
        return None
    r33 = math.sqrt(s)
    w33 = 1.0 / r33
    r34 = (a34 - r03 * r04 - r13 * r14 - r23 * r24) * w33
    r35 = (a35 - r03 * r05 - r13 * r15 - r23 * r25) * w33
    s = a44 - r04 * r04 - r14 * r14 - r24 * r24 - r34 * r34
    if not s > 0.0:
        return None
    r44 = math.sqrt(s)
    w44 = 1.0 / r44
    r45 = (a45 - r04 * r05 - r14 * r15 - r24 * r25 - r34 * r35) * w44
    s = a55 - r05 * r05 - r15 * r15 - r25 * r25 - r35 * r35 - r45 * r45
    if not s > 0.0:
        return None
    r55 = math.sqrt(s)
    w55 = 1.0 / r55
    w01 = -(r01 * w11) * w00
    w12 = -(r12 * w22) * w11
    w02 = -(r01 * w12 + r02 * w22) * w00
    w23 = -(r23 * w33) * w22
    w13 = -(r12 * w23 + r13 * w33) * w11
    w03 = -(r01 * w13 + r02 * w23 + r03 * w33) * w00
    w34 = -(r34 * w44) * w33
    w24 = -(r23 * w34 + r24 * w44) * w22
    w14 = -(r12 * w24 + r13 * w34 + r14 * w44) * w11
    w04 = -(r01 * w14 + r02 * w24 + r03 * w34 + r04 * w44) * w00
    w45 = -(r45 * w55) * w44
    w35 = -(r34 * w45 + r35 * w55) * w33
    w25 = -(r23 * w35 + r24 * w45 + r25 * w55) * w22
    w15 = -(r12 * w25 + r13 * w35 + r14 * w45 + r15 * w55) * w11
    w05 = -(r01 * w15 + r02 * w25 + r03 * w35 + r04 * w45 + r05 * w55) * w00
    t0 = w00 * w00 + w01 * w01 + w02 * w02 + w03 * w03 + w04 * w04 + w05 * w05
    t1 = w11 * w11 + w12 * w12 + w13 * w13 + w14 * w14 + w15 * w15
    t2 = w22 * w22 + w23 * w23 + w24 * w24 + w25 * w25
    t3 = w33 * w33 + w34 * w34 + w35 * w35
    t4 = w44 * w44 + w45 * w45
    t5 = w55 * w55
    trace = a00 + a11 + a22 + a33 + a44 + a55
    if not trace * (t0 + t1 + t2 + t3 + t4 + t5) <= COND_BOUND:
        return None
    y0 = w00 * b0
    y1 = w01 * b0 + w11 * b1
    y2 = w02 * b0 + w12 * b1 + w22 * b2
    y3 = w03 * b0 + w13 * b1 + w23 * b2 + w33 * b3
    y4 = w04 * b0 + w14 * b1 + w24 * b2 + w34 * b3 + w44 * b4
    y5 = w05 * b0 + w15 * b1 + w25 * b2 + w35 * b3 + w45 * b4 + w55 * b5
    x0 = w00 * y0 + w01 * y1 + w02 * y2 + w03 * y3 + w04 * y4 + w05 * y5
    x1 = w11 * y1 + w12 * y2 + w13 * y3 + w14 * y4 + w15 * y5
    x2 = w22 * y2 + w23 * y3 + w24 * y4 + w25 * y5
    x3 = w33 * y3 + w34 * y4 + w35 * y5
    x4 = w44 * y4 + w45 * y5
    x5 = w55 * y5
    return (x0, x1, x2, x3, x4, x5)
