"""The task-scaling problem of one tick, solved exactly: the largest scale, and the bounded damped
least-squares rates when no scale exists.

Problem (weighted joint coordinates y, q_dot = D y; Flacco, De Luca & Khatib 2015, IEEE T-RO 31(3),
the task scaling problem):

    maximise s  subject to  A y = s x_d,  lo <= y <= hi,  0 <= s <= 1,

A the (m, n) weighted Jacobian of rank r, x_d = A a the damped twist, a (n,) the damped task rates
(in the row space of A). Design: every solution of A y = s x_d is y = s a + N z with N = Vh[r:]^T the
(n, k) orthonormal null-space basis from the tick's own SVD (k = n - r), so the problem becomes an
LP in w = (s, z), only 1 + k unknowns, with the 2n rate bounds as inequalities. No reduced
Jacobian is ever formed, so no rank test can stop the search early (the greedy loop of
`twistrate.solver.limits.saturate` stopped when dropping a joint lost rank, e.g. the elbow of a
shoulder-elbow-wrist arm, and braked although a scale existed), and A y = s x_d holds by
construction: the twist is scaled along its own direction, never bent.

* k = 0 (6 joints, or fewer with full column rank): the scale interval is a ratio test.
* k = 1 (7-joint arms): z is eliminated exactly (Fourier-Motzkin elimination; Dantzig & Eaves 1973,
  J. Comb. Theory A 14, "Fourier-Motzkin elimination and its dual"): every pair of an upper and a
  lower bound on z gives one linear condition on s, at most n^2 of them; the largest s meeting all
  is the optimum, found by walking down from s = 1 along the pairs that bind (`max_scale_one`:
  usually one or two of them, on Python floats).
* k >= 2: a primal active-set method on the (1 + k)-dimensional LP (Nocedal & Wright 2006,
  "Numerical Optimization", 2nd ed., sections 16.5 and 13; the projected objective as the
  direction, Bland's rule against cycling), with its phase 1 (minimise the largest bound violation
  t, itself an LP started feasible) deciding feasibility.

Secondary goal (the null-space objectives): among the rates of maximal scale, the one nearest the
objective rates: z closest to z_pref = N^T y_0 (so y closest to s a + N N^T y_0, the unconstrained
tick's own choice when s = 1). For k = 1 that is a clip of z_pref into the interval left at s*; for
k >= 2 a least-distance QP with the same active-set method.

No scale (the LP is infeasible: the previous rate cannot reach any task-consistent rate within one
tick of acceleration): `bounded_damped_rates` gives the rates within the bounds whose weighted twist
comes closest to the asked one,

    minimise |A y - x_w|^2 + mu^2 |y - y_null|^2  subject to  lo <= y <= hi,

the Euclidean norm of the task-weighted twist error (m/s; the norm the damped least squares of the
free tick minimises, so with no bound active the answer is the free tick's own rates y_task + y_null
when mu is its damping factor). Euclidean and damped because the solution is then unique and
Lipschitz in the data: where the norm is flat (a singular direction) the damping term decides, so
the rates do not jump between ticks; a max-norm or 1-norm fit would jump between vertices. Solved
in `twistrate.solver.bounded` (the held set guessed, then checked by its KKT conditions; the
active-set method for bound-constrained least squares of Stark & Parker 1995, Comput. Stat. 10,
when the guesses fail; every subproblem regular since mu > 0).
"""

from __future__ import annotations

import numpy as np

from twistrate.solver.bounded import bounded_damped_rates
from twistrate.solver.limits import BoundPlan, active_bits, rate_bounds

