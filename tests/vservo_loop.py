"""A pure-numpy closed camera loop for the visual servoing tests: the servo's twist moves the tool
(integrated with pinocchio's exp6, an outside reference), the synthetic camera sees the new pose."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pinocchio as pin

from twistrate.clients.vservo import servo as vs
from twistrate.clients.vservo import synthetic, transforms
from twistrate.clients.vservo.errorlog import ErrorLog


@dataclass
class Run:
    """What a run recorded, one entry per servo period."""

    states: list[str] = field(default_factory=list)
    error_norm: list[float] = field(default_factory=list)
    error_px: list[float] = field(default_factory=list)
    true_px: list[float] = field(default_factory=list)
    twists: list[np.ndarray] = field(default_factory=list)
    poses: list[np.ndarray] = field(default_factory=list)

    def norms(self) -> np.ndarray:
        return np.array([np.nan if e is None else e for e in self.error_norm])


def run_loop(servo: vs.Servo, camera: synthetic.SyntheticCamera, T_base_tool: np.ndarray, steps: int,
             log: ErrorLog | None = None) -> Run:
    """Close the loop for `steps` periods of servo.settings.period_s from the tool pose T_base_tool."""
    cell, T = camera.cell, np.array(T_base_tool)
    dt = servo.settings.period_s
    run = Run()
    frame, arrived = None, 0.0
    for k in range(steps):
        now = k * dt
        camera.capture(T, now)
        newest = camera.poll(now)
        if newest is not None:
            frame, arrived = newest, now
        step = servo.step(frame, arrived, now)
        run.states.append(step.state.value)
        run.error_norm.append(step.error_norm)
        run.error_px.append(step.error_px_mean)
        run.twists.append(step.twist)
        run.poses.append(T.copy())
        if isinstance(servo.goal, vs.PointGoal):
            ids, pixels, _ = cell.view(T)
            rows = np.searchsorted(servo.goal.ids, ids)
            run.true_px.append(float(np.linalg.norm(pixels - servo.goal.pixels[rows], axis=1).mean()))
        if log is not None:
            log.row(now, step.state.value, step.points, step.error_px_mean, step.error_px_max,
                    step.error_norm, step.error_m, step.error_rad, step.twist, step.gain,
                    step.state.value == "settled")
        if cell.mount.kind == "tool":
            V_tool = transforms.camera_to_tool(step.twist, cell.mount.T)  # tool frame: right-multiply
            T = T @ pin.exp6(pin.Motion(V_tool * dt)).homogeneous
        else:
            wire = vs.wire_twist(step.twist, cell.mount, T[:3, 3])
            at = T[:3, 3] + np.array(wire["point"])
            V_base = pin.SE3(np.eye(3), at).action @ np.concatenate([wire["linear"], wire["angular"]])
            T = pin.exp6(pin.Motion(V_base * dt)).homogeneous @ T  # base frame: left-multiply
    return run


def decay_rate(norms: np.ndarray, dt: float, high: float, low: float) -> float:
    """Least-squares slope of -log|e| per second over the samples with low <= |e| / |e_0| <= high."""
    rel = norms / norms[0]
    k = np.flatnonzero((rel <= high) & (rel >= low))
    slope = np.polyfit(k * dt, np.log(norms[k]), 1)[0]
    return float(-slope)


def offset(T: np.ndarray, axis: tuple[float, float, float], angle_rad: float,
           shift_m: tuple[float, float, float]) -> np.ndarray:
    """T moved in its own frame by a rotation about `axis` and a translation (m)."""
    u = np.asarray(axis, float) / np.linalg.norm(axis)
    return T @ pin.SE3(pin.exp3(u * angle_rad), np.asarray(shift_m, float)).homogeneous
