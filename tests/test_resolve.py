"""resolve(): twist conversion, weighting, null space, hard limits and their branches, input errors.

Outside references: rigid-body kinematics checked by finite differences of forward kinematics (the
tool really moves with the commanded twist), closed forms solved with numpy.linalg.solve, and the
limit formulas' consequences checked by simulation.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from arm_factory import random_arm, random_q

from twistrate.solver.arm import Arm
from twistrate.solver.errors import ConfigError, InputError
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.limits import plan_bounds, rate_bounds
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import (
    LIMIT_ACCELERATION,
    LIMIT_POSITION,
    LIMIT_VELOCITY,
    DesiredTwist,
    resolve,
    resolve_counted,
)

T = 0.002
FREE = SolverOptions(damping="none", limit_gain=0.0, enforce_limits=False)


def _twist(rng: np.random.Generator, scale: float = 0.05, **kw) -> DesiredTwist:
    return DesiredTwist(rng.normal(scale=scale, size=3), rng.normal(scale=3 * scale, size=3), **kw)


def _rot_log(R: np.ndarray) -> np.ndarray:
    """Rotation vector of R (axis * angle), for small angles (common practice)."""
    angle = np.arccos(np.clip((np.trace(R) - 1) / 2, -1, 1))
    w = np.array([R[2, 1] - R[1, 2], R[0, 2] - R[2, 0], R[1, 0] - R[0, 1]])
    return w / 2 if angle < 1e-12 else w * angle / (2 * np.sin(angle))


def _moved_twist(arm: Arm, q: np.ndarray, qd: np.ndarray, offset_tool: np.ndarray) -> np.ndarray:
    """(v, w), base frame, of the point fixed to the tool at offset_tool (tool coords), by central
    finite differences of forward kinematics along qd (rigid-body kinematics, common practice)."""
    h = 1e-6
    Tp, Tm = forward(arm, q + h * qd).T_base_tool, forward(arm, q - h * qd).T_base_tool
    p = lambda T_: T_[:3, :3] @ offset_tool + T_[:3, 3]  # noqa: E731
    v = (p(Tp) - p(Tm)) / (2 * h)
    w = _rot_log(Tp[:3, :3] @ Tm[:3, :3].T) / (2 * h)
    return np.concatenate((v, w))


def _redundant_arm(rng: np.random.Generator, n: int = 7) -> tuple[Arm, np.ndarray]:
    """A random arm with a well-conditioned configuration (s_min of J > 0.05)."""
    while True:
        arm = random_arm(rng, n=n, prismatic=False)
        for _ in range(20):
            q = random_q(rng, arm)
            J = geometric_jacobian(arm, forward(arm, q))
            if np.linalg.svd(J, compute_uv=False)[-1] > 0.05:
                return arm, q


@pytest.mark.parametrize("frame", ["base", "tool"])
def test_tool_moves_with_the_commanded_twist_about_the_reference_point(rng: np.random.Generator,
                                                                       frame: str) -> None:
    # A twist (v_ref, w) of reference point r: every point of the tool moves with v = v_ref + w x (p - p_ref)
    # (rigid-body velocity field, Murray, Li & Sastry 1994). Checked by finite differences of FK.
    for _ in range(5):
        arm, q = _redundant_arm(rng)
        point = rng.normal(scale=0.1, size=3)
        tw = _twist(rng, frame=frame, point=point)
        r = resolve(arm, q, np.zeros(arm.n), tw, T, FREE)
        R = forward(arm, q).T_base_tool[:3, :3]
        offset_tool = point if frame == "tool" else R.T @ point
        measured = _moved_twist(arm, q, r.qd, offset_tool)
        to_base = R if frame == "tool" else np.eye(3)
        np.testing.assert_allclose(measured[:3], to_base @ tw.linear, atol=1e-7)
        np.testing.assert_allclose(measured[3:], to_base @ tw.angular, atol=1e-7)
        # and the reported tool-point twist is the one achieved
        np.testing.assert_allclose(r.twist_achieved, r.twist_desired, atol=1e-10)
        np.testing.assert_allclose(r.twist_achieved, _moved_twist(arm, q, r.qd, np.zeros(3)), atol=1e-7)


def test_joint_weights_give_the_weighted_least_norm_solution(rng: np.random.Generator) -> None:
    # Weighted least norm (Whitney 1969; Chan & Dubey 1995): minimising q_dot^T W q_dot subject to
    # J q_dot = x gives q_dot = W^-1 J^T (J W^-1 J^T)^-1 x; solved here with numpy.linalg.solve.
    arm, q = _redundant_arm(rng)
    weights = rng.uniform(0.2, 5.0, size=arm.n)
    options = dataclasses.replace(FREE, joint_weights=tuple(weights))
    tw = _twist(rng)
    r = resolve(arm, q, np.zeros(arm.n), tw, T, options)
    J = geometric_jacobian(arm, forward(arm, q))
    Winv = np.diag(1.0 / weights)
    expected = Winv @ J.T @ np.linalg.solve(J @ Winv @ J.T, r.twist_desired)
    np.testing.assert_allclose(r.qd, expected, rtol=1e-8, atol=1e-12)


def test_task_weighting_scales_the_angular_rows(rng: np.random.Generator) -> None:
    # With L the characteristic length the singular values are those of diag(1,1,1,L,L,L) J (m).
    arm, q = _redundant_arm(rng)
    for L in (0.1, 1.0):
        options = dataclasses.replace(FREE, characteristic_length=L)
        r = resolve(arm, q, np.zeros(arm.n), _twist(rng), T, options)
        expected = np.linalg.svd(np.diag([1, 1, 1, L, L, L]) @ r.J, compute_uv=False)
        np.testing.assert_allclose(r.singular_values, expected, rtol=1e-10)


def test_null_space_objectives_do_not_move_the_tool(rng: np.random.Generator) -> None:
    # Gradient projection (Liegeois 1977): (I - J+ J) q_dot_0 lies in the kernel of J.
    arm, q = _redundant_arm(rng)
    tw = _twist(rng)
    bare = resolve(arm, q, np.zeros(arm.n), tw, T, FREE)
    rich = dataclasses.replace(FREE, limit_gain=5.0, posture_gain=2.0, manipulability_gain=30.0,
                               posture=tuple(random_q(rng, arm)))
    r = resolve(arm, q, np.zeros(arm.n), tw, T, rich)
    assert np.linalg.norm(r.qd - bare.qd) > 1e-6  # the objectives do act
    np.testing.assert_allclose(r.J @ (r.qd - bare.qd), 0.0, atol=1e-10)
    np.testing.assert_allclose(r.twist_achieved, tw.linear.tolist() + tw.angular.tolist(), atol=1e-10)


def test_projected_posture_objective_is_a_descent_direction(rng: np.random.Generator) -> None:
    # Liegeois 1977: the projected gradient P grad has grad^T P grad >= 0 (P a projector), so the
    # null-space motion never increases the posture error to first order.
    arm, q = _redundant_arm(rng)
    posture = random_q(rng, arm)
    options = dataclasses.replace(FREE, posture_gain=1.0, posture=tuple(posture))
    zero = DesiredTwist(np.zeros(3), np.zeros(3))
    r = resolve(arm, q, np.zeros(arm.n), zero, T, options)
    assert (posture - q) @ r.qd > 0.0
    np.testing.assert_allclose(r.J @ r.qd, 0.0, atol=1e-10)


def test_exactly_singular_configuration_has_its_own_finite_branch() -> None:
    # bench6 with the wrist bend at 0: the forearm-roll and flange-roll axes coincide (spherical wrist
    # singularity, common practice), so J loses rank exactly.
    arm = load_arm("bench6")
    q = np.array(arm.q_home, dtype=float)
    q[4] = 0.0
    J = geometric_jacobian(arm, forward(arm, q))
    assert np.linalg.svd(J, compute_uv=False)[-1] < 1e-12
    tw = DesiredTwist(np.array([0.1, -0.05, 0.02]), np.array([0.3, 0.2, -0.4]))
    for policy in ("none", "constant", "manipulability", "singular_value", "selective"):
        for limits in (False, True):
            options = SolverOptions(damping=policy, enforce_limits=limits, limit_gain=1.0)
            r = resolve(arm, q, np.zeros(arm.n), tw, T, options)
            for name in ("qd", "twist_achieved", "singular_values", "U", "J"):
                assert np.all(np.isfinite(getattr(r, name))), (policy, limits, name)
            assert np.isfinite(r.damping) and 0.0 <= r.scale <= 1.0
            if policy in ("constant", "singular_value", "manipulability"):
                # Nakamura & Hanafusa 1986: every direction's gain is at most 1/(2 l) (weighted units)
                L = options.characteristic_length
                xw = r.twist_desired * np.array([1, 1, 1, L, L, L])
                assert np.linalg.norm(r.qd) <= np.linalg.norm(xw) / (2 * r.damping) + 1e-9


def test_fewer_joints_than_task_rows(rng: np.random.Generator) -> None:
    # planar3: 3 joints; the achieved twist is the least-squares (pseudo-inverse) projection of the
    # desired one onto the range of J (numpy.linalg.lstsq as the reference).
    arm = load_arm("planar3")
    q = np.array(arm.q_home, dtype=float)
    tw = _twist(rng)
    r = resolve(arm, q, np.zeros(3), tw, T, FREE)
    expected = np.linalg.lstsq(r.J * [[1], [1], [1], [0.3], [0.3], [0.3]],
                               r.twist_desired * [1, 1, 1, 0.3, 0.3, 0.3], rcond=None)[0]
    np.testing.assert_allclose(r.qd, expected, rtol=1e-9, atol=1e-12)
    assert r.singular_values.shape == (3,) and r.U.shape == (6, 3)


@pytest.mark.parametrize("field", ["q", "qd_prev", "twist.linear", "twist.angular", "twist.point"])
@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_input_raises_input_error_naming_the_field(field: str, bad: float) -> None:
    arm = load_arm("reach7")
    q = np.array(arm.q_home, dtype=float)
    qd = np.zeros(7)
    lin, ang, point = np.zeros(3), np.array([0.0, 0.0, 0.1]), np.array([0.0, 0.02, 0.0])
    target = {"q": q, "qd_prev": qd, "twist.linear": lin, "twist.angular": ang, "twist.point": point}[field]
    target[1] = bad
    with pytest.raises(InputError, match=f"^{field.replace('.', '[.]')}:"):
        resolve(arm, q, qd, DesiredTwist(lin, ang, "tool", point), T, SolverOptions())


def test_bad_frame_period_and_options_raise() -> None:
    arm = load_arm("reach7")
    q, qd = np.array(arm.q_home, dtype=float), np.zeros(7)
    tw = DesiredTwist(np.zeros(3), np.zeros(3))
    with pytest.raises(InputError, match=r"twist\.frame"):
        resolve(arm, q, qd, DesiredTwist(np.zeros(3), np.zeros(3), "world"), T, SolverOptions())  # type: ignore[arg-type]
    with pytest.raises(InputError, match="period"):
        resolve(arm, q, qd, tw, 0.0, SolverOptions())
    with pytest.raises(ConfigError, match="joint_weights"):
        resolve(arm, q, qd, tw, T, SolverOptions(joint_weights=(1.0, 2.0)))
    with pytest.raises(ConfigError, match="posture"):
        resolve(arm, q, qd, tw, T, SolverOptions(posture=(0.0,) * 6))
    with pytest.raises(ConfigError, match="characteristic_length"):
        resolve(arm, q, qd, tw, T, SolverOptions(characteristic_length=0.0))
    with pytest.raises(ConfigError, match="damping"):
        resolve(arm, q, qd, tw, T, SolverOptions(damping="heavy"))  # type: ignore[arg-type]


def test_returned_arrays_do_not_alias_across_ticks(rng: np.random.Generator) -> None:
    arm, q = _redundant_arm(rng)
    options = SolverOptions(limit_gain=1.0, posture_gain=0.5, manipulability_gain=10.0)
    r1 = resolve(arm, q, np.zeros(arm.n), _twist(rng), T, options)
    saved = {k: np.array(getattr(r1, k), copy=True) for k in
             ("qd", "twist_desired", "twist_achieved", "limits_active", "J", "singular_values", "U")}
    saved_T = r1.frames.T_base_tool.copy()
    resolve(arm, random_q(rng, arm), rng.normal(size=arm.n), _twist(rng), T, options)
    for k, v in saved.items():
        np.testing.assert_array_equal(getattr(r1, k), v)
    np.testing.assert_array_equal(r1.frames.T_base_tool, saved_T)
    assert r1.limits_active.dtype == np.uint8 and r1.limits_active.shape == (arm.n,)


def _push(arm: Arm, joint: int, start: float, speed: float, ticks: int,
          reverse_at: int | None = None) -> tuple[list[float], int, int]:
    """Drive `joint` from `start` (rad) toward its nearer limit with the twist that joint alone would
    make at `speed` rad/s, constant in the base frame (reversed from tick `reverse_at` on, if given);
    integrate q += q_dot T. Checks every bound every tick and returns (scales, bits seen, ticks where
    no scale was feasible)."""
    plan = plan_bounds(arm, T)
    options = SolverOptions(damping="none", limit_gain=0.0)
    q = np.array(arm.q_home, dtype=float)
    q[joint] = start
    qd = np.zeros(arm.n)
    J = geometric_jacobian(arm, forward(arm, q))
    toward = -1.0 if start - arm.q_min[joint] < arm.q_max[joint] - start else 1.0
    tw = DesiredTwist(toward * speed * J[:3, joint], toward * speed * J[3:, joint])
    scales, bits_seen, infeasible = [], 0, 0
    for k in range(ticks):
        if k == reverse_at:
            tw = DesiredTwist(-tw.linear, -tw.angular)
        b = rate_bounds(plan, q, qd)
        r = resolve(arm, q, qd, tw, T, options)
        assert np.all(r.qd >= b.lo - 1e-12) and np.all(r.qd <= b.hi + 1e-12)
        assert np.all(np.abs(r.qd) <= arm.v_max + 1e-12)
        assert np.all(np.abs(r.qd - qd) <= arm.a_max * T + 1e-12)
        assert 0.0 <= r.scale <= 1.0
        if np.allclose(r.twist_achieved, r.scale * r.twist_desired, atol=1e-9):
            scales.append(r.scale)
        else:  # the documented infeasible case: braking along the previous rate, scale 0
            assert r.scale == 0.0
            infeasible += 1
        bits_seen |= int(np.bitwise_or.reduce(r.limits_active))
        qd = r.qd
        q = q + qd * T
        assert np.all(q >= arm.q_min - 1e-12) and np.all(q <= arm.q_max + 1e-12)
    return scales, bits_seen, infeasible


def test_limits_hold_and_the_twist_is_only_scaled_while_pushing_into_a_joint_limit() -> None:
    # reach7's base yaw driven into its 165 deg limit: every bound holds every tick, the joint never
    # passes its limit, and the tool twist is always a scaled copy of the desired one (Flacco, De Luca
    # & Khatib 2012): the other joints take over in the null space, so the scale stays high.
    arm = load_arm("reach7")
    scales, bits_seen, infeasible = _push(arm, 0, np.radians(150.0), 0.3, 800)
    assert infeasible == 0
    assert min(scales) < 1.0 and np.mean(scales) > 0.9
    assert bits_seen & (LIMIT_ACCELERATION | LIMIT_POSITION | LIMIT_VELOCITY)


def test_limits_hold_when_the_scaled_twist_becomes_infeasible() -> None:
    # reach7's shoulder driven at speed, then the twist reversed: no joint rate within one tick of
    # acceleration makes any scaled copy of the reversed twist (s > 0) or holds the tool (s = 0),
    # so on some ticks no scale in [0, 1] is feasible (the scaling LP itself is infeasible there,
    # see tests/test_limits_lp.py). The hard bounds still hold every tick.
    arm = load_arm("reach7")
    scales, _, infeasible = _push(arm, 1, np.radians(-60.0), 0.3, 400, reverse_at=200)
    assert infeasible > 0 and len(scales) > 0


def test_braking_share_keeps_the_push_into_a_limit_feasible() -> None:
    # reach7's shoulder pushed into its -115 deg limit: the position bound plans its braking with
    # BRAKING_SHARE of the acceleration limit, which leaves the other joints the headroom to follow
    # the shrinking scale, so every tick has a feasible scale (recursive feasibility of braking
    # bounds: Flacco, De Luca & Khatib 2015, IEEE T-RO 31(3), from memory).
    arm = load_arm("reach7")
    scales, _, infeasible = _push(arm, 1, np.radians(-100.0), 0.3, 800)
    assert infeasible == 0 and min(scales) < 1.0


def test_damping_and_saturation_scale_the_damped_twist(rng: np.random.Generator) -> None:
    # With damping acting, the limits scale the damped twist along its own direction: J q_dot with
    # limits = s * (J q_dot without limits), objectives off.
    arm = load_arm("bench6")
    q = np.array(arm.q_home, dtype=float)
    q[4] = 0.02  # near the wrist singularity: the singular-value damping acts
    tw = DesiredTwist(np.array([0.4, 0.2, -0.3]), np.array([1.0, -0.5, 0.8]))
    base = SolverOptions(damping="singular_value", limit_gain=0.0, enforce_limits=False)
    free = resolve(arm, q, np.zeros(6), tw, T, base)
    limited = resolve(arm, q, np.zeros(6), tw, T, dataclasses.replace(base, enforce_limits=True))
    assert free.damping > 0.0 and limited.scale < 1.0
    np.testing.assert_allclose(limited.twist_achieved, limited.scale * free.twist_achieved, atol=1e-9)


def test_infeasible_scale_brakes_along_the_previous_rate() -> None:
    # A stop commanded at speed: no task scale is feasible within one tick of acceleration, so the
    # joints decelerate together along the previous rate as hard as the slowest joint allows.
    arm = load_arm("reach7")
    q = np.array(arm.q_home, dtype=float)
    qd_prev = 0.5 * arm.v_max * np.array([1, -1, 1, 1, -1, 1, -1])
    r, passes = resolve_counted(arm, q, qd_prev, DesiredTwist(np.zeros(3), np.zeros(3)), T,
                                SolverOptions(limit_gain=0.0))
    c = max(1.0 - arm.a_max * T / np.abs(qd_prev))
    np.testing.assert_allclose(r.qd, c * qd_prev, rtol=1e-12)
    assert r.scale == 0.0 and passes > 0
    assert np.all(np.abs(r.qd - qd_prev) <= arm.a_max * T + 1e-12)
    assert np.any(r.limits_active & LIMIT_ACCELERATION)


def test_crossing_bounds_brake_as_hard_as_possible() -> None:
    # A joint beyond its lower limit and still moving outward: the position bound (no further
    # outward motion) and the acceleration bound cross; the joint is pinned at q_dot_prev + A T.
    arm = load_arm("reach7")
    plan = plan_bounds(arm, T)
    q = np.array(arm.q_home, dtype=float)
    q[3] = arm.q_min[3] - 0.01
    qd_prev = np.zeros(7)
    qd_prev[3] = -0.5
    b = rate_bounds(plan, q, qd_prev)
    assert b.lo[3] == b.hi[3] == pytest.approx(-0.5 + arm.a_max[3] * T)
    r = resolve(arm, q, qd_prev, DesiredTwist(np.zeros(3), np.zeros(3)), T, SolverOptions())
    assert r.qd[3] == pytest.approx(-0.5 + arm.a_max[3] * T)
    assert r.limits_active[3] & LIMIT_ACCELERATION and r.limits_active[3] & LIMIT_POSITION


def test_rank_deficient_saturation_restores_the_best_scale() -> None:
    # bench6 (6 joints, square J): saturating any joint drops the rank of J W below 6, so the loop
    # restores the best scale found; the twist is still only scaled, never bent.
    arm = load_arm("bench6")
    q = np.array(arm.q_home, dtype=float)
    tw = DesiredTwist(np.array([1.5, 0.0, 0.0]), np.zeros(3))
    r, passes = resolve_counted(arm, q, np.zeros(6), tw, T, SolverOptions(damping="none", limit_gain=0.0))
    assert passes >= 1 and 0.0 < r.scale < 1.0
    np.testing.assert_allclose(r.twist_achieved, r.scale * r.twist_desired, atol=1e-10)
    b = rate_bounds(plan_bounds(arm, T), q, np.zeros(6))
    assert np.all(r.qd >= b.lo) and np.all(r.qd <= b.hi)
    assert np.any(r.limits_active)
