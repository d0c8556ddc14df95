"""Each step of the teleop axis pipeline on its own, and the pipeline assembled."""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.clients.teleop import axes
from twistrate.clients.teleop.pipeline import AxisPipeline
from twistrate.clients.teleop.profile import profile_from_dict

EPS = 1e-9


def test_rest_offset_is_the_mean_and_is_subtracted() -> None:
    samples = np.array([[10, -4, 0, 2, 0, 1], [12, -6, 0, 2, 2, 1]], dtype=float)
    rest = axes.rest_offset(samples)
    np.testing.assert_allclose(rest, [11, -5, 0, 2, 1, 1])
    np.testing.assert_allclose(axes.subtract_rest([11, -5, 0, 2, 1, 1], rest), np.zeros(6))
    np.testing.assert_allclose(axes.subtract_rest([21, -5, 0, 2, 1, 1], rest), [10, 0, 0, 0, 0, 0])


def test_normalize_divides_by_full_scale_and_clips() -> None:
    u = axes.normalize(np.array([175, -350, 700, 0, -1000, 35]), 350.0)
    np.testing.assert_allclose(u, [0.5, -1.0, 1.0, 0.0, -1.0, 0.1])


def test_remap_takes_source_axes_with_signs() -> None:
    u = np.array([0.1, 0.2, 0.3, 0.4, 0.5, 0.6])
    out = axes.remap(u, [1, 0, 2, 5, 4, 3], [1, -1, -1, 1, 1, -1])
    np.testing.assert_allclose(out, [0.2, -0.1, -0.3, 0.6, 0.5, -0.4])


@pytest.mark.parametrize("d", [0.0, 0.05, 0.1, 0.3, 0.9])
def test_deadband_is_continuous_at_the_edge_and_reaches_full_scale(d: float) -> None:
    # u' = sign(u)(|u| - d)/(1 - d) (common practice): 0 inside the band, 0 at its edge, +-1 at +-1,
    # and the slope outside is 1/(1 - d), so a step eps past the edge moves the output by eps/(1 - d).
    inside = np.linspace(-d, d, 6)
    np.testing.assert_array_equal(axes.deadband(inside, d), np.zeros(6))
    np.testing.assert_allclose(axes.deadband(np.array([1.0, -1.0, d, -d, 0, 0]), d), [1, -1, 0, 0, 0, 0])
    for eps in (1e-3, 1e-6, 1e-9):
        out = axes.deadband(np.array([d + eps, -(d + eps), 0, 0, 0, 0]), d)
        assert abs(out[0]) <= eps / (1.0 - d) * (1 + 1e-6) + EPS
        assert out[0] > 0 > out[1]
    u = np.linspace(-1, 1, 2001)
    out = axes.deadband(u, d)
    assert np.all(np.diff(out) >= -EPS), "deadband must be monotonic"
    # largest jump between neighbours is bounded by the slope times the step: no discontinuity
    assert np.max(np.abs(np.diff(out))) <= (u[1] - u[0]) / (1 - d) + 1e-9


def test_deadband_per_axis() -> None:
    d = np.array([0.0, 0.1, 0.2, 0.3, 0.4, 0.5])
    out = axes.deadband(np.full(6, 0.25), d)
    expected = [(0.25 - di) / (1 - di) if di < 0.25 else 0.0 for di in d]
    np.testing.assert_allclose(out, expected)


@pytest.mark.parametrize("k", [0.0, 0.3, 0.5, 0.7, 1.0])
def test_curve_shape(k: float) -> None:
    # y = (1 - k) u + k u^3 (common practice): odd, fixed at 0 and +-1, slope 1 - k at rest, 1 + 2k at
    # full deflection (dy/du = (1 - k) + 3 k u^2), monotonic for k in [0, 1].
    u = np.linspace(-1, 1, 401)
    y = axes.curve(u, k)
    np.testing.assert_allclose(axes.curve(np.array([0.0, 1.0, -1.0]), k), [0.0, 1.0, -1.0], atol=EPS)
    np.testing.assert_allclose(y, -axes.curve(-u, k), atol=EPS)
    assert np.all(np.diff(y) >= -EPS)
    h = 1e-6  # central finite differences
    slope0 = (axes.curve(np.array([h]), k) - axes.curve(np.array([-h]), k))[0] / (2 * h)
    assert slope0 == pytest.approx(1 - k, abs=1e-6)
    slope1 = (axes.curve(np.array([1.0]), k) - axes.curve(np.array([1.0 - h]), k))[0] / h
    assert slope1 == pytest.approx(1 + 2 * k, abs=1e-4)
    assert np.all(np.abs(y) <= np.abs(u) + EPS), "the curve never exceeds the linear response"


