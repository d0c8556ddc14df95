"""Damped least squares from one SVD: the damping laws and the damped task rates they produce.

Notation (one tick): A = S J D is the weighted Jacobian (S = diag(1, 1, 1, L, L, L) task
weighting, D = W^-1/2 joint weighting), A = sum_i s_i u_i v_i^T its SVD, x_w = S x the weighted
desired twist. The task part of the rates in the weighted joint coordinates y (q_dot = D y) is

    y_task = sum_{i < r} g_i v_i u_i^T x_w,

with r the numerical rank (`twistrate.solver.svd`) and g_i the gain of direction i:

* "none": g_i = 1 / s_i, the pseudo-inverse (the exact inverse when A is square and of full rank);
* "constant", "manipulability", "singular_value": g_i = s_i / (s_i^2 + l^2), damped least squares
  (Wampler 1986; Nakamura & Hanafusa 1986), solved from the SVD, never via an explicit inverse.
  The gain in every direction is at most 1 / (2 l). The damping factor l comes from:
  - constant: l = damping_max;
  - manipulability (Nakamura & Hanafusa 1986): l^2 = l_max^2 (1 - w / w0)^2 for w < w0, else 0,
    with w = prod_i s_i the manipulability of A (Yoshikawa 1985);
  - singular_value (Chiaverini 1997): l^2 = (1 - (s_min / eps)^2) l_max^2 for s_min < eps, else 0;
* "selective" (Buss & Kim 2005, "Selectively damped least squares for inverse kinematics"), read
  as a per-tick bound on each singular direction's joint-rate contribution: with alpha_i = u_i^T x_w,
  N_i = ||u_i[:3]|| + ||u_i[3:]||, rho_j = ||A[:3, j]|| + ||A[3:, j]||,
  M_i = s_i^-1 sum_j |v_ji| rho_j, gamma_i = min(1, N_i / M_i) gamma_max, each contribution
  phi_i = s_i^-1 alpha_i v_i is clamped to max-abs gamma_i, and the sum to max-abs gamma_max
  (rad/s; in the weighted coordinates y when joint weights are set). The reported damping is the
  equivalent l of the most attenuated direction: a gain c_i / s_i equals s_i / (s_i^2 + l_i^2)
  for l_i = s_i sqrt(1 / c_i - 1).
"""

from __future__ import annotations

import math

import numpy as np

from twistrate.solver.options import SolverOptions
from twistrate.solver.svd import (
    RANK_ATOL,
    RANK_RTOL,
    numerical_rank,
    solve_small,
    svd_full,
    symmetric_eigenvalues,
)

#: Smallest attenuation factor used when converting selective damping to an equivalent l (keeps
#: the reported damping finite; gamma_max > 0 is required by `twistrate.solver.resolve`).
_ATTENUATION_FLOOR = 1e-300


def damping_factor(s: np.ndarray, options: SolverOptions) -> float:
    """Damping factor l (m) of the policy in `options` for singular values s (descending, m).

    s : (k,) singular values of the weighted Jacobian, k = min(6, n). Returns 0.0 for "none" and
    "selective" (selective damping has no single l; see `task_rates`).
    """
    policy = options.damping
    if policy == "singular_value":
        return _singular_value_law(float(s[-1]), options)
    if policy == "constant":
        return options.damping_max
    if policy == "manipulability":
        w0 = options.manipulability_threshold
        w = math.prod(s.tolist())
        if w >= w0:
            return 0.0
        return options.damping_max * (1.0 - w / w0)
    return 0.0


def _singular_value_law(s_min: float, options: SolverOptions) -> float:
    """Damping factor (m) of the "singular_value" policy for the smallest singular value s_min (m)."""
    eps = options.singular_value_threshold
    if s_min >= eps:
        return 0.0
    return options.damping_max * math.sqrt(1.0 - (s_min / eps) ** 2)


def task_rates(
    U: np.ndarray,
    s: np.ndarray,
    Vh: np.ndarray,
    rank: int,
    x_w: np.ndarray,
    A: np.ndarray,
    options: SolverOptions,
) -> tuple[np.ndarray, float]:
    """Task rates y_task (n,) in the weighted joint coordinates, and the damping applied (m).

    U : (m, m), s : (k,), Vh : (n, n) the full SVD of A (`svd_full`); rank : numerical rank r.
    x_w : (m,) weighted desired twist, base frame, tool point, rows (v, L w), m/s.
    A : (m, n) the weighted Jacobian (read by the selective policy only).
    Directions at or below the rank tolerance get gain 0 under every policy, so the result is
    finite for any finite input, including exactly singular A.
    """
    coef, lam = task_coefficients(U, s, Vh, rank, x_w, A, options)
    return coef.dot(Vh[:rank]), lam


