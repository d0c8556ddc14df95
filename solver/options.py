"""Tunable options of the per-tick rate resolution and of the health classifier (plain data)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

DampingPolicy = Literal["none", "constant", "manipulability", "singular_value", "selective"]
DAMPING_POLICIES: tuple[str, ...] = ("none", "constant", "manipulability", "singular_value", "selective")


@dataclass(frozen=True)
class SolverOptions:
    """Options of `twistrate.solver.resolve.resolve`. Units SI; gains in 1/s.

    damping : policy for the damping factor lambda of damped least squares:
        "none" (exact inverse / pseudo-inverse), "constant" (lambda = damping_max),
        "manipulability" (Nakamura & Hanafusa 1986, threshold `manipulability_threshold`),
        "singular_value" (Chiaverini 1997, threshold `singular_value_threshold`),
        "selective" (Buss & Kim 2005, per-direction bound `selective_step_max`).
    damping_max : lambda (constant) or lambda_max (variable policies), in the units of the
        task-weighted singular values (m).
    manipulability_threshold : w0 of the manipulability-based policy, in units of the task-weighted
        manipulability (m^6 for six rows).
    singular_value_threshold : epsilon of the smallest-singular-value policy (m).
    selective_step_max : gamma_max of selective damping: largest joint-rate norm any one singular
        direction may contribute, rad/s.
    characteristic_length : L (m); the angular task rows are multiplied by L so both row blocks are
        m/s and singular values are in m (task weighting, translation against rotation).
    joint_weights : (n,) positive weights W_ii or None for identity; a larger weight makes a joint
        move less (weighted least norm, q_dot^T W q_dot).
    limit_gain : gain k of the joint-range cost gradient projected into the null space (Liegeois
        1977), 1/s.
    manipulability_gain : gain of the manipulability-gradient objective in the null space: joint
        rates k * dw/dq with w the manipulability of the task-weighted Jacobian (m^6 for six
        rows and n >= 6), so k is in rad/s per (m^6/rad).
    posture_gain : gain of the attraction to `posture` in the null space, 1/s.
    posture : (n,) preferred joint positions (rad or m), or None for the arm's home posture.
    enforce_limits : enforce joint position (with braking distance), velocity and acceleration
        limits by saturation in the null space with task scaling (Flacco, De Luca & Khatib 2012).

    `twistrate.solver.resolve` validates the options against the arm once and memoises the derived
    per-tick constants on the instance (an attribute outside the dataclass fields; equality,
    `dataclasses.replace` and `asdict` ignore it). Build a new instance to change an option.
    """

    damping: DampingPolicy = "singular_value"
    damping_max: float = 0.04
    manipulability_threshold: float = 1e-3
    singular_value_threshold: float = 0.04
    selective_step_max: float = 1.0
    characteristic_length: float = 0.3
    joint_weights: tuple[float, ...] | None = None
    limit_gain: float = 1.0
    manipulability_gain: float = 0.0
    posture_gain: float = 0.0
    posture: tuple[float, ...] | None = None
    enforce_limits: bool = True


@dataclass(frozen=True)
class HealthThresholds:
    """Thresholds of the health state machine, on the smallest task-weighted singular value (m).

    The state goes clear -> narrow below `narrow_below`, narrow -> pinched below `pinched_below`
    (m: the weakest direction of motion narrowing, then pinched nearly shut); it returns one level
    only once the value exceeds that level's entry threshold times (1 + release_margin).
    """

    narrow_below: float = 0.06
    pinched_below: float = 0.015
    release_margin: float = 0.2
