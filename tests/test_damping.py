"""Damped least squares from one SVD: each damping law against its published formula, the damped
solution against the closed form solved independently, and the exactly singular branch."""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.solver.damping import damping_factor, resting_joint_damping, task_rates
from twistrate.solver.options import SolverOptions
from twistrate.solver.svd import RANK_RTOL, numerical_rank, rank_tolerance, svd_full


def _rates(A: np.ndarray, x: np.ndarray, options: SolverOptions) -> tuple[np.ndarray, float]:
    U, s, Vh = svd_full(A)
    return task_rates(U, s, Vh, numerical_rank(s, rank_tolerance(s)), x, A, options)


def _with_singular_values(rng: np.random.Generator, s: list[float], n: int = 7) -> np.ndarray:
    """(len(s), n) matrix with the given singular values and random singular vectors."""
    m = len(s)
    Uq, _ = np.linalg.qr(rng.normal(size=(m, m)))
    Vq, _ = np.linalg.qr(rng.normal(size=(n, n)))
    return Uq @ np.diag(s) @ Vq[:m]


@pytest.mark.parametrize("lam", [0.005, 0.04, 0.3])
def test_gain_in_every_singular_direction_is_bounded(rng: np.random.Generator, lam: float) -> None:
    # Wampler 1986 (IEEE T-SMC 16(1)); Nakamura & Hanafusa 1986 (ASME JDSMC 108(3)): the damped
    # inverse maps u_i to s_i / (s_i^2 + l^2) v_i, and s / (s^2 + l^2) <= 1 / (2 l), equality at s = l.
    A = _with_singular_values(rng, [1.2, 0.7, 0.3, lam, 0.01, 1e-5])
    U, s, _ = np.linalg.svd(A)  # independent decomposition
    options = SolverOptions(damping="constant", damping_max=lam)
    for i in range(6):
        y, applied = _rates(A, U[:, i], options)
        assert applied == lam
        gain = np.linalg.norm(y)
        assert gain == pytest.approx(s[i] / (s[i] ** 2 + lam**2), rel=1e-9)
        assert gain <= 1.0 / (2.0 * lam) * (1.0 + 1e-12)


@pytest.mark.parametrize("n", [6, 7, 9])
def test_damped_solution_equals_closed_form(rng: np.random.Generator, n: int) -> None:
    # Closed form of damped least squares (Wampler 1986; Nakamura & Hanafusa 1986):
    # q_dot = J^T (J J^T + l^2 I)^-1 x, solved here with numpy.linalg.solve as the independent path.
    lam = 0.05
    options = SolverOptions(damping="constant", damping_max=lam)
    for _ in range(20):
        A = rng.normal(size=(6, n)) * rng.uniform(0.05, 1.0, size=n)
        x = rng.normal(size=6)
        y, _ = _rates(A, x, options)
        expected = A.T @ np.linalg.solve(A @ A.T + lam**2 * np.eye(6), x)
        np.testing.assert_allclose(y, expected, rtol=1e-9, atol=1e-12)


def test_damped_solution_equals_closed_form_when_rank_deficient(rng: np.random.Generator) -> None:
    # Same closed form; J J^T + l^2 I stays regular when J loses rank (the point of damping).
    A = rng.normal(size=(6, 7))
    A[5] = A[4]  # rank 5 exactly
    x = rng.normal(size=6)
    lam = 0.1
    y, _ = _rates(A, x, SolverOptions(damping="constant", damping_max=lam))
    expected = A.T @ np.linalg.solve(A @ A.T + lam**2 * np.eye(6), x)
    np.testing.assert_allclose(y, expected, rtol=1e-9, atol=1e-12)


