"""vservo's configuration: a TOML file validated with pydantic into `VservoConfig`, and the servo parts.

Every problem is a ConfigError naming the file, the key path, the value and what is accepted; unknown
keys are refused. Units are SI unless the key names another (`_ms`, `_hz`, `_deg`, `_px`, `_mm`,
`_mrad`). Rotations are fixed-axis roll, pitch, yaw in degrees (`rpy_deg`: R = Rz(yaw) Ry(pitch)
Rx(roll), as in docs/arm-format.md). `load_config(None)` reads the packaged example
(configs/vservo/panel.toml), which describes the synthetic panel cell.
"""

from __future__ import annotations

import math
import tomllib
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from twistrate.clients.vservo import laws
from twistrate.clients.vservo.camera import Intrinsics
from twistrate.clients.vservo.errorlog import Convergence
from twistrate.clients.vservo.features import Gate
from twistrate.clients.vservo.interaction import MIN_POINTS, DepthChoice
from twistrate.clients.vservo.rigid import rotation_about, transform
from twistrate.clients.vservo.servo import Mount, PointGoal, PoseGoal, Settings
from twistrate.service.wire import (
    DEFAULT_CONTROL,
    DEFAULT_FEATURES,
    DEFAULT_INTAKE,
    DEFAULT_OUTPUT,
    MAX_FEATURE_ID,
    MAX_NAME_CHARS,
)
from twistrate.solver.errors import ConfigError

CONFIG_PACKAGE = "twistrate.configs.vservo"
DEFAULT_CONFIG = "panel.toml"

_STRICT = ConfigDict(strict=True, extra="forbid", frozen=True, allow_inf_nan=False)
Positive = Annotated[float, Field(gt=0.0)]
Vec3 = Annotated[list[float], Field(min_length=3, max_length=3)]


class _Section(BaseModel):
    model_config = _STRICT


class CameraSection(_Section):
    name: Annotated[str, Field(min_length=1, max_length=MAX_NAME_CHARS)] = "camera"
    fx: Positive
    fy: Positive
    cx: float
    cy: float
    width: Annotated[int, Field(gt=0, le=100_000)]
    height: Annotated[int, Field(gt=0, le=100_000)]
    rate_hz: Annotated[float, Field(gt=0.0, le=1000.0)] = 30.0


class MountSection(_Section):
    on: Literal["tool", "cell"] = "tool"
    xyz_m: Vec3 = Field(default_factory=lambda: [0.0, 0.0, 0.0])
    rpy_deg: Vec3 = Field(default_factory=lambda: [0.0, 0.0, 0.0])


class LawSection(_Section):
    kind: Literal["points", "pose"] = "points"
    depth: Literal["current", "desired", "mean"] = "mean"
    gain_near: Annotated[float, Field(gt=0.0, le=100.0)] = 1.0
    gain_far: Annotated[float, Field(gt=0.0, le=100.0)] = 1.0
    gain_knee: Annotated[float, Field(gt=0.0, le=10.0)] = 0.05
    linear_max: Annotated[float, Field(gt=0.0, le=1.0)] = 0.05
    angular_max: Annotated[float, Field(gt=0.0, le=3.0)] = 0.3


class GateSection(_Section):
    stale_after_ms: Annotated[float, Field(gt=0.0, le=10_000.0)] = 200.0
    max_age_ms: Annotated[float, Field(ge=0.0, le=10_000.0)] = 0.0  # 0: off


class SettleSection(_Section):
    threshold_px: Positive = 1.0
    hold_frames: Annotated[int, Field(ge=1, le=10_000)] = 10
    threshold_mm: Positive = 0.5
    threshold_mrad: Positive = 2.0


class GoalSection(_Section):
    """Points (ids, pixels, depths_m) for `law.kind = "points"`, a pose for `"pose"`."""

    ids: list[Annotated[int, Field(ge=0, le=MAX_FEATURE_ID)]] | None = None
    pixels: list[Annotated[list[float], Field(min_length=2, max_length=2)]] | None = None
    depths_m: list[Positive] | None = None
    pose_xyz_m: Vec3 | None = None
    pose_rpy_deg: Vec3 | None = None


class EndpointsSection(_Section):
    features: str = DEFAULT_FEATURES
    intake: str = DEFAULT_INTAKE
    output: str = DEFAULT_OUTPUT
    control: str = DEFAULT_CONTROL


class RunSection(_Section):
    rate_hz: Annotated[float, Field(gt=0.0, le=1000.0)] = 50.0  # twists per second without new frames
    lease_ms: Annotated[int, Field(ge=50, le=60_000)] = 3000
    # SCHED_FIFO priority of the loop and its ZeroMQ I/O threads when the OS permits (sched.py); 0: off
    realtime_priority: Annotated[int, Field(ge=0, le=99)] = 0


