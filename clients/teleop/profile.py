"""The teleop profile: device mapping and pipeline constants, a TOML file validated into `Profile`.

`load_profile(path)` reads a file (None: the packaged default, configs/teleop/default.toml) and
returns a frozen `Profile`. Unknown keys are refused; every problem is a ConfigError naming the
file, the key path, the value and what is accepted. Units are SI unless the key names another
(`_ms`, `_hz`). The default file documents every key.
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from twistrate.solver.errors import ConfigError, field_error

PROFILE_PACKAGE = "twistrate.configs.teleop"
DEFAULT_PROFILE = "default.toml"
#: Hand-jogging caps the profile accepts (the service applies its own caps on top), m/s and rad/s.
LINEAR_MAX_LIMIT = 1.0
ANGULAR_MAX_LIMIT = 3.0
#: Largest deadband accepted: the rescaling divides by 1 - d.
DEADBAND_LIMIT = 0.9
#: Publish rate bounds, Hz (the protocol suggests 50 to 250 per second; docs/protocol.md 7.1).
RATE_HZ_MIN = 20.0
RATE_HZ_MAX = 500.0

_STRICT = ConfigDict(strict=True, extra="forbid", frozen=True, allow_inf_nan=False)
Unit = Annotated[float, Field(ge=0.0, le=1.0)]
Band = Annotated[float, Field(ge=0.0, le=DEADBAND_LIMIT)]
Positive = Annotated[float, Field(gt=0.0)]
ButtonIndex = Annotated[int, Field(ge=0, le=63)]


def _six(name: str, value: Any) -> Any:
    if isinstance(value, list) and len(value) != 6:
        raise ValueError(f"{name} needs one entry per axis vx, vy, vz, wx, wy, wz (6), got {len(value)}")
    return value


class _Section(BaseModel):
    model_config = _STRICT


class DeviceSection(_Section):
    """select : a device path (/dev/input/eventN) or part of its name, case-insensitive; "" picks the
    first six-axis device. full_scale : counts at full deflection per device axis X..RZ (a number for
    all); 0 means: an absolute device's declared range. idle_ms : relative axes not reported for this
    long are at rest. settle_ms : how long the rest offset is averaged at start (hands off)."""

    select: str = ""
    full_scale: Annotated[float, Field(ge=0.0)] | list[Annotated[float, Field(gt=0.0)]] = 350.0
    idle_ms: Annotated[float, Field(ge=5.0, le=1000.0)] = 60.0
    settle_ms: Annotated[float, Field(ge=0.0, le=5000.0)] = 200.0

    _check_scale = field_validator("full_scale")(lambda v: _six("full_scale", v))


class AxesSection(_Section):
    """source[i] : the device axis (0..5 = X, Y, Z, RX, RY, RZ) driving twist axis i (vx, vy, vz, wx,
    wy, wz); sign[i] : +1 or -1. deadband : fraction of full deflection ignored around rest, per axis
    or one for all. curve : k of the response curve y = (1 - k) u + k u^3, per axis or one for all."""

    source: list[Annotated[int, Field(ge=0, le=5)]] = Field(default_factory=lambda: [0, 1, 2, 3, 4, 5])
    sign: list[Literal[1, -1]] = Field(default_factory=lambda: [1, 1, 1, 1, 1, 1])
    deadband: Band | list[Band] = 0.1
    curve: Unit | list[Unit] = 0.5

    @field_validator("source")
    @classmethod
    def _permutation(cls, v: list[int]) -> list[int]:
        _six("source", v)
        if sorted(v) != [0, 1, 2, 3, 4, 5]:
            raise ValueError("source must use each device axis 0..5 exactly once")
        return v

    _check_sign = field_validator("sign")(lambda v: _six("sign", v))
    _check_band = field_validator("deadband")(lambda v: _six("deadband", v))
    _check_curve = field_validator("curve")(lambda v: _six("curve", v))


class FilterSection(_Section):
    """The 1-euro filter (Casiez et al. 2012). min_cutoff_hz : cutoff at rest. beta : cutoff gain per
    unit deflection speed, s. derivative_cutoff_hz : cutoff of the speed estimate. on : false skips it."""

    on: bool = True
    min_cutoff_hz: Annotated[float, Field(gt=0.0, le=100.0)] = 1.5
    beta: Annotated[float, Field(ge=0.0, le=100.0)] = 2.0
    derivative_cutoff_hz: Annotated[float, Field(gt=0.0, le=100.0)] = 1.0


class SpeedSection(_Section):
    """linear_max, angular_max : m/s and rad/s at full deflection and scale 1 (separate caps).
    scales : the speed-scale steps, ascending in (0, 1]. start : the step used at start (a value of
    `scales`)."""

    linear_max: Annotated[float, Field(gt=0.0, le=LINEAR_MAX_LIMIT)] = 0.1
    angular_max: Annotated[float, Field(gt=0.0, le=ANGULAR_MAX_LIMIT)] = 0.5
    scales: list[Annotated[float, Field(gt=0.0, le=1.0)]] = Field(
        default_factory=lambda: [0.1, 0.25, 0.5, 1.0], min_length=1, max_length=16)
    start: Annotated[float, Field(gt=0.0, le=1.0)] = 0.25

    @model_validator(mode="after")
    def _steps(self) -> SpeedSection:
        if any(b <= a for a, b in zip(self.scales, self.scales[1:], strict=False)):
            raise ValueError(f"scales must be strictly ascending, got {self.scales}")
        if self.start not in self.scales:
            raise ValueError(f"start ({self.start}) must be one of scales {self.scales}")
        return self


class MotionSection(_Section):
    """frame : "base" or "tool" at start. point : the reference point as an offset from the tool
    origin, tool frame, m (e.g. a fingertip). hold_to_move : motion only while the hold button is
    held (default true; false must be written explicitly). dominant : only the most deflected axis
    moves. lock : "none", "translation" (translation only) or "rotation". rate_hz : twists per second
    while deflected."""

    frame: Literal["base", "tool"] = "base"
    point: list[Annotated[float, Field(ge=-2.0, le=2.0)]] = Field(
        default_factory=lambda: [0.0, 0.0, 0.0], min_length=3, max_length=3)
    hold_to_move: bool = True
    dominant: bool = False
    lock: Literal["none", "translation", "rotation"] = "none"
    rate_hz: Annotated[float, Field(ge=RATE_HZ_MIN, le=RATE_HZ_MAX)] = 125.0


class ButtonsSection(_Section):
    """Device button indices (0 = the lowest button code the device has) for each action; absent = no
    button (the terminal keys still work). hold : hold-to-move. frame : base/tool. faster, slower :
    speed-scale steps. lock : none -> translation -> rotation. dominant : toggle."""

    hold: ButtonIndex | None = 0
    frame: ButtonIndex | None = 1
    faster: ButtonIndex | None = None
    slower: ButtonIndex | None = None
    lock: ButtonIndex | None = None
    dominant: ButtonIndex | None = None

    @model_validator(mode="after")
    def _distinct(self) -> ButtonsSection:
        used = [v for v in self.model_dump().values() if v is not None]
        if len(used) != len(set(used)):
            raise ValueError(f"each button index may serve one action, got {self.model_dump()}")
        return self


class KeyboardSection(_Section):
    """Keyboard mode (terminals send no key release; see clients/teleop/keyboard.py). first_gap_ms :
    a key counts as held this long after its first character (longer than the auto-repeat delay).
    repeat_gap_ms : and this long after each repeat (longer than the auto-repeat period)."""

    first_gap_ms: Annotated[float, Field(ge=50.0, le=2000.0)] = 700.0
    repeat_gap_ms: Annotated[float, Field(ge=20.0, le=1000.0)] = 150.0

    @model_validator(mode="after")
    def _order(self) -> KeyboardSection:
        if self.repeat_gap_ms > self.first_gap_ms:
            raise ValueError("repeat_gap_ms must not exceed first_gap_ms")
        return self


class Profile(_Section):
    """Everything the teleop pipeline and session need."""

    device: DeviceSection = Field(default_factory=DeviceSection)
    axes: AxesSection = Field(default_factory=AxesSection)
    filter: FilterSection = Field(default_factory=FilterSection)
    speed: SpeedSection = Field(default_factory=SpeedSection)
    motion: MotionSection = Field(default_factory=MotionSection)
    buttons: ButtonsSection = Field(default_factory=ButtonsSection)
    keyboard: KeyboardSection = Field(default_factory=KeyboardSection)

    @model_validator(mode="after")
    def _hold_button(self) -> Profile:
        if self.motion.hold_to_move and self.buttons.hold is None:
            raise ValueError("buttons.hold is unset while motion.hold_to_move is true: name the hold "
                             "button, or write motion.hold_to_move = false to move without one")
        return self


def _describe(err: Mapping[str, Any]) -> str:
    loc = ".".join(str(p) for p in err["loc"])
    msg = str(err["msg"]).removeprefix("Value error, ")
    if err["type"] == "extra_forbidden":
        section = err["loc"][0] if len(err["loc"]) > 1 else None
        if section in Profile.model_fields:
            known = list(Profile.model_fields[section].annotation.model_fields)  # type: ignore[union-attr]
        else:
            known = list(Profile.model_fields)
        return f"{loc}: got an unknown key; accepted: {', '.join(known)}"
    if not loc:
        return f"profile: {msg}"
    return f"{loc}: got {err.get('input')!r}; accepted: {msg}"


def profile_from_dict(data: Mapping[str, Any], source: str = "profile") -> Profile:
    """Validate a parsed TOML document. Raises ConfigError naming `source`, the key, the value and
    what is accepted (one line per problem)."""
    try:
        return Profile.model_validate(dict(data))
    except ValidationError as exc:
        lines = [_describe(e) for e in exc.errors(include_url=False)]
        raise ConfigError(f"{source}: " + "\n  ".join(lines)) from None


def load_profile(path: str | Path | None = None) -> Profile:
    """Read and validate a profile TOML file; None: the packaged default profile."""
    if path is None:
        entry = resources.files(PROFILE_PACKAGE).joinpath(DEFAULT_PROFILE)
        with resources.as_file(entry) as real:
            return load_profile(real)
    path = Path(path)
    try:
        text = path.read_bytes()
    except OSError as exc:
        raise field_error(ConfigError, "profile file", str(path),
                          f"a readable TOML file ({exc.strerror or exc})") from None
    try:
        data = tomllib.loads(text.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}; accepted: a UTF-8 TOML document "
                          "(see configs/teleop/default.toml)") from None
    return profile_from_dict(data, str(path))


def per_axis(value: float | list[float]) -> list[float]:
    """A per-axis setting as 6 numbers (one number stands for all six)."""
    return list(value) if isinstance(value, list) else [float(value)] * 6
