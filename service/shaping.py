"""Shaping of the asked twist before the solve: a Cartesian ramp on its rate of change.

Why: the joints' acceleration bound lets each joint rate change by a_max T per tick, so a step of the
asked twist (a jog key pressed at full speed, a client switching phases) asks for rates no joint can
reach in one tick; the scaling problem then has no scale (scale 0, the bounded least-squares fallback
tracks) for the ticks it takes the rates to catch up. Limiting the asked twist's own rate of change
(common practice for jogging and teleoperation: the commanded Cartesian velocity is ramped with a
bounded acceleration) turns the step into a ramp the joints can follow, and the solve keeps a scale.

The ramp works on the twist in the base frame at the tool point (the solver's own `twist_desired`):
each tick the change from the previous tick's shaped twist is scaled by one factor c in (0, 1] so that
|dv| <= linear_accel_max T and |dw| <= angular_accel_max T (one factor keeps the direction of the
change, like the speed caps keep the direction of the twist). Rules:

* the previous shaped twist is the last resolution's `twist_desired` while running, else (and after a
  stop) the twist the arm makes (J q_dot_prev), so a resumed twist ramps from the motion the arm is in;
* likewise while the ramp moves toward a changed request after a tick that did not make its asked
  twist's direction: one with no feasible scale (`Resolution.tracking`: the bounded least squares
  tracked) or one on which a keep-out zone held the arm (a damper row met with equality,
  `Resolution.rows_active`). A request the ramp has reached stays asked as it is (pressing on against a
  zone or a limit keeps asking for the press, and the scale reports it). Ramping on from a twist the
  arm was not making would keep asking, for the length of the ramp, for the part it could not make: after a
  press against a zone, a change of direction (press, then slide along it) kept asking for the part
  pointing into the zone and the direction-preserving scaling held the whole twist back (the demo's
  pass: 166 stalled ticks at the start of its slide along the bench, then the scale jumping from 0.05
  to 1 within three ticks); with two wrist joints on their limits, an operator's reversal (back off)
  kept asking for the roll into them for half a second. The arm's twist J q_dot_prev is where an
  acceleration-limited ramp physically starts, as after a stop;
* a zero asked twist (a stop) is not ramped: the solver brakes along the previous rate as hard as the
  joints allow, never slower than before;
* the shaped twist goes through the speed caps again, so a cap lowered this tick (reduced speed) holds
  at once.

Off unless `[speed] linear_accel_max` and `angular_accel_max` are set (docs/operation.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from twistrate.service.config_sections import SpeedSection
from twistrate.service.motion import speed_cap_factor
from twistrate.solver.kinematics import Frames
from twistrate.solver.resolve import DesiredTwist, Resolution
from twistrate.solver.twist import twist_base

_ZERO3 = np.zeros(3)
_ZERO3.setflags(write=False)


def ramp_step(x: np.ndarray, x_prev: np.ndarray, linear_step: float, angular_step: float) -> np.ndarray:
    """(6,) x_prev + c (x - x_prev) with the largest c in (0, 1] keeping |dv| <= linear_step (m/s) and
    |dw| <= angular_step (rad/s); x, x_prev : (6,) twists, same frame and point, rows (v, w)."""
    d = x - x_prev
    dv = math.sqrt(float(d[:3].dot(d[:3])))
    dw = math.sqrt(float(d[3:].dot(d[3:])))
    c = 1.0
    if dv > linear_step:
        c = linear_step / dv
    if dw * c > angular_step:
        c = angular_step / dw
    return x if c >= 1.0 else x_prev + c * d


@dataclass(frozen=True)
class TwistRamp:
    """The ramp of one service. linear_accel_max : m/s^2; angular_accel_max : rad/s^2 (both > 0);
    period : tick period T, s."""

    linear_accel_max: float
    angular_accel_max: float
    period: float

    def shape(self, desired: DesiredTwist, frames: Frames, J: np.ndarray, qd_prev: np.ndarray,
              last: Resolution | None, linear_max: float, angular_max: float) -> DesiredTwist:
        """The asked twist of this tick, ramped (module docstring): base frame, tool point.

        desired : the asked twist after the speed caps; frames, J : (6, n) this tick's kinematics;
        qd_prev : (n,) the rates commanded last tick; last : the previous tick's resolution while
        running, else None; linear_max (m/s), angular_max (rad/s) : the speed caps in force.
        """
        if not (desired.linear.any() or desired.angular.any()):
            return desired
        x = twist_base(desired, frames.T_base_tool)
        T = self.period
        step_v, step_w = self.linear_accel_max * T, self.angular_accel_max * T
        x_prev = last.twist_desired if last is not None else None
        if x_prev is None or not x_prev.any() or (_held(last) and _moving(x, x_prev, step_v, step_w)):
            x_prev = J.dot(qd_prev)  # from rest, after a stop (not ramped), tracking or a hold: the arm's
        x = ramp_step(x, x_prev, step_v, step_w)
        cap = speed_cap_factor(x[:3], x[3:], _ZERO3, linear_max, angular_max)
        if cap < 1.0:
            x = x * cap
        return DesiredTwist(x[:3], x[3:], "base", _ZERO3)


def _held(last: Resolution | None) -> bool:
    """True when the last tick did not make its asked twist's direction: no scale was feasible (it
    tracked, `Resolution.tracking`) or a keep-out damper row held its rates (met with equality)."""
    if last is None:
        return False
    rows = last.rows_active
    return last.tracking or (rows is not None and bool(rows.any()))


def _moving(x: np.ndarray, x_prev: np.ndarray, step_v: float, step_w: float) -> bool:
    """True when the ramp has not reached the request: x (6,) differs from the last shaped twist x_prev
    (6,) by more than one step (linear m/s, angular rad/s)."""
    d = x - x_prev
    return float(d[:3].dot(d[:3])) > step_v * step_v or float(d[3:].dot(d[3:])) > step_w * step_w


def twist_ramp(speed: SpeedSection, period: float) -> TwistRamp | None:
    """The ramp of a config's [speed] section at tick period `period` (s), or None when it is off."""
    if speed.linear_accel_max is None or speed.angular_accel_max is None:
        return None
    return TwistRamp(float(speed.linear_accel_max), float(speed.angular_accel_max), float(period))


def ramped(ramp: TwistRamp | None, desired: DesiredTwist, frames: Frames, J: np.ndarray, qd_prev: np.ndarray,
           last: Resolution | None, tunables: Any) -> DesiredTwist:
    """The pipeline's call: `TwistRamp.shape` with the speed caps in force (tunables.tool_linear_max,
    tunables.angular_max), or `desired` itself when the ramp is off (ramp None)."""
    if ramp is None:
        return desired
    return ramp.shape(desired, frames, J, qd_prev, last, tunables.tool_linear_max, tunables.angular_max)
