"""The service configuration: a TOML file validated into `ServiceConfig`, and the run-time tunable subset.

`load_config(path)` reads a TOML file (or, with no path, the packaged demo configuration that runs
the example 7-joint arm on its built-in simulated arm) and returns a frozen `ServiceConfig`; every
problem is a ConfigError naming the file, the key path, the value and what is accepted. Unknown
keys are refused. Units are SI unless the key names another (`_ms`, `_hz`, `_deg`, `_deg_s`).

`Tunables` is the subset a client may change while the service runs (control op `set`);
`apply_set(current, params)` validates a request against the same bounds and returns the new
values, or raises ControlError("bad_argument") naming the parameter, the value and the range.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from dataclasses import replace
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from twistrate.service.security import check_endpoints, load_allow_list, load_secret_keypair
from twistrate.service.state import E_BAD_ARGUMENT
from twistrate.service.tick import DEFAULT_RT_PRIORITY
from twistrate.service.wire import (
    DAMPING_POLICIES,
    DEFAULT_CONTROL,
    DEFAULT_INTAKE,
    DEFAULT_OUTPUT,
    LEASE_MS_MAX,
    MIN_CHARACTERISTIC_LENGTH_M,
)
from twistrate.solver.errors import ConfigError, ControlError, field_error
from twistrate.solver.options import HealthThresholds, SolverOptions

if TYPE_CHECKING:
    from twistrate.solver.arm import Arm

#: Packaged service configurations; DEFAULT_CONFIG is what `load_config(None)` reads.
CONFIG_PACKAGE = "twistrate.configs.service"
DEFAULT_CONFIG = "demo.toml"

#: Tool-point speed cap in reduced-speed mode, m/s: "the speed of the TCP shall not exceed
#: 250 mm/s" (ISO 10218-1:2011, 5.6 reduced speed). Also the largest value the config accepts.
REDUCED_SPEED_MAX = 0.25
#: Default tick rate, Hz (500 and 1000 are both supported; see DEVELOPERS.md for the benchmark).
DEFAULT_TICK_HZ = 500.0
TICK_HZ_MIN = 10.0
TICK_HZ_MAX = 2000.0
#: Highest SCHED_FIFO priority on Linux (sched(7)).
RT_PRIORITY_MAX = 99

_STRICT = ConfigDict(strict=True, extra="forbid", frozen=True, allow_inf_nan=False)

# --- bounded value types, shared by the config sections and the tunables ---------------------------
Damping = Literal[DAMPING_POLICIES]  # the protocol's list (wire.constants); the solver's copy is tested equal
DampingMax = Annotated[float, Field(ge=0.0, le=1.0)]
Threshold = Annotated[float, Field(gt=0.0, le=1.0)]
StepMax = Annotated[float, Field(gt=0.0, le=10.0)]
Gain = Annotated[float, Field(ge=0.0, le=100.0)]
Hysteresis = Annotated[float, Field(ge=0.0, le=1.0)]
LinearMax = Annotated[float, Field(gt=0.0, le=10.0)]
AngularMax = Annotated[float, Field(gt=0.0, le=20.0)]
ReducedMax = Annotated[float, Field(gt=0.0, le=REDUCED_SPEED_MAX)]
#: characteristic length, m: at least the protocol's MIN_CHARACTERISTIC_LENGTH_M (1 mm), which bounds the
#: angular part of the weakest direction on the wire (docs/protocol.md 7.4)
Length = Annotated[float, Field(ge=MIN_CHARACTERISTIC_LENGTH_M, le=5.0)]


class _Section(BaseModel):
    model_config = _STRICT


# --- sections -------------------------------------------------------------------------------------


class ArmSection(_Section):
    """file : a .toml/.urdf path relative to the config file, or a packaged example name (reach7).
    base_link, tool_link, acceleration : URDF only (see twistrate.solver.load.load_arm)."""

    file: Annotated[str, Field(min_length=1)] = "reach7"
    base_link: str | None = None
    tool_link: str | None = None
    acceleration: Annotated[float, Field(gt=0.0)] | None = None


class TickSection(_Section):
    """rate_hz : tick rate. health_hz : health publish rate (at most the tick rate).
    realtime_priority : SCHED_FIFO priority of the tick thread, used when the operating system permits
    it (else normal scheduling, with one logged notice); 0 disables real-time scheduling."""

    rate_hz: Annotated[float, Field(ge=TICK_HZ_MIN, le=TICK_HZ_MAX)] = DEFAULT_TICK_HZ
    health_hz: Annotated[float, Field(gt=0.0, le=TICK_HZ_MAX)] = 50.0
    realtime_priority: Annotated[int, Field(ge=0, le=RT_PRIORITY_MAX)] = DEFAULT_RT_PRIORITY


class EndpointsSection(_Section):
    """Where the service binds (docs/protocol.md, section 1)."""

    intake: str = DEFAULT_INTAKE
    output: str = DEFAULT_OUTPUT
    control: str = DEFAULT_CONTROL


class SecuritySection(_Section):
    """CURVE (docs/protocol.md, section 13). Both set: CURVE on every socket; both empty: none.

    server_secret_key : the service's NAME.key_secret file (relative to the config file).
    client_public_keys : public key files or directories of *.key files of the admitted clients.
    """

    server_secret_key: str | None = None
    client_public_keys: list[str] = Field(default_factory=list)

    @property
    def curve(self) -> bool:
        return self.server_secret_key is not None

    def server_keys(self) -> tuple[bytes, bytes]:
        """(public, secret) Z85 keys of the service. Raises ConfigError."""
        if self.server_secret_key is None:
            raise field_error(ConfigError, "security.server_secret_key", None, "a secret key file path")
        return load_secret_keypair(self.server_secret_key)

    def allowed_clients(self) -> frozenset[bytes]:
        """Z85 public keys of the admitted clients. Raises ConfigError."""
        return load_allow_list(self.client_public_keys)


class SolverSection(_Section):
    """Rate resolution options (twistrate.solver.options.SolverOptions; same names, SI units).

    joint_weights : n positive weights, or absent for identity. posture / posture_deg : n preferred
    joint positions (rad or m / degrees, revolute joints only), or absent for the arm's home.
    """

    damping: Damping = "singular_value"
    damping_max: DampingMax = 0.04
    manipulability_threshold: Threshold = 1e-3
    singular_value_threshold: Threshold = 0.04
    selective_step_max: StepMax = 1.0
    characteristic_length: Length = 0.3
    joint_weights: list[Annotated[float, Field(gt=0.0, le=1e6)]] | None = None
    limit_gain: Gain = 1.0
    manipulability_gain: Gain = 0.0
    posture_gain: Gain = 0.0
    posture: list[Annotated[float, Field(ge=-1000.0, le=1000.0)]] | None = None
    posture_deg: list[Annotated[float, Field(ge=-36000.0, le=36000.0)]] | None = None
    enforce_limits: bool = True

    @model_validator(mode="after")
    def _one_posture(self) -> SolverSection:
        if self.posture is not None and self.posture_deg is not None:
            raise ValueError("give posture (rad or m) or posture_deg (degrees), not both")
        return self


class HealthSection(_Section):
    """Health state thresholds on the smallest task-weighted singular value, m (HealthThresholds)."""

    approaching_below: Threshold = 0.06
    holding_below: Threshold = 0.015
    hysteresis: Hysteresis = 0.2

    @model_validator(mode="after")
    def _ordered(self) -> HealthSection:
        if self.holding_below >= self.approaching_below:
            raise ValueError(f"holding_below ({self.holding_below}) must be below approaching_below "
                             f"({self.approaching_below})")
        return self


class SpeedSection(_Section):
    """Tool speed caps. linear_max : m/s (reference point and tool point); angular_max : rad/s, or
    angular_max_deg_s in degrees per second (one of the two). reduced_speed : start in reduced-speed
    mode. reduced_linear_max : tool-point cap in reduced-speed mode, m/s, at most 0.25
    (ISO 10218-1:2011, 5.6 reduced speed)."""

    linear_max: LinearMax = 0.5
    angular_max: AngularMax | None = None
    angular_max_deg_s: Annotated[float, Field(gt=0.0, le=1145.0)] | None = None
    reduced_speed: bool = False
    reduced_linear_max: ReducedMax = REDUCED_SPEED_MAX

    @model_validator(mode="after")
    def _one_angular(self) -> SpeedSection:
        if self.angular_max is not None and self.angular_max_deg_s is not None:
            raise ValueError("give angular_max (rad/s) or angular_max_deg_s, not both")
        return self

    @property
    def angular_max_rad_s(self) -> float:
        """The angular cap in rad/s (default 1.0 rad/s when neither key is given)."""
        if self.angular_max_deg_s is not None:
            return math.radians(self.angular_max_deg_s)
        return 1.0 if self.angular_max is None else self.angular_max


class WatchdogSection(_Section):
    """Input freshness: a twist (joint state) older than this brings the arm to rest, ms."""

    twist_timeout_ms: Annotated[float, Field(gt=0.0, le=10_000.0)] = 100.0
    joints_timeout_ms: Annotated[float, Field(gt=0.0, le=10_000.0)] = 50.0


class LeaseSection(_Section):
    """Lease durations, ms: default_ms when a claim names none; claims may ask within [min_ms, max_ms]."""

    default_ms: Annotated[int, Field(ge=1, le=LEASE_MS_MAX)] = 1000
    min_ms: Annotated[int, Field(ge=1, le=LEASE_MS_MAX)] = 50
    max_ms: Annotated[int, Field(ge=1, le=LEASE_MS_MAX)] = 60_000

    @model_validator(mode="after")
    def _ordered(self) -> LeaseSection:
        if not self.min_ms <= self.default_ms <= self.max_ms:
            raise ValueError(f"need min_ms <= default_ms <= max_ms; got {self.min_ms}, {self.default_ms}, "
                             f"{self.max_ms}")
        return self


class SimulationSection(_Section):
    """The built-in simulated arm. enabled : the service integrates its own commands (no driver;
    joints messages are not expected). lag_s : first-order lag time constant of each joint rate, s.
    initial_posture / initial_posture_deg : start positions (rad or m / degrees, revolute joints
    only), or absent for the arm's home."""

    enabled: bool = True
    lag_s: Annotated[float, Field(ge=0.0, le=10.0)] = 0.02
    initial_posture: list[Annotated[float, Field(ge=-1000.0, le=1000.0)]] | None = None
    initial_posture_deg: list[Annotated[float, Field(ge=-36000.0, le=36000.0)]] | None = None

    @model_validator(mode="after")
    def _one_posture(self) -> SimulationSection:
        if self.initial_posture is not None and self.initial_posture_deg is not None:
            raise ValueError("give initial_posture (rad or m) or initial_posture_deg, not both")
        return self