def test_dominant_keeps_the_largest_axis() -> None:
    np.testing.assert_array_equal(axes.dominant(np.array([0.1, -0.6, 0.2, 0.5, 0, 0])), [0, -0.6, 0, 0, 0, 0])
    np.testing.assert_array_equal(axes.dominant(np.array([0.3, 0, 0, -0.3, 0, 0])), [0.3, 0, 0, 0, 0, 0])
    np.testing.assert_array_equal(axes.dominant(np.zeros(6)), np.zeros(6))


def test_lock_zeroes_the_other_half() -> None:
    u = np.arange(1.0, 7.0)
    np.testing.assert_array_equal(axes.lock(u, "translation"), [1, 2, 3, 0, 0, 0])
    np.testing.assert_array_equal(axes.lock(u, "rotation"), [0, 0, 0, 4, 5, 6])
    np.testing.assert_array_equal(axes.lock(u, "none"), u)


def test_to_twist_has_separate_caps_and_caps_the_norm() -> None:
    linear, angular = axes.to_twist(np.array([1.0, 0, 0, 0, 0, -0.5]), 0.1, 0.6, 1.0)
    np.testing.assert_allclose(linear, [0.1, 0, 0])
    np.testing.assert_allclose(angular, [0, 0, -0.3])
    linear, angular = axes.to_twist(np.array([1.0, 1.0, 1.0, 1.0, 1.0, 0]), 0.1, 0.6, 0.5)
    assert np.linalg.norm(linear) == pytest.approx(0.05)
    assert np.linalg.norm(angular) == pytest.approx(0.3)
    np.testing.assert_allclose(linear / np.linalg.norm(linear), np.ones(3) / np.sqrt(3))  # direction kept
    linear, _ = axes.to_twist(np.array([0.2, 0, 0, 0, 0, 0]), 0.1, 0.6, 0.5)
    np.testing.assert_allclose(linear, [0.01, 0, 0])  # below the cap: proportional


def test_step_scale_clamps() -> None:
    steps = [0.1, 0.25, 0.5, 1.0]
    assert axes.step_scale(1, 1, steps) == 2
    assert axes.step_scale(3, 1, steps) == 3
    assert axes.step_scale(0, -1, steps) == 0


def test_pipeline_assembled_rest_is_exact_zero_and_full_push_is_the_cap() -> None:
    profile = profile_from_dict({"axes": {"sign": [1, -1, 1, 1, 1, 1]}, "filter": {"on": False},
                                 "speed": {"start": 1.0}})
    pipe = AxisPipeline(profile)
    pipe.capture_rest(np.array([[5, 0, 0, 0, 0, 0]] * 3))
    u = pipe.device_stage(np.array([5 + 20, 0, 0, 0, 0, 0]))  # inside the 0.1 deadband (35 counts)
    shaped = pipe.shape(u, 0.0)
    assert shaped.rest and not shaped.linear.any() and not shaped.angular.any()
    u = pipe.device_stage(np.array([5, 350, 0, 0, 0, 0]))
    shaped = pipe.shape(u, 0.01)
    np.testing.assert_allclose(shaped.linear, [0, -0.1, 0])  # full push on device Y, sign -1
    assert not shaped.rest
    shaped = pipe.shape(pipe.device_stage(np.array([5, 0, 0, 0, 0, 350])), 0.02, lock="translation")
    assert shaped.rest, "a push the lock removes entirely leaves nothing to move"
