"""Forward kinematics of every joint frame in one pass, and the geometric Jacobian of the tool point.

Kernels trust their input (finite q of the right length); validation happens at the edges.

How the pass stays cheap: the chain runs in *axis frames* (each joint frame turned about its origin
so +z is the joint axis; see `Arm`), with the tool as one more element. All local transforms come
from one batched matmul of their coefficient rows [sin q, cos q, q, 1] with a precomputed basis;
their prefix products follow by n 4x4 products written in place (ndarray.dot with out=, about
0.5 us each: measured cheaper than a log-depth prefix scan of batched matmuls, whose per-call
overhead dominates for arms of up to ten joints). Base-frame axes and origins are then columns of
the result, and the tool pose its last element.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from twistrate.solver.arm import Arm

#: (3, 9) Levi-Civita symbol: LEVI_CIVITA @ outer(a, b).ravel() == cross(a, b).
LEVI_CIVITA = np.array([
    [0.0, 0, 0, 0, 0, 1, 0, -1, 0],
    [0, 0, -1, 0, 0, 0, 1, 0, 0],
    [0, 1, 0, -1, 0, 0, 0, 0, 0],
])
LEVI_CIVITA.setflags(write=False)
#: Row 3 a + b of the stacked outer products of two (3, n) arrays x, y is x[a] * y[b]:
#: x.take(_OUTER3_A, axis=0) * y.take(_OUTER3_B, axis=0) (so LEVI_CIVITA @ it is the column-wise x cross y).
_OUTER3_A = np.repeat(np.arange(3), 3)
_OUTER3_B = np.tile(np.arange(3), 3)
_OUTER3_A.setflags(write=False)
_OUTER3_B.setflags(write=False)


@dataclass(frozen=True, eq=False, init=False)
class Frames:
    """Result of one forward-kinematics pass at configuration q.

    T_base_axis : (n, 4, 4) each joint's axis frame after its motion: the joint frame turned about
        its origin so that +z is the joint axis (identical to the joint frame when the arm's axis
        is +z); base frame, metres.
    T_base_tool : (4, 4) tool pose, base frame, metres.
    T_axis_joint : (n, 4, 4) constant joint frame in axis frame (from the arm), or None when the
        axis frames are the joint frames.

    Derived (read-only views, or computed on first use):
    T_base_joint : (n, 4, 4) each joint's frame after its motion, base frame, metres.
    z_base : (n, 3) each joint's unit axis, base frame.
    p_base : (n, 3) each joint frame's origin, base frame, metres (a point on the joint axis).
    """

    T_base_axis: np.ndarray
    T_base_tool: np.ndarray
    T_axis_joint: np.ndarray | None

    def __init__(
        self, T_base_axis: np.ndarray, T_base_tool: np.ndarray, T_axis_joint: np.ndarray | None = None
    ) -> None:
        # Frozen: write __dict__ directly (cheaper than the generated per-field object.__setattr__).
        fields = self.__dict__
        fields["T_base_axis"] = T_base_axis
        fields["T_base_tool"] = T_base_tool
        fields["T_axis_joint"] = T_axis_joint

    @property
    def z_base(self) -> np.ndarray:
        return self.T_base_axis[:, :3, 2]

    @property
    def p_base(self) -> np.ndarray:
        return self.T_base_axis[:, :3, 3]

    @cached_property
    def T_base_joint(self) -> np.ndarray:
        if self.T_axis_joint is None:
            return self.T_base_axis
        return self.T_base_axis @ self.T_axis_joint


def forward(arm: Arm, q: np.ndarray) -> Frames:
    """Forward kinematics of all joint frames and the tool.

    q : (n,) joint positions, rad (revolute) or m (prismatic), in the arm's joint order.
    """
    # Coefficient rows [sin q, cos q, q, 1] of the n + 1 chain elements (joints, tool).
    c = arm.chain_coef_template.copy()
    np.sin(q, c[:-1, 0, 0])
    np.cos(q, c[:-1, 0, 1])
    if not arm.all_revolute:
        c[:-1, 0, 2] = q
    m = len(c)
    local = (c @ arm.chain_basis).reshape(m, 4, 4)  # local transforms A_e
    P = np.empty((m, 4, 4))  # prefix products P[e] = A_0 ... A_e
    prev = P[0]
    prev[...] = local[0]
    for e in range(1, m):
        cur = P[e]
        prev.dot(local[e], out=cur)
        prev = cur
    return Frames(P[:-1], P[-1], arm.T_axis_joint)


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
    T = frames.T_base_axis
    J = np.empty((6, len(T)))
    z = J[3:]
    z[...] = T[:, :3, 2].T  # (3, n) axes
    d = frames.T_base_tool[:3, 3:] - T[:, :3, 3].T  # (3, n) p_e - p_i
    # Column-wise cross products z_i x d_i: Levi-Civita times the stacked outer products
    # outer(z_i, d_i) (row 3 a + b holds z[a] d[b]); .dot is the cheapest numpy product call.
    zd = z.take(_OUTER3_A, axis=0)
    zd *= d.take(_OUTER3_B, axis=0)
    LEVI_CIVITA.dot(zd, out=J[:3])
    if not arm.all_revolute:
        z_prismatic = z * arm.prismatic_float  # taken before the mask clears z (a view of J[3:])
        J *= arm.jacobian_column_mask
        J[:3] += z_prismatic
    return J


def tool_pose(arm: Arm, q: np.ndarray) -> np.ndarray:
    """T_base_tool : (4, 4) tool pose in the base frame at q (n,)."""
    return forward(arm, q).T_base_tool
