"""The sections of the service configuration (one pydantic model each, strict, unknown keys refused), their
bounded value types, and the TUNABLE marker of the keys a client may change while the service runs.

Units are SI unless the key names another (`_ms`, `_hz`, `_deg`, `_deg_s`). The whole document is
twistrate.service.config.ServiceConfig; the run-time tunables are built in twistrate.service.tunables.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from twistrate.service.security import load_allow_list, load_secret_keypair
from twistrate.service.tick import DEFAULT_RT_PRIORITY
from twistrate.service.wire import (
    DAMPING_POLICIES,
    DEFAULT_CONTROL,
    DEFAULT_INTAKE,
    DEFAULT_OUTPUT,
    LEASE_MS_MAX,
    MIN_CHARACTERISTIC_LENGTH_M,
)
from twistrate.solver.errors import ConfigError, field_error

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


@dataclass(frozen=True)
class Tunable:
    """Marks a config key that a client may change while the service runs (control op `set`): put it in
    the key's Annotated type, `Annotated[DampingMax, TUNABLE]`; twistrate.service.tunables builds the
    run-time model from the marked keys, so a new tunable is this one edit.

    value_from : the attribute holding the start value when it is not the key itself (a property that
        converts units). annotation : the tunable's type when it differs from the key's.
    """

    value_from: str | None = None
    annotation: Any = None


TUNABLE = Tunable()

#: The optional `[keepout]` table, kept as parsed: its loader, twistrate.solver.zones.parse_keepout,
#: validates it (strict; every error names keepout.<key>) when the config is loaded (docs/keepout.md).
KeepoutSection = dict[str, Any]

# --- bounded value types, shared by the config sections and the tunables ---------------------------
Damping = Literal[DAMPING_POLICIES]  # the protocol's list (wire.constants); the solver's copy is tested equal
DampingMax = Annotated[float, Field(ge=0.0, le=1.0)]
Threshold = Annotated[float, Field(gt=0.0, le=1.0)]
StepMax = Annotated[float, Field(gt=0.0, le=10.0)]
Gain = Annotated[float, Field(ge=0.0, le=100.0)]
Margin = Annotated[float, Field(ge=0.0, le=1.0)]
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

    damping: Annotated[Damping, TUNABLE] = "singular_value"
    damping_max: Annotated[DampingMax, TUNABLE] = 0.04
    manipulability_threshold: Annotated[Threshold, TUNABLE] = 1e-3
    singular_value_threshold: Annotated[Threshold, TUNABLE] = 0.04
    selective_step_max: Annotated[StepMax, TUNABLE] = 1.0
    characteristic_length: Length = 0.3
    joint_weights: list[Annotated[float, Field(gt=0.0, le=1e6)]] | None = None
    limit_gain: Annotated[Gain, TUNABLE] = 1.0
    manipulability_gain: Annotated[Gain, TUNABLE] = 0.0
    posture_gain: Annotated[Gain, TUNABLE] = 0.0
    posture: list[Annotated[float, Field(ge=-1000.0, le=1000.0)]] | None = None
    posture_deg: list[Annotated[float, Field(ge=-36000.0, le=36000.0)]] | None = None
    enforce_limits: bool = True

    @model_validator(mode="after")
    def _one_posture(self) -> SolverSection:
        if self.posture is not None and self.posture_deg is not None:
            raise ValueError("give posture (rad or m) or posture_deg (degrees), not both")
        return self


def check_thresholds_ordered(values: Any) -> None:
    """The inner health threshold lies below the outer one (a config section or the tunables)."""
    if values.pinched_below_m >= values.narrow_below_m:
        raise ValueError(f"pinched_below_m ({values.pinched_below_m}) must be below narrow_below_m "
                         f"({values.narrow_below_m})")


class HealthSection(_Section):
    """Health state thresholds on the smallest task-weighted singular value, m (HealthThresholds)."""

    narrow_below_m: Annotated[Threshold, TUNABLE] = 0.06
    pinched_below_m: Annotated[Threshold, TUNABLE] = 0.015
    release_margin: Annotated[Margin, TUNABLE] = 0.2

    @model_validator(mode="after")
    def _ordered(self) -> HealthSection:
        check_thresholds_ordered(self)
        return self


class SpeedSection(_Section):
    """Tool speed caps. linear_max : m/s (reference point and tool point); angular_max : rad/s, or
    angular_max_deg_s in degrees per second (one of the two). reduced_speed : start in reduced-speed
    mode. reduced_linear_max : tool-point cap in reduced-speed mode, m/s, at most 0.25
    (ISO 10218-1:2011, 5.6 reduced speed). linear_accel_max (m/s^2), angular_accel_max (rad/s^2) : the
    ramp on the asked twist's rate of change before the solve (`twistrate.service.shaping`), both or
    neither (default: off)."""

    linear_max: Annotated[LinearMax, TUNABLE] = 0.5
    angular_max: Annotated[AngularMax | None, Tunable("angular_max_rad_s", AngularMax)] = None
    angular_max_deg_s: Annotated[float, Field(gt=0.0, le=1145.0)] | None = None
    reduced_speed: Annotated[bool, TUNABLE] = False
    reduced_linear_max: Annotated[ReducedMax, TUNABLE] = REDUCED_SPEED_MAX
    #: the ramp of the asked twist (service/shaping.py), m/s^2 and rad/s^2: both or neither (off)
    linear_accel_max: Annotated[float, Field(gt=0.0, le=100.0)] | None = None
    angular_accel_max: Annotated[float, Field(gt=0.0, le=1000.0)] | None = None

    @model_validator(mode="after")
    def _one_angular(self) -> SpeedSection:
        if self.angular_max is not None and self.angular_max_deg_s is not None:
            raise ValueError("give angular_max (rad/s) or angular_max_deg_s, not both")
        if (self.linear_accel_max is None) != (self.angular_accel_max is None):
            raise ValueError("give both linear_accel_max (m/s^2) and angular_accel_max (rad/s^2), or neither")
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


#: Default size cap of a recording, MB (10**6 bytes): about 1.4 h of a 6-joint arm at 1 kHz.
RECORDER_MAX_MB = 1000.0


class RecorderSection(_Section):
    """path : record every tick to this file (relative to the config file; `{time}` becomes the UTC
    start time; an existing file is refused, never overwritten); absent: off. max_mb : the recording
    stops (event `recording_stopped`, the service goes on) before the file passes this size, MB."""

    path: Annotated[str, Field(min_length=1)] | None = None
    max_mb: Annotated[float, Field(gt=0.0, le=1e6)] = RECORDER_MAX_MB

    @property
    def max_bytes(self) -> int:
        return int(self.max_mb * 1e6)


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
