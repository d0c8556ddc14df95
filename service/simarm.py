"""The simulated arm: integrates commanded joint rates (optional first-order lag) inside its own limits.

It plays the robot: commands go in as joint rates, joint state (positions and rates) comes out.
Whatever it is told, it never leaves its position limits and never exceeds its velocity limits:
a non-finite command counts as zero, commanded rates are clamped to +-v_max, and a joint that
reaches a position limit stops there (its rate drops to zero) instead of passing it.

Lag model (common practice for a velocity-controlled drive): each joint rate follows the command
as a first-order system, tau * d(qd)/dt = qd_cmd - qd, integrated exactly over a step dt:
    qd(t + dt) = qd_cmd + (qd(t) - qd_cmd) * exp(-dt / tau)
    q(t + dt)  = q(t) + qd_cmd * dt + (qd(t) - qd_cmd) * tau * (1 - exp(-dt / tau))
With tau = 0 the rate equals the (clamped) command at once and q advances by qd_cmd * dt.
"""

from __future__ import annotations

import math

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.errors import InputError, field_error


class SimArm:
    """A simulated velocity-controlled arm.

    q_min, q_max : (n,) position limits, rad (revolute) or m (prismatic); +-inf for unlimited.
    v_max : (n,) velocity limits, rad/s or m/s, > 0.
    q0 : (n,) initial positions within the limits (clipped into them otherwise).
    lag_s : first-order lag time constant tau, s (0: no lag).
    """

    def __init__(self, q_min: np.ndarray, q_max: np.ndarray, v_max: np.ndarray, q0: np.ndarray,
                 lag_s: float = 0.0) -> None:
        self.q_min = np.array(q_min, dtype=float)
        self.q_max = np.array(q_max, dtype=float)
        self.v_max = np.array(v_max, dtype=float)
        n = self.q_min.shape[0]
        if not (self.q_min.shape == self.q_max.shape == self.v_max.shape == (n,)) or n == 0:
            raise field_error(InputError, "simulated arm limits", (self.q_min.shape, self.v_max.shape),
                              "(n,) arrays of equal length")
        if not math.isfinite(lag_s) or lag_s < 0.0:
            raise field_error(InputError, "sim lag_s", lag_s, "a finite number >= 0 (seconds)")
        q0 = np.asarray(q0, dtype=float).reshape(-1)
        if q0.shape != (n,) or not np.all(np.isfinite(q0)):
            raise field_error(InputError, "sim q0", q0.tolist(), f"{n} finite positions")
        self.lag_s = float(lag_s)
        self._q = np.clip(q0, self.q_min, self.q_max)
        self._qd = np.zeros(n)
        self._cmd = np.zeros(n)

    @classmethod
    def from_arm(cls, arm: Arm, lag_s: float = 0.0, q0: np.ndarray | None = None) -> SimArm:
        """A simulated arm with the model's own limits, starting at `q0` (default: the arm's home)."""
        return cls(arm.q_min, arm.q_max, arm.v_max, arm.q_home if q0 is None else q0, lag_s)

    @property
    def n(self) -> int:
        return self._q.shape[0]

    @property
    def q(self) -> np.ndarray:
        """(n,) current positions, rad or m (a copy)."""
        return self._q.copy()

    @property
    def qd(self) -> np.ndarray:
        """(n,) current rates, rad/s or m/s (a copy)."""
        return self._qd.copy()

    def command(self, qd_cmd: np.ndarray) -> None:
        """Set the commanded rates (n,), rad/s or m/s. Non-finite entries count as 0; clamped to +-v_max."""
        cmd = np.asarray(qd_cmd, dtype=float)
        if cmd.shape != self._cmd.shape:
            raise field_error(InputError, "sim command", cmd.shape, f"({self.n},) joint rates")
        cmd = np.where(np.isfinite(cmd), cmd, 0.0)
        np.clip(cmd, -self.v_max, self.v_max, out=self._cmd)

    def step(self, dt: float) -> None:
        """Advance the simulation by dt seconds (dt >= 0)."""
        if not dt > 0.0:
            return
        cmd = self._cmd
        if self.lag_s > 0.0:
            decay = math.exp(-dt / self.lag_s)
            diff = self._qd - cmd
            q_new = self._q + cmd * dt + diff * (self.lag_s * (1.0 - decay))
            qd_new = cmd + diff * decay
        else:
            q_new = self._q + cmd * dt
            qd_new = cmd.copy()
        np.clip(qd_new, -self.v_max, self.v_max, out=qd_new)
        # A joint that would pass a limit stops on it: position clamped, rate zeroed.
        low = q_new < self.q_min
        high = q_new > self.q_max
        hit = low | high
        if hit.any():
            q_new = np.clip(q_new, self.q_min, self.q_max)
            qd_new[hit] = 0.0
        self._q = q_new
        self._qd = qd_new
