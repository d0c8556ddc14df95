"""The bounded damped least squares of a tick with no task scale (twistrate.solver.bounded) against
scipy.optimize.lsq_linear (method "bvls": Stark & Parker 1995, Comput. Stat. 10, "Bounded-variable
least-squares: an algorithm and applications") on the stacked problem [A; mu I] y ~ [x; mu y_ref],
over random problems of 2 to 9 joints, with narrow boxes far from the unconstrained minimiser (the
shape of a tick after a step of the asked twist) and pinned joints (lo == hi). Every way of finding the
held set is exercised and checked on its own: the unconstrained case, one joint held, the primal-dual
active-set iteration and the step method (the guesses switched off).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import lsq_linear

import twistrate.solver.bounded as bounded
from twistrate.solver.bounded import bounded_damped_rates


def _problem(rng: np.random.Generator):
    n = int(rng.integers(2, 10))
    m = int(rng.integers(1, 7))
    A = rng.normal(size=(m, n)) * rng.uniform(0.05, 1.0, n)
    x = rng.normal(scale=rng.choice([0.1, 1.0, 5.0]), size=m)
    mu = float(rng.choice([1e-3, 1e-2, 0.04]))
    y_ref = rng.normal(scale=0.3, size=n) * (rng.random() < 0.5)
    centre = rng.normal(scale=0.5, size=n)
    half = rng.uniform(0.0, 0.05, n) * rng.choice([1.0, 10.0, 100.0])
    half[rng.random(n) < 0.1] = 0.0  # pinned joints (crossed bounds resolved to one value)
    return A, x, centre - half, centre + half, mu, y_ref


def _reference(A, x, lo, hi, mu, y_ref):
    n = A.shape[1]
    pinned = lo >= hi
    free = ~pinned
    # lsq_linear wants lo < hi: pinned joints are substituted out (common practice)
    M = np.vstack([A, mu * np.eye(n)])
    rhs = np.r_[x, mu * y_ref] - M[:, pinned] @ lo[pinned]
    y = lo.copy()
    if free.any():
        y[free] = lsq_linear(M[:, free], rhs, bounds=(lo[free], hi[free]), method="bvls", tol=1e-15).x
    return y


def _objective(A, x, mu, y_ref, v) -> float:
    return float(np.sum((A @ v - x) ** 2) + mu * mu * np.sum((v - y_ref) ** 2))


def _check(rng: np.random.Generator, cases: int) -> None:
    for _ in range(cases):
        A, x, lo, hi, mu, y_ref = _problem(rng)
        y = bounded_damped_rates(A, x, lo, hi, mu, y_ref)
        assert np.all(y >= lo) and np.all(y <= hi)
        ref = _reference(A, x, lo, hi, mu, y_ref)
        f, f_ref = _objective(A, x, mu, y_ref, y), _objective(A, x, mu, y_ref, ref)
        assert f <= f_ref + 1e-12 * (1.0 + f_ref)
        np.testing.assert_allclose(y, ref, atol=1e-8 * (1.0 + np.abs(ref).max()))


def _paths(monkeypatch: pytest.MonkeyPatch) -> dict[str, int]:
    counts = {"guess": 0, "steps": 0}
    guess, steps = bounded._guess_held, bounded._held_by_steps

    def counted_guess(*args):
        out = guess(*args)
        counts["guess"] += out is not None
        return out

    def counted_steps(*args):
        counts["steps"] += 1
        return steps(*args)

    monkeypatch.setattr(bounded, "_guess_held", counted_guess)
    monkeypatch.setattr(bounded, "_held_by_steps", counted_steps)
    return counts


def test_guesses_match_bvls(monkeypatch: pytest.MonkeyPatch) -> None:
    counts = _paths(monkeypatch)
    _check(np.random.default_rng(41), 400)
    assert counts["guess"] > 200  # the guesses answer most problems


def test_primal_dual_iteration_matches_bvls(monkeypatch: pytest.MonkeyPatch) -> None:
    # Problems no single held joint answers go through the iteration (each pass: one held set solved).
    counts = _paths(monkeypatch)
    held_sizes: list[int] = []
    real = bounded._held_minimiser

    def counted(*args):
        held_sizes.append(len(args[5]))
        return real(*args)

    monkeypatch.setattr(bounded, "_held_minimiser", counted)
    _check(np.random.default_rng(42), 300)
    assert len(held_sizes) > 100 and max(held_sizes) >= 3  # iterations ran, with several joints held
    assert counts["guess"] > counts["steps"]


def test_step_method_matches_bvls(monkeypatch: pytest.MonkeyPatch) -> None:
    counts = _paths(monkeypatch)
    monkeypatch.setattr(bounded, "_guess_held", lambda *args: None)
    _check(np.random.default_rng(43), 300)
    assert counts["steps"] > 200


def test_cholesky_solve_matches_numpy() -> None:
    rng = np.random.default_rng(44)
    for m in range(1, 8):
        X = rng.normal(size=(m, m))
        M = X @ X.T + 0.1 * np.eye(m)
        b = rng.normal(size=m)
        np.testing.assert_allclose(bounded._chol_solve(M.tolist(), b.tolist()), np.linalg.solve(M, b),
                                   rtol=1e-10, atol=1e-12)


def test_objective_rates_by_their_null_space_coordinates_match_bvls() -> None:
    # The tick's call: the SVD of A passed in and the objective rates given as null-space coordinates
    # z (y_ref = Vh[r:]^T z); checked against bvls on y_ref formed explicitly.
    rng = np.random.default_rng(45)
    for _ in range(300):
        A, x, lo, hi, mu, _ = _problem(rng)
        U, s, Vh = np.linalg.svd(A)  # full matrices: Vh (n, n)
        r = int(np.count_nonzero(s > 1e-10 * s[0]))
        z = rng.normal(scale=0.3, size=A.shape[1] - r)
        y = bounded_damped_rates(A, x, lo, hi, mu, None, (U, s, Vh), z)
        ref = _reference(A, x, lo, hi, mu, Vh[r:].T @ z)
        assert np.all(y >= lo) and np.all(y <= hi)
        np.testing.assert_allclose(y, ref, atol=1e-8 * (1.0 + np.abs(ref).max()))
