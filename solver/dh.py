"""Denavit-Hartenberg tables (standard and modified conventions) to the arm model's chain form.

Standard convention, link i: A_i = Rz(theta_i) Tz(d_i) Tx(a_i) Rx(alpha_i); joint i moves theta_i
(revolute) or d_i (prismatic) about / along z_{i-1}, at the start of A_i.
Modified convention, link i: A_i = Rx(alpha_{i-1}) Tx(a_{i-1}) Rz(theta_i) Tz(d_i); joint i moves
about / along z_i, at the end of A_i.
Lengths in metres, angles in radians. theta_i / d_i in a table are the offsets at q_i = 0.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

DHConvention = Literal["standard", "modified"]
Z_AXIS = np.array([0.0, 0.0, 1.0])


@dataclass(frozen=True)
class DHRow:
    """One DH row. a, d in m; alpha, theta in rad; theta (revolute) or d (prismatic) is the offset."""

    a: float
    alpha: float
    d: float
    theta: float
    prismatic: bool = False


def rot_x(angle: float) -> np.ndarray:
    """(4, 4) rotation about x by `angle` rad."""
    c, s = np.cos(angle), np.sin(angle)
    return np.array([[1.0, 0, 0, 0], [0, c, -s, 0], [0, s, c, 0], [0, 0, 0, 1.0]])


def rot_z(angle: float) -> np.ndarray:
    """(4, 4) rotation about z by `angle` rad."""
    c, s = np.cos(angle), np.sin(angle)
    return np.array([[c, -s, 0, 0], [s, c, 0, 0], [0, 0, 1.0, 0], [0, 0, 0, 1.0]])


def trans(x: float = 0.0, y: float = 0.0, z: float = 0.0) -> np.ndarray:
    """(4, 4) translation by (x, y, z) m."""
    T = np.eye(4)
    T[:3, 3] = (x, y, z)
    return T


def dh_link(row: DHRow, convention: DHConvention, q: float = 0.0) -> np.ndarray:
    """(4, 4) link transform A_i of one DH row at joint position q (rad or m)."""
    theta = row.theta + (0.0 if row.prismatic else q)
    d = row.d + (q if row.prismatic else 0.0)
    if convention == "standard":
        return rot_z(theta) @ trans(z=d) @ trans(x=row.a) @ rot_x(row.alpha)
    return rot_x(row.alpha) @ trans(x=row.a) @ rot_z(theta) @ trans(z=d)


def dh_chain(rows: list[DHRow], convention: DHConvention) -> tuple[list[np.ndarray], np.ndarray]:
    """Convert a DH table to the chain form of `twistrate.solver.arm`.

    Returns (T_prev_joint per joint, each (4, 4); T_last_extra (4, 4)), where every joint axis is
    +z of its own frame and T_last_extra is the fixed transform from the last joint's frame (after
    its motion) to the last DH frame (to be composed before the tool transform):
        prod_i A_i(q_i) == prod_i (T_prev_joint[i] @ M_z(q_i)) @ T_last_extra.
    """
    fixed = [dh_link(row, convention, 0.0) for row in rows]
    if convention == "standard":
        # A_i(q) = M_z(q) @ A_i(0): motion first, fixed part after it.
        return [np.eye(4), *fixed[:-1]], fixed[-1]
    # A_i(q) = A_i(0) @ M_z(q): fixed part first, motion last.
    return fixed, np.eye(4)
