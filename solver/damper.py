"""Keep-out contacts, their velocity-damper rows A q_dot >= b, and the point Jacobians they use.

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

from dataclasses import dataclass

import numpy as np

from twistrate.solver.jacobians import offset_point_jacobian
from twistrate.solver.kinematics import LEVI_CIVITA
from twistrate.solver.zones import KeepOutConfig

#: A damper row A q_dot >= b counts as active (met with equality) at the rates when
#: A q_dot - b <= this times (1 + |b|), m/s: the LP's row slack (scaling.ROW_TOL) plus the final clip's
#: rounding.
ROW_ACTIVE_TOL = 1e-9


@dataclass(frozen=True, eq=False)
class Contacts:
    """Contacts of one pass (r >= 0 of them), one per damper row.

    pair : (r,) index into `KeepOut.pair_names`.
    distance : (r,) signed distance of the pair's surfaces, m.
    point_a, point_b : (r, 3) closest points, base frame, m (a on an arm capsule).
    normal : (r, 3) unit normal from b to a, base frame.
    body_a, body_b : (r,) bodies carrying the points (0: the root link or a zone: not moving).
    """

    pair: np.ndarray
    distance: np.ndarray
    point_a: np.ndarray
    point_b: np.ndarray
    normal: np.ndarray
    body_a: np.ndarray
    body_b: np.ndarray


def carrier_masks(n: int) -> np.ndarray:
    """(n + 1, n) mask[b, j] = 1.0 when joint j moves body b (j < b), else 0.0 (read-only)."""
    mask = (np.arange(n)[None, :] < np.arange(n + 1)[:, None]).astype(float)
    mask.setflags(write=False)
    return mask


def distance_rate_rows(contacts: Contacts, J: np.ndarray, T_base_tool: np.ndarray,
                       mask: np.ndarray) -> np.ndarray:
    """(r, n) rows n^T (J_pa - J_pb): d_dot = row @ q_dot, m/s per unit joint rate.

    J : (6, n) geometric Jacobian of the tool point, base frame, rows (v, w); T_base_tool (4, 4).
    mask : (n + 1, n) from `carrier_masks`.
    n^T J_p q_dot = n^T v_tool + n^T (w x r) = n^T v_tool + (r x n)^T w with r = p - p_tool (the
    linear rows of the offset-point Jacobian), restricted to the joints moving each point's link.
    Side b is skipped when no contact has a moving b (zones and the root link do not move).
    """
    nrm = contacts.normal
    r = len(nrm)
    both = bool(contacts.body_b.any())
    points = np.concatenate([contacts.point_a, contacts.point_b]) if both else contacts.point_a
    normals = np.concatenate([nrm, nrm]) if both else nrm
    W = np.empty((len(points), 6))
    W[:, :3] = normals
    # r x n for every row at once: Levi-Civita times the row-wise outer products (r, n).
    outer = (points - T_base_tool[:3, 3])[:, :, None] * normals[:, None, :]
    W[:, 3:] = outer.reshape(-1, 9) @ LEVI_CIVITA.T
    G = W @ J
    G *= mask[np.concatenate([contacts.body_a, contacts.body_b]) if both else contacts.body_a]
    return G[:r] - G[r:] if both else G


def damper_bounds(distance: np.ndarray, config: KeepOutConfig) -> np.ndarray:
    """(r,) right sides b = -xi (d - d_s) / (d_i - d_s), m/s, for distances d (r,) m."""
    return -config.gain_m_s * (distance - config.security_m) / (config.influence_m - config.security_m)


def damper_rows(contacts: Contacts, J: np.ndarray, T_base_tool: np.ndarray, config: KeepOutConfig,
                mask: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Velocity-damper rows of the contacts: (A, b, pair) with A q_dot >= b.

    contacts : from `KeepOut.contacts` at the configuration of J.
    mask : `carrier_masks(n)` when the caller keeps one (`KeepOut.masks`), else built here.
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