def test_policy_none_is_the_pseudo_inverse_and_the_exact_inverse_when_square(
    rng: np.random.Generator,
) -> None:
    # Moore-Penrose pseudo-inverse (numpy.linalg.pinv as the reference) for a redundant arm, and the
    # exact solution of J q_dot = x (numpy.linalg.solve) for a square regular J (common practice).
    options = SolverOptions(damping="none")
    A = rng.normal(size=(6, 7))
    x = rng.normal(size=6)
    y, lam = _rates(A, x, options)
    assert lam == 0.0
    np.testing.assert_allclose(y, np.linalg.pinv(A) @ x, rtol=1e-9, atol=1e-12)
    B = rng.normal(size=(6, 6))
    y, _ = _rates(B, x, options)
    np.testing.assert_allclose(y, np.linalg.solve(B, x), rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("w_scale", [0.0, 0.3, 0.9, 1.5])
def test_manipulability_based_damping_law(rng: np.random.Generator, w_scale: float) -> None:
    # Nakamura & Hanafusa 1986: l^2 = k0 (1 - w / w0)^2 for w < w0, else 0, with k0 = l_max^2 and
    # w = sqrt(det(J J^T)) (Yoshikawa 1985), computed here from numpy.linalg.det independently.
    A = _with_singular_values(rng, [1.0, 0.8, 0.5, 0.4, 0.3, 0.2])
    w = float(np.sqrt(np.linalg.det(A @ A.T)))
    w0 = w / w_scale if w_scale > 0 else w * 1e-3
    options = SolverOptions(damping="manipulability", damping_max=0.07, manipulability_threshold=w0)
    _, s, _ = svd_full(A)
    expected = 0.07 * (1.0 - w / w0) if w < w0 else 0.0
    assert damping_factor(s, options) == pytest.approx(expected, rel=1e-9, abs=1e-15)
    _, applied = _rates(A, rng.normal(size=6), options)
    assert applied == pytest.approx(expected, rel=1e-9, abs=1e-15)


@pytest.mark.parametrize("s_min", [0.0, 0.01, 0.03, 0.039, 0.05])
def test_smallest_singular_value_damping_law(rng: np.random.Generator, s_min: float) -> None:
    # Chiaverini 1997 (IEEE TRA 13(3)): l^2 = (1 - (s_min / eps)^2) l_max^2 for s_min < eps, else 0;
    # s_min from numpy.linalg.svd independently.
    A = _with_singular_values(rng, [1.0, 0.8, 0.5, 0.4, 0.3, s_min])
    eps, lmax = 0.04, 0.06
    options = SolverOptions(damping="singular_value", damping_max=lmax, singular_value_threshold=eps)
    sm = float(np.linalg.svd(A, compute_uv=False)[-1])
    expected_sq = (1.0 - (sm / eps) ** 2) * lmax**2 if sm < eps else 0.0
    y, applied = _rates(A, rng.normal(size=6), options)
    assert applied**2 == pytest.approx(expected_sq, rel=1e-9, abs=1e-15)
    assert np.all(np.isfinite(y))


def test_selective_damping_without_clamping_is_the_pseudo_inverse(rng: np.random.Generator) -> None:
    # Buss & Kim 2005 (J. Graphics Tools 10(3)): with every clamp inactive (gamma_max large) selectively
    # damped least squares reduces to the pseudo-inverse (numpy.linalg.pinv as the reference).
    A = rng.normal(size=(6, 7))
    x = 0.01 * rng.normal(size=6)
    y, lam = _rates(A, x, SolverOptions(damping="selective", selective_step_max=1e6))
    np.testing.assert_allclose(y, np.linalg.pinv(A) @ x, rtol=1e-9, atol=1e-12)
    assert lam == 0.0


def test_selective_damping_bounds_each_direction_and_the_sum(rng: np.random.Generator) -> None:
    # Buss & Kim 2005: per singular direction i, gamma_i = min(1, N_i / M_i) gamma_max with
    # N_i = sum over end-effector blocks of ||u_i block||, M_i = s_i^-1 sum_j |v_ji| sum_k ||rho_kj||;
    # each contribution s_i^-1 alpha_i v_i is clamped to max-abs gamma_i and the sum to gamma_max
    # (from memory). N_i, M_i and the clamps are recomputed here from numpy.linalg.svd.
    gmax = 0.2
    A = _with_singular_values(rng, [1.0, 0.8, 0.5, 0.3, 0.05, 0.002])
    x = rng.normal(size=6)
    y, lam = _rates(A, x, SolverOptions(damping="selective", selective_step_max=gmax))
    U, s, Vh = np.linalg.svd(A)
    rho = np.linalg.norm(A[:3], axis=0) + np.linalg.norm(A[3:], axis=0)
    expected = np.zeros(7)
    for i in range(6):
        N = np.linalg.norm(U[:3, i]) + np.linalg.norm(U[3:, i])
        M = np.abs(Vh[i]) @ rho / s[i]
        gamma = min(1.0, N / M) * gmax
        phi = (U[:, i] @ x) / s[i] * Vh[i]
        peak = np.abs(phi).max()
        expected += phi * min(1.0, gamma / peak)
    if np.abs(expected).max() > gmax:
        expected *= gmax / np.abs(expected).max()
    np.testing.assert_allclose(y, expected, rtol=1e-9, atol=1e-12)
    assert np.abs(y).max() <= gmax * (1 + 1e-12)
    assert lam > 0.0  # the weak direction was clamped


@pytest.mark.parametrize("policy", ["none", "constant", "manipulability", "singular_value", "selective"])
def test_exactly_singular_matrix_gives_finite_bounded_rates(rng: np.random.Generator, policy: str) -> None:
    # Exactly singular J (two identical rows, one zero column): the direction at the rank tolerance
    # gets gain 0 under every policy; the damped policies stay within 1/(2 l) per direction
    # (Nakamura & Hanafusa 1986).
    A = rng.normal(size=(6, 7))
    A[5] = A[4]
    A[:, 6] = 0.0
    x = rng.normal(size=6)
    options = SolverOptions(damping=policy, damping_max=0.05)
    y, lam = _rates(A, x, options)
    assert np.all(np.isfinite(y)) and np.isfinite(lam)
    if policy in ("constant", "singular_value", "manipulability"):
        assert lam == pytest.approx(0.05)
        assert np.linalg.norm(y) <= np.linalg.norm(x) / (2 * 0.05) * (1 + 1e-12)
    # the singular direction contributes nothing
    _, s, Vh = np.linalg.svd(A)
    assert s[-1] < 1e-12
    assert abs(Vh[5] @ y) < 1e-9 * (1 + np.linalg.norm(y))


def _resting_reference(A, x, lam, keep, options):
    """The resting joints' damping by its definition: the policy on numpy's SVD of A[:, keep] and the
    damped least-squares rates of those columns (Wampler 1986), resting columns 0."""
    U, s, Vh = np.linalg.svd(A[:, keep])
    lam_e = damping_factor(s, options)
    if lam_e <= lam:
        return None, lam
    k = s.size
    out = np.zeros(A.shape[1])
    out[keep] = Vh[:k].T @ (s / (s * s + lam_e * lam_e) * (U[:, :k].T @ x))
    return out, lam_e


@pytest.mark.parametrize("policy", ["singular_value", "manipulability"])
@pytest.mark.parametrize("n", [7, 6, 4])
def test_resting_joint_damping_matches_the_svd_of_the_free_columns(rng: np.random.Generator, policy: str,
                                                                     n: int) -> None:
    # The Gram-matrix route of resting_joint_damping against numpy's SVD of the free columns, on
    # matrices whose free columns are near singular, exactly singular or well conditioned.
    options = SolverOptions(damping=policy, damping_max=0.04, singular_value_threshold=0.05,
                            manipulability_threshold=1e-3)
    AT = np.full(n, 0.01)
    damped = 0
    for case in range(200):
        m = 6
        A = rng.normal(size=(m, n)) * rng.uniform(0.05, 1.0, n)
        rest = rng.random(n) < 0.3
        if not rest.any() or rest.all():
            rest[:] = False
            rest[int(rng.integers(n))] = True
        keep = np.flatnonzero(~rest)
        if case % 3 == 0:  # free columns near (or exactly) rank deficient
            A[:, keep[0]] = A[:, keep[1:]] @ rng.normal(size=keep.size - 1) + rng.choice([0.0, 1e-9, 1e-3])
        a = rng.normal(size=n)
        speed = np.full(2 * n, 1.0)  # the resting joints' side within one tick of braking (<= A T)
        speed[np.flatnonzero(rest & (a < 0))] = 0.005
        speed[n + np.flatnonzero(rest & (a > 0))] = 0.005
        x = rng.normal(size=m) * 0.2
        lam = float(rng.choice([0.0, 0.01]))
        out, lam_out = resting_joint_damping(A, a, x, lam, speed, AT, options)
        ref, lam_ref = _resting_reference(A, x, lam, keep, options)
        assert lam_out == pytest.approx(lam_ref, rel=1e-9, abs=1e-12)
        if ref is None:
            assert out is a
        else:
            damped += 1
            # the solver leaves out directions with s_i <= RANK_RTOL s_max (svd.py), the definition
            # keeps them: they differ by at most RANK_RTOL s_max |x| / lam_e^2 (module docstring)
            s_max = float(np.linalg.svd(A[:, keep], compute_uv=False)[0])
            band = RANK_RTOL * s_max * float(np.linalg.norm(x)) / lam_ref**2
            np.testing.assert_allclose(out, ref, rtol=1e-8, atol=1e-10 * (1.0 + np.abs(ref).max()) + band)
    assert damped > 20