def task_coefficients(
    U: np.ndarray,
    s: np.ndarray,
    Vh: np.ndarray,
    rank: int,
    x_w: np.ndarray,
    A: np.ndarray,
    options: SolverOptions,
) -> tuple[np.ndarray, float]:
    """`task_rates` in the right singular basis: (coef (rank,), damping (m)) with
    y_task = coef @ Vh[:rank], i.e. coef_i = g_i u_i^T x_w (module docstring); same arguments.

    The per-tick caller assembles the whole rate from these and the null-space part in one product
    with Vh (`twistrate.solver.resolve`).
    """
    if rank == 0:
        return np.zeros(0), 0.0
    if options.damping == "selective":
        return _selective(U, s, Vh, rank, x_w, A, options.selective_step_max)
    lam = damping_factor(s, options)
    if rank < s.shape[0]:
        s = s[:rank]
    coef = x_w.dot(U if rank == U.shape[1] else U[:, :rank])
    if lam > 0.0:
        g = s * s
        g += lam * lam
        coef *= s
        coef /= g
    else:
        coef /= s
    return coef, lam


def _selective(
    U: np.ndarray, s: np.ndarray, Vh: np.ndarray, rank: int, x_w: np.ndarray, A: np.ndarray,
    gamma_max: float,
) -> tuple[np.ndarray, float]:
    """Selectively damped task rates (Buss & Kim 2005), see the module docstring, as (coefficients
    (rank,) in the basis Vh[:rank], equivalent damping)."""
    Ur = U[:, :rank]
    Vr = Vh[:rank]
    sr = s[:rank]
    alpha = x_w @ Ur
    N = np.sqrt(np.einsum("ij,ij->j", Ur[:3], Ur[:3])) + np.sqrt(np.einsum("ij,ij->j", Ur[3:], Ur[3:]))
    rho = np.sqrt(np.einsum("ij,ij->j", A[:3], A[:3])) + np.sqrt(np.einsum("ij,ij->j", A[3:], A[3:]))
    absV = np.abs(Vr)
    # gamma_i = min(1, N_i / M_i) gamma_max with M_i = (|v_i| . rho) / s_i.
    Mi_s = absV @ rho  # = M_i * s_i
    gamma = gamma_max * np.minimum(1.0, N * sr / np.maximum(Mi_s, np.finfo(float).tiny))
    phi = alpha / sr  # contribution_i = phi_i * v_i
    peak = np.abs(phi) * absV.max(axis=1)  # max-abs of contribution_i
    c = np.minimum(1.0, gamma / np.maximum(peak, np.finfo(float).tiny))
    coef = phi * c
    y = coef @ Vr
    total = float(np.abs(y).max()) if y.size else 0.0
    if total > gamma_max:
        factor = gamma_max / total
        coef *= factor
        c = c * factor
    worst = float(c.min())
    if worst >= 1.0:
        return coef, 0.0
    i = int(c.argmin())
    return coef, float(sr[i]) * math.sqrt(1.0 / max(worst, _ATTENUATION_FLOOR) - 1.0)


#: Damping policies whose factor grows as the singular values shrink (see `_resting_damping`).
_DAMPING_BY_SIZE = ("singular_value", "manipulability")


