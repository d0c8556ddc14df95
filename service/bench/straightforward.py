"""The benchmark's reference: a straightforward numpy tick of the kind teams hand-write (a new 4x4 per link
from np.array of lists every tick, np.cross columns, explicit inverse and np.linalg.pinv projector, clipping
for limits). It has no manipulability gradient and no saturation, so it does less work than resolve();
`bench solver` reports our speed-up over it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.arm_toml import parse_arm_spec
from twistrate.solver.errors import TwistrateError
from twistrate.solver.load import read_arm_source
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist


@dataclass(frozen=True)
class Plain:
    """What a hand-written loop keeps: DH rows (a, alpha, d, theta) or origins + axes, mount, tool, limits."""

    dh: list[tuple[float, float, float, float]] | None
    origins: list[np.ndarray]
    axes: list[np.ndarray]
    mount: np.ndarray
    tool: np.ndarray
    q_min: np.ndarray
    q_max: np.ndarray
    v_max: np.ndarray
    a_max: np.ndarray
    home: np.ndarray


def plain_model(arm: Arm, source: str) -> Plain:
    """The hand-written loop's description: the TOML's DH table when the arm has one, else origin + axis."""
    dh = None
    try:
        data, _, suffix = read_arm_source(source)
        spec = parse_arm_spec(data, source) if suffix == ".toml" else None
    except TwistrateError:  # an unreadable file: fall back to origin + axis
        spec = None
    standard = spec is not None and spec.dh_convention == "standard"
    if standard and all(j.kind == "revolute" for j in spec.joint):
        dh = [(j.dh.a_m, _radians(j.dh.alpha_deg, j.dh.alpha_rad), j.dh.d_m,
               _radians(j.dh.theta_deg, j.dh.theta_rad)) for j in spec.joint]
    limited = np.isfinite(arm.q_min) & np.isfinite(arm.q_max)  # a hand-written loop keeps finite numbers
    return Plain(
        dh=dh, origins=[np.array(j.T_prev_joint) for j in arm.joints],
        axes=[np.array(j.axis) for j in arm.joints], mount=np.array(arm.T_base_root),
        tool=np.array(arm.T_last_tool), q_min=np.where(limited, arm.q_min, -1e3),
        q_max=np.where(limited, arm.q_max, 1e3), v_max=np.array(arm.v_max), a_max=np.array(arm.a_max),
        home=np.array(arm.q_home),
    )


def _radians(deg: float | None, rad: float | None) -> float:
    """A DH angle as the spec gives it (degrees or radians; absent is zero), in radians."""
    return float(np.radians(deg)) if deg is not None else float(rad or 0.0)


def _straightforward_fk(m: Plain, q: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray], np.ndarray]:
    """Joint origins, joint axes (base frame) and tool pose, one np.array 4x4 per link per tick."""
    T = m.mount
    origins, axes = [], []
    if m.dh is not None:  # standard DH: joint i turns about z_{i-1}
        for i, (a, alpha, d, theta) in enumerate(m.dh):
            origins.append(T[:3, 3])
            axes.append(T[:3, 2])
            ct, st = np.cos(theta + q[i]), np.sin(theta + q[i])
            ca, sa = np.cos(alpha), np.sin(alpha)
            A = np.array([[ct, -st * ca, st * sa, a * ct], [st, ct * ca, -ct * sa, a * st],
                          [0.0, sa, ca, d], [0.0, 0.0, 0.0, 1.0]])
            T = T @ A
        # the packaged DH arms put the last DH frame's fixed part and the tool in T_last_tool
        return origins, axes, T @ _dh_tool_correction(m)
    for i in range(len(q)):
        T = T @ m.origins[i]
        kx, ky, kz = m.axes[i]
        c, s = np.cos(q[i]), np.sin(q[i])
        v = 1.0 - c
        R = np.array([[c + kx * kx * v, kx * ky * v - kz * s, kx * kz * v + ky * s, 0.0],
                      [ky * kx * v + kz * s, c + ky * ky * v, ky * kz * v - kx * s, 0.0],
                      [kz * kx * v - ky * s, kz * ky * v + kx * s, c + kz * kz * v, 0.0],
                      [0.0, 0.0, 0.0, 1.0]])
        T = T @ R
        origins.append(T[:3, 3])
        axes.append(T[:3, :3] @ m.axes[i])
    return origins, axes, T @ m.tool


def _dh_tool_correction(m: Plain) -> np.ndarray:
    """Tool transform after the last DH frame: the arm's T_last_tool minus the last DH link's fixed part."""
    a, alpha, d, theta = m.dh[-1]  # type: ignore[index]
    ct, st, ca, sa = np.cos(theta), np.sin(theta), np.cos(alpha), np.sin(alpha)
    last = np.array([[ct, -st * ca, st * sa, a * ct], [st, ct * ca, -ct * sa, a * st],
                     [0.0, sa, ca, d], [0.0, 0.0, 0.0, 1.0]])
    return np.linalg.solve(last, m.tool)


def straightforward_tick(m: Plain, q: np.ndarray, qd_prev: np.ndarray, tw: DesiredTwist,
                          period: float, options: SolverOptions) -> np.ndarray:
    """The hand-written tick: FK, J with np.cross, damped inverse, explicit pinv projector, clipping."""
    origins, axes, T = _straightforward_fk(m, q)
    n = len(q)
    p_e = T[:3, 3]
    J = np.zeros((6, n))
    for i in range(n):
        J[:3, i] = np.cross(axes[i], p_e - origins[i])
        J[3:, i] = axes[i]
    L = options.characteristic_length
    W = np.diag([1.0, 1.0, 1.0, L, L, L])
    Jw = W @ J
    x = W @ np.concatenate((tw.linear, tw.angular))
    s = np.linalg.svd(Jw, compute_uv=False)
    eps, lmax = options.singular_value_threshold, options.damping_max
    lam2 = (1.0 - (s[-1] / eps) ** 2) * lmax**2 if s[-1] < eps else 0.0
    qd = Jw.T @ np.linalg.inv(Jw @ Jw.T + lam2 * np.eye(6)) @ x
    P = np.eye(n) - np.linalg.pinv(Jw) @ Jw
    mid = 0.5 * (m.q_min + m.q_max)
    grad = (-(q - mid) / (n * (m.q_max - m.q_min) ** 2) * options.limit_gain
            + options.posture_gain * (m.home - q))
    qd = qd + P @ grad
    qd = np.clip(qd, -m.v_max, m.v_max)
    return np.clip(qd, qd_prev - m.a_max * period, qd_prev + m.a_max * period)


def check_plain(arm: Arm, m: Plain, q: np.ndarray) -> None:
    """The hand-written FK must agree with ours before its time means anything."""
    from twistrate.solver.kinematics import forward

    _, _, T = _straightforward_fk(m, q)
    if np.abs(T - forward(arm, q).T_base_tool).max() > 1e-9:
        raise RuntimeError(f"straightforward loop disagrees with forward() for {arm.name}")
