"""The simulated arm: lag integration against a reference ODE solver, and its limits under any command."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp

from twistrate.service.simarm import SimArm
from twistrate.solver.errors import InputError

Q_MIN = np.array([-1.0, -2.0, -0.5])
Q_MAX = np.array([1.0, 2.0, 0.5])
V_MAX = np.array([0.5, 1.0, 2.0])


def test_no_lag_integrates_rate_times_dt():
    # Explicit integration of a constant rate: q(t + dt) = q(t) + qd dt (definition of a rate).
    sim = SimArm(Q_MIN, Q_MAX, V_MAX, np.zeros(3))
    sim.command(np.array([0.1, -0.2, 0.3]))
    for _ in range(10):
        sim.step(0.01)
    np.testing.assert_allclose(sim.q, [0.01, -0.02, 0.03], atol=1e-12)
    np.testing.assert_allclose(sim.qd, [0.1, -0.2, 0.3])


def test_lag_matches_reference_ode_solver():
    # Reference: scipy.integrate.solve_ivp on tau * qd' = u - qd, q' = qd (first-order lag, common practice).
    tau, dt = 0.03, 0.002
    u = np.array([0.4, -0.7, 1.5])
    sim = SimArm(Q_MIN * 10, Q_MAX * 10, V_MAX, np.zeros(3), lag_s=tau)
    sim.command(u)
    steps = 50
    for _ in range(steps):
        sim.step(dt)

    def rhs(_t, y):
        qd = y[3:]
        return np.concatenate([qd, (u - qd) / tau])

    ref = solve_ivp(rhs, (0.0, steps * dt), np.zeros(6), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(sim.q, ref.y[:3, -1], atol=1e-8)
    np.testing.assert_allclose(sim.qd, ref.y[3:, -1], atol=1e-8)


def test_commands_clamped_to_velocity_limits_and_non_finite_is_zero():
    sim = SimArm(Q_MIN, Q_MAX, V_MAX, np.zeros(3))
    sim.command(np.array([10.0, np.nan, -np.inf]))
    sim.step(0.01)
    np.testing.assert_allclose(sim.qd, [0.5, 0.0, 0.0])


def test_joint_stops_on_its_limit():
    sim = SimArm(Q_MIN, Q_MAX, V_MAX, np.array([0.99, 0.0, 0.0]))
    sim.command(np.array([0.5, 0.0, 0.0]))
    sim.step(0.1)
    assert sim.q[0] == Q_MAX[0]
    assert sim.qd[0] == 0.0


def test_rejects_bad_construction():
    with pytest.raises(InputError, match="lag_s"):
        SimArm(Q_MIN, Q_MAX, V_MAX, np.zeros(3), lag_s=-1.0)
    with pytest.raises(InputError, match="q0"):
        SimArm(Q_MIN, Q_MAX, V_MAX, np.zeros(2))
    with pytest.raises(InputError, match="command"):
        SimArm(Q_MIN, Q_MAX, V_MAX, np.zeros(3)).command(np.zeros(4))


rates = st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), min_size=3, max_size=3)


@settings(max_examples=100, deadline=None, derandomize=True)
@given(st.lists(rates, min_size=1, max_size=30), st.sampled_from([0.0, 0.005, 0.05]),
       st.floats(1e-4, 0.5))
def test_never_leaves_limits(commands, lag, dt):
    sim = SimArm(Q_MIN, Q_MAX, V_MAX, np.zeros(3), lag_s=lag)
    for cmd in commands:
        sim.command(np.array(cmd))
        sim.step(dt)
        q, qd = sim.q, sim.qd
        assert np.all(np.isfinite(q)) and np.all(np.isfinite(qd))
        assert np.all(q >= Q_MIN) and np.all(q <= Q_MAX)
        assert np.all(np.abs(qd) <= V_MAX)
