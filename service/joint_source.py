"""One joint-state source: a joint state that jumps further than the arm could have moved since the last
one, or that names another source, means a second driver (or a forgotten `twistrate sim`) publishes to
this service. The check is pure (no clock, no sockets): the intake calls `JointSourceGuard.check` with
each accepted joint state and its receive time, and faults the service with the reason it returns.

The bound for joint i between two states received dt apart (docs/protocol.md 7.2):

    |q_i - q_prev_i| <= v_max_i * dt + tolerance_i

v_max_i : the arm's velocity limit (rad/s or m/s); tolerance_i : JUMP_TOLERANCE_RAD (revolute) or
JUMP_TOLERANCE_M (prismatic), which covers measurement noise, quantisation, and states that arrive in a
burst (one receive time for several states after a late tick).
"""

from __future__ import annotations

import numpy as np

#: Jump tolerance of a revolute joint, rad (about 2.9 degrees): far above the noise and quantisation of
#: a joint encoder (common practice: well below 0.01 degrees), far below the difference between two
#: drivers' unrelated configurations.
JUMP_TOLERANCE_RAD = 0.05
#: Jump tolerance of a prismatic joint, m.
JUMP_TOLERANCE_M = 0.01


class JointSourceGuard:
    """Checks each accepted joint state against the previous one (tick thread only).

    names : (n,) joint names; v_max : (n,) velocity limits, rad/s or m/s; revolute : (n,) bool mask.
    """

    def __init__(self, names: tuple[str, ...] | list[str], v_max: np.ndarray, revolute: np.ndarray) -> None:
        self.names = tuple(names)
        self.v_max = np.asarray(v_max, dtype=float)
        self.tolerance = np.where(np.asarray(revolute, dtype=bool), JUMP_TOLERANCE_RAD, JUMP_TOLERANCE_M)
        self._q: np.ndarray | None = None
        self._rx_ns = 0
        self._source: str | None = None

    def reset(self, q: np.ndarray, rx_ns: int, source: str | None) -> None:
        """Take (q, rx_ns, source) as the reference without checking it (the first state, or in fault)."""
        self._q, self._rx_ns, self._source = q, rx_ns, source

    def check(self, q: np.ndarray, rx_ns: int, source: str | None) -> str | None:
        """None when q (n,) rad or m, received at rx_ns (monotonic ns) from `source`, can follow the
        previous state; else the fault reason (the joint and the jump, or the two sources). An accepted
        state becomes the reference; a refused one does not."""
        if self._q is None:
            self.reset(q, rx_ns, source)
            return None
        if source != self._source:
            return (f"joint state from a second source: {source!r} after {self._source!r} (one driver per "
                    "service; docs/protocol.md 7.2)")
        dt = max(0, rx_ns - self._rx_ns) * 1e-9
        allowed = self.v_max * dt + self.tolerance
        jump = np.abs(q - self._q)
        over = jump > allowed
        if over.any():
            i = int(np.argmax(jump - allowed))
            return (f"joint state jumped: {self.names[i]} moved {jump[i]:.4g} in {dt * 1e3:.3g} ms, "
                    f"more than its velocity limit allows ({allowed[i]:.4g} = {self.v_max[i]:.4g} * dt "
                    f"+ tolerance {self.tolerance[i]:.4g}); a second joint-state source? "
                    "(docs/protocol.md 7.2)")
        self.reset(q, rx_ns, source)
        return None
