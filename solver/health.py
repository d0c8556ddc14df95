"""Health measures of a configuration (from a Jacobian or a Resolution) and the health state machine.

Measures (Yoshikawa 1985, IJRR 4(2), "Manipulability of robotic mechanisms"; Salisbury & Craig
1982 for the condition number):

* manipulability w = sqrt(det(J J^T)) = product of the singular values; where rows outnumber
  joints det(J J^T) = 0 and the product of the min(rows, joints) singular values is reported
  instead. Whole: of the task-weighted Jacobian S J D (angular rows times the characteristic
  length L, so m^k for k singular values; D = W^-1/2, identity unless joint weights are set), the
  matrix the solver inverts. Translational: of J_v = J[:3] (m^3). Rotational: of J_w = J[3:]
  (dimensionless).
* singular values (m) and the inverse condition number s_min / s_max in [0, 1] (0 when s_max = 0).
* the weakest task direction: the left singular vector u of the smallest singular value, as a twist
  direction (linear = u[:3], angular = u[3:] / L; base frame; |linear|^2 + L^2 |angular|^2 = 1),
  sign-normalised so its largest-magnitude weighted component is positive (first one on ties).
* damping and task scale applied (None when built from a Jacobian alone).
* each joint's margin to its nearer position limit as a fraction of its range,
  min(q - q_min, q_max - q) / (q_max - q_min): 0.5 mid-range, 0 on a limit, negative beyond;
  unlimited joints report +inf.

State machine (driven per tick by the smallest task-weighted singular value s_min, thresholds in
`twistrate.solver.options.HealthThresholds`): CLEAR -> NARROW below `narrow_below` (the weakest
direction of motion narrowing), -> PINCHED below `pinched_below` (nearly shut); escalation is
immediate (to whatever level the entry thresholds give). The states only report: the arm keeps
moving, damped. De-escalation goes one level per update, and only once s_min exceeds that level's entry
threshold times (1 + release_margin), so a value hovering at a threshold does not chatter.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.options import HealthThresholds, SolverOptions
from twistrate.solver.resolve import Resolution
from twistrate.solver.svd import singular_values, svd_full

CLEAR = "clear"
NARROW = "narrow"
PINCHED = "pinched"
#: States in order of severity.
STATES: tuple[str, ...] = (CLEAR, NARROW, PINCHED)
_LEVEL = {CLEAR: 0, NARROW: 1, PINCHED: 2}


@dataclass(frozen=True)
class Health:
    """Health of one configuration (see the module docstring for definitions and units).

    manipulability : task-weighted, m^k (k = min(6, n)). manipulability_translational : m^3.
    manipulability_rotational : dimensionless.
    singular_values : (min(6, n),) of the task-weighted Jacobian, descending, m.
    sigma_min : smallest of them, m (drives `state`). inverse_condition : s_min / s_max.
    weakest_linear : (3,) m/s and weakest_angular : (3,) rad/s per unit weighted twist, base frame.
    damping : lambda applied, m, or None. scale : task scale applied, or None.
    limit_margin : (n,) fraction of each joint's range to its nearer limit; +inf when unlimited.
    state : CLEAR, NARROW or PINCHED.
    """

    manipulability: float
    manipulability_translational: float
    manipulability_rotational: float
    singular_values: np.ndarray
    sigma_min: float
    inverse_condition: float
    weakest_linear: np.ndarray
    weakest_angular: np.ndarray
    damping: float | None
    scale: float | None
    limit_margin: np.ndarray
    state: str


def manipulability(J: np.ndarray) -> float:
    """Yoshikawa manipulability of J (m, n): sqrt(det(J J^T)) for m <= n, else the product of the
    n singular values (J J^T is then singular). Computed from the singular values (robust where
    det(J J^T) rounds to a tiny negative)."""
    if J.shape[0] == 0 or J.shape[1] == 0:
        return 0.0
    return float(np.prod(singular_values(J)))  # numpy.linalg.svd's LAPACK call, less overhead


def limit_margins(arm: Arm, q: np.ndarray) -> np.ndarray:
    """(n,) margin of each joint to its nearer position limit as a fraction of its range; +inf for
    unlimited joints (infinite limits); negative beyond a limit. q : (n,) rad or m."""
    limited = np.isfinite(arm.q_min) & np.isfinite(arm.q_max)
    lo = np.where(limited, arm.q_min, 0.0)
    hi = np.where(limited, arm.q_max, 1.0)
    near = np.minimum(q - lo, hi - q)
    return np.where(limited, near / (hi - lo), np.inf)


def weakest_direction(U: np.ndarray, k: int, characteristic_length: float) -> tuple[np.ndarray, np.ndarray]:
    """Weakest task direction from left singular vectors U (6, >= k) of the task-weighted Jacobian.

    Column k - 1 (the smallest of k singular values), sign-normalised (largest-magnitude component
    positive, first on ties). Returns (linear (3,), angular (3,)) as a twist direction: the
    weighted vector is (linear, L * angular), base frame.
    """
    u = U[:, k - 1]
    if u[int(np.argmax(np.abs(u)))] < 0.0:
        u = -u
    return u[:3].copy(), u[3:] / characteristic_length


def next_state(previous: str | None, sigma_min: float, thresholds: HealthThresholds) -> str:
    """Health state after one update with the smallest task-weighted singular value sigma_min (m).

    previous : the state before (None: no history, the entry thresholds alone decide).
    """
    if sigma_min < thresholds.pinched_below:
        entry = PINCHED
    elif sigma_min < thresholds.narrow_below:
        entry = NARROW
    else:
        entry = CLEAR
    if previous is None or _LEVEL[entry] >= _LEVEL[previous]:
        return entry
    exit_factor = 1.0 + thresholds.release_margin
    if previous == PINCHED:
        return NARROW if sigma_min > thresholds.pinched_below * exit_factor else PINCHED
    return CLEAR if sigma_min > thresholds.narrow_below * exit_factor else NARROW


def assess(
    arm: Arm,
    q: np.ndarray,
    source: Resolution | np.ndarray,
    options: SolverOptions | None = None,
    previous: str | None = None,
    thresholds: HealthThresholds | None = None,
) -> Health:
    """Health of configuration q from a tick's Resolution or from a geometric Jacobian alone.

    q : (n,) joint positions. source : a Resolution of this q (its singular values, U, J, damping
        and scale are reused, no new SVD of the whole Jacobian), or J : (6, n) geometric Jacobian,
        base frame, tool point, rows (v, w) (then damping and scale are None).
    options : the solver options (characteristic length and joint weights); defaults when None.
        Pass the same options the Resolution was made with.
    previous : previous health state (for the release margin), or None.
    """
    options = SolverOptions() if options is None else options
    thresholds = HealthThresholds() if thresholds is None else thresholds
    L = options.characteristic_length
    if isinstance(source, Resolution):
        J = source.J
        s = source.singular_values
        U = source.U
        damping: float | None = source.damping
        scale: float | None = source.scale
    else:
        J = np.asarray(source, dtype=float)
        A = J.copy()
        A[3:] *= L
        if options.joint_weights is not None:
            A /= np.sqrt(np.asarray(options.joint_weights, dtype=float))[None, :]
        U, s, _ = svd_full(A)
        damping = scale = None
    k = s.shape[0]
    s_max = float(s[0]) if k else 0.0
    s_min = float(s[-1]) if k else 0.0
    linear, angular = weakest_direction(U, k, L)
    return Health(
        manipulability=float(np.prod(s)),
        manipulability_translational=manipulability(J[:3]),
        manipulability_rotational=manipulability(J[3:]),
        singular_values=s.copy(),
        sigma_min=s_min,
        inverse_condition=s_min / s_max if s_max > 0.0 else 0.0,
        weakest_linear=linear,
        weakest_angular=angular,
        damping=damping,
        scale=scale,
        limit_margin=limit_margins(arm, np.asarray(q, dtype=float)),
        state=next_state(previous, s_min, thresholds),
    )
