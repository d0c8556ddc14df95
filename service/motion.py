"""Per-tick motion shaping around the solver: tool speed caps on the desired twist, and the stopping ramp.

Both are pure functions of their arguments, called on the tick thread.
"""

from __future__ import annotations

import math

import numpy as np


def speed_cap_factor(linear: np.ndarray, angular: np.ndarray, point: np.ndarray,
                     linear_max: float, angular_max: float) -> float:
    """Factor s in (0, 1] that brings a twist within the tool speed caps when both parts are scaled by s.

    linear : (3,) m/s, velocity of the reference point. angular : (3,) rad/s. point : (3,) m, offset
    of the reference point from the tool origin (same frame as the vectors; norms are frame-free).
    linear_max : cap on the linear speed of both the reference point and the tool point, m/s.
    angular_max : cap on the angular speed, rad/s.
    Scaling both parts by one factor keeps the twist's direction (common practice for speed
    supervision: slow down along the path, never bend it). The tool point's velocity is
    v_tool = v_ref - w x point (rigid body).
    """
    s = 1.0
    v = math.sqrt(float(linear @ linear))
    if v > linear_max:
        s = linear_max / v
    w = math.sqrt(float(angular @ angular))
    if w * s > angular_max:
        s = angular_max / w
    if point.any():
        wx, wy, wz = angular
        px, py, pz = point
        vx = linear[0] - (wy * pz - wz * py)
        vy = linear[1] - (wz * px - wx * pz)
        vz = linear[2] - (wx * py - wy * px)
        vt_norm = math.sqrt(vx * vx + vy * vy + vz * vz)
        if vt_norm * s > linear_max:
            s = linear_max / vt_norm
    return s


def ramp_to_rest(qd: np.ndarray, a_max: np.ndarray, dt: float) -> np.ndarray:
    """Rates `dt` seconds closer to rest, all joints slowed by one common factor (the joint-space
    direction is kept), the most constrained joint decelerating at exactly its a_max.

    qd : (n,) rates commanded last (rad/s or m/s). a_max : (n,) acceleration limits (> 0).
    dt : time since qd was commanded, s (the actual elapsed time, not a tick count: a late tick
    removes as much as the deceleration allows over the time that really passed, never more; dt <= 0
    keeps qd). Returns new (n,) rates; every |change_i| <= a_max_i * dt. The factor is common, so the
    most constrained joint stays the same one and the rates follow the straight line from the stop's
    start to rest in time: rest (all zeros exactly) is reached once the time summed over the calls
    reaches max_i |qd_i| / a_max_i of the first call, however that time was cut into calls.
    """
    speed = np.abs(qd)
    top = float(speed.max()) if speed.size else 0.0
    if top == 0.0:
        return np.zeros_like(qd)
    if not dt > 0.0:
        return qd.copy()
    # Fraction of the current rates that may be removed over dt without exceeding any a_max_i dt.
    with np.errstate(divide="ignore", over="ignore"):
        fraction = float(np.min(a_max * dt / speed))
    if fraction >= 1.0:
        return np.zeros_like(qd)
    return qd * (1.0 - fraction)
