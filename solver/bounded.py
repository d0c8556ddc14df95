"""The bounded damped least squares of a tick with no task scale (`twistrate.solver.scaling`):

    minimise |A y - x_w|^2 + mu^2 |y - y_ref|^2  subject to  lo <= y <= hi,

a strictly convex quadratic over a box (mu > 0), so its minimiser is unique and the KKT conditions
are sufficient: a held set B (joints fixed at a bound, the others free) whose minimiser keeps the
free joints inside their bounds and has every held multiplier of the right sign is the answer,
however it was found. With the normal matrix H = A^T A + mu^2 I, q = A^T x_w + mu^2 y_ref and its
inverse P, the minimiser with B held at values v_B is y* + P[:, B] lam, lam = P_BB^-1 (v_B - y*_B)
(y* = P q the unconstrained minimiser), and lam is the gradient at the held joints (H P = I), i.e.
their multipliers: at a lower bound lam_i >= 0, at an upper bound lam_i <= 0.

The inverse and the unconstrained minimiser come from an SVD of A (the tick's own, passed in, or one
computed here): with A = U S V^T, H = V (S^T S + mu^2 I) V^T, so P = V diag(g) V^T with g_i =
1 / (s_i^2 + mu^2) (s_i = 0 beyond min(m, n)) and y* = V diag(g) (S^T U^T x_w + mu^2 V^T y_ref): no
inverse of H is formed, and P is accurate to rounding of its largest entry whatever H's condition
(V is orthogonal to rounding; g is exact).

How the held set is found (every path ends in the held set's own minimiser from the smaller of two
regular systems, `_held_minimiser`, so the answer depends only on the held set):

1. y* inside the bounds: done (y* itself).
2. One joint held (the common case when the twist asks far beyond a box of one tick of
   acceleration): each joint y* violates, held at the bound it violates; the minimiser is then
   y* + P[:, i] (v_i - y*_i) / P_ii and its multiplier has the right sign by construction, so the
   guess holds when the others stay inside.
3. The primal-dual active-set iteration (Hintermueller, Ito & Kunisch 2003, SIAM J. Optim. 13(3),
   "The primal-dual active set strategy as a semismooth Newton method") from every violated joint
   held: release the held joints with a wrong multiplier and hold the free joints out of bounds,
   all at once, until nothing changes; at most PDAS_MAX_PASSES passes (it need not terminate for a
   normal matrix that is not an M-matrix, hence the cap).
4. Else the step method (Stark & Parker 1995, Comput. Stat. 10, "Bounded-variable least-squares:
   an algorithm and applications"): from y* clipped (the clipped joints held) each pass steps
   toward the minimiser of the held set and holds the first joint that meets a bound, or, at that
   minimiser, releases every held joint whose multiplier points inward (all at once; each step
   descends and stays inside the bounds; the pass cap bounds the rare degenerate zig-zag).

Steps 2 and 3 run on Python floats: for n <= 9 joints a pass is a few dozen multiplications, far
cheaper than the numpy calls it would take on arrays of 7 numbers. H and q (step 3 on, and the release
tolerance) are formed only when step 2 does not answer.
"""

from __future__ import annotations

import numpy as np

from twistrate.solver.svd import svd_full

try:  # the LAPACK gufunc behind numpy.linalg.solve (private, hence the fallback; see svd.py)
    from numpy.linalg import _umath_linalg as _gufuncs

    _solve1 = _gufuncs.solve1
except (ImportError, AttributeError):  # pragma: no cover - depends on the numpy build
    _solve1 = None

#: Relative size below which a multiplier counts as zero (release test of a held joint).
RELEASE_RTOL = 1e-12
#: Most passes of the primal-dual active-set iteration (step 3), then the step method.
PDAS_MAX_PASSES = 8
#: Most passes of the step method per joint (Bland-like release terminates far earlier).
STEP_MAX_PER_JOINT = 8