def resting_joint_damping(
    A: np.ndarray, a: np.ndarray, x_w: np.ndarray, lam: float, speed: np.ndarray, AT: np.ndarray,
    options: SolverOptions,
) -> tuple[np.ndarray, float]:
    """Damping of the joints the position limits leave free, and the task rates it gives.

    A joint "rests" when the task rate a_i (weighted) pushes it toward a limit it is within one tick
    of braking of (position speed bound on that side <= A T): it cannot help the task any more, and
    the other joints may be near a singularity of their own that the damping of the whole A (lam)
    does not see. Then the damping policy is applied to the singular values of A_e, A without the
    resting columns; if that asks for more damping (lam_e > lam), the task rates become the damped
    least-squares rates of those joints alone (resting joints 0), whose twist A a is the new damped
    twist the scaling problem scales. A : (m, n) weighted Jacobian; a : (n,) damped task rates
    (weighted coordinates); x_w : (m,) weighted asked twist (m/s); lam : the tick's damping (m);
    speed : (2n,) sided position/velocity speed bounds (`twistrate.solver.limits.RateBounds.speed`,
    lower side first); AT : (n,) one tick of acceleration (rad/s or m/s). Returns (a (n,), damping (m)).

    How, for "singular_value" (no SVD of A_e; Golub & Van Loan 2013, "Matrix Computations", 4th ed.,
    section 8.6: the singular values of A_e are the square roots of the eigenvalues of its Gram
    matrix): with p = min(m, n_e), G = A_e A_e^T (m x m) when A_e is wide or square, else A_e^T A_e
    (n_e x n_e); its p eigenvalues are s_e^2. The law reads only s_min^2 (Chiaverini 1997), which the
    Gram matrix gives to an absolute accuracy of eps s_max^2, so the damping is the SVD's to rounding.
    The damped rates A_e^T (G + lam_e^2 I)^-1 x_w (wide) or (G + lam_e^2 I)^-1 A_e^T x_w (tall) are
    the SVD's sum_i s_i / (s_i^2 + lam_e^2) v_i u_i^T x_w; G + lam_e^2 I is well conditioned, its
    smallest eigenvalue s_min^2 + lam_e^2 >= min(eps^2, damping_max^2) (the law raises lam_e as s_min
    falls). The SVD route left out directions with s_i <= RANK_RTOL s_max; they add at most
    RANK_RTOL s_max |x_w| / lam_e^2. "manipulability" keeps the SVD of A_e: its w = prod s_i is linear
    in the smallest singular value, which the Gram matrix gives only to about sqrt(eps) s_max.
    """
    if options.damping not in _DAMPING_BY_SIZE:
        return a, lam  # the other policies never damp more for smaller singular values
    n = a.shape[0]
    # Python floats: the test is a handful of comparisons per joint (cheaper than numpy calls on n values)
    a_l, sp, reach = a.tolist(), speed.tolist(), AT.tolist()  # speed and A T in joint units
    keep = []
    for i in range(n):
        v = a_l[i]
        if not ((v < 0.0 and sp[i] <= reach[i]) or (v > 0.0 and sp[n + i] <= reach[i])):
            keep.append(i)
    n_e = len(keep)
    if n_e in (0, n):
        return a, lam
    if options.damping != "singular_value":
        return _resting_by_svd(A[:, keep], keep, a, x_w, lam, options)
    wide = n_e >= A.shape[0]
    if wide:  # A_0: A with the resting columns zeroed, so A_0 A^T = A_e A_e^T and A_0^T w is 0 there
        on = [0.0] * n
        for i in keep:
            on[i] = 1.0
        A_0 = A * on
        G = A_0.dot(A.T)
    else:
        A_e = A[:, keep]
        G = A_e.T.dot(A_e)
    # the smallest eigenvalue, s_min^2 to rounding (it may dip below 0 by about eps s_max^2)
    lam_e = _singular_value_law(math.sqrt(max(symmetric_eigenvalues(G).item(0), 0.0)), options)
    if lam_e <= lam:
        return a, lam
    G.ravel()[:: G.shape[0] + 1] += lam_e * lam_e  # (a view: G is contiguous)
    if wide:
        return solve_small(G, x_w).dot(A_0), lam_e
    out = np.zeros(n)
    out[keep] = solve_small(G, x_w.dot(A_e))
    return out, lam_e


def _resting_by_svd(
    A_e: np.ndarray, keep: list[int], a: np.ndarray, x_w: np.ndarray, lam: float, options: SolverOptions,
) -> tuple[np.ndarray, float]:
    """`resting_joint_damping` from a full SVD of A_e (m, n_e), the columns `keep` of A (same
    arguments and result)."""
    U_e, s_e, Vh_e = svd_full(A_e)
    lam_e = damping_factor(s_e, options)
    if lam_e <= lam:
        return a, lam
    r = numerical_rank(s_e, max(RANK_RTOL * float(s_e[0]), RANK_ATOL)) if s_e.size else 0
    s_r = s_e if r == s_e.size else s_e[:r]
    coef = x_w.dot(U_e[:, :r]) if r < U_e.shape[1] else x_w.dot(U_e)
    coef *= s_r / (s_r * s_r + lam_e * lam_e)
    out = np.zeros(a.shape[0])
    out[keep] = coef.dot(Vh_e[:r])
    return out, lam_e