class RecorderSection(_Section):
    """path : record every tick to this file (relative to the working directory); absent: off."""

    path: str | None = None


class LoggingSection(_Section):
    """level : log threshold. max_per_s : at most this many lines per second for any one repeated
    message key (the rest are counted and summarised)."""

    level: Literal["debug", "info", "warning", "error"] = "info"
    max_per_s: Annotated[float, Field(gt=0.0, le=1000.0)] = 2.0


class SocketsSection(_Section):
    """Per-socket bounds: ZMQ_MAXMSGSIZE, high-water marks (messages) and linger."""

    max_message_bytes: Annotated[int, Field(ge=1024, le=16 * 1024 * 1024)] = 65536
    send_hwm: Annotated[int, Field(ge=1, le=100_000)] = 1000
    receive_hwm: Annotated[int, Field(ge=1, le=100_000)] = 1000
    linger_ms: Annotated[int, Field(ge=0, le=10_000)] = 200


# --- run-time tunables --------------------------------------------------------------------------------


class Tunables(_Section):
    """The parameters a client may change while the service runs (control op `set`); SI units.
    Names, types and bounds are the config keys of the same name (docs/protocol.md, section 8.4)."""

    damping: Damping
    damping_max: DampingMax
    manipulability_threshold: Threshold
    singular_value_threshold: Threshold
    selective_step_max: StepMax
    limit_gain: Gain
    manipulability_gain: Gain
    posture_gain: Gain
    linear_max: LinearMax
    angular_max: AngularMax
    reduced_speed: bool
    reduced_linear_max: ReducedMax
    approaching_below: Threshold
    holding_below: Threshold
    hysteresis: Hysteresis

    @model_validator(mode="after")
    def _ordered(self) -> Tunables:
        if self.holding_below >= self.approaching_below:
            raise ValueError(f"holding_below ({self.holding_below}) must be below approaching_below "
                             f"({self.approaching_below})")
        return self

    def solver_options(self, base: SolverOptions) -> SolverOptions:
        """`base` with the tunable solver fields replaced."""
        return replace(base, damping=self.damping, damping_max=self.damping_max,
                       manipulability_threshold=self.manipulability_threshold,
                       singular_value_threshold=self.singular_value_threshold,
                       selective_step_max=self.selective_step_max, limit_gain=self.limit_gain,
                       manipulability_gain=self.manipulability_gain, posture_gain=self.posture_gain)

    def health_thresholds(self) -> HealthThresholds:
        return HealthThresholds(self.approaching_below, self.holding_below, self.hysteresis)

    @property
    def tool_linear_max(self) -> float:
        """The tool-point linear speed cap in effect, m/s (the reduced one in reduced-speed mode)."""
        return min(self.linear_max, self.reduced_linear_max) if self.reduced_speed else self.linear_max


