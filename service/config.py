"""The service configuration: a TOML file validated into `ServiceConfig`, and the run-time tunable subset.

`load_config(path)` reads a TOML file (or, with no path, the packaged demo configuration that runs
the example 7-joint arm on its built-in simulated arm) and returns a frozen `ServiceConfig`; every
problem is a ConfigError naming the file, the key path, the value and what is accepted. Unknown
keys are refused. Units are SI unless the key names another (`_ms`, `_hz`, `_deg`, `_deg_s`).

The sections and their value types are in twistrate.service.config_sections; keys marked TUNABLE may be
changed while the service runs (control op `set`): the run-time model of them, and the validation of a
`set`, live in twistrate.service.tunables.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pydantic import Field, ValidationError, model_validator

# re-exported: the constants of the configuration, where callers look for them
from twistrate.service.config_sections import DEFAULT_TICK_HZ as DEFAULT_TICK_HZ
from twistrate.service.config_sections import REDUCED_SPEED_MAX as REDUCED_SPEED_MAX
from twistrate.service.config_sections import RT_PRIORITY_MAX as RT_PRIORITY_MAX
from twistrate.service.config_sections import (
    ArmSection,
    EndpointsSection,
    HealthSection,
    KeepoutSection,
    LeaseSection,
    LoggingSection,
    RecorderSection,
    SecuritySection,
    SimulationSection,
    SocketsSection,
    SolverSection,
    SpeedSection,
    TickSection,
    WatchdogSection,
    _Section,
)
from twistrate.service.security import check_endpoints
from twistrate.solver.errors import ConfigError, field_error
from twistrate.solver.options import HealthThresholds, SolverOptions
from twistrate.solver.validation import describe_all

if TYPE_CHECKING:
    from twistrate.service.tunables import Tunables
    from twistrate.solver.arm import Arm
    from twistrate.solver.keepout import KeepOut
    from twistrate.solver.zones import KeepOutConfig

#: Packaged service configurations; DEFAULT_CONFIG is what `load_config(None)` reads.
CONFIG_PACKAGE = "twistrate.configs.service"
DEFAULT_CONFIG = "demo.toml"

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
    keepout: KeepoutSection | None = None

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
        """The run-time tunable values at start-up (twistrate.service.tunables)."""
        from twistrate.service.tunables import tunables_of

        return tunables_of(self)

    def health_thresholds(self) -> HealthThresholds:
        h = self.health
        return HealthThresholds(h.narrow_below_m, h.pinched_below_m, h.release_margin)

    def load_arm(self) -> Arm:
        """Load the configured arm (path already resolved against the config file). Raises ConfigError."""
        from twistrate.solver.errors import InputError, ModelError
        from twistrate.solver.load import load_arm

        try:
            return load_arm(self.arm.file, self.arm.base_link, self.arm.tool_link, self.arm.acceleration)
        except (InputError, ModelError) as exc:
            raise ConfigError(f"arm.file = {self.arm.file!r}: {exc}") from None

    def keepout_config(self) -> KeepOutConfig | None:
        """The validated `[keepout]` section (twistrate.solver.zones.parse_keepout), or None without one."""
        from twistrate.solver.zones import parse_keepout

        return None if self.keepout is None else parse_keepout(dict(self.keepout))

    def keepout_pass(self, arm: Arm) -> KeepOut | None:
        """The keep-out pass for `arm` (docs/keepout.md), or None without a `[keepout]` section. Raises
        ConfigError for a bad section or link names in `touching` the arm does not have."""
        from twistrate.solver.keepout import KeepOut

        cfg = self.keepout_config()
        return None if cfg is None else KeepOut(arm, cfg)

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


def config_from_dict(data: Mapping[str, Any], base_dir: str | Path = ".",
                     source: str = "config") -> ServiceConfig:
    """Validate a parsed TOML document. Relative paths (arm file, key files) resolve against base_dir.
    Raises ConfigError naming `source`, the key path, the value and what is accepted."""
    base = Path(base_dir)
    data = _resolve_paths(dict(data), base)
    try:
        config = ServiceConfig.model_validate(data)
    except ValidationError as exc:
        lines = describe_all(exc.errors(include_url=False), ServiceConfig)
        raise ConfigError(f"{source}: " + "\n  ".join(lines)) from None
    try:
        _check_arm_source(config.arm.file)
        check_endpoints({f"endpoints.{k}": v for k, v in config.endpoints.model_dump().items()},
                        curve=config.security.curve)
        config.keepout_config()
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
    """Make the file paths of the document (arm, keys, recording) absolute against `base` (strings only;
    types are checked later)."""
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
    rec = data.get("recorder")
    if isinstance(rec, dict) and isinstance(rec.get("path"), str) and rec["path"]:
        data["recorder"] = {**rec, "path": str(base / rec["path"])}
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
