"""Tool speed caps and the stopping ramp: direction kept, caps met, accelerations bounded, and the stop
time equal to max_i |qd_i| / a_max_i rounded up to whole ticks (kinematics of constant deceleration,
common practice)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from twistrate.service.motion import ramp_to_rest, speed_cap_factor

vec = st.lists(st.floats(-5.0, 5.0), min_size=3, max_size=3).map(np.array)


@settings(max_examples=150, deadline=None, derandomize=True)
@given(vec, vec, vec, st.floats(0.01, 2.0), st.floats(0.01, 3.0))
def test_speed_cap_meets_every_cap_and_is_tight(v, w, p, vmax, wmax):
    s = speed_cap_factor(v, w, p, vmax, wmax)
    assert 0.0 < s <= 1.0
    vt = v - np.cross(w, p)  # rigid body: v_ref = v_tool + w x p
    tol = 1e-9
    assert np.linalg.norm(s * v) <= vmax + tol
    assert np.linalg.norm(s * w) <= wmax + tol
    assert np.linalg.norm(s * vt) <= vmax + tol
    if s < 1.0:  # tight: one of the caps is reached exactly
        reached = [np.linalg.norm(s * v) / vmax, np.linalg.norm(s * w) / wmax, np.linalg.norm(s * vt) / vmax]
        assert max(reached) == pytest.approx(1.0, abs=1e-9)


def test_speed_cap_identity_below_caps():
    assert speed_cap_factor(np.array([0.1, 0, 0]), np.zeros(3), np.zeros(3), 0.25, 1.0) == 1.0


@settings(max_examples=150, deadline=None, derandomize=True)
@given(st.lists(st.floats(-3.0, 3.0), min_size=1, max_size=7), st.sampled_from([0.002, 0.01]),
       st.data())
def test_ramp_bounded_direction_kept_and_stop_time(qd0, period, data):
    qd0 = np.array(qd0)
    a_max = np.array(data.draw(st.lists(st.floats(2.0, 20.0), min_size=qd0.size, max_size=qd0.size)))
    expected = math.ceil(float(np.max(np.abs(qd0) / a_max)) / period - 1e-9) if np.any(qd0) else 0
    qd = qd0.copy()
    ticks = 0
    while np.any(qd != 0.0):
        new = ramp_to_rest(qd, a_max, period)
        assert np.all(np.abs(new - qd) <= a_max * period * (1 + 1e-12))
        if np.any(new):  # same joint-space direction: new is a non-negative multiple of qd0
            k = new @ qd0 / (qd0 @ qd0)
            np.testing.assert_allclose(new, k * qd0, atol=1e-12)
        qd = new
        ticks += 1
        assert ticks <= expected + 1
    assert expected <= ticks <= expected + 1


@settings(max_examples=100, deadline=None, derandomize=True)
@given(st.lists(st.floats(-3.0, 3.0), min_size=1, max_size=7),
       st.lists(st.floats(0.0005, 0.05), min_size=1, max_size=150), st.data())
def test_ramp_follows_the_clock_however_the_time_is_cut(qd0, gaps, data):
    """Irregular calls (late ticks): the rates stay on or under the straight line from qd0 to rest over
    T = max_i |qd0_i| / a_max_i (constant deceleration, common practice), each step within a_max * dt,
    and rest is reached at the first call at or after T, not later."""
    qd0 = np.array(qd0)
    a_max = np.array(data.draw(st.lists(st.floats(2.0, 20.0), min_size=qd0.size, max_size=qd0.size)))
    stop_s = float(np.max(np.abs(qd0) / a_max))
    qd, t = qd0.copy(), 0.0
    for dt in gaps:
        new = ramp_to_rest(qd, a_max, dt)
        t += dt
        assert np.all(np.abs(new - qd) <= a_max * dt * (1 + 1e-12))
        left = max(0.0, 1.0 - t / stop_s) if stop_s > 0 else 0.0
        assert np.all(np.abs(new) <= np.abs(qd0) * left + 1e-9)
        if t >= stop_s * (1 + 1e-9):
            assert not new.any()
        qd = new


def test_ramp_keeps_the_rates_for_no_elapsed_time():
    qd = np.array([0.5, -0.2])
    np.testing.assert_array_equal(ramp_to_rest(qd, np.array([5.0, 5.0]), 0.0), qd)
    np.testing.assert_array_equal(ramp_to_rest(qd, np.array([5.0, 5.0]), -1e-3), qd)