def _bounds_text(metadata: list[Any]) -> str | None:
    """'>= lo and <= hi' from a field's annotated-types constraints, or None when unbounded."""
    flat: list[Any] = []
    for meta in metadata:  # a FieldInfo inside Annotated carries its constraints in .metadata
        flat += list(getattr(meta, "metadata", None) or [meta])
    metadata = flat
    parts = []
    for attrs in ((("ge", ">="), ("gt", ">")), (("le", "<="), ("lt", "<"))):
        for attr, op in attrs:
            for meta in metadata:
                value = getattr(meta, attr, None)
                if value is not None:
                    parts.append(f"{op} {value:g}")
    return " and ".join(parts) or None


def _range_text(name: str) -> str:
    """Accepted values of a tunable, from its field constraints."""
    info = Tunables.model_fields[name]
    if info.annotation is bool:
        return "true or false"
    if name == "damping":
        return f"one of {', '.join(DAMPING_POLICIES)}"
    return f"a number {_bounds_text(info.metadata)}"


def tunable_ranges() -> dict[str, str]:
    """{name: accepted values} of every tunable (for messages and documentation)."""
    return {name: _range_text(name) for name in Tunables.model_fields}


def apply_set(current: Tunables, params: Mapping[str, object]) -> Tunables:
    """Validate a `set` request against the bounds and return the new tunables (all or nothing).

    Raises ControlError(E_BAD_ARGUMENT) naming the parameter, the value and the accepted range.
    """
    if not params:
        raise ControlError(E_BAD_ARGUMENT, "params: got {}; accepted: at least one parameter")
    for name, value in params.items():
        if name not in Tunables.model_fields:
            raise ControlError(E_BAD_ARGUMENT, f"params.{name}: got {value!r}; accepted: a tunable name, "
                               f"one of {', '.join(Tunables.model_fields)}")
    try:
        return Tunables.model_validate({**current.model_dump(), **params})
    except ValidationError as exc:
        err = exc.errors(include_url=False)[0]
        loc = err["loc"]
        if loc:
            name = str(loc[0])
            raise ControlError(E_BAD_ARGUMENT, f"params.{name}: got {params.get(name, err['input'])!r}; "
                               f"accepted: {_range_text(name)}") from None
        raise ControlError(E_BAD_ARGUMENT,
                           f"params: got {dict(params)!r}; accepted: {_clean(err['msg'])}") from None


