"""Per-tick rate resolution: desired tool twist -> joint rates (damping, null space, hard limits).

CONTRACT DRAFT: the data types and the signature of `resolve` are fixed; the body is being built.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.kinematics import Frames
from twistrate.solver.options import SolverOptions

TwistFrame = Literal["base", "tool"]

#: bits of Resolution.limits_active, per joint
LIMIT_POSITION = 1
LIMIT_VELOCITY = 2
LIMIT_ACCELERATION = 4


@dataclass(frozen=True)
class DesiredTwist:
    """A desired rigid-body twist of the tool.

    linear : (3,) m/s, velocity of the reference point.
    angular : (3,) rad/s, angular velocity of the tool.
    frame : "base" or "tool": the frame both vectors (and `point`) are expressed in.
    point : (3,) m, reference point as an offset from the tool origin, expressed in `frame`
        (zeros: the tool point itself).
    """

    linear: np.ndarray
    angular: np.ndarray
    frame: TwistFrame = "base"
    point: np.ndarray = field(default_factory=lambda: np.zeros(3))


@dataclass(frozen=True)
class Resolution:
    """Everything one tick of rate resolution produced.

    qd : (n,) joint rates, rad/s (revolute) or m/s (prismatic), joint order.
    twist_desired : (6,) the desired twist converted to base frame, tool point, rows (v, w).
    twist_achieved : (6,) J @ qd, base frame, tool point, rows (v, w); equals scale * twist_desired
        when no damping acts.
    scale : task scaling factor in [0, 1] applied by the hard limits (1: twist followed fully).
    damping : damping factor lambda applied (0 when none), m.
    limits_active : (n,) uint8 bit mask per joint, LIMIT_POSITION | LIMIT_VELOCITY |
        LIMIT_ACCELERATION: which bound was saturated this tick.
    frames : forward kinematics at q.
    J : (6, n) geometric Jacobian, base frame, tool point, rows (v, w).
    singular_values : (min(6, n),) singular values of the task-weighted Jacobian, descending, m.
    U : (6, min(6, n)) left singular vectors of the task-weighted Jacobian, base frame, (v, w)
        rows (angular rows in the weighted units).
    """

    qd: np.ndarray
    twist_desired: np.ndarray
    twist_achieved: np.ndarray
    scale: float
    damping: float
    limits_active: np.ndarray
    frames: Frames
    J: np.ndarray
    singular_values: np.ndarray
    U: np.ndarray


def resolve(
    arm: Arm,
    q: np.ndarray,
    qd_prev: np.ndarray,
    twist: DesiredTwist,
    period: float,
    options: SolverOptions,
) -> Resolution:
    """One tick: joint rates for `twist` at configuration q.

    q : (n,) measured joint positions (rad or m). qd_prev : (n,) rates commanded last tick.
    period : tick period T in s (acceleration bounds are per tick).
    """
    raise NotImplementedError("rate resolution is being built")
