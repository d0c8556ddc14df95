"""A synthetic camera of our own invented cell: fiducial dots seen by a pinhole camera.

Two invented cells (demo data, no real setup behind them):

* `panel_cell`: eye-in-hand. A camera on the tool of the example arm looks down at an inspection
  panel lying on a bench (0.20 m high) in front of the arm; five dots on the panel, ids 21-25, four at
  the corners of a 0.10 m x 0.07 m rectangle and one off-centre so the view has no symmetry.
* `plate_cell`: eye-to-hand. A camera fixed on a post of the cell looks at a small plate carried by the
  tool, five dots on the plate, ids 31-35.

`SyntheticCamera` projects the dots from a given T_base_tool, adds optional pixel noise, latency and
dropped frames, and hides the target during given blackout windows; everything is drawn from one
seeded generator, so a run repeats exactly. Times are seconds on the caller's clock.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field

import numpy as np

from twistrate.clients.vservo.camera import Intrinsics, project, visible
from twistrate.clients.vservo.features import PointFrame, PoseFrame
from twistrate.clients.vservo.rigid import inverse, look_at, rotation_about, transform
from twistrate.clients.vservo.servo import Mount, PointGoal
from twistrate.solver.errors import ConfigError, field_error

#: The invented camera: 640 x 480 px, 600 px focal length (about 56 degrees across), centred.
DEMO_INTRINSICS = Intrinsics(fx=600.0, fy=600.0, cx=320.0, cy=240.0, width=640, height=480)


@dataclass(frozen=True, eq=False)
class Cell:
    """The dots, their carrier and the camera mount.

    ids (K,) int; dots (K, 3) m in the carrier frame; carrier `base` (the dots are fixed in the cell,
    T_base_carrier = T_base_panel) or `tool` (they ride on the tool, T_tool_carrier); mount: the camera
    on the tool (T_tool_cam) or in the cell (T_base_cam)."""

    intrinsics: Intrinsics
    ids: np.ndarray
    dots: np.ndarray
    carrier: str
    T_carrier: np.ndarray
    mount: Mount

    def T_base_cam(self, T_base_tool: np.ndarray) -> np.ndarray:
        """(4, 4) camera pose in the base frame at tool pose T_base_tool (4, 4)."""
        return T_base_tool @ self.mount.T if self.mount.kind == "tool" else self.mount.T

    def T_base_target(self, T_base_tool: np.ndarray) -> np.ndarray:
        """(4, 4) pose of the dots' carrier frame in the base frame."""
        return self.T_carrier if self.carrier == "base" else T_base_tool @ self.T_carrier

    def T_cam_target(self, T_base_tool: np.ndarray) -> np.ndarray:
        """(4, 4) the carrier's pose in the camera frame (what a pose estimator would report)."""
        return inverse(self.T_base_cam(T_base_tool)) @ self.T_base_target(T_base_tool)

    def view(self, T_base_tool: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Noise-free view: (ids (M,), pixels (M, 2) px, depths (M,) m) of the dots in the image."""
        T = self.T_base_target(T_base_tool)
        P_base = self.dots @ T[:3, :3].T + T[:3, 3]
        xy, Z = project(self.T_base_cam(T_base_tool), P_base)
        seen = visible(self.intrinsics, xy, Z)
        return self.ids[seen], self.intrinsics.pixels(xy[seen]), Z[seen]

    def goal(self, T_base_tool_star: np.ndarray) -> PointGoal:
        """The desired view: the dots as seen from the tool pose T_base_tool_star (4, 4)."""
        ids, pixels, depths = self.view(T_base_tool_star)
        if len(ids) != len(self.ids):
            raise field_error(ConfigError, "goal pose", "some dots out of view", "a pose that sees every dot")
        return PointGoal(ids, pixels, depths)


def _panel_dots() -> np.ndarray:
    return np.array([[-0.05, -0.035, 0.0], [0.05, -0.035, 0.0], [0.05, 0.035, 0.0],
                     [-0.05, 0.035, 0.0], [0.02, 0.012, 0.0]])


#: The panel on the bench: 0.20 m high, in front of the example arm, turned 15 degrees.
T_BASE_PANEL = transform(rotation_about([0, 0, 1], np.deg2rad(15.0)), np.array([0.55, 0.05, 0.20]))
#: The invented hand-eye calibration: 4 cm beside the tool axis, 2 cm below the tool, turned 90 degrees.
T_TOOL_CAM = transform(rotation_about([0, 0, 1], np.pi / 2), np.array([0.04, 0.0, 0.02]))


def panel_cell(intrinsics: Intrinsics = DEMO_INTRINSICS, T_tool_cam: np.ndarray = T_TOOL_CAM) -> Cell:
    """Eye-in-hand: the panel on the bench seen by a camera on the tool (T_tool_cam (4, 4))."""
    return Cell(intrinsics, np.arange(21, 26), _panel_dots(), "base", T_BASE_PANEL, Mount("tool", T_tool_cam))


def panel_goal_tool_pose(cell: Cell, height_m: float = 0.22, yaw_rad: float = 0.0) -> np.ndarray:
    """(4, 4) T_base_tool* of the panel cell's desired view: the camera `height_m` above the panel
    centre looking straight down, image turned `yaw_rad` from the panel's x axis."""
    R_panel_cam = rotation_about([0, 0, 1], yaw_rad) @ np.diag([1.0, -1.0, -1.0])
    T_panel_cam = transform(R_panel_cam, np.array([0.0, 0.0, height_m]))
    return cell.T_carrier @ T_panel_cam @ inverse(cell.mount.T)


#: The invented post camera: at (0.9, -0.4, 0.6) m looking at the space in front of the arm.
T_BASE_POST_CAM = look_at(np.array([0.9, -0.4, 0.6]), np.array([0.5, 0.0, 0.35]), np.array([0.0, 0.0, 1.0]))


def plate_cell(intrinsics: Intrinsics = DEMO_INTRINSICS, T_base_cam: np.ndarray = T_BASE_POST_CAM) -> Cell:
    """Eye-to-hand: a plate 6 cm past the tool origin along its z axis, five dots (ids 31-35), seen by a
    camera fixed in the cell at T_base_cam (4, 4)."""
    T_tool_plate = transform(np.eye(3), np.array([0.0, 0.0, 0.06]))
    dots = _panel_dots() * 0.6
    return Cell(intrinsics, np.arange(31, 36), dots, "tool", T_tool_plate, Mount("cell", T_base_cam))


@dataclass
class SyntheticCamera:
    """Frames of a Cell with pixel noise (standard deviation `noise_px` per coordinate), `latency_s`
    between capture and delivery, frames dropped with probability `drop_rate`, and `blackouts`: (start,
    end) windows of capture time in which the target is hidden (frames arrive empty). With `pose` the
    frames carry the target's pose (noise-free) instead of points."""

    cell: Cell
    noise_px: float = 0.0
    latency_s: float = 0.0
    drop_rate: float = 0.0
    seed: int = 0
    blackouts: tuple[tuple[float, float], ...] = ()
    depths: bool = True
    pose: bool = False
    _pending: deque = field(default_factory=deque, init=False)

    def __post_init__(self) -> None:
        for name in ("noise_px", "latency_s"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value >= 0.0):
                raise field_error(ConfigError, name, value, "a finite value >= 0")
        if not 0.0 <= self.drop_rate < 1.0:
            raise field_error(ConfigError, "drop_rate", self.drop_rate, "0 <= rate < 1")
        self._rng = np.random.default_rng(self.seed)

    def capture(self, T_base_tool: np.ndarray, time_s: float) -> None:
        """Expose one frame at time_s with the tool at T_base_tool (4, 4); it is delivered latency_s later."""
        noise = self._rng.normal(0.0, 1.0, (len(self.cell.ids), 2)) * self.noise_px
        dropped = self._rng.random() < self.drop_rate
        if dropped:
            return
        hidden = any(start <= time_s < end for start, end in self.blackouts)
        if self.pose:
            T = None if hidden else self.cell.T_cam_target(T_base_tool)
            self._pending.append(PoseFrame(T, time_s))
            return
        ids, pixels, depths = self.cell.view(T_base_tool)
        if hidden:
            ids, pixels, depths = ids[:0], pixels[:0], depths[:0]
        rows = np.searchsorted(self.cell.ids, ids)
        pixels = pixels + noise[rows]
        self._pending.append(PointFrame(ids, pixels, depths if self.depths else None, time_s))

    def poll(self, time_s: float) -> PointFrame | PoseFrame | None:
        """The newest frame delivered by time_s that was not returned before, or None (older ones are
        dropped: only the newest frame matters)."""
        newest = None
        while self._pending and self._pending[0].capture_s + self.latency_s <= time_s:
            newest = self._pending.popleft()
        return newest