# --- the whole configuration -----------------------------------------------------------------------------


class ServiceConfig(_Section):
    """Everything `twistrate serve` needs. `base_dir` is the folder relative paths start from."""

    arm: ArmSection = Field(default_factory=ArmSection)
    tick: TickSection = Field(default_factory=TickSection)
    endpoints: EndpointsSection = Field(default_factory=EndpointsSection)
    security: SecuritySection = Field(default_factory=SecuritySection)
    solver: SolverSection = Field(default_factory=SolverSection)
    health: HealthSection = Field(default_factory=HealthSection)
    speed: SpeedSection = Field(default_factory=SpeedSection)
    watchdog: WatchdogSection = Field(default_factory=WatchdogSection)
    lease: LeaseSection = Field(default_factory=LeaseSection)
    simulation: SimulationSection = Field(default_factory=SimulationSection)
    recorder: RecorderSection = Field(default_factory=RecorderSection)
    logging: LoggingSection = Field(default_factory=LoggingSection)
    sockets: SocketsSection = Field(default_factory=SocketsSection)

    @model_validator(mode="after")
    def _cross_checks(self) -> ServiceConfig:
        if self.tick.health_hz > self.tick.rate_hz:
            raise ValueError(f"tick.health_hz ({self.tick.health_hz:g}) must be at most tick.rate_hz "
                             f"({self.tick.rate_hz:g})")
        period_ms = 1000.0 / self.tick.rate_hz
        for key in ("twist_timeout_ms", "joints_timeout_ms"):
            if getattr(self.watchdog, key) < 2 * period_ms:
                raise ValueError(f"watchdog.{key} ({getattr(self.watchdog, key):g}) must be at least two "
                                 f"tick periods ({2 * period_ms:g} ms)")
        if bool(self.security.server_secret_key) != bool(self.security.client_public_keys):
            raise ValueError("security: give both server_secret_key and client_public_keys (CURVE), "
                             "or neither")
        return self

    @property
    def tick_period_s(self) -> float:
        return 1.0 / self.tick.rate_hz

    def tunables(self) -> Tunables:
        """The run-time tunable values at start-up."""
        s, h, v = self.solver, self.health, self.speed
        return Tunables(damping=s.damping, damping_max=s.damping_max,
                        manipulability_threshold=s.manipulability_threshold,
                        singular_value_threshold=s.singular_value_threshold,
                        selective_step_max=s.selective_step_max, limit_gain=s.limit_gain,
                        manipulability_gain=s.manipulability_gain, posture_gain=s.posture_gain,
                        linear_max=v.linear_max, angular_max=v.angular_max_rad_s,
                        reduced_speed=v.reduced_speed, reduced_linear_max=v.reduced_linear_max,
                        approaching_below=h.approaching_below, holding_below=h.holding_below,
                        hysteresis=h.hysteresis)

    def health_thresholds(self) -> HealthThresholds:
        h = self.health
        return HealthThresholds(h.approaching_below, h.holding_below, h.hysteresis)

    def load_arm(self) -> Arm:
        """Load the configured arm (path already resolved against the config file). Raises ConfigError."""
        from twistrate.solver.errors import InputError, ModelError
        from twistrate.solver.load import load_arm

        try:
            return load_arm(self.arm.file, self.arm.base_link, self.arm.tool_link, self.arm.acceleration)
        except (InputError, ModelError) as exc:
            raise ConfigError(f"arm.file = {self.arm.file!r}: {exc}") from None

    def solver_options(self, arm: Arm) -> SolverOptions:
        """SolverOptions for `arm`: checks the per-joint lists against its n and converts degrees."""
        s = self.solver
        weights = _per_joint(s.joint_weights, arm, "solver.joint_weights")
        posture = _posture(s.posture, s.posture_deg, arm, "solver.posture")
        return SolverOptions(damping=s.damping, damping_max=s.damping_max,
                             manipulability_threshold=s.manipulability_threshold,
                             singular_value_threshold=s.singular_value_threshold,
                             selective_step_max=s.selective_step_max,
                             characteristic_length=s.characteristic_length,
                             joint_weights=None if weights is None else tuple(weights),
                             limit_gain=s.limit_gain, manipulability_gain=s.manipulability_gain,
                             posture_gain=s.posture_gain, posture=None if posture is None else tuple(posture),
                             enforce_limits=s.enforce_limits)

    def initial_posture(self, arm: Arm) -> list[float] | None:
        """Simulated arm start positions (rad or m), or None for the arm's home."""
        sim = self.simulation
        return _posture(sim.initial_posture, sim.initial_posture_deg, arm, "simulation.initial_posture")