def bounded_damped_rates(
    A: np.ndarray, x_w: np.ndarray, lo: np.ndarray, hi: np.ndarray, mu: float, y_ref: np.ndarray,
    svd: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None, z_ref: np.ndarray | None = None,
) -> np.ndarray:
    """argmin |A y - x_w|^2 + mu^2 |y - y_ref|^2 over lo <= y <= hi (module docstring), (n,).

    A : (m, n) weighted Jacobian; x_w : (m,) asked twist, task-weighted (m/s); lo, hi : (n,) bounds,
    lo <= hi (lo == hi: a pinned joint, always held); mu : damping (m), > 0; y_ref : (n,) the
    null-space objective rates (zeros for none), or None with z_ref. svd : the full SVD (U (m, m),
    s (min(m, n),) descending, Vh (n, n)) of A (`twistrate.solver.svd.svd_full`), or None to compute
    it here. z_ref : (n - r,) with the SVD and y_ref None: y_ref = Vh[r:]^T z_ref, the objective rates
    given by their null-space coordinates (so V^T y_ref = (0, z_ref) exactly, and y_ref itself is
    formed only if step 2 does not answer).
    """
    n = A.shape[1]
    U, s, Vh = svd_full(A) if svd is None else svd
    k = s.shape[0]
    mu2 = mu * mu
    # y* = V c with c_i = g_i (s_i u_i^T x_w + mu^2 v_i^T y_ref), g_i = 1 / (s_i^2 + mu^2)
    ux = x_w.dot(U).tolist()
    if y_ref is not None:
        vy = Vh.dot(y_ref).tolist()
    elif z_ref is not None:
        vy = [0.0] * (n - z_ref.shape[0]) + z_ref.tolist()
    else:
        vy = [0.0] * n
    sv = s.tolist()
    g = [0.0] * n
    c = [0.0] * n
    for i in range(n):
        si = sv[i] if i < k else 0.0
        gi = 1.0 / (si * si + mu2)
        g[i] = gi
        c[i] = gi * (si * ux[i] + mu2 * vy[i]) if i < k else vy[i]
    y_star = np.dot(c, Vh)
    ys = y_star.tolist()
    lo_l, hi_l = lo.tolist(), hi.tolist()
    for i in range(n):
        if not lo_l[i] <= ys[i] <= hi_l[i]:
            break
    else:
        return y_star
    P = (Vh.T * g).dot(Vh)
    normal = _Normal(A, x_w, mu2, y_ref, z_ref, Vh)
    found = _guess_held(P.tolist(), normal, ys, lo_l, hi_l)
    if found is not None:  # its free joints were checked inside their bounds, the held ones are on them
        return np.array(found[1])
    H, q, tol = normal.lists()
    y_clip = np.minimum(np.maximum(y_star, lo), hi)
    held_mask, y_clip = _held_by_steps(P, y_star, y_clip, np.flatnonzero(y_clip != y_star), lo, hi, tol)
    held = dict(zip(np.flatnonzero(held_mask).tolist(), y_clip[held_mask].tolist(), strict=True))
    y = _held_minimiser(P.tolist(), H, ys, q, held, sorted(held), [i for i in range(n) if i not in held])[0]
    for i in range(n):
        if i not in held:
            y[i] = min(max(y[i], lo_l[i]), hi_l[i])  # rounding only: the free joints are inside
    return np.array(y)


class _Normal:
    """The normal matrix H = A^T A + mu^2 I (n, n), the right-hand side q = A^T x_w + mu^2 y_ref (n,)
    and the release tolerance of a multiplier, as lists, formed on first use (step 3 on)."""

    __slots__ = ("_args", "_lists")

    def __init__(self, A: np.ndarray, x_w: np.ndarray, mu2: float, y_ref: np.ndarray | None,
                 z_ref: np.ndarray | None, Vh: np.ndarray) -> None:
        self._args = (A, x_w, mu2, y_ref, z_ref, Vh)
        self._lists: tuple[list[list[float]], list[float], float] | None = None

    def lists(self) -> tuple[list[list[float]], list[float], float]:
        if self._lists is None:
            A, x_w, mu2, y_ref, z_ref, Vh = self._args
            H = A.T.dot(A)
            H.ravel()[:: H.shape[0] + 1] += mu2  # (a view: H is contiguous)
            q = A.T.dot(x_w)
            if y_ref is None and z_ref is not None:
                y_ref = z_ref.dot(Vh[Vh.shape[0] - z_ref.shape[0]:])
            if y_ref is not None:
                q += mu2 * y_ref
            ql = q.tolist()
            self._lists = (H.tolist(), ql, RELEASE_RTOL * (1.0 + max(map(abs, ql))))
        return self._lists


