"""One servo step: the newest frame in, a camera twist (or zero) and a state out; the wire twist.

Pure and clock-free: the caller passes its monotonic times. Image-based servoing of points matched
by id to a desired set, or position-based servoing of a target pose; zero twist whenever the gate
says the features are stale, missing or too few. Twists are (6,) linear first (v, w), m/s and rad/s.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from twistrate.clients.vservo import laws
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
from twistrate.clients.vservo.interaction import MIN_POINTS, DepthChoice, estimate, point_matrix
from twistrate.clients.vservo.pointlaw import PointLaw
from twistrate.solver.errors import ConfigError, field_error

#: The discrete-time loop e_{k+1} = (1 - lambda T) e_k is stable for 0 < lambda T < 2; we refuse gains
#: beyond this share of that bound, since latency lowers it further (common practice).
GAIN_PERIOD_MAX = 1.0
ZERO = (0.0,) * 6


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
    """One step's result. twist (6,): the camera twist to send, (v, w) of the camera frame, m/s and
    rad/s, a tuple of 6 floats, zero unless tracking."""

    state: ServoState
    twist: tuple[float, ...]
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
            self._ids_tuple = tuple(int(i) for i in goal.ids)
            self._shape = (K, 2)
            self._pixels_star = np.asarray(goal.pixels, dtype=float)
            self._every = tuple(range(K))
            self._inv_f = 1.0 / self._f
            i = settings.intrinsics
            self._law = PointLaw(i.fx, i.fy, i.cx, i.cy, self._pixels_star.tolist(),
                                 np.asarray(goal.depths, dtype=float).tolist(), settings.depth)

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
        """The frame's points matched to the goal's, as plain floats for the law: at once when the frame
        holds exactly the goal's ids in the goal's order (a tuple from feed.decode_features, or an int64
        array as the wire's reference decoder gives them) with finite pixels and finite positive depths
        (a sum is finite only if every term is); else the general match decides (features.match)."""
        ids, pixels, depths = frame.ids, frame.pixels, frame.depths
        if type(ids) is tuple:
            same = ids == self._ids_tuple
        else:
            same = (type(ids) is np.ndarray and ids.dtype == np.int64 and ids.tobytes() == self._ids_key
                    and type(pixels) is np.ndarray and pixels.dtype == np.float64
                    and pixels.shape == self._shape
                    and (depths is None or (type(depths) is np.ndarray and depths.dtype == np.float64)))
            if same:
                pixels = pixels.tolist()
                depths = None if depths is None else depths.tolist()
        if same and len(pixels) == len(self._ids_tuple) and math.isfinite(sum(map(sum, pixels))) and (
                depths is None or (len(depths) == len(pixels) and math.isfinite(sum(depths))
                                   and min(depths) > 0.0)):
            return Matched(self._every, pixels, depths)
        m = match(frame, self._rows)
        return Matched(m.index.tolist(), m.pixels.tolist(), None if m.depths is None else m.depths.tolist())

    def _points(self, frame: PointFrame | None, arrived_s: float, now_s: float) -> Step:
        s = self.settings
        matched = self._match(frame) if frame is not None else None
        state = gate_state(frame, arrived_s, now_s, s.gate, matched)
        if state is ServoState.TRACKING:
            rows = None if matched.index is self._every else matched.index
            law = self._law(matched.pixels, matched.depths, rows)
            if not law.ok:  # pixels so large their squares overflow: nothing usable
                state = ServoState.TOO_FEW
        if state is not ServoState.TRACKING:
            self.convergence.reset()
            return Step(state, ZERO, points=0 if matched is None else len(matched.index))
        gain = s.gain(law.error_norm)
        if law.direction is not None:
            twist = (-gain * c for c in law.direction)
        else:  # ill-conditioned for the normal equations: the SVD reference drops the null directions
            twist = self._reference_twist(matched, rows, gain)
        twist = laws.saturate(tuple(twist), s.linear_max, s.angular_max)
        mean_px = law.mean_px
        settled = self._count(frame, lambda: self.convergence.update_points(mean_px))
        return Step(ServoState.SETTLED if settled else ServoState.TRACKING, twist, points=len(matched.index),
                    error_px_mean=mean_px, error_px_max=law.max_px, error_norm=law.error_norm, gain=gain)

    def _reference_twist(self, matched: Matched, rows: list[int] | None, gain: float) -> np.ndarray:
        """(6,) -gain L_hat^+ e by interaction.estimate and laws.ibvs_twist (numpy, SVD)."""
        k = np.arange(len(self.goal.ids)) if rows is None else np.asarray(rows, dtype=int)
        pixels = np.asarray(matched.pixels, dtype=float).reshape(-1, 2)
        depths = None if matched.depths is None else np.asarray(matched.depths, dtype=float)
        e = ((pixels - self._pixels_star[k]) * self._inv_f).ravel()
        xy = (pixels - self._c) * self._inv_f
        L_star = self._L_star[np.column_stack([2 * k, 2 * k + 1]).ravel()]
        L_hat = estimate(self.settings.depth, xy, depths, self._xy_star[k], self.goal.depths[k], L_star)
        return laws.ibvs_twist(L_hat, e, gain)

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
        T = np.asarray(self.T, dtype=float)
        # R's rows and t as plain floats, for wire_twist (frozen: set once here)
        object.__setattr__(self, "_R", tuple(tuple(row) for row in T[:3, :3].tolist()))
        object.__setattr__(self, "_t", tuple(T[:3, 3].tolist()))


def wire_twist(twist: Sequence[float] | np.ndarray, mount: Mount,
               p_base_tool: Sequence[float] | np.ndarray | None = None) -> dict:
    """The service's twist fields {linear, angular, frame, point} (lists of float) for a camera twist
    (6,) (v, w), camera frame. A camera on the tool needs nothing else (tool frame, at the camera: R v,
    R w, point t, as transforms.camera_point_twist); a camera in the cell needs the tool origin
    p_base_tool (3,) m, base frame (base frame, at the camera's location: -R v, -R w, point p - p_base_tool,
    as transforms.eye_to_hand_twist). On plain floats: a handful of products, cheaper than numpy calls."""
    (r00, r01, r02), (r10, r11, r12), (r20, r21, r22) = mount._R
    v0, v1, v2, w0, w1, w2 = twist
    linear = [r00 * v0 + r01 * v1 + r02 * v2, r10 * v0 + r11 * v1 + r12 * v2, r20 * v0 + r21 * v1 + r22 * v2]
    angular = [r00 * w0 + r01 * w1 + r02 * w2, r10 * w0 + r11 * w1 + r12 * w2, r20 * w0 + r21 * w1 + r22 * w2]
    if mount.kind == "tool":
        return {"linear": linear, "angular": angular, "frame": "tool", "point": list(mount._t)}
    if p_base_tool is None:
        raise field_error(ConfigError, "p_base_tool", None, "the tool origin (3,) m for a camera in the cell")
    o0, o1, o2 = (float(c) for c in p_base_tool)
    t0, t1, t2 = mount._t
    return {"linear": [-c for c in linear], "angular": [-c for c in angular], "frame": "base",
            "point": [t0 - o0, t1 - o1, t2 - o2]}