def _per_joint(values: list[float] | None, arm: Arm, key: str) -> list[float] | None:
    if values is not None and len(values) != arm.n:
        raise field_error(ConfigError, key, values, f"{arm.n} values, one per joint of arm {arm.name!r}")
    return values


def _posture(rad: list[float] | None, deg: list[float] | None, arm: Arm, key: str) -> list[float] | None:
    if deg is None:
        return _per_joint(rad, arm, key)
    _per_joint(deg, arm, f"{key}_deg")
    if not all(arm.revolute):
        raise field_error(ConfigError, f"{key}_deg", deg,
                          f"{key} in rad and m: arm {arm.name!r} has prismatic joints")
    return [math.radians(x) for x in deg]


# --- loading ---------------------------------------------------------------------------------------------


def _clean(msg: str) -> str:
    """A pydantic message made into the 'accepted' part of ours."""
    for prefix in ("Value error, ", "Input should be "):
        if msg.startswith(prefix):
            msg = msg[len(prefix):]
    return msg


def _describe(err: Mapping[str, Any], section_keys: Mapping[str, list[str]]) -> str:
    loc = [str(p) for p in err["loc"] if not isinstance(p, int)]
    key = "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in err["loc"]).lstrip(".")
    key = key or "(top level)"
    kind = err["type"]
    if kind == "extra_forbidden":
        section = loc[0] if len(loc) > 1 else ""
        known = section_keys.get(section, [])
        where = f"[{section}]" if section else "the top level"
        return (f"{key}: got {err['input']!r}; accepted: no such key in {where}; known keys: "
                f"{', '.join(known)} (remove or rename it)")
    if kind == "missing":
        return f"{key}: missing; accepted: {_clean(err['msg'])}"
    if kind == "value_error" and not loc[1:]:
        return f"{key + ': ' if loc else ''}{_clean(err['msg'])}"
    shown = repr(err["input"])
    if len(shown) > 80:
        shown = shown[:77] + "..."
    accepted = _clean(err["msg"])
    bounds = _field_bounds(loc)
    if kind == "finite_number" or (bounds and kind in _RANGE_ERRORS):
        accepted = f"a finite number {bounds}" if bounds else "a finite number"
    return f"{key}: got {shown}; accepted: {accepted}"


