"""One servo step: the newest frame in, a camera twist (or zero) and a state out; the wire twist.

Pure and clock-free: the caller passes its monotonic times. Image-based servoing of points matched
by id to a desired set, or position-based servoing of a target pose; zero twist whenever the gate
says the features are stale, missing or too few. Twists are (6,) linear first (v, w), m/s and rad/s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from twistrate.clients.vservo import laws, transforms
from twistrate.clients.vservo.camera import Intrinsics
from twistrate.clients.vservo.errorlog import Convergence
from twistrate.clients.vservo.features import (
    Frame,
    Gate,
    Matched,
    PointFrame,
    PoseFrame,
    ServoState,
    gate_state,
    match,
)
from twistrate.clients.vservo.interaction import MIN_POINTS, DepthChoice, MeanMatrix, estimate, point_matrix
from twistrate.solver.errors import ConfigError, field_error

#: The discrete-time loop e_{k+1} = (1 - lambda T) e_k is stable for 0 < lambda T < 2; we refuse gains
#: beyond this share of that bound, since latency lowers it further (common practice).
GAIN_PERIOD_MAX = 1.0
ZERO = np.zeros(6)
ZERO.setflags(write=False)


@dataclass(frozen=True, eq=False)
class PointGoal:
    """Desired view of points: ids (K,) int, pixels (K, 2) px, depths (K,) m, K >= MIN_POINTS."""

    ids: np.ndarray
    pixels: np.ndarray
    depths: np.ndarray

    def __post_init__(self) -> None:
        K = len(self.ids)
        if K < MIN_POINTS or len(np.unique(self.ids)) != K:
            raise field_error(ConfigError, "goal.ids", list(self.ids), f"at least {MIN_POINTS} distinct ids")
        if np.shape(self.pixels) != (K, 2) or not np.isfinite(self.pixels).all():
            raise field_error(ConfigError, "goal.pixels", np.shape(self.pixels), f"({K}, 2) finite pixels")
        if np.shape(self.depths) != (K,) or not (np.asarray(self.depths) > 0.0).all():
            raise field_error(ConfigError, "goal.depths", self.depths, f"{K} depths > 0 m")


@dataclass(frozen=True, eq=False)
class PoseGoal:
    """Desired pose of the target in the camera frame: T_camstar_target (4, 4)."""

    T_camstar_target: np.ndarray


@dataclass(frozen=True)
class Settings:
    """How the servo runs. period_s: the servo period T (s) the gain is checked against."""

    intrinsics: Intrinsics
    gain: laws.GainSchedule
    period_s: float
    depth: DepthChoice = DepthChoice.MEAN
    linear_max: float = 0.05
    angular_max: float = 0.3
    gate: Gate = field(default_factory=Gate)

    def __post_init__(self) -> None:
        if not (np.isfinite(self.period_s) and self.period_s > 0.0):
            raise field_error(ConfigError, "period_s", self.period_s, "a servo period > 0 s")
        if self.gain.largest * self.period_s > GAIN_PERIOD_MAX:
            raise field_error(ConfigError, "gain", self.gain.largest,
                              f"lambda * period <= {GAIN_PERIOD_MAX} (here lambda <= "
                              f"{GAIN_PERIOD_MAX / self.period_s:g} 1/s)")
        for name in ("linear_max", "angular_max"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value > 0.0):
                raise field_error(ConfigError, name, value, "a finite speed cap > 0")


@dataclass(frozen=True, eq=False)
class Step:
    """One step's result. twist (6,): the camera twist to send (camera frame), zero unless tracking."""

    state: ServoState
    twist: np.ndarray
    points: int = 0
    error_px_mean: float | None = None
    error_px_max: float | None = None
    error_norm: float | None = None
    error_m: float | None = None
    error_rad: float | None = None
    gain: float = 0.0

    @property
    def moving(self) -> bool:
        return self.state in (ServoState.TRACKING, ServoState.SETTLED)


