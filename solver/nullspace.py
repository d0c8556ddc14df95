"""Null-space objectives (joint-range cost, posture) and the exact projector (I - A+ A) from the SVD.

Gradient projection (Liegeois 1977): q_dot = A# x + (I - A+ A) q_dot_0, where A+ is the exact
pseudo-inverse of the weighted Jacobian A = S J D with a rank tolerance (never the damped A#, whose
"projector" I - A# A is not one and would leak objective motion into the task). From the full SVD
A = U diag(s) Vh, with numerical rank r, I - A+ A = Vh[r:]^T Vh[r:] exactly, so J D (I - A+ A) = 0
for any vector.

Objectives, as joint-rate fields q_dot_0(q) (rad/s or m/s), each with its own gain:

* joint-range cost (Siciliano, Sciavicco, Villani & Oriolo 2009, "Robotics: Modelling, Planning
  and Control", eq. 3.57, from memory): H(q) = -(1/2n) sum_i ((q_i - qbar_i) / (qmax_i - qmin_i))^2,
  qbar the mid-range; gradient dH/dq_i = -(q_i - qbar_i) / (n (qmax_i - qmin_i)^2); unlimited joints
  contribute nothing;
* posture attraction: k_p (q_posture - q), the gradient of -(k_p/2) |q - q_posture|^2;
* manipulability increase: the analytic gradient of the manipulability, from
  `twistrate.solver.jacobians` (composed in `twistrate.solver.resolve`).

The first two are affine in q, so they are folded once into q_dot_0 = c0 - c1 * q (`LinearObjective`).
In the weighted coordinates y (q_dot = D y) the objective enters as y_0 = D q_dot_0, so the
projected joint rates are D (I - A+ A) D q_dot_0 (weighted least-norm gradient projection).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm


@dataclass(frozen=True)
class LinearObjective:
    """The affine null-space objectives of one (arm, options): y_0 = c0 - c1 * q.

    c0 : (n,) constant part, weighted coordinates (already multiplied by D).
    c1 : (n,) per-joint rate gain, 1/s, weighted coordinates (already multiplied by D).
    """

    c0: np.ndarray
    c1: np.ndarray


def _ranges(arm: Arm) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(limited (n,) bool, span (n,), mid (n,)): finite stand-ins (1, 0) for unlimited joints."""
    limited = np.isfinite(arm.q_min) & np.isfinite(arm.q_max)
    lo = np.where(limited, arm.q_min, 0.0)
    hi = np.where(limited, arm.q_max, 1.0)
    return limited, hi - lo, 0.5 * (lo + hi)


def joint_range_gradient(arm: Arm, q: np.ndarray) -> np.ndarray:
    """(n,) gradient of the joint-range cost H (Siciliano et al. 2009 eq. 3.57), 1/rad or 1/m.

    Unlimited joints (infinite position limits) get 0.
    """
    limited, span, mid = _ranges(arm)
    return np.where(limited, -(q - mid) / (arm.n * span * span), 0.0)


def linear_objective(
    arm: Arm,
    limit_gain: float,
    posture_gain: float,
    posture: np.ndarray,
    col_scale: np.ndarray,
) -> LinearObjective | None:
    """Fold limit_gain * grad H(q) + posture_gain * (posture - q), times D = col_scale, into c0 - c1 q.

    posture : (n,) preferred joint positions (rad or m). col_scale : (n,) diagonal of D = W^-1/2.
    Returns None when both gains are zero (the objective term is skipped per tick).
    """
    if limit_gain == 0.0 and posture_gain == 0.0:
        return None
    limited, span, mid = _ranges(arm)
    k_range = np.where(limited, limit_gain / (arm.n * span * span), 0.0)
    c1 = (k_range + posture_gain) * col_scale
    c0 = (k_range * mid + posture_gain * posture) * col_scale
    return LinearObjective(c0, c1)


def project(Vh: np.ndarray, rank: int, y: np.ndarray) -> np.ndarray:
    """(I - A+ A) y for A with full SVD right factor Vh (n, n) and numerical rank `rank`; y : (n,)."""
    if Vh.shape[0] - rank == 1:  # one null direction (a 7-joint arm): a dot and a scaling
        v = Vh[rank]
        return v.dot(y) * v
    Vn = Vh[rank:]
    return Vn.dot(y).dot(Vn)


def projector(Vh: np.ndarray, rank: int) -> np.ndarray:
    """(n, n) explicit null-space projector I - A+ A = Vh[rank:]^T Vh[rank:] (inspection and tests)."""
    Vn = Vh[rank:]
    return Vn.T @ Vn