_RANGE_ERRORS = ("less_than_equal", "less_than", "greater_than", "greater_than_equal", "finite_number")


def _field_bounds(loc: list[str]) -> str | None:
    """Bounds text of the config field at `loc` (section, key[, index]), if it is a bounded number."""
    model: Any = ServiceConfig
    info = None
    for part in loc:
        fields = getattr(model, "model_fields", None)
        if fields is None or part not in fields:
            break
        info = fields[part]
        model = info.annotation
    if info is None:
        return None
    metadata = list(info.metadata)
    for arg in getattr(info.annotation, "__args__", ()):  # Optional[Annotated[...]] and list[Annotated[...]]
        metadata += list(getattr(arg, "__metadata__", ()))
        for inner in getattr(arg, "__args__", ()):
            metadata += list(getattr(inner, "__metadata__", ()))
    return _bounds_text(metadata)


def _section_keys() -> dict[str, list[str]]:
    keys = {"": list(ServiceConfig.model_fields)}
    for name, info in ServiceConfig.model_fields.items():
        keys[name] = list(info.annotation.model_fields)  # type: ignore[union-attr]
    return keys


def config_from_dict(data: Mapping[str, Any], base_dir: str | Path = ".",
                     source: str = "config") -> ServiceConfig:
    """Validate a parsed TOML document. Relative paths (arm file, key files) resolve against base_dir.
    Raises ConfigError naming `source`, the key path, the value and what is accepted."""
    base = Path(base_dir)
    data = _resolve_paths(dict(data), base)
    try:
        config = ServiceConfig.model_validate(data)
    except ValidationError as exc:
        keys = _section_keys()
        lines = [_describe(e, keys) for e in exc.errors(include_url=False)]
        raise ConfigError(f"{source}: " + "\n  ".join(lines)) from None
    try:
        _check_arm_source(config.arm.file)
        check_endpoints({f"endpoints.{k}": v for k, v in config.endpoints.model_dump().items()},
                        curve=config.security.curve)
        if config.security.curve:
            config.security.server_keys()
            config.security.allowed_clients()
    except ConfigError as exc:
        raise ConfigError(f"{source}: {exc}") from None
    return config


