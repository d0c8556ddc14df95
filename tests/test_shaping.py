"""The ramp of the asked twist (twistrate.service.shaping): a vector rate limiter (common practice for
jogging: the commanded Cartesian velocity changes with bounded acceleration), checked against its closed
forms, the speed caps, the config, and in closed loop: a stepped push that brakes to scale 0 without the
ramp keeps a scale on every tick with it."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twistrate.service.bench.saturation import DEMO_RAMP, push_through_wrist
from twistrate.service.config import config_from_dict
from twistrate.service.shaping import TwistRamp, ramp_step, ramped, twist_ramp
from twistrate.solver.errors import ConfigError
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.resolve import DesiredTwist, resolve

T = 0.002


def test_a_step_becomes_a_ramp_of_the_stated_acceleration() -> None:
    # From rest to v = 0.3 m/s at a = 2 m/s^2: v / (a T) = 75 ticks, each changing by exactly a T
    # (closed form of a rate limiter), along the step's own direction.
    target = np.array([0.18, -0.24, 0.0, 0.0, 0.0, 0.0])  # |v| = 0.3
    x = np.zeros(6)
    for k in range(1, 76):
        nxt = ramp_step(target, x, 2.0 * T, 1.0 * T)
        assert np.linalg.norm(nxt - x) == pytest.approx(2.0 * T, rel=1e-12)
        np.testing.assert_allclose(nxt, target * min(1.0, k / 75), rtol=1e-12, atol=1e-15)
        x = nxt
    assert np.array_equal(ramp_step(target, x, 2.0 * T, 1.0 * T), target)  # reached: passed through


def test_the_angular_limit_scales_the_whole_change() -> None:
    # Linear change within its limit, angular change 10x its limit: one factor 1/10 on both parts.
    d = np.array([0.001, 0.0, 0.0, 0.0, 0.0, 0.02])
    out = ramp_step(d, np.zeros(6), 1.0, 0.002)
    np.testing.assert_allclose(out, d / 10, rtol=1e-12)


def _reach7_state():
    arm = load_arm("reach7")
    q = np.array(arm.q_home, dtype=float)
    frames = forward(arm, q)
    return arm, q, frames, geometric_jacobian(arm, frames)


class _Caps:
    tool_linear_max = 0.5
    angular_max = 1.0


def test_shape_ramps_from_the_last_solved_twist_and_keeps_stops_and_caps() -> None:
    arm, q, frames, J = _reach7_state()
    ramp = TwistRamp(0.5, 1.5, T)
    tw = DesiredTwist(np.array([0.0, 0.3, 0.0]), np.zeros(3))
    first = ramped(ramp, tw, frames, J, np.zeros(arm.n), None, _Caps())  # from rest: J qd_prev = 0
    assert first.frame == "base" and not first.point.any()
    np.testing.assert_allclose(first.linear, [0.0, 0.5 * T, 0.0], atol=1e-15)
    last = resolve(arm, q, np.zeros(arm.n), first, T, _options())
    second = ramped(ramp, tw, frames, J, last.qd, last, _Caps())
    np.testing.assert_allclose(second.linear, [0.0, 2 * 0.5 * T, 0.0], atol=1e-15)
    stop = DesiredTwist(np.zeros(3), np.zeros(3))
    assert ramped(ramp, stop, frames, J, last.qd, last, _Caps()) is stop  # stops are never slowed
    assert ramped(None, tw, frames, J, last.qd, last, _Caps()) is tw  # off

    class Reduced(_Caps):
        tool_linear_max = 0.5 * T  # a cap lowered this tick holds at once
    capped = ramped(ramp, tw, frames, J, last.qd, last, Reduced())
    assert np.linalg.norm(capped.linear) == pytest.approx(0.5 * T, rel=1e-12)


def test_shape_converts_a_tool_frame_twist_about_a_reference_point() -> None:
    # The ramp works at the tool point in the base frame: with a huge limit it returns the solver's
    # own conversion of the twist (v_tool = v_ref + r x w, Murray, Li & Sastry 1994, section 2.4).
    arm, _, frames, J = _reach7_state()
    tw = DesiredTwist(np.array([0.01, 0.0, 0.02]), np.array([0.0, 0.3, 0.0]), "tool",
                      np.array([0.0, 0.0, 0.1]))
    out = TwistRamp(1e6, 1e6, T).shape(tw, frames, J, np.zeros(arm.n), None, math.inf, math.inf)
    R = frames.T_base_tool[:3, :3]
    w = R @ tw.angular
    np.testing.assert_allclose(out.angular, w, atol=1e-15)
    np.testing.assert_allclose(out.linear, R @ tw.linear + np.cross(R @ tw.point, w), atol=1e-15)


def _options():
    from twistrate.service.bench.saturation import DEMO_OPTIONS
    return DEMO_OPTIONS


def test_config_takes_both_limits_or_neither() -> None:
    config = config_from_dict({"speed": {"linear_accel_max": 0.5, "angular_accel_max": 1.5}})
    assert twist_ramp(config.speed, T) == TwistRamp(0.5, 1.5, T)
    assert twist_ramp(config_from_dict({}).speed, T) is None  # default: off
    with pytest.raises(ConfigError, match="angular_accel_max"):
        config_from_dict({"speed": {"linear_accel_max": 0.5}})


def test_the_demo_config_ramp_is_the_benchmarks() -> None:
    from twistrate.service.config import load_config
    assert twist_ramp(load_config(None).speed, T) == DEMO_RAMP


def test_a_stepped_push_keeps_a_scale_with_the_ramp() -> None:
    # Without the ramp the steps (start and reversal at full speed) leave ticks at scale 0; with it none.
    raw = push_through_wrist("reach7", seconds=3.0, ramp_s=0.0)
    assert raw["scale_zero_fraction"] > 0.0
    shaped = push_through_wrist("reach7", seconds=3.0, ramp_s=0.0, ramp=DEMO_RAMP)
    assert shaped["asked_steps"] == raw["asked_steps"] == 2  # steps counted on the operator's twist
    assert shaped["scale_zero_fraction"] == 0.0 and shaped["below_half_fraction"] == 0.0
    assert shaped["peak_acceleration_ratio"] <= 1.0 + 1e-9
    assert max(shaped["sign_changes"]) <= shaped["asked_direction_changes"] == 1


def _copy(r, **changes):
    from twistrate.solver.resolve import Resolution
    fields = {name: getattr(r, name) for name in ("qd", "twist_desired", "twist_achieved", "scale", "damping",
                                                  "limits_active", "frames", "J", "singular_values", "U",
                                                  "tracking", "contacts", "rows_active")}
    fields.update(changes)
    return Resolution(**fields)


@pytest.mark.parametrize("kind", ["tracking", "held", "scaled", "reached"])
def test_after_a_tick_that_missed_its_direction_the_ramp_starts_from_the_arms_twist(kind: str) -> None:
    # A rate limiter restarted from the motion the arm is in (closed form of ramp_step from J qd_prev):
    # after a tick with no feasible scale (tracking) or held by a keep-out row, for a changed request; a
    # merely scaled tick (direction kept) ramps on from its asked twist as before, and a request the ramp
    # has reached stays asked while held (pressing on keeps asking for the press).
    arm, q, frames, J = _reach7_state()
    ramp = TwistRamp(0.5, 1.5, T)
    last = resolve(arm, q, np.zeros(arm.n), DesiredTwist(np.array([0.0, 0.0, -0.14]), np.zeros(3)), T,
                   _options())
    qd_prev = np.linalg.pinv(J) @ np.array([0.0, 0.0, -0.02, 0.0, 0.0, 0.0])  # the arm makes 0.02 m/s down
    if kind == "tracking":
        last = _copy(last, tracking=True, scale=0.0)
    elif kind == "held":
        last = _copy(last, rows_active=np.array([False, True]))
    elif kind == "scaled":
        last = _copy(last, scale=0.4, rows_active=np.array([False, False]))
    else:
        last = _copy(last, rows_active=np.array([False, True]))
        press = DesiredTwist(last.twist_desired[:3], last.twist_desired[3:])
        assert ramped(ramp, press, frames, J, qd_prev, last, _Caps()).linear.tolist() == [0.0, 0.0, -0.14]
        return
    tw = DesiredTwist(np.array([0.0, 0.1, 0.0]), np.zeros(3))
    out = ramped(ramp, tw, frames, J, qd_prev, last, _Caps())
    start = J @ qd_prev if kind != "scaled" else last.twist_desired
    target = np.array([0.0, 0.1, 0.0, 0.0, 0.0, 0.0])
    expected = start + (0.5 * T) / np.linalg.norm((target - start)[:3]) * (target - start)
    np.testing.assert_allclose(np.concatenate((out.linear, out.angular)), expected, atol=1e-12)