class VservoConfig(_Section):
    camera: CameraSection
    mount: MountSection = Field(default_factory=MountSection)
    law: LawSection = Field(default_factory=LawSection)
    gate: GateSection = Field(default_factory=GateSection)
    settle: SettleSection = Field(default_factory=SettleSection)
    goal: GoalSection
    endpoints: EndpointsSection = Field(default_factory=EndpointsSection)
    run: RunSection = Field(default_factory=RunSection)

    @model_validator(mode="after")
    def _goal_matches_the_law(self) -> VservoConfig:
        g = self.goal
        if self.law.kind == "points":
            if g.ids is None or g.pixels is None or g.depths_m is None:
                raise ValueError("goal: a points law needs goal.ids, goal.pixels and goal.depths_m")
            if not (len(g.ids) == len(g.pixels) == len(g.depths_m)) or len(g.ids) < MIN_POINTS:
                raise ValueError(f"goal: ids, pixels and depths_m of one length, at least {MIN_POINTS}")
            if len(set(g.ids)) != len(g.ids):
                raise ValueError("goal.ids: every id once")
        elif g.pose_xyz_m is None or g.pose_rpy_deg is None:
            raise ValueError("goal: a pose law needs goal.pose_xyz_m and goal.pose_rpy_deg")
        if self.law.gain_near / self.camera.rate_hz > 1.0 or self.law.gain_far / self.camera.rate_hz > 1.0:
            rate = self.camera.rate_hz
            raise ValueError(f"law: gain times the frame period <= 1 (at {rate:g} Hz: gains <= {rate:g} 1/s)")
        return self


def rpy(rpy_deg: list[float]) -> np.ndarray:
    """(3, 3) rotation of fixed-axis roll, pitch, yaw in degrees: Rz(yaw) Ry(pitch) Rx(roll)."""
    r, p, y = (math.radians(a) for a in rpy_deg)
    return rotation_about([0, 0, 1], y) @ rotation_about([0, 1, 0], p) @ rotation_about([1, 0, 0], r)


def config_from_dict(data: dict[str, Any], source: str = "config") -> VservoConfig:
    try:
        return VservoConfig.model_validate(data)
    except ValidationError as exc:
        lines = []
        for err in exc.errors(include_url=False):
            key = ".".join(str(p) for p in err["loc"]) or "document"
            if err["type"] == "missing":
                lines.append(f"{key}: missing; accepted: a value (the key is required)")
                continue
            shown = repr(err.get("input"))
            shown = shown if len(shown) <= 80 else shown[:77] + "..."
            lines.append(f"{key}: got {shown}; accepted: {err['msg'].removeprefix('Value error, ')}")
        raise ConfigError(f"{source}: " + "\n  ".join(lines)) from None


def packaged_names() -> list[str]:
    """The packaged vservo configurations by name (configs/vservo/NAME.toml): panel, post, ..."""
    return sorted(f.name[:-5] for f in resources.files(CONFIG_PACKAGE).iterdir() if f.name.endswith(".toml"))


def load_config(path: str | Path | None = None) -> VservoConfig:
    """Read and validate a vservo TOML file (None: the packaged example). A bare name that is no file,
    such as `post`, is the packaged configuration of that name (configs/vservo/post.toml)."""
    name = None if path is None else str(path)
    if name is not None and not Path(name).exists() and name in packaged_names():
        path = None
    if path is None:
        file = DEFAULT_CONFIG if name is None else f"{name}.toml"
        text = resources.files(CONFIG_PACKAGE).joinpath(file).read_text()
        source = f"packaged {file}"
    else:
        try:
            text = Path(path).read_text()
        except OSError as exc:
            raise ConfigError(f"vservo config {path}: cannot read ({exc.strerror}); accepted: a TOML file "
                              f"or a packaged name ({', '.join(packaged_names())})") from None
        source = str(path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not TOML ({exc})") from None
    return config_from_dict(data, source)


def intrinsics(config: VservoConfig) -> Intrinsics:
    c = config.camera
    return Intrinsics(fx=c.fx, fy=c.fy, cx=c.cx, cy=c.cy, width=c.width, height=c.height)


def mount(config: VservoConfig) -> Mount:
    """The camera's pose on the tool (T_tool_cam) or in the cell (T_base_cam)."""
    m = config.mount
    return Mount(m.on, transform(rpy(m.rpy_deg), np.array(m.xyz_m)))


def goal(config: VservoConfig) -> PointGoal | PoseGoal:
    g = config.goal
    if config.law.kind == "points":
        return PointGoal(np.array(g.ids), np.array(g.pixels, dtype=float), np.array(g.depths_m, dtype=float))
    return PoseGoal(transform(rpy(g.pose_rpy_deg), np.array(g.pose_xyz_m)))


def settings(config: VservoConfig) -> Settings:
    law = config.law
    max_age = config.gate.max_age_ms / 1000.0 if config.gate.max_age_ms > 0 else float("inf")
    return Settings(intrinsics(config), laws.GainSchedule(law.gain_near, law.gain_far, law.gain_knee),
                    1.0 / config.camera.rate_hz, depth=DepthChoice(law.depth), linear_max=law.linear_max,
                    angular_max=law.angular_max, gate=Gate(config.gate.stale_after_ms / 1000.0, max_age))


def convergence(config: VservoConfig) -> Convergence:
    s = config.settle
    return Convergence(threshold_px=s.threshold_px, hold_frames=s.hold_frames,
                       threshold_m=s.threshold_mm / 1000.0, threshold_rad=s.threshold_mrad / 1000.0)
