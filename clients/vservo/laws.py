"""Visual servoing laws: image-based (points) and position-based (pose), a gain schedule, saturation.

Chaumette & Hutchinson (2006), "Visual servo control, Part I: basic approaches", IEEE Robotics &
Automation Magazine 13(4). Every twist here is the camera's, (6,) linear first (v, w), m/s and
rad/s, expressed in the current camera frame (the paper's v_c).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from twistrate.clients.vservo.rigid import inverse, log_so3
from twistrate.solver.errors import ConfigError, field_error

#: Singular values of L_hat below this fraction of the largest are dropped by the pseudo-inverse:
#: a degenerate point set (coincident or collinear points) then gives a bounded twist, not a huge one.
PINV_RCOND = 1e-6


def ibvs_twist(L_hat: np.ndarray, e: np.ndarray, gain: float) -> np.ndarray:
    """(6,) camera twist v_c = -lambda L_hat^+ e (the paper's eq. (5)).

    L_hat (2N, 6) interaction matrix estimate; e (2N,) feature error s - s*, normalised coordinates,
    rows (x_1, y_1, ...); gain lambda (1/s) > 0.
    """
    U, sigma, Vt = np.linalg.svd(L_hat, full_matrices=False)
    if sigma[-1] > PINV_RCOND * sigma[0]:  # full rank, the usual case: nothing to drop
        return (-gain) * (Vt.T @ ((U.T @ e) / sigma))
    keep = sigma > PINV_RCOND * sigma[0]  # degenerate point set: drop the null directions
    return -gain * (Vt[keep].T @ ((U[:, keep].T @ e) / sigma[keep]))


def pbvs_error(T_cam_target: np.ndarray, T_camstar_target: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pose error of the current camera relative to the desired one: ((3,) c*t_c in m, (3,) theta u).

    T_cam_target (4, 4): the target's estimated pose in the current camera frame; T_camstar_target
    (4, 4): its pose in the desired camera frame. c*T_c = T_camstar_target @ inv(T_cam_target) maps
    current camera coordinates to desired camera coordinates; t is its translation (the current camera
    origin in the desired frame), theta u the rotation vector of c*R_c.
    """
    T_camstar_cam = T_camstar_target @ inverse(T_cam_target)
    return T_camstar_cam[:3, 3].copy(), log_so3(T_camstar_cam[:3, :3])


def pbvs_twist(T_cam_target: np.ndarray, T_camstar_target: np.ndarray, gain: float) -> np.ndarray:
    """(6,) camera twist of position-based servoing with e = (c*t_c, theta u), s* = 0.

    The paper's section "Position-based visual servo", second choice of s: v_c = -lambda R^T c*t_c,
    w_c = -lambda theta u, R = c*R_c. Derivation checked in the tests: with v_c expressed in the
    current camera frame, d(c*t_c)/dt = c*R_c v and d(theta u)/dt = L_theta_u w, L_theta_u = I +
    theta/2 [u]x + (1 - sinc theta / sinc^2(theta/2)) [u]x^2 (the paper prints -theta/2 for the
    opposite rotation convention; finite differences fix ours). L_theta_u theta u = theta u, so e decays
    as exp(-lambda t) and the camera origin moves on a straight line to the desired one (desired frame).
    """
    T_camstar_cam = T_camstar_target @ inverse(T_cam_target)
    t, R = T_camstar_cam[:3, 3], T_camstar_cam[:3, :3]
    return np.concatenate([-gain * (R.T @ t), -gain * log_so3(R)])


@dataclass(frozen=True)
class GainSchedule:
    """Gain lambda (1/s) as a function of the feature error size |e| (normalised, unitless).

    Our own schedule: lambda(|e|) = near + (far - near) |e|^2 / (|e|^2 + knee^2). Far from the goal
    (|e| >> knee) it tends to `far`, near the goal to `near`: a gentle gain while the error is large
    (commands stay under the saturation, the features stay in view) and a firmer one on the tail,
    where the exponential decay of the paper's eq. (6) is slow in absolute terms. It is smooth and
    monotone between the two values, so the loop never sees a gain step. near == far is a constant
    gain. The discrete-time loop needs lambda T < 2 for every value (T the servo period), checked by
    the caller that knows T.
    """

    near: float
    far: float
    knee: float = 0.05

    def __post_init__(self) -> None:
        for name in ("near", "far"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value > 0.0):
                raise field_error(ConfigError, f"gain.{name}", value, "a finite gain > 0 1/s")
        if not (np.isfinite(self.knee) and self.knee > 0.0):
            raise field_error(ConfigError, "gain.knee", self.knee, "a finite error size > 0 (normalised)")

    @classmethod
    def constant(cls, gain: float) -> GainSchedule:
        return cls(near=gain, far=gain)

    @property
    def largest(self) -> float:
        return max(self.near, self.far)

    def __call__(self, error_norm: float) -> float:
        r = error_norm * error_norm
        return self.near + (self.far - self.near) * r / (r + self.knee * self.knee)


def saturate(twist: Sequence[float] | np.ndarray, linear_max: float,
             angular_max: float) -> tuple[float, ...]:
    """(6,) twist (v, w) scaled by one factor so |v| <= linear_max (m/s) and |w| <= angular_max (rad/s),
    as a tuple of 6 floats.

    One common factor keeps the direction of the whole twist (common practice: scaling each part or
    clipping components would bend the path the law asks for).
    """
    v = math.sqrt(twist[0] * twist[0] + twist[1] * twist[1] + twist[2] * twist[2])
    w = math.sqrt(twist[3] * twist[3] + twist[4] * twist[4] + twist[5] * twist[5])
    factor = 1.0
    if v > linear_max:
        factor = linear_max / v
    if w * factor > angular_max:
        factor = angular_max / w
    return tuple(float(c) * factor for c in twist)
