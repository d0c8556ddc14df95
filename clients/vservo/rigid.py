"""Rigid-motion helpers in pure numpy: skew matrices, homogeneous transforms, SO(3)/SE(3) exp and log.

Conventions: a transform T_a_b is a (4, 4) homogeneous matrix mapping b coordinates to a; a twist
is (6,) linear first (v, w), m/s then rad/s; rotations are (3, 3). Clients may not import the
solver, so the few helpers the camera loop needs live here.
"""

from __future__ import annotations

import numpy as np

#: Below this rotation angle (rad) the series forms of the SO(3) / SE(3) maps are used.
SMALL_ANGLE_RAD = 1e-6
#: Within this distance of pi (rad) the rotation axis is taken from R + I instead of R - R^T.
NEAR_PI_RAD = 1e-6


def skew(a: np.ndarray) -> np.ndarray:
    """(3, 3) matrix [a]x with [a]x b = a x b, for a (3,) vector."""
    return np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


def transform(R: np.ndarray, p: np.ndarray) -> np.ndarray:
    """(4, 4) homogeneous transform from a (3, 3) rotation and a (3,) translation (m)."""
    T = np.eye(4)
    T[:3, :3] = R
    T[:3, 3] = p
    return T


def inverse(T: np.ndarray) -> np.ndarray:
    """Inverse of a (4, 4) rigid transform: T_b_a from T_a_b."""
    R = T[:3, :3]
    return transform(R.T, -R.T @ T[:3, 3])


def exp_so3(w: np.ndarray) -> np.ndarray:
    """(3, 3) rotation exp([w]x) of a (3,) rotation vector w = theta u (rad), Rodrigues' formula."""
    theta = float(np.linalg.norm(w))
    K = skew(w)
    if theta < SMALL_ANGLE_RAD:
        return np.eye(3) + K + 0.5 * K @ K
    return np.eye(3) + np.sin(theta) / theta * K + (1.0 - np.cos(theta)) / theta**2 * K @ K


def log_so3(R: np.ndarray) -> np.ndarray:
    """(3,) rotation vector theta u (rad, theta in [0, pi]) of a (3, 3) rotation matrix."""
    cos_theta = float(np.clip((np.trace(R) - 1.0) / 2.0, -1.0, 1.0))
    theta = float(np.arccos(cos_theta))
    axial = np.array([R[2, 1] - R[1, 2], R[0, 2] - R[2, 0], R[1, 0] - R[0, 1]])
    if theta < SMALL_ANGLE_RAD:
        return 0.5 * axial
    if np.pi - theta < NEAR_PI_RAD:
        # Near pi the axial part vanishes; R + I = 2 u u^T there (Rodrigues' formula at theta = pi).
        B = 0.5 * (R + np.eye(3))
        k = int(np.argmax(np.diag(B)))
        u = B[:, k] / np.sqrt(max(B[k, k], 0.0))
        if axial @ u < 0.0:
            u = -u
        return theta * u / np.linalg.norm(u)
    return theta / (2.0 * np.sin(theta)) * axial


def exp_se3(twist: np.ndarray) -> np.ndarray:
    """(4, 4) transform exp of a (6,) twist (v, w) held for unit time, both in the moving frame.

    T_a_b(t + dt) = T_a_b(t) @ exp_se3(V dt) integrates a twist V of frame b expressed in b.
    """
    v, w = twist[:3], twist[3:]
    theta = float(np.linalg.norm(w))
    K = skew(w)
    if theta < SMALL_ANGLE_RAD:
        V = np.eye(3) + 0.5 * K + K @ K / 6.0
    else:
        V = (np.eye(3) + (1.0 - np.cos(theta)) / theta**2 * K
             + (theta - np.sin(theta)) / theta**3 * K @ K)
    return transform(exp_so3(w), V @ v)


def rotation_about(axis: np.ndarray, angle_rad: float) -> np.ndarray:
    """(3, 3) rotation of `angle_rad` about the (3,) `axis` (any non-zero length)."""
    u = np.asarray(axis, dtype=float)
    return exp_so3(u / np.linalg.norm(u) * angle_rad)


def look_at(eye: np.ndarray, target: np.ndarray, up: np.ndarray) -> np.ndarray:
    """(4, 4) T_world_cam of a camera at `eye` whose optical axis (+z) points at `target`, image +y
    as close as possible to -`up` (image rows grow downwards). All (3,) points in world, m."""
    z = np.asarray(target, float) - np.asarray(eye, float)
    z /= np.linalg.norm(z)
    x = np.cross(z, np.asarray(up, float))
    x /= np.linalg.norm(x)
    y = np.cross(z, x)
    return transform(np.column_stack([x, y, z]), np.asarray(eye, float))
