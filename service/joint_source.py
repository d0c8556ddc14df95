"""One joint-state source: a joint state that jumps further than the arm could have moved since the last
one, or that names another source, means a second driver (or a forgotten `twistrate sim`) publishes to
this service. The check is pure (no clock, no sockets): the intake calls `JointSourceGuard.check` with
each accepted joint state and its receive time, and faults the service with the reason it returns.

The bound for joint i between two states received dt apart (docs/protocol.md 7.2):

    |q_i - q_prev_i| <= v_max_i * dt + tolerance_i

v_max_i : the arm's velocity limit (rad/s or m/s); tolerance_i : JUMP_TOLERANCE_RAD (revolute) or
JUMP_TOLERANCE_M (prismatic), which covers measurement noise, quantisation, and states that arrive in a
burst (one receive time for several states after a late tick).

A frozen driver (docs/protocol.md 7.2): one that keeps sending the same position, bit for bit, while
the service commands motion (a stuck encoder reading, a driver re-sending its last buffer, a blocked
arm). `frozen()` integrates the commanded rates over the receive times since the position last changed;
once that commanded motion exceeds FROZEN_MOTION_RAD / FROZEN_MOTION_M for some joint and no change came
for longer than `frozen_after_ns` (the joint-state timeout), the state is frozen: the intake takes it but
lets the joint state go stale from the last change (`changed_ns`), so the service stops the arm as for a
silent driver. At rest (rates zero) a repeated state is what a live driver sends: it never counts, and
it starts the check afresh (motion may resume once the arm is at rest).
"""

from __future__ import annotations

import numpy as np

#: Jump tolerance of a revolute joint, rad (about 2.9 degrees): far above the noise and quantisation of
#: a joint encoder (common practice: well below 0.01 degrees), far below the difference between two
#: drivers' unrelated configurations.
JUMP_TOLERANCE_RAD = 0.05
#: Jump tolerance of a prismatic joint, m.
JUMP_TOLERANCE_M = 0.01
#: A frozen joint state: the commanded rates since the reported position last changed (bit for bit) would
#: have moved a joint this far, rad (revolute) or m (prismatic). 1 mrad (about 0.06 degrees) is far above
#: a joint encoder's resolution (common practice: well below 0.01 degrees), so a live driver of a moving
#: joint reports a change long before; the same figure as the pipeline's range tolerance.
FROZEN_MOTION_RAD = 1e-3
FROZEN_MOTION_M = 1e-4


class JointSourceGuard:
    """Checks each accepted joint state against the previous one (tick thread only).

    names : (n,) joint names; v_max : (n,) velocity limits, rad/s or m/s; revolute : (n,) bool mask.
    frozen_after_ns : the frozen-state check's time bound, ns (the joint-state timeout; None: no check).
    """

    def __init__(self, names: tuple[str, ...] | list[str], v_max: np.ndarray, revolute: np.ndarray,
                 frozen_after_ns: int | None = None) -> None:
        self.names = tuple(names)
        self.v_max = np.asarray(v_max, dtype=float)
        rev = np.asarray(revolute, dtype=bool)
        self.tolerance = np.where(rev, JUMP_TOLERANCE_RAD, JUMP_TOLERANCE_M)
        self._q: np.ndarray | None = None
        self._rx_ns = 0
        self._source: str | None = None
        self.frozen_after_ns = frozen_after_ns
        self.frozen_motion = np.where(rev, FROZEN_MOTION_RAD, FROZEN_MOTION_M)
        #: the frozen check: last state and receipt, receipt of the last change, commanded motion since
        self._f_q: np.ndarray | None = None
        self._f_rx_ns = 0
        self._f_changed_ns = 0
        self._f_moved = np.zeros(len(self.names))

    @property
    def changed_ns(self) -> int:
        """Receive time of the last state whose position changed (or that restarted the check), ns."""
        return self._f_changed_ns

    def restart_frozen(self, q: np.ndarray, rx_ns: int) -> None:
        """Take (q, rx_ns) as a fresh change (the first state, or in fault)."""
        self._f_q, self._f_rx_ns, self._f_changed_ns = q, rx_ns, rx_ns
        self._f_moved[:] = 0.0

    def frozen(self, q: np.ndarray, rx_ns: int, qd: np.ndarray) -> str | None:
        """None while q (n,) rad or m, received at rx_ns (monotonic ns), is a live measurement; else the
        fault reason. qd (n,) : the rates commanded since the previous state, rad/s or m/s."""
        prev = self._f_q
        if self.frozen_after_ns is None or prev is None or not (q == prev).all() or not qd.any():
            self.restart_frozen(q, rx_ns)
            return None
        dt = max(0, rx_ns - self._f_rx_ns) * 1e-9
        self._f_rx_ns = rx_ns
        moved = self._f_moved
        moved += np.abs(qd) * dt
        still_ns = rx_ns - self._f_changed_ns
        if still_ns <= self.frozen_after_ns or not (moved > self.frozen_motion).any():
            return None
        i = int(np.argmax(moved / self.frozen_motion))
        return (f"joint state frozen: the same position for {still_ns * 1e-6:.4g} ms while the commanded "
                f"rates would have moved {self.names[i]} by {moved[i]:.4g} (more than "
                f"{self.frozen_motion[i]:g}); "
                "a stuck driver or a blocked arm? (docs/protocol.md 7.2)")

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