#: Slack (weighted rad/s) of the rate bounds inside the LP (rounding; the caller clips into them).
BOUND_TOL = 1e-12
#: Null-space components |N_ij| at most this are treated as 0 (the joint does not move along z_j).
NULL_EPS = 1e-12
#: The k = 1 walk accepts s when Zhi(s) - Zlo(s) >= -ROOT_RTOL (1 + |Zhi| + |Zlo|) (rounding at a root).
ROOT_RTOL = 1e-14
#: Phase 1 accepts a point whose largest bound violation is at most this (weighted rad/s).
FEASIBLE_TOL = 1e-10
#: Relative size below which a projected direction or a multiplier counts as zero (active set).
ACTIVE_RTOL = 1e-12
#: Most iterations of an active-set solve per constraint (Bland's rule terminates far earlier).
ACTIVE_MAX_PER_ROW = 4
#: Smallest damping mu of the bounded least squares (m): keeps the problem strictly convex when
#: the tick's damping factor is 0; its effect on a well-conditioned fit is of order (mu / s_min)^2.
TRACK_DAMPING_MIN = 1e-3
#: Slack (m/s) of the extra inequality rows R y >= r inside the LP (rounding, like BOUND_TOL).
ROW_TOL = 1e-12


def max_scale(
    a: np.ndarray, N: np.ndarray, lo: np.ndarray, hi: np.ndarray, z_pref: np.ndarray | None,
    rows: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[float, np.ndarray] | None:
    """Largest s in [0, 1] with y = s a + N z inside [lo, hi] (module docstring), and that y.

    a : (n,) task rates of the whole damped twist, weighted joint coordinates. N : (n, k)
    orthonormal basis of the null space of A (k >= 0). lo, hi : (n,) rate bounds, lo <= hi.
    z_pref : (k,) preferred null-space coordinates (N^T y_0 of the objectives) or None (zeros).
    rows : optional extra inequality rows (R (p, n), r (p,)) with R y >= r in the same weighted
        coordinates (the keep-out velocity dampers, `twistrate.solver.keepout`: Faverjon &
        Tournassoud 1987, ICRA; Kanoun, Lamiraux & Wieber 2011, IEEE T-RO 27(4)). They join every
        path: the ratio test (k = 0), the elimination (k = 1, as one-sided "joints" whose upper
        bound is implied by the rate bounds) and the active-set LP (k >= 2).
    Returns (s, y (n,)) or None when no s in [0, 1] is feasible. y may exceed the bounds by
    BOUND_TOL (the caller clips).
    """
    k = N.shape[1]
    if k == 1 and rows is None:  # the 7-joint tick: the tolerance is added on Python floats there
        return max_scale_one(a, N[:, 0], lo, hi, 0.0 if z_pref is None else float(z_pref[0]), BOUND_TOL)
    lo_t = lo - BOUND_TOL
    hi_t = hi + BOUND_TOL
    if rows is not None:
        R, r = rows
        r_t = r - ROW_TOL
    if k == 0:
        h, f = np.concatenate((hi_t, -lo_t)), np.concatenate((a, -a))
        if rows is not None:  # R (s a) >= r  <=>  s (-R a) <= -r
            h, f = np.concatenate((h, -r_t)), np.concatenate((f, -R.dot(a)))
        found = _scale_range(h, f)
        if found is None:
            return None
        s = found[1]
        return s, s * a
    if k == 1:
        zp = 0.0 if z_pref is None else float(z_pref[0])
        n = a.shape[0]
        cap = np.abs(R).dot(np.maximum(np.abs(lo_t), np.abs(hi_t))) + 1.0  # R y <= cap for any bounded y
        found = max_scale_one(np.concatenate((a, R.dot(a))), np.concatenate((N[:, 0], R.dot(N[:, 0]))),
                               np.concatenate((lo_t, r_t)), np.concatenate((hi_t, cap)), zp)
        return None if found is None else (found[0], found[1][:n])
    return _max_scale_general(a, N, lo_t, hi_t, np.zeros(k) if z_pref is None else z_pref,
                              None if rows is None else (R, r_t))


def _scale_range(h: np.ndarray, f: np.ndarray) -> tuple[float, float] | None:
    """Interval [s_lo, s_hi] within [0, 1] of s with s f <= h (elementwise; h, f (p,)), or None."""
    up = f > 0.0
    down = f < 0.0
    flat = ~(up | down)
    if flat.any() and h[flat].min() < 0.0:
        return None
    s_hi = min(1.0, float((h[up] / f[up]).min())) if up.any() else 1.0
    s_lo = max(0.0, float((h[down] / f[down]).max())) if down.any() else 0.0
    if s_lo > s_hi:
        return None
    return s_lo, s_hi


def max_scale_one(
    a: np.ndarray, nv: np.ndarray, lo_t: np.ndarray, hi_t: np.ndarray, z_pref: float, tol: float = 0.0,
) -> tuple[float, np.ndarray] | None:
    """k = 1: eliminate z (Fourier-Motzkin), walking the pairs that bind from s = 1 down.

    `max_scale` for k = 1 (also called by the tick directly, `twistrate.solver.resolve`): a : (n,)
    task rates, nv : (n,) the unit null vector of A, z_pref : the preferred null-space coordinate;
    lo_t, hi_t : (n,) the bounds, widened by `tol` here (BOUND_TOL; 0 when the caller widened them).
    Returns (s, y (n,)) or None, as `max_scale`.

    Joint i, signed so that its null-space coefficient g_i = |nv_i| >= 0: l_i <= s f_i + z g_i <= u_i.
    A joint with g_i <= NULL_EPS bounds s alone (l_i <= s f_i <= u_i: a ratio test). The others bound z:
    z <= Zhi(s) = min_j (u_j - s f_j) / g_j and z >= Zlo(s) = max_i (l_i - s f_i) / g_i, so s is
    feasible iff D(s) = Zhi(s) - Zlo(s) >= 0. D is the minimum over the pairs (j, i) of the lines
    (u_j - s f_j) / g_j - (l_i - s f_i) / g_i (the Fourier-Motzkin conditions s F_ij <= H_ij, scaled by
    1 / (g_i g_j)), hence concave and below each line. From the largest s allowed, while D(s) < 0: take
    the pair binding at s; if its line does not fall toward larger s (slope >= 0), it stays negative
    for every smaller s: no scale exists; else move to its root, which no feasible s exceeds (D < 0
    between). Each move leaves a pair behind, so this ends within the n^2 pairs, usually in one or two
    moves, at the same optimum as the full elimination (Dantzig & Eaves 1973). Python floats: a few
    dozen operations on 7 numbers beat the vectorised n^2 products' numpy calls.
    """
    A_, N_, L_, U_ = a.tolist(), nv.tolist(), lo_t.tolist(), hi_t.tolist()
    if tol:
        L_ = [v - tol for v in L_]
        U_ = [v + tol for v in U_]
    s_hi, s_lo = 1.0, 0.0
    upper: list[tuple[float, float]] = []  # (alpha, beta): z <= alpha - s beta
    lower: list[tuple[float, float]] = []  # z >= alpha - s beta
    for g, f, low, u in zip(N_, A_, L_, U_, strict=True):
        if g < 0.0:
            g, f, low, u = -g, -f, -u, -low
        if g <= NULL_EPS:
            if f > 0.0:
                s_hi, s_lo = min(s_hi, u / f), max(s_lo, low / f)
            elif f < 0.0:
                s_hi, s_lo = min(s_hi, low / f), max(s_lo, u / f)
            elif low > 0.0 or u < 0.0:
                return None
            continue
        upper.append((u / g, f / g))
        lower.append((low / g, f / g))
    if s_lo > s_hi:
        return None
    s = s_hi
    if not upper:
        return s, s * a
    for _ in range(len(upper) * len(lower) + 2):
        # the binding pair: the least (z, alpha, beta) of the upper lines, the greatest of the lower
        # (explicit loops: the same order as min/max over the tuples, without building them)
        al_h, be_h = upper[0]
        z_hi = al_h - s * be_h
        for al, be in upper:
            v = al - s * be
            if v < z_hi or (v == z_hi and (al < al_h or (al == al_h and be < be_h))):
                z_hi, al_h, be_h = v, al, be
        al_l, be_l = lower[0]
        z_lo = al_l - s * be_l
        for al, be in lower:
            v = al - s * be
            if v > z_lo or (v == z_lo and (al > al_l or (al == al_l and be > be_l))):
                z_lo, al_l, be_l = v, al, be
        if z_hi - z_lo >= -ROOT_RTOL * (1.0 + abs(z_hi) + abs(z_lo)):
            break
        if be_h <= be_l:  # the binding line D = (al_h - al_l) - s (be_h - be_l) never rises leftward
            return None
        s = (al_h - al_l) / (be_h - be_l)  # its root
        if s < s_lo:
            return None
    else:  # pragma: no cover - each move leaves a pair behind, so the loop ends first
        return None
    z = 0.5 * (z_lo + z_hi) if z_lo > z_hi else min(max(z_pref, z_lo), z_hi)
    if s >= 1.0:
        return 1.0, a + z * nv
    return s, s * a + z * nv


def _max_scale_general(
    a: np.ndarray, N: np.ndarray, lo_t: np.ndarray, hi_t: np.ndarray, z_pref: np.ndarray,
    rows: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[float, np.ndarray] | None:
    """k >= 2: phase 1 (least largest violation), phase 2 (max s), then the least-distance QP in z.
    rows : optional (R (p, n), r (p,)), R y >= r, as rows -R M w <= -r beside the rate bounds."""
    k = N.shape[1]
    d = 1 + k
    M = np.concatenate((a[:, None], N), axis=1)  # y = M w, w = (s, z)
    if rows is None:
        G = np.concatenate((M, -M, np.eye(1, d), -np.eye(1, d)))  # M w <= hi, -M w <= -lo, 0 <= s <= 1
        h = np.concatenate((hi_t, -lo_t, [1.0, 0.0]))
    else:
        G = np.concatenate((M, -M, -rows[0].dot(M), np.eye(1, d), -np.eye(1, d)))
        h = np.concatenate((hi_t, -lo_t, -rows[1], [1.0, 0.0]))
    p = G.shape[0] - 2  # the rows of y (bounds and dampers), before the two on s
    # phase 1 in (w, t): G w - t <= h, -t <= 0; start w = (0, z_pref), t = the largest violation
    w0 = np.concatenate(([0.0], z_pref))
    t0 = max(0.0, float((G @ w0 - h).max()))
    G1 = np.concatenate((np.concatenate((G, -np.ones((G.shape[0], 1))), axis=1), -np.eye(1, d + 1, d)))
    h1 = np.concatenate((h, [0.0]))
    c1 = -np.eye(1, d + 1, d)[0]
    w1 = active_set(G1, h1, np.concatenate((w0, [t0])), c=c1)
    if w1[-1] > FEASIBLE_TOL:
        return None
    # phase 2: max s from the feasible point (the violation t <= FEASIBLE_TOL is absorbed in h)
    slack = h + max(0.0, float(w1[-1]))
    w = active_set(G, slack, w1[:-1], c=np.eye(1, d)[0])
    s = min(1.0, max(0.0, float(w[0])))
    # secondary: z nearest z_pref with s fixed (G_z z <= h - s G_s)
    Gz = G[:p, 1:]
    hz = slack[:p] - s * G[:p, 0]
    z = active_set(Gz, hz, w[1:], target=z_pref)
    return s, s * a + N @ z


def active_set(
    G: np.ndarray, h: np.ndarray, w: np.ndarray, c: np.ndarray | None = None, target: np.ndarray | None = None
) -> np.ndarray:
    """Primal active-set method for a small problem over {w : G w <= h}, from a feasible w.

    G : (p, d), h : (p,), w : (d,) feasible start. With `c` (d,): maximise c^T w (LP; bounded
    feasible set assumed). With `target` (d,): minimise |w - target|^2 (least-distance QP). The
    working set holds linearly independent active rows; the step is the objective's gradient
    projected onto their null space (LP) or the exact minimiser there (QP); a zero step with all
    multipliers of the right sign is optimal, else the row with the lowest index among the wrong
    signs leaves (Bland's rule). Feasibility is kept throughout, so the iteration cap (rare,
    degenerate cycling) still returns a feasible point.
    """
    p, d = G.shape
    w = w.copy()
    working: list[int] = []
    lp = c is not None
    for _ in range(ACTIVE_MAX_PER_ROW * (p + d)):
        grad = c if lp else target - w  # type: ignore[operator]
        if working:
            Q, R = np.linalg.qr(G[working].T)  # (d, |W|), (|W|, |W|)
            step = grad - Q @ (Q.T @ grad)
        else:
            Q = R = None
            step = grad.copy()
        scale = 1.0 + float(np.abs(grad).max())
        if float(np.abs(step).max()) <= ACTIVE_RTOL * scale:
            if not working:
                return w
            lam = np.linalg.solve(R, Q.T @ grad)  # G_W^T lam = grad
            wrong = np.flatnonzero(lam < -ACTIVE_RTOL * scale)
            if wrong.size == 0:
                return w
            working.pop(int(min(wrong, key=lambda i: working[i])))
            continue
        rate = G @ step
        room = np.maximum(h - G @ w, 0.0)
        blocking = rate > ACTIVE_RTOL * scale * (1.0 + np.abs(G).max(axis=1))
        blocking[working] = False
        alpha = np.inf if lp else 1.0
        hit = -1
        if blocking.any():
            ratios = np.full(p, np.inf)
            ratios[blocking] = room[blocking] / rate[blocking]
            j = int(ratios.argmin())
            if ratios[j] < alpha:
                alpha, hit = float(ratios[j]), j
        if not np.isfinite(alpha):
            return w  # unbounded direction: cannot happen for the bounded problems here
        w += alpha * step
        if hit >= 0:
            working.append(hit)  # else (QP): the minimiser on the working set, tested next pass
    return w


def bounded_damped_rates_rows(
    A: np.ndarray, x_w: np.ndarray, lo: np.ndarray, hi: np.ndarray, mu: float, y_ref: np.ndarray,
    rows: tuple[np.ndarray, np.ndarray], svd: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> np.ndarray:
    """`bounded_damped_rates` with extra rows R y >= r (R (p, n), r (p,), e.g. keep-out dampers), (n,).

    Phase 1 (an LP in (y, t), the active-set method from the rows-free answer clipped into the
    bounds): the least largest row violation t* within the bounds (0 when the rows can be met; > 0
    only for an overlap no motion can relieve within the bounds, e.g. a zero row with r > 0).
    Then the least-distance QP in u = L^T y (H = A^T A + mu^2 I = L L^T, Cholesky; so the damped
    fit |A y - x_w|^2 + mu^2 |y - y_ref|^2 is |u - L^-1 q|^2 up to a constant) over the bounds and
    the rows relaxed by t*: the rates nearest the asked twist that keep every damper row the
    bounds allow (Nocedal & Wright 2006, section 16.5; the same `active_set`).
    """
    R, r = rows
    n = A.shape[1]
    y0 = bounded_damped_rates(A, x_w, lo, hi, mu, y_ref, svd)
    eye = np.eye(n)
    G = np.concatenate((eye, -eye, -R))
    h = np.concatenate((hi, -lo, -r))
    p = r.shape[0]
    t0 = max(0.0, float((r - R.dot(y0)).max()))
    if t0 > 0.0:  # phase 1: minimise t subject to the bounds and R y + t >= r, t >= 0
        t_col = np.concatenate((np.zeros(2 * n), -np.ones(p)))[:, None]
        G1 = np.concatenate((np.concatenate((G, t_col), axis=1), -np.eye(1, n + 1, n)))
        w1 = active_set(G1, np.concatenate((h, [0.0])), np.concatenate((y0, [t0])), c=-np.eye(1, n + 1, n)[0])
        y0, t = np.minimum(np.maximum(w1[:n], lo), hi), max(0.0, float(w1[n]))
        h[2 * n:] += max(t, float((r - R.dot(y0)).max())) + ROW_TOL
    H = A.T @ A
    H[np.diag_indices(n)] += mu * mu
    Lc = np.linalg.cholesky(H)  # H = Lc Lc^T, regular (mu > 0)
    Li_T = np.linalg.inv(Lc).T  # y = Li_T u
    target = Li_T.T.dot(A.T.dot(x_w) + (mu * mu) * y_ref)  # L^-1 q
    u = active_set(G.dot(Li_T), h, Lc.T.dot(y0), target=target)
    return np.minimum(np.maximum(Li_T.dot(u), lo), hi)


def rest_rates(plan: BoundPlan, q: np.ndarray, qd_prev: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The rates (n,) nearest rest within the tick's bounds, and their `active_bits` (n,) (the tick's
    answer when a huge finite request overflowed)."""
    bounds = rate_bounds(plan, q, qd_prev)
    qd = np.minimum(np.maximum(0.0, bounds.lo), bounds.hi)
    return qd, active_bits(bounds, qd)
