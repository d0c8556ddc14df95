"""Foresight for the health signal: how soon the current joint rates reach a pinched configuration or a
position limit, to first order.

Pinched: the time until the smallest task-weighted singular value sigma (m) reaches the health
threshold `pinched_below_m` along the current rates q_dot. For a simple singular value (distinct from
its neighbour, nonzero) with singular vectors u (left) and v (right, weighted joint coordinates),

    d sigma / dt = u^T A_dot v,   A_dot = S J_dot D,   J_dot = sum_j dJ/dq_j q_dot_j

(the first-order perturbation of a simple singular value: Stewart & Sun 1990, "Matrix Perturbation
Theory", ch. IV, from memory; checked here against finite differences along simulated motion and the
closed form of a planar two-link arm, tests/test_foresight.py). J_dot comes from the derivative
tensor of `twistrate.solver.jacobians`. With v = A^T u / sigma the right vector is not needed, so a
tick's Resolution (J, U, singular values) suffices. The time is the linear extrapolation
(sigma - threshold) / (-d sigma / dt).

Where it holds and what is reported otherwise:
* sigma simple and above the rank tolerance: sigma is then analytic in q and the rate is exact; the
  time is a first-order estimate, good while it is short against the time the rate itself changes
  in (sigma_dot / sigma_ddot), and it converges to the exact time as the threshold nears;
* sigma already at or below the threshold: 0.0;
* moving away or steady (d sigma / dt >= 0): None;
* sigma repeated or nearly so (gap to the next larger value below SIMPLE_GAP_RTOL of the largest:
  the values may cross, the derivative of "the smallest" is not defined there) or sigma at zero
  (|sigma| has a kink): None, and the rate is None too.

Position limits: per joint, the time until the current rate carries it to the limit it moves toward,
(q_max - q) / q_dot or (q_min - q) / q_dot; +inf at rest, moving away, or unlimited; 0.0 on or beyond
the limit while moving outward. The joint that gets there first is the smallest finite time's index.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.jacobians import jacobian_dot
from twistrate.solver.svd import rank_tolerance

#: The smallest singular value counts as simple when its gap to the next larger one exceeds this
#: share of the largest singular value.
SIMPLE_GAP_RTOL = 1e-6


@dataclass(frozen=True)
class Foresight:
    """First-order foresight of one configuration and joint rates (module docstring).

    sigma_min_m : smallest task-weighted singular value, m.
    sigma_min_rate_m_s : its rate along q_dot, m/s, or None where it is not simple or is zero.
    time_to_pinched_s : s until sigma_min reaches the pinched threshold, 0.0 at or below it, None when
        moving away, steady, or the rate is undefined.
    time_to_limit_s : (n,) s until each joint reaches the position limit it moves toward; +inf at rest,
        moving away or unlimited; 0.0 on or beyond it moving outward.
    first_limit_joint : index of the joint with the smallest finite time_to_limit_s, or None.
    time_to_first_limit_s : that time, s, or None.
    """

    sigma_min_m: float
    sigma_min_rate_m_s: float | None
    time_to_pinched_s: float | None
    time_to_limit_s: np.ndarray
    first_limit_joint: int | None
    time_to_first_limit_s: float | None


def sigma_min_rate(A: np.ndarray, A_dot: np.ndarray, U: np.ndarray, s: np.ndarray) -> float | None:
    """d sigma_min / dt = u^T A_dot A^T u / sigma_min (m/s), or None when sigma_min is not simple or is 0.

    A : (m, n) task-weighted Jacobian; A_dot : (m, n) its time derivative along the rates; U : (m, >= k)
    left singular vectors; s : (k,) singular values, descending, m.
    """
    k = s.shape[0]
    if k == 0:
        return None
    sigma = float(s[-1])
    if sigma <= rank_tolerance(s):
        return None
    if k > 1 and float(s[-2]) - sigma <= SIMPLE_GAP_RTOL * float(s[0]):
        return None
    u = U[:, k - 1]
    v = (u @ A) / sigma
    return float(u @ A_dot @ v)


def time_to_threshold_s(sigma: float, rate: float | None, threshold: float) -> float | None:
    """Linear extrapolation: s until `sigma` (m) falls to `threshold` (m) at `rate` (m/s) (module doc)."""
    if sigma <= threshold:
        return 0.0
    if rate is None or not rate < 0.0:
        return None
    return (sigma - threshold) / -rate


def limit_times_s(arm: Arm, q: np.ndarray, qd: np.ndarray) -> np.ndarray:
    """(n,) s until each joint's rate qd (n,) carries it from q (n,) to the limit it moves toward."""
    out = np.full(q.shape[0], np.inf)
    up = qd > 0.0
    down = qd < 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        out[up] = (arm.q_max[up] - q[up]) / qd[up]
        out[down] = (arm.q_min[down] - q[down]) / qd[down]
    out[~np.isfinite(out)] = np.inf  # unlimited joints (inf / rate) and any overflow
    np.maximum(out, 0.0, out=out)
    return out


def foresight(
    arm: Arm, q: np.ndarray, qd: np.ndarray, J: np.ndarray, U: np.ndarray, s: np.ndarray,
    weight: np.ndarray, pinched_below_m: float,
) -> Foresight:
    """Foresight at q (n,) moving at qd (n,) (module docstring).

    J : (6, n) geometric Jacobian at q, base frame, tool point, rows (v, w). U : (6, >= k) and s : (k,)
    the left singular vectors and singular values (m) of A = J * weight (a Resolution's U and
    singular_values). weight : (6, n) the elementwise task and joint weighting, S_ii D_jj
    (`task_joint_weight`). pinched_below_m : the pinched health threshold, m.
    """
    A = J * weight
    A_dot = jacobian_dot(J, qd) * weight
    rate = sigma_min_rate(A, A_dot, U, s)
    sigma = float(s[-1]) if s.size else 0.0
    times = limit_times_s(arm, q, qd)
    first = int(times.argmin()) if times.size else -1
    finite = first >= 0 and math.isfinite(float(times[first]))
    return Foresight(
        sigma_min_m=sigma,
        sigma_min_rate_m_s=rate,
        time_to_pinched_s=time_to_threshold_s(sigma, rate, pinched_below_m),
        time_to_limit_s=times,
        first_limit_joint=first if finite else None,
        time_to_first_limit_s=float(times[first]) if finite else None,
    )


def task_joint_weight(
    n: int, characteristic_length: float, joint_weights: tuple[float, ...] | None
) -> np.ndarray:
    """(6, n) elementwise weighting S_ii D_jj with S = diag(1, 1, 1, L, L, L), D = W^-1/2 (the solver's)."""
    S = np.array([1.0, 1.0, 1.0, characteristic_length, characteristic_length, characteristic_length])
    D = np.ones(n) if joint_weights is None else 1.0 / np.sqrt(np.asarray(joint_weights, dtype=float))
    return S[:, None] * D[None, :]
