"""Velocity-damper rows of the keep-out contacts, A q_dot >= b, and the point Jacobians they use.

Velocity damper (Faverjon & Tournassoud 1987, ICRA; in the form of Kanoun, Lamiraux & Wieber 2011,
IEEE T-RO 27(4)): for each contact with distance d < d_i, n the unit normal from b to a and J_pa,
J_pb the point Jacobians of the closest points (base frame),

    n^T (J_pa - J_pb) q_dot >= -xi (d - d_s) / (d_i - d_s)

with d_i the influence distance, d_s the security distance and xi > 0 (m/s) the approach speed
allowed at d_i. n^T (J_pa - J_pb) q_dot is the rate of change of d (the closest points slide on
the surfaces, but to first order only the motion along n changes d). The approach speed falls
linearly to 0 at d_s; below d_s the right side is positive and asks for an escape speed. Its
first-order integral over one tick of period T keeps d >= d_s when T xi <= d_i - d_s.

Point Jacobian of a point p fixed to a link (offset-point Jacobian, base frame):
J_p = [[I, -[r]x], [0, I]] J with r = p - p_tool and J the tool Jacobian, with the columns of the
joints that do not carry the link zeroed.
"""

from __future__ import annotations

import numpy as np

from twistrate.solver.jacobians import offset_point_jacobian
from twistrate.solver.keepout import Contacts
from twistrate.solver.kinematics import cross_rows
from twistrate.solver.zones import KeepOutConfig


def carrier_masks(n: int) -> np.ndarray:
    """(n + 1, n) mask[b, j] = 1.0 when joint j moves body b (j < b), else 0.0."""
    return (np.arange(n)[None, :] < np.arange(n + 1)[:, None]).astype(float)


def distance_rate_rows(contacts: Contacts, J: np.ndarray, T_base_tool: np.ndarray,
                       mask: np.ndarray) -> np.ndarray:
    """(r, n) rows n^T (J_pa - J_pb): d_dot = row @ q_dot, m/s per unit joint rate.

    J : (6, n) geometric Jacobian of the tool point, base frame, rows (v, w); T_base_tool (4, 4).
    mask : (n + 1, n) from `carrier_masks`.
    n^T J_p q_dot = n^T v_tool + n^T (w x r) = n^T v_tool + (r x n)^T w with r = p - p_tool (the
    linear rows of the offset-point Jacobian), restricted to the joints moving each point's link.
    """
    p_tool = T_base_tool[:3, 3]
    nrm = contacts.normal

    def side(point: np.ndarray, body: np.ndarray) -> np.ndarray:
        G = np.concatenate([nrm, cross_rows(point - p_tool, nrm)], axis=1) @ J  # (r, n)
        return G * mask[body]

    return side(contacts.point_a, contacts.body_a) - side(contacts.point_b, contacts.body_b)


def damper_bounds(distance: np.ndarray, config: KeepOutConfig) -> np.ndarray:
    """(r,) right sides b = -xi (d - d_s) / (d_i - d_s), m/s, for distances d (r,) m."""
    return -config.gain_m_s * (distance - config.security_m) / (config.influence_m - config.security_m)


def damper_rows(contacts: Contacts, J: np.ndarray, T_base_tool: np.ndarray, config: KeepOutConfig,
                mask: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Velocity-damper rows of the contacts: (A, b, pair) with A q_dot >= b.

    contacts : from `KeepOut.contacts` at the configuration of J.
    J : (6, n) geometric Jacobian of the tool point, base frame, rows (v, w); T_base_tool (4, 4).
    Returns A : (r, n) m/s per unit joint rate (rad/s or m/s), b : (r,) m/s, pair : (r,) the
    contact's pair index (`KeepOut.pair_names`); r = 0 gives empty arrays of these shapes.
    """
    n = J.shape[1]
    if not len(contacts.pair):
        return np.zeros((0, n)), np.zeros(0), contacts.pair
    A = distance_rate_rows(contacts, J, T_base_tool, carrier_masks(n) if mask is None else mask)
    return A, damper_bounds(contacts.distance, config), contacts.pair


def point_jacobian(J: np.ndarray, T_base_tool: np.ndarray, p_base: np.ndarray, body: int) -> np.ndarray:
    """Jacobian of a point fixed to body `body` (0 root, i + 1 the link joint i moves), now at
    p_base (3,) m, base frame.

    J : (6, n) geometric Jacobian of the tool point, base frame, rows (v, w); T_base_tool (4, 4).
    Returns (6, n), base frame, rows (v m/s, w rad/s): [[I, -[r]x], [0, I]] J, r = p - p_tool, with
    the columns of joints j >= body zeroed (they do not move that link); body 0 gives zeros.
    """
    Jp = offset_point_jacobian(J, p_base - T_base_tool[:3, 3])
    Jp[:, body:] = 0.0
    return Jp
