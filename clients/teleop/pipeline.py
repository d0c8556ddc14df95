"""The axis pipeline: raw device counts (or keyboard deflections) to a tool twist.

    device stage  : raw (6,) counts, device order -> rest offset -> normalize -> remap and signs
    shaping       : u (6,) twist order -> deadband -> response curve -> 1-euro filter
                    -> dominant axis -> translation / rotation lock
    speeds        : -> linear (3,) m/s, angular (3,) rad/s with separate caps times the speed scale

Keyboard mode enters at the shaping stage (its keys already give u in twist order). Rest is decided
after the deadband, where it is exact: at rest the output is exactly zero and the filter forgets its
history, so a release is never smeared into a slow drift.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.clients.teleop import axes
from twistrate.clients.teleop.device import DeviceInfo
from twistrate.clients.teleop.one_euro import OneEuroFilter
from twistrate.clients.teleop.profile import Profile, per_axis
from twistrate.solver.errors import ConfigError, field_error


@dataclass(frozen=True)
class Shaped:
    """One pipeline output. linear : (3,) m/s, angular : (3,) rad/s, in the operator's frame (the
    caller attaches it). u : (6,) unitless shaped deflections, twist order. rest : True when every
    axis is inside its deadband or locked out (linear and angular are then exactly zero)."""

    linear: np.ndarray
    angular: np.ndarray
    u: np.ndarray
    rest: bool


def full_scale_for(profile: Profile, info: DeviceInfo | None) -> np.ndarray:
    """(6,) counts at full deflection, device axis order: the profile's, or for `full_scale = 0` the
    absolute device's declared half-range. Raises ConfigError when neither is usable."""
    value = profile.device.full_scale
    if isinstance(value, list):
        return np.array(value, dtype=float)
    if value > 0.0:
        return np.full(6, float(value))
    if info is None or info.abs_range is None:
        raise field_error(ConfigError, "device.full_scale", value,
                          "a count > 0 for relative devices (0 reads the range of an absolute device)")
    half = [(info.abs_range[c][1] - info.abs_range[c][0]) / 2.0 for c in range(6)]
    if min(half) <= 0.0:
        raise field_error(ConfigError, "device.full_scale", value,
                          f"a count > 0: the device declares an empty range ({info.abs_range})")
    return np.array(half, dtype=float)


class AxisPipeline:
    """The pipeline of one profile. Stateful only in the rest offset and the filter's history."""

    def __init__(self, profile: Profile, info: DeviceInfo | None = None) -> None:
        self.profile = profile
        self.rest = np.zeros(6)
        # keyboard mode (no device, full_scale 0) never calls device_stage
        needs_scale = info is not None or profile.device.full_scale != 0
        self.full_scale = full_scale_for(profile, info) if needs_scale else np.ones(6)
        self.source = list(profile.axes.source)
        self.sign = np.array(profile.axes.sign, dtype=float)
        self.deadband = np.array(per_axis(profile.axes.deadband))
        self.k = np.array(per_axis(profile.axes.curve))
        f = profile.filter
        self.filter = OneEuroFilter(f.min_cutoff_hz, f.beta, f.derivative_cutoff_hz) if f.on else None

    def capture_rest(self, samples: np.ndarray) -> None:
        """samples : (m, 6) raw counts with the controller let go, device order."""
        self.rest = axes.rest_offset(samples)

    def device_stage(self, raw: np.ndarray) -> np.ndarray:
        """raw : (6,) latched counts, device order. Returns u (6,) in [-1, 1], twist order."""
        u = axes.normalize(axes.subtract_rest(raw, self.rest), self.full_scale)
        return axes.remap(u, self.source, self.sign)

    def shape(self, u: np.ndarray, t_s: float, *, lock: str = "none", dominant: bool = False,
              scale: float = 1.0) -> Shaped:
        """u : (6,) in [-1, 1], twist order, sampled at t_s (s, monotonic). lock, dominant : the
        operator's current choices; scale : speed scale in (0, 1]. Returns the twist."""
        u = axes.deadband(u, self.deadband)
        if axes.at_rest(u):
            if self.filter is not None:
                self.filter.reset()
            zero = np.zeros(3)
            return Shaped(zero, zero.copy(), np.zeros(6), True)
        u = axes.curve(u, self.k)
        if self.filter is not None:
            u = self.filter(u, t_s)
        if dominant:
            u = axes.dominant(u)
        u = axes.lock(u, lock)
        speed = self.profile.speed
        linear, angular = axes.to_twist(u, speed.linear_max, speed.angular_max, scale)
        return Shaped(linear, angular, u, axes.at_rest(u))  # a lock may leave nothing to move
