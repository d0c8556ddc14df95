"""The one singular value decomposition per tick: full SVD of a small matrix and its numerical rank.

Every per-tick quantity of the rate resolution (damped inverse, null-space projector, damping
laws, health measures, manipulability) is read off one call of `svd_full` on the weighted
Jacobian. For a 6 x 7 matrix the public `numpy.linalg.svd` spends about a third of its time in
Python-level argument handling and error-state setup; `svd_full` calls the same LAPACK-backed
generalised ufunc directly (numpy's `numpy.linalg._umath_linalg.svd_f`, present in numpy 1.x and
2.x) and falls back to `numpy.linalg.svd` if that private entry point is missing or reports a
failure. The same route serves two smaller kernels of the saturated tick: the eigenvalues of a small
symmetric matrix (`symmetric_eigenvalues`) and a small regular solve (`solve_small`).
"""

from __future__ import annotations

import numpy as np

try:  # the gufunc behind numpy.linalg.svd(full_matrices=True); private, hence the fallback
    from numpy.linalg import _umath_linalg as _gufuncs

    _svd_gufunc = _gufuncs.svd_f
    _values_gufunc = _gufuncs.svd
    _eigvalsh_gufunc = _gufuncs.eigvalsh_lo
    _solve1_gufunc = _gufuncs.solve1
except (ImportError, AttributeError):  # pragma: no cover - depends on the numpy build
    _svd_gufunc = _values_gufunc = _eigvalsh_gufunc = _solve1_gufunc = None

#: Relative rank tolerance: singular values <= RANK_RTOL * s_max are treated as zero (the
#: direction is numerically singular). Used for the pseudo-inverse of policy "none", the
#: null-space projector and the rank test of the saturation loop.
RANK_RTOL = 1e-10
#: Absolute floor of the rank tolerance, in the units of the singular values (m for the
#: task-weighted Jacobian): a matrix whose largest singular value is below it has rank 0.
RANK_ATOL = 1e-12


def svd_full(A: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Full SVD A = U[:, :k] diag(s) Vh[:k] of a finite float (m, n) matrix, k = min(m, n).

    Returns U : (m, m), s : (k,) descending, >= 0, Vh : (n, n); rows k.. of Vh span the
    kernel's complement directions beyond the first k (the null space when rank is k).
    Never raises for finite input: if LAPACK does not converge (not observed for small finite
    matrices), returns the rank-0 decomposition (U = I, s = 0, Vh = I), which every caller
    treats as "no task direction can be followed".
    """
    if _svd_gufunc is not None:
        U, s, Vh = _svd_gufunc(A, signature="d->ddd")
        if s[0] == s[0]:  # not NaN: converged (the gufunc fills NaN on failure)
            return U, s, Vh
    try:
        U, s, Vh = np.linalg.svd(A, full_matrices=True)
    except np.linalg.LinAlgError:
        m, n = A.shape
        return np.eye(m), np.zeros(min(m, n)), np.eye(n)
    return U, s, Vh


def singular_values(A: np.ndarray) -> np.ndarray:
    """(min(m, n),) singular values of a finite float (m, n) matrix, descending (no vectors: cheaper).

    Same gufunc route and fallbacks as `svd_full`; zeros if LAPACK does not converge.
    """
    if _values_gufunc is not None:
        s = _values_gufunc(A, signature="d->d")
        if s[0] == s[0]:
            return s
    try:
        return np.linalg.svd(A, compute_uv=False)
    except np.linalg.LinAlgError:
        return np.zeros(min(A.shape))


def rank_tolerance(s: np.ndarray) -> float:
    """Absolute tolerance below which a singular value of `s` (descending) counts as zero."""
    return max(RANK_RTOL * float(s[0]), RANK_ATOL) if s.size else RANK_ATOL


def numerical_rank(s: np.ndarray, tol: float) -> int:
    """Number of singular values of `s` (descending) strictly above `tol`."""
    if s.size == 0 or s[-1] > tol:
        return int(s.size)
    return int(np.count_nonzero(s > tol))


def symmetric_eigenvalues(G: np.ndarray) -> np.ndarray:
    """(p,) eigenvalues, ascending, of a finite symmetric (p, p) matrix (its lower triangle is read).

    The LAPACK-backed gufunc behind `numpy.linalg.eigvalsh`, called directly (as `svd_full`); falls
    back to the public function. Zeros if LAPACK does not converge (not observed for small matrices).
    """
    if _eigvalsh_gufunc is not None:
        w = _eigvalsh_gufunc(G, signature="d->d")
        if w[0] == w[0]:  # not NaN: converged
            return w
    try:
        return np.linalg.eigvalsh(G)
    except np.linalg.LinAlgError:
        return np.zeros(G.shape[0])


def solve_small(M: np.ndarray, b: np.ndarray) -> np.ndarray:
    """M^-1 b (p,) for a small regular (p, p) matrix M (the callers' are positive definite by
    construction), through the gufunc behind `numpy.linalg.solve` when present."""
    if _solve1_gufunc is not None:
        return _solve1_gufunc(M, b, signature="dd->d")
    return np.linalg.solve(M, b)  # pragma: no cover - depends on the numpy build