def _check_arm_source(file: str) -> None:
    """The arm file exists, or names a packaged example (parsed later by ServiceConfig.load_arm)."""
    from twistrate.solver.errors import InputError
    from twistrate.solver.load import read_arm_source

    try:
        read_arm_source(file)
    except InputError as exc:
        raise ConfigError(f"arm.file = {file!r}: {exc}") from None


def _resolve_paths(data: dict[str, Any], base: Path) -> dict[str, Any]:
    """Make the file paths of the document absolute against `base` (strings only; types are checked later)."""
    arm = data.get("arm")
    if isinstance(arm, dict) and isinstance(arm.get("file"), str) and arm["file"]:
        candidate = base / arm["file"]
        if candidate.exists():  # else: a packaged example name, or a missing file load_arm will name
            data["arm"] = {**arm, "file": str(candidate)}
    sec = data.get("security")
    if isinstance(sec, dict):
        sec = dict(sec)
        if isinstance(sec.get("server_secret_key"), str):
            sec["server_secret_key"] = str(base / sec["server_secret_key"])
        if isinstance(sec.get("client_public_keys"), list):
            sec["client_public_keys"] = [str(base / p) if isinstance(p, str) else p
                                         for p in sec["client_public_keys"]]
        data["security"] = sec
    return data


def load_config(path: str | Path | None = None) -> ServiceConfig:
    """Read and validate a service configuration TOML file; None: the packaged demo configuration."""
    if path is None:
        entry = resources.files(CONFIG_PACKAGE).joinpath(DEFAULT_CONFIG)
        with resources.as_file(entry) as real:
            return load_config(real)
    path = Path(path)
    try:
        text = path.read_bytes()
    except OSError as exc:
        raise field_error(ConfigError, "config file", str(path),
                          f"a readable TOML file ({exc.strerror or exc})") from None
    try:
        data = tomllib.loads(text.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}; accepted: a UTF-8 TOML document "
                          "(see configs/service/demo.toml)") from None
    return config_from_dict(data, path.parent, str(path))
