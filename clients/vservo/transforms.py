"""Camera twists to the twists the service takes: camera on the tool (eye-in-hand) or fixed in the cell.

Twists are (6,) linear first (v, w). A twist "at point p" gives the velocity of the body point at p
and the body's angular velocity; moving the reference point from p to o gives v_o = v_p + w x (o - p)
(rigid-body kinematics, common practice).

Eye-in-hand: the camera pose in the tool frame T_tool_cam = (R, t) comes from a hand-eye calibration.
A camera twist V_c (camera frame, at the camera origin) is, in the tool frame at the tool origin,

    V_tool = [[R, [t]x R], [0, R]] V_c

(the adjoint of T_tool_cam, linear first; Murray, Li & Sastry 1994, "A Mathematical Introduction to
Robotic Manipulation", eq. 2.58, with their (v, w) order). The service also takes a twist at any
point of the tool, so the law's twist can go out unshifted: `camera_point_twist`.

Eye-to-hand: the camera is fixed in the cell at T_base_cam and sees a target carried by the tool.
The features depend only on the relative pose T_cam_target, and a camera twist V_c changes it as the
target moving with -V_c (camera frame, at the camera origin) does: T_cam_target <- exp(-V_c dt)
T_cam_target in both cases (Chaumette & Hutchinson 2007, "Visual servo control, Part II: advanced
approaches", IEEE Robotics & Automation Magazine 14(1), section "Eye-in-hand and eye-to-hand",
where the sign of the camera-to-arm matrix flips). So the tool must move with -V_c, re-expressed
in the base frame; `eye_to_hand_twist`.
"""

from __future__ import annotations

import numpy as np

from twistrate.clients.vservo.rigid import skew


def adjoint(T_a_b: np.ndarray) -> np.ndarray:
    """(6, 6) matrix mapping a twist in frame b at b's origin to frame a at a's origin, linear first."""
    R, t = T_a_b[:3, :3], T_a_b[:3, 3]
    A = np.zeros((6, 6))
    A[:3, :3] = R
    A[:3, 3:] = skew(t) @ R
    A[3:, 3:] = R
    return A


def camera_to_tool(V_cam: np.ndarray, T_tool_cam: np.ndarray) -> np.ndarray:
    """(6,) tool twist, tool frame, at the tool origin, of a (6,) camera twist (camera frame, camera
    origin); T_tool_cam (4, 4) the hand-eye calibration (camera pose in the tool frame)."""
    return adjoint(T_tool_cam) @ V_cam


def camera_point_twist(V_cam: np.ndarray,
                       T_tool_cam: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The camera twist as the service's tool-frame twist at the camera: ((3,) linear m/s, (3,) angular
    rad/s, (3,) point m), all in the tool frame; point = the camera origin's offset from the tool origin.
    """
    R, t = T_tool_cam[:3, :3], T_tool_cam[:3, 3]
    return R @ V_cam[:3], R @ V_cam[3:], t.copy()


def shift_point(twist: np.ndarray, from_point: np.ndarray, to_point: np.ndarray) -> np.ndarray:
    """(6,) the same rigid motion with its linear part at `to_point` instead of `from_point` (all (3,)
    in one frame, m)."""
    out = np.array(twist, dtype=float)
    out[:3] = twist[:3] + np.cross(twist[3:], np.asarray(to_point) - np.asarray(from_point))
    return out


def eye_to_hand_twist(V_cam: np.ndarray, T_base_cam: np.ndarray,
                      p_base_tool: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The tool's base-frame twist that realises the camera twist V_c (6,) of a fixed camera.

    T_base_cam (4, 4): the camera's pose in the base frame; p_base_tool (3,): the tool origin, base
    frame, m (from the service's `state` message). Returns ((3,) linear m/s, (3,) angular rad/s,
    (3,) point m) in the base frame, the linear part at the camera origin's location, point = that
    location's offset from the tool origin (the service's `point` field).
    """
    R, p = T_base_cam[:3, :3], T_base_cam[:3, 3]
    return -(R @ V_cam[:3]), -(R @ V_cam[3:]), p - np.asarray(p_base_tool, dtype=float)