def _guess_held(
    P: list[list[float]], normal: _Normal, ys: list[float], lo: list[float], hi: list[float],
) -> tuple[dict[int, float], list[float]] | None:
    """Steps 2 and 3 of the module docstring on Python floats: the optimal held set {joint: bound
    value} and its minimiser (n,), or None when neither finds it. P : (n, n) the inverse normal
    matrix as lists; normal : H, q and the release tolerance on demand; ys : (n,) the unconstrained
    minimiser; lo, hi : (n,) bounds."""
    n = len(ys)
    start: dict[int, float] = {}
    pinned = []
    for i in range(n):
        if lo[i] >= hi[i]:
            pinned.append(i)
            start[i] = lo[i]
        elif ys[i] < lo[i]:
            start[i] = lo[i]
        elif ys[i] > hi[i]:
            start[i] = hi[i]
    if len(pinned) <= 1:  # step 2: a pinned joint, if any, must be the one held
        for i in pinned or list(start):
            v_i = start[i]
            lam = (v_i - ys[i]) / P[i][i]
            y = list(ys)
            for k in range(n):
                y_k = ys[k] + P[k][i] * lam
                if not lo[k] <= y_k <= hi[k] and k != i:
                    break
                y[k] = y_k
            else:
                y[i] = v_i
                return {i: v_i}, y
    H, q, tol = normal.lists()
    held = start
    is_pinned = set(pinned)
    for _ in range(PDAS_MAX_PASSES):  # step 3
        B = sorted(held)
        F = [k for k in range(n) if k not in held]
        y, lam = _held_minimiser(P, H, ys, q, held, B, F)
        changed = False
        nxt: dict[int, float] = {}
        for j, i in enumerate(B):
            wrong = lam[j] > tol if held[i] >= hi[i] else lam[j] < -tol
            if wrong and i not in is_pinned:
                changed = True
            else:
                nxt[i] = held[i]
        for k in F:
            if y[k] < lo[k]:
                nxt[k], changed = lo[k], True
            elif y[k] > hi[k]:
                nxt[k], changed = hi[k], True
        if not changed:
            return held, y
        if not nxt:
            return None
        held = nxt
    return None


def _held_minimiser(
    P: list[list[float]], H: list[list[float]], ys: list[float], q: list[float], held: dict[int, float],
    B: list[int], F: list[int],
) -> tuple[list[float], list[float]]:
    """Minimiser (n,) with the joints B held at `held` values, and their multipliers lam (|B|,), by the
    smaller of two regular systems: P_BB lam = v_B - y*_B (then y = y* + P[:, B] lam), or
    H_FF y_F = q_F - H_FB v_B (then lam = (H y - q)_B, the gradient at the held joints)."""
    n = len(ys)
    if len(B) == 1:  # the step-2 formula: lam = (v_i - y*_i) / P_ii
        i = B[0]
        lam = [(held[i] - ys[i]) / P[i][i]]
        y = [ys[k] + P[k][i] * lam[0] for k in range(n)]
        y[i] = held[i]
        return y, lam
    if len(B) <= len(F):
        lam = _chol_solve([[P[i][j] for j in B] for i in B], [held[i] - ys[i] for i in B])
        y = list(ys)
        for k in F:
            row = P[k]
            v = y[k]
            for j, i in enumerate(B):
                v += row[i] * lam[j]
            y[k] = v
        for i in B:
            y[i] = held[i]
        return y, lam
    y = [0.0] * n
    for i in B:
        y[i] = held[i]
    rhs = []
    for k in F:
        row = H[k]
        v = q[k]
        for i in B:
            v -= row[i] * held[i]
        rhs.append(v)
    for k, v in zip(F, _chol_solve([[H[i][j] for j in F] for i in F], rhs), strict=True):
        y[k] = v
    lam = []
    for i in B:
        row = H[i]
        g = -q[i]
        for k in range(n):
            g += row[k] * y[k]
        lam.append(g)
    return y, lam


