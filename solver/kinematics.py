"""Forward kinematics of every joint frame in one pass, and the geometric Jacobian of the tool point.

Kernels trust their input (finite q of the right length); validation happens at the edges.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm


@dataclass(frozen=True)
class Frames:
    """Result of one forward-kinematics pass at configuration q.

    T_base_joint : (n, 4, 4) each joint's frame after its motion, base frame, metres.
    z_base : (n, 3) each joint's unit axis, base frame.
    p_base : (n, 3) each joint frame's origin, base frame, metres (a point on the joint axis).
    T_base_tool : (4, 4) tool pose, base frame, metres.
    """

    T_base_joint: np.ndarray
    z_base: np.ndarray
    p_base: np.ndarray
    T_base_tool: np.ndarray


def forward(arm: Arm, q: np.ndarray) -> Frames:
    """Forward kinematics of all joint frames and the tool.

    q : (n,) joint positions, rad (revolute) or m (prismatic), in the arm's joint order.
    """
    n = arm.n
    # Local transforms A_i = F_i @ M_i(q_i) for all joints at once (see Arm.motion_basis).
    coef = np.empty((n, 1, 3))
    np.sin(q, out=coef[:, 0, 0])
    np.cos(q, out=coef[:, 0, 1])
    coef[:, 0, 2] = q
    A = np.matmul(coef, arm.motion_basis)
    A += arm.motion_const[:, None, :]
    A = A.reshape(n, 4, 4)
    # The chain is sequential; a Python list of 4x4 products is cheaper than writes into a stack.
    T_prev = A[0]
    chain = [T_prev]
    for i in range(1, n):
        T_prev = T_prev @ A[i]
        chain.append(T_prev)
    T = np.stack(chain)
    T_base_tool = T_prev @ arm.T_last_tool
    z_base = np.matmul(T[:, :3, :3], arm.axes[:, :, None])[:, :, 0]
    p_base = T[:, :3, 3]
    return Frames(T, z_base, p_base, T_base_tool)


def cross_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise cross product of (k, 3) arrays (cheaper than np.cross for small k)."""
    out = np.empty_like(b)
    out[:, 0] = a[:, 1] * b[:, 2] - a[:, 2] * b[:, 1]
    out[:, 1] = a[:, 2] * b[:, 0] - a[:, 0] * b[:, 2]
    out[:, 2] = a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]
    return out


def geometric_jacobian(arm: Arm, frames: Frames) -> np.ndarray:
    """Geometric Jacobian of the tool point.

    Returns J : (6, n), base frame, rows (v, w): linear velocity of the tool point (m/s) then
    angular velocity (rad/s), per unit joint rate. Revolute column [z x (p_e - p); z], prismatic
    column [z; 0].
    """
    n = arm.n
    z = frames.z_base
    d = frames.T_base_tool[:3, 3] - frames.p_base
    J = np.empty((6, n))
    Jv = cross_rows(z, d)
    rev = arm.revolute
    Jv[~rev] = z[~rev]
    J[:3] = Jv.T
    J[3:] = z.T
    J[3:, ~rev] = 0.0
    return J


def tool_pose(arm: Arm, q: np.ndarray) -> np.ndarray:
    """T_base_tool : (4, 4) tool pose in the base frame at q (n,)."""
    return forward(arm, q).T_base_tool
