"""Property tests of resolve() over seeded random arms (tests/arm_factory.py), configurations and twists.

Invariants (sources beside each): the null-space projector annihilates the Jacobian; without
limits and damping the twist is followed exactly; with limits the twist is only scaled and every
bound holds; no finite input gives a non-finite output; null-space objectives never change the tool
twist; the per-joint bounds stay consistent tick after tick.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from arm_factory import random_arm, random_q
from hypothesis import given, settings
from hypothesis import strategies as st

from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.limits import plan_bounds, rate_bounds
from twistrate.solver.nullspace import projector
from twistrate.solver.options import DAMPING_POLICIES, SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.svd import numerical_rank, rank_tolerance, svd_full

T = 0.002
PROFILE = settings(max_examples=80, deadline=None, derandomize=True)
seeds = st.integers(min_value=0, max_value=2**32 - 1)
NO_LIMITS = SolverOptions(damping="none", limit_gain=0.0, enforce_limits=False)


def _case(seed: int, n_min: int = 2, n_max: int = 9):
    rng = np.random.default_rng(seed)
    arm = random_arm(rng, n=int(rng.integers(n_min, n_max + 1)))
    return rng, arm, random_q(rng, arm)


def _twist(rng: np.random.Generator, scale: float) -> DesiredTwist:
    frame = "tool" if rng.random() < 0.5 else "base"
    point = rng.normal(scale=0.1, size=3) if rng.random() < 0.5 else np.zeros(3)
    return DesiredTwist(rng.normal(scale=scale, size=3), rng.normal(scale=2 * scale, size=3), frame, point)


def _s_min(arm, q) -> float:
    J = geometric_jacobian(arm, forward(arm, q))
    return float(np.linalg.svd(J * np.array([1, 1, 1, 0.3, 0.3, 0.3])[:, None], compute_uv=False)[-1])


@PROFILE
@given(seeds)
def test_projector_annihilates_the_weighted_jacobian(seed: int) -> None:
    # Liegeois 1977: J (I - J+ J) = 0 for the exact pseudo-inverse; here for A = S J D from one SVD.
    rng, arm, q = _case(seed)
    J = geometric_jacobian(arm, forward(arm, q))
    L = rng.uniform(0.05, 1.0)
    d = rng.uniform(0.3, 3.0, size=arm.n)
    A = J * np.array([1, 1, 1, L, L, L])[:, None] * d
    _, s, Vh = svd_full(A)
    P = projector(Vh, numerical_rank(s, rank_tolerance(s)))
    assert np.abs(A @ P).max() <= 1e-9 * (1.0 + s[0])
    np.testing.assert_allclose(P @ P, P, atol=1e-12)  # idempotent (a projector)


@PROFILE
@given(seeds)
def test_twist_is_followed_exactly_without_limits_and_damping(seed: int) -> None:
    # Pseudo-inverse solution of J q_dot = x for a full-row-rank J (Moore-Penrose, common practice).
    rng, arm, q = _case(seed, 6, 9)
    if _s_min(arm, q) < 1e-3:
        return
    r = resolve(arm, q, np.zeros(arm.n), _twist(rng, 0.2), T, NO_LIMITS)
    np.testing.assert_allclose(r.twist_achieved, r.twist_desired, atol=1e-9 * (1 + np.abs(r.qd).max()))
    assert r.scale == 1.0 and r.damping == 0.0 and not r.limits_active.any()


@PROFILE
@given(seeds)
def test_limited_twist_is_scaled_never_bent_and_every_bound_holds(seed: int) -> None:
    # Flacco, De Luca & Khatib 2012/2015: J q_dot = s x with 0 <= s <= 1 and Qmin <= q_dot <= Qmax.
    # The previous rate is within one tick of acceleration of rest, so a feasible scale exists.
    rng, arm, _ = _case(seed, 2, 9)
    frac = rng.choice([0.0005, 0.005, 0.05, 0.5, 0.95, 0.995, 0.9995], size=arm.n)
    q = arm.q_min + (arm.q_max - arm.q_min) * frac
    qd_prev = rng.uniform(-1, 1, size=arm.n) * arm.a_max * T
    tw = _twist(rng, float(rng.choice([0.05, 0.5, 3.0])))
    options = SolverOptions(damping="none", limit_gain=float(rng.choice([0.0, 2.0])),
                            posture_gain=float(rng.choice([0.0, 1.0])))
    r = resolve(arm, q, qd_prev, tw, T, options)
    x_d = resolve(arm, q, qd_prev, tw, T, dataclasses.replace(options, enforce_limits=False, limit_gain=0.0,
                                                               posture_gain=0.0)).twist_achieved
    assert 0.0 <= r.scale <= 1.0
    np.testing.assert_allclose(r.twist_achieved, r.scale * x_d, atol=1e-8 * (1 + np.abs(x_d).max()))
    tol = 1e-12
    q_next = q + r.qd * T
    assert np.all(q_next >= arm.q_min - tol) and np.all(q_next <= arm.q_max + tol)  # position
    assert np.all(np.abs(r.qd) <= arm.v_max + tol)  # velocity
    assert np.all(np.abs(r.qd - qd_prev) <= arm.a_max * T + tol)  # acceleration
    b = rate_bounds(plan_bounds(arm, T), q, qd_prev)  # braking distance
    assert np.all(r.qd >= b.lo - tol) and np.all(r.qd <= b.hi + tol)


@PROFILE
@given(seeds, st.sampled_from(DAMPING_POLICIES), st.booleans())
def test_finite_input_never_gives_non_finite_output(seed: int, policy: str, limits: bool) -> None:
    rng, arm, q = _case(seed)
    q = q + rng.choice([0.0, 0.5, 10.0]) * rng.normal(size=arm.n)  # possibly far beyond the limits
    qd_prev = rng.choice([0.0, 1.0, 1e3]) * rng.normal(size=arm.n)
    tw = _twist(rng, float(rng.choice([0.0, 1e-9, 1.0, 1e6])))
    options = SolverOptions(damping=policy, enforce_limits=limits, limit_gain=1.0, posture_gain=0.5,
                            manipulability_gain=10.0)
    r = resolve(arm, q, qd_prev, tw, T, options)
    for name in ("qd", "twist_desired", "twist_achieved", "J", "singular_values", "U"):
        assert np.all(np.isfinite(getattr(r, name))), name
    assert np.isfinite(r.scale) and np.isfinite(r.damping) and 0.0 <= r.scale <= 1.0


@PROFILE
@given(seeds, st.sampled_from(DAMPING_POLICIES))
def test_null_space_objectives_never_change_the_tool_twist(seed: int, policy: str) -> None:
    # Gradient projection (Liegeois 1977) through the exact projector: J (I - J+ J) q_dot_0 = 0 under
    # every damping policy (the damped J# is never used for the projector).
    rng, arm, q = _case(seed)
    tw = _twist(rng, 0.1)
    bare = SolverOptions(damping=policy, limit_gain=0.0, enforce_limits=False)
    rich = dataclasses.replace(bare, limit_gain=3.0, posture_gain=1.5, manipulability_gain=20.0,
                               posture=tuple(random_q(rng, arm)),
                               joint_weights=tuple(rng.uniform(0.5, 2.0, size=arm.n)))
    base_w = dataclasses.replace(bare, joint_weights=rich.joint_weights)
    r0 = resolve(arm, q, np.zeros(arm.n), tw, T, base_w)
    r1 = resolve(arm, q, np.zeros(arm.n), tw, T, rich)
    scale = 1.0 + np.abs(r1.qd).max()
    np.testing.assert_allclose(r1.twist_achieved, r0.twist_achieved, atol=1e-8 * scale)


@settings(max_examples=30, deadline=None, derandomize=True)
@given(seeds)
def test_rate_bounds_stay_consistent_tick_after_tick(seed: int) -> None:
    # Recursive feasibility of the discrete braking bound (derivation in twistrate.solver.limits): a
    # joint that obeyed its bounds never faces crossing bounds on the next tick, and never passes a
    # limit, whatever the twists asked for.
    rng, arm, q = _case(seed, 2, 9)
    plan = plan_bounds(arm, T)
    options = SolverOptions(limit_gain=0.0)
    n = arm.n
    qd = np.zeros(n)
    for _ in range(60):
        b = rate_bounds(plan, q, qd)
        assert np.all(-b.speed[:n] <= b.acc_hi + 1e-12) and np.all(b.acc_lo <= b.speed[n:] + 1e-12)
        r = resolve(arm, q, qd, _twist(rng, 2.0), T, options)
        qd = r.qd
        q = q + qd * T
        assert np.all(q >= arm.q_min - 1e-12) and np.all(q <= arm.q_max + 1e-12)