def _chol_solve(M: list[list[float]], b: list[float]) -> list[float]:
    """M^-1 b for a small symmetric positive definite M (lists; a principal block of P or H, so
    regular), by Cholesky factorisation M = L L^T and two triangular solves (Golub & Van Loan 2013,
    "Matrix Computations", 4th ed., algorithm 4.2.1). A non-positive pivot (rounding in a nearly
    singular block) is replaced by a tiny positive one: the held set it yields is still checked by
    the caller's KKT test and the polish."""
    m = len(b)
    L = [[0.0] * m for _ in range(m)]
    for j in range(m):
        Lj = L[j]
        d = M[j][j]
        for k in range(j):
            d -= Lj[k] * Lj[k]
        d = d ** 0.5 if d > 0.0 else 1e-300
        Lj[j] = d
        for i in range(j + 1, m):
            Li = L[i]
            v = M[i][j]
            for k in range(j):
                v -= Li[k] * Lj[k]
            Li[j] = v / d
    z = [0.0] * m
    for i in range(m):
        Li = L[i]
        v = b[i]
        for k in range(i):
            v -= Li[k] * z[k]
        z[i] = v / Li[i]
    x = [0.0] * m
    for i in reversed(range(m)):
        v = z[i]
        for k in range(i + 1, m):
            v -= L[k][i] * x[k]
        x[i] = v / L[i][i]
    return x


def _held_by_steps(
    P: np.ndarray, y_star: np.ndarray, y: np.ndarray, held: np.ndarray, lo: np.ndarray, hi: np.ndarray,
    tol: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Step 4 of the module docstring from y (n,) = y* clipped, `held` the clipped joints' indices;
    returns the held mask (n,) bool and the rates (n,) it ended at (held joints on their bounds)."""
    n = y.shape[0]
    pinned = lo >= hi
    inf = np.full(n, np.inf)
    for _ in range(STEP_MAX_PER_JOINT * n + 2):
        if held.size:
            P_B = P[:, held]
            gap = y[held] - y_star[held]
            lam = _spd_solve(P_B[held], gap) if held.size > 1 else gap / P_B[held[0]]
            target = y_star + P_B @ lam
            target[held] = y[held]
        else:
            lam = target = y_star
        step = target - y
        room = np.where(step > 0.0, hi - y, np.where(step < 0.0, lo - y, inf))
        room /= np.where(step != 0.0, step, 1.0)
        room[held] = np.inf
        j = int(room.argmin())
        if room[j] < 1.0:
            y += max(0.0, float(room[j])) * step
            y[j] = hi[j] if step[j] > 0.0 else lo[j]
            held = np.append(held, j)
            continue
        y = target
        if held.size == 0:
            break
        # multiplier lam_i = dF/dy_i of a held joint: at lo it must be >= 0, at hi <= 0. Every held
        # joint with the wrong sign is released at once (the step that follows keeps feasibility)
        viol = np.where(y[held] >= hi[held], lam, -lam)
        release = (viol > tol) & ~pinned[held]
        if not release.any():
            break
        held = held[~release]
    held_mask = np.zeros(n, dtype=bool)
    held_mask[held] = True
    return held_mask, y


def _spd_solve(M: np.ndarray, b: np.ndarray) -> np.ndarray:
    """M^-1 b for a small symmetric positive definite M (regular by construction: mu > 0)."""
    if _solve1 is not None:
        return _solve1(M, b, signature="dd->d")
    return np.linalg.solve(M, b)  # pragma: no cover