class Servo:
    """Holds the settings, the goal and the convergence count; `step` is the whole law."""

    def __init__(self, settings: Settings, goal: PointGoal | PoseGoal,
                 convergence: Convergence | None = None) -> None:
        self.settings = settings
        self.goal = goal
        self.convergence = convergence or Convergence()
        self._counted: Frame | None = None  # the last frame the convergence count has seen
        if isinstance(goal, PointGoal):
            K = len(goal.ids)
            self._xy_star = settings.intrinsics.normalised(goal.pixels)
            self._rows = {int(i): k for k, i in enumerate(goal.ids)}
            self._L_star = point_matrix(self._xy_star, goal.depths)  # (2K, 6), constant
            self._f = np.array([settings.intrinsics.fx, settings.intrinsics.fy])
            self._c = np.array([settings.intrinsics.cx, settings.intrinsics.cy])
            # built once for the frames that show every goal point in the goal's order (a pipeline's
            # usual frame): no matching, no row picking, L_hat filled in place
            self._ids_key = np.asarray(goal.ids, dtype=np.int64).tobytes()
            self._pixels_star = np.asarray(goal.pixels, dtype=float)
            self._every = np.arange(K)
            self._inv_f = 1.0 / self._f
            self._L_mean = MeanMatrix(self._L_star)

    def step(self, frame: Frame | None, arrived_s: float, now_s: float) -> Step:
        """The twist for the newest frame (None: none yet), received at arrived_s, at time now_s (s)."""
        if isinstance(self.goal, PointGoal):
            if frame is not None and not isinstance(frame, PointFrame):
                self.convergence.reset()
                return Step(ServoState.TOO_FEW, ZERO)
            return self._points(frame, arrived_s, now_s)
        if frame is not None and not isinstance(frame, PoseFrame):
            self.convergence.reset()
            return Step(ServoState.TOO_FEW, ZERO)
        return self._pose(frame, arrived_s, now_s)

    def _count(self, frame: Frame, update) -> bool:
        """Count each frame once toward convergence (a step may reuse the newest frame)."""
        if frame is self._counted:
            return self.convergence.settled
        self._counted = frame
        return update()

    def _match(self, frame: PointFrame) -> Matched:
        """The frame's points matched to the goal's: at once when the frame holds exactly the goal's ids
        in the goal's order (int64, as the wire decoder gives them), with finite pixels and finite
        positive depths (a sum is finite only if every term is; else the general match decides)."""
        ids, pixels, depths = frame.ids, frame.pixels, frame.depths
        if (type(ids) is np.ndarray and ids.dtype == np.int64 and ids.tobytes() == self._ids_key
                and type(pixels) is np.ndarray and pixels.dtype == np.float64
                and math.isfinite(pixels.sum())
                and (depths is None or (type(depths) is np.ndarray and depths.dtype == np.float64
                                        and math.isfinite(depths.sum()) and depths.min() > 0.0))):
            return Matched(self._every, pixels, depths)
        return match(frame, self._rows)

    def _points(self, frame: PointFrame | None, arrived_s: float, now_s: float) -> Step:
        goal, s = self.goal, self.settings
        matched = self._match(frame) if frame is not None else None
        state = gate_state(frame, arrived_s, now_s, s.gate, matched)
        if state is not ServoState.TRACKING:
            self.convergence.reset()
            return Step(state, ZERO, points=0 if matched is None else int(matched.index.size))
        k = matched.index
        full = k.size == len(goal.ids)  # every point seen: k is 0..K-1 in order (match keeps desired order)
        d = matched.pixels - (self._pixels_star if full else self._pixels_star[k])  # (M, 2) px
        sq = d * d
        distance = np.sqrt(sq[:, 0] + sq[:, 1])
        e = (d * self._inv_f).ravel()  # s - s*, normalised: ((u, v) - (u*, v*)) / (f_x, f_y)
        error_norm = math.sqrt(e @ e)
        xy = (matched.pixels - self._c) * self._inv_f
        if full and s.depth is DepthChoice.MEAN:  # the usual case, in place: (L_e + L_e*) / 2
            L_hat = self._L_mean(xy, goal.depths if matched.depths is None else matched.depths)
        else:
            L_star = self._L_star if full else self._L_star[np.column_stack([2 * k, 2 * k + 1]).ravel()]
            L_hat = estimate(s.depth, xy, matched.depths, self._xy_star[k], goal.depths[k], L_star)
        gain = s.gain(error_norm)
        twist = laws.saturate(laws.ibvs_twist(L_hat, e, gain), s.linear_max, s.angular_max)
        mean_px = float(distance.sum()) / k.size
        settled = self._count(frame, lambda: self.convergence.update_points(mean_px))
        return Step(ServoState.SETTLED if settled else ServoState.TRACKING, twist, points=int(k.size),
                    error_px_mean=mean_px, error_px_max=float(distance.max()), error_norm=error_norm,
                    gain=gain)

    def _pose(self, frame: PoseFrame | None, arrived_s: float, now_s: float) -> Step:
        s = self.settings
        state = gate_state(frame, arrived_s, now_s, s.gate)
        if state is not ServoState.TRACKING:
            self.convergence.reset()
            return Step(state, ZERO)
        t, theta_u = laws.pbvs_error(frame.T_cam_target, self.goal.T_camstar_target)
        error_m, error_rad = float(np.linalg.norm(t)), float(np.linalg.norm(theta_u))
        gain = s.gain(float(np.hypot(error_m, error_rad)))
        twist = laws.pbvs_twist(frame.T_cam_target, self.goal.T_camstar_target, gain)
        twist = laws.saturate(twist, s.linear_max, s.angular_max)
        settled = self._count(frame, lambda: self.convergence.update_pose(error_m, error_rad))
        return Step(ServoState.SETTLED if settled else ServoState.TRACKING, twist, error_m=error_m,
                    error_rad=error_rad, gain=gain)


@dataclass(frozen=True)
class Mount:
    """Where the camera is: on the tool (`tool`, T = T_tool_cam from the hand-eye calibration) or fixed
    in the cell (`cell`, T = T_base_cam), (4, 4)."""

    kind: str
    T: np.ndarray

    def __post_init__(self) -> None:
        if self.kind not in ("tool", "cell"):
            raise field_error(ConfigError, "mount", self.kind, "'tool' or 'cell'")


def wire_twist(twist: np.ndarray, mount: Mount, p_base_tool: np.ndarray | None = None) -> dict:
    """The service's twist fields {linear, angular, frame, point} (lists of float) for a camera twist
    (6,). A camera on the tool needs nothing else (tool frame, at the camera); a camera in the cell
    needs the tool origin p_base_tool (3,) m, base frame (base frame, at the camera's location)."""
    if mount.kind == "tool":
        linear, angular, point = transforms.camera_point_twist(twist, mount.T)
        frame = "tool"
    else:
        if p_base_tool is None:
            raise field_error(ConfigError, "p_base_tool", None,
                              "the tool origin (3,) m for a camera in the cell")
        linear, angular, point = transforms.eye_to_hand_twist(twist, mount.T, p_base_tool)
        frame = "base"
    return {"linear": linear.tolist(), "angular": angular.tolist(), "frame": frame, "point": point.tolist()}
