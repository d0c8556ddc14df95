"""The service state machine: modes, the controlling client's lease, enable/disable, watchdog and fault.

Pure logic with the clock passed in (`now_ns`, time.monotonic_ns); the runtime calls it from the
tick thread only, so it needs no locks. Every transition appends an event (name, detail) to
`events`, which the runtime publishes and clears each tick.

Modes (the `mode` field of every command, health and event message):

* disabled : motion not enabled (the start-up mode). Rates ramp to zero within the acceleration
  limits and stay there.
* running  : enabled, the lease is valid, and both the twist and the joint state are fresh: rates
  come from the solver.
* stopping : enabled but the twist or the joint state is stale: rates ramp to zero within the
  acceleration limits.
* holding  : enabled, input still stale, rates at zero. Motion resumes on fresh input: a twist from
  the lease holder younger than its timeout (and received after the last enable).
* fault    : non-finite or out-of-range joint state, or a non-finite solver result. Rates ramp to
  zero and stay there until `clear_fault`, which returns to disabled (enable again to move).
* shutdown : SIGINT/SIGTERM received: rates ramp to zero, then the service closes.

Lease rules: one lease at a time; `claim` is refused while another unexpired lease exists. The
holder renews before expiry. When a lease expires or is released, motion is disabled (the arm
stops as for a stale twist, and a new holder must enable explicitly).
"""

from __future__ import annotations

import secrets
from dataclasses import dataclass

from twistrate.service.wire.constants import (
    E_BAD_ARGUMENT,
    E_FAULT,
    E_LEASE_HELD,
    E_NO_LEASE,
    E_SHUTDOWN,
    MODES,
)
from twistrate.service.wire.constants import MODE_DISABLED as DISABLED
from twistrate.service.wire.constants import MODE_FAULT as FAULT
from twistrate.service.wire.constants import MODE_HOLDING as HOLDING
from twistrate.service.wire.constants import MODE_RUNNING as RUNNING
from twistrate.service.wire.constants import MODE_SHUTDOWN as SHUTDOWN
from twistrate.service.wire.constants import MODE_STOPPING as STOPPING
from twistrate.solver.errors import ControlError

__all__ = ["DISABLED", "E_BAD_ARGUMENT", "E_FAULT", "E_LEASE_HELD", "E_NO_LEASE", "E_SHUTDOWN", "FAULT",
           "HOLDING", "MODES", "RUNNING", "SHUTDOWN", "STOPPING", "Lease", "ServiceState"]

#: Bytes of randomness in a lease token (hex-encoded, so twice as many characters).
TOKEN_BYTES = 8


@dataclass(frozen=True)
class Lease:
    """The controlling client's lease. Times on time.monotonic_ns."""

    token: str
    client: str
    duration_ns: int
    expires_ns: int


class ServiceState:
    """Modes, lease, enable flag and fault of one service.

    lease_ms_default : lease duration when a claim names none, ms.
    lease_ms_min, lease_ms_max : accepted range of a requested lease duration, ms.
    """

    def __init__(self, lease_ms_default: float = 1000.0, lease_ms_min: float = 50.0,
                 lease_ms_max: float = 60000.0) -> None:
        self.lease_ms_default = float(lease_ms_default)
        self.lease_ms_min = float(lease_ms_min)
        self.lease_ms_max = float(lease_ms_max)
        self.mode = DISABLED
        self.enabled = False
        self.lease: Lease | None = None
        self.fault_reason = ""
        #: monotonic ns of the last enable: only twists received after it may move the arm.
        self.epoch_ns = 0
        self.events: list[tuple[str, str]] = []

    # -- lease ---------------------------------------------------------------------------------

    def holder(self, token: object, now_ns: int) -> Lease:
        """The current lease if `token` is its token, else ControlError(no_lease)."""
        lease = self.lease
        if lease is None or now_ns >= lease.expires_ns:
            raise ControlError(E_NO_LEASE, f"lease: got {token!r}; accepted: the token of a current lease "
                               "(none is held: claim one)")
        if not isinstance(token, str) or not secrets.compare_digest(token, lease.token):
            raise ControlError(E_NO_LEASE, f"lease: got {token!r}; accepted: the token of the current "
                               f"lease, held by {lease.client!r}")
        return lease

    def holds(self, token: str, now_ns: int) -> bool:
        """True when `token` is the current, unexpired lease (the hot-path check for twists)."""
        lease = self.lease
        return lease is not None and now_ns < lease.expires_ns and token == lease.token

    def claim(self, client: str, lease_ms: float | None, now_ns: int) -> Lease:
        """Grant the lease to `client` unless another unexpired lease exists."""
        self._expire(now_ns)
        if self.mode == SHUTDOWN:
            raise ControlError(E_SHUTDOWN, "claim: the service is shutting down; accepted: none")
        if self.lease is not None:
            raise ControlError(E_LEASE_HELD, f"claim: lease held by {self.lease.client!r}; accepted: "
                               "a claim once it is released or expires")
        ms = self.lease_ms_default if lease_ms is None else float(lease_ms)
        if not self.lease_ms_min <= ms <= self.lease_ms_max:
            raise ControlError(E_BAD_ARGUMENT, f"lease_ms: got {lease_ms!r}; accepted: "
                               f"{self.lease_ms_min:g} to {self.lease_ms_max:g}")
        duration = int(ms * 1e6)
        self.lease = Lease(secrets.token_hex(TOKEN_BYTES), str(client), duration, now_ns + duration)
        self.events.append(("lease_claimed", f"by {client!r} for {ms:g} ms"))
        return self.lease

    def renew(self, token: object, now_ns: int) -> Lease:
        """Extend the current lease by its duration from now."""
        lease = self.holder(token, now_ns)
        self.lease = Lease(lease.token, lease.client, lease.duration_ns, now_ns + lease.duration_ns)
        return self.lease

    def release(self, token: object, now_ns: int) -> None:
        """Give the lease up; motion is disabled."""
        lease = self.holder(token, now_ns)
        self.lease = None
        self.events.append(("lease_released", f"by {lease.client!r}"))
        self._disable("lease released")

    def _expire(self, now_ns: int) -> None:
        lease = self.lease
        if lease is not None and now_ns >= lease.expires_ns:
            self.lease = None
            self.events.append(("lease_expired", f"lease of {lease.client!r} not renewed"))
            self._disable("lease expired")

    # -- enable / disable / fault ---------------------------------------------------------------

    def enable(self, token: object, now_ns: int) -> None:
        """Allow motion (needs the lease; refused in fault and shutdown)."""
        self.holder(token, now_ns)
        if self.mode == FAULT:
            raise ControlError(E_FAULT, f"enable: service in fault ({self.fault_reason}); accepted: "
                               "enable after clear_fault")
        if self.mode == SHUTDOWN:
            raise ControlError(E_SHUTDOWN, "enable: the service is shutting down; accepted: none")
        if not self.enabled:
            self.enabled = True
            self.epoch_ns = now_ns
            self.events.append(("enabled", "motion enabled"))

    def disable(self, token: object, now_ns: int) -> None:
        """Stop motion (ramp to zero) and stay disabled. Needs the lease."""
        self.holder(token, now_ns)
        self._disable("disabled by the lease holder")

    def _disable(self, why: str) -> None:
        if self.enabled:
            self.enabled = False
            self.events.append(("disabled", why))

    def fault(self, reason: str) -> None:
        """Enter fault (idempotent while in fault): rates ramp to zero until clear_fault."""
        if self.mode in (FAULT, SHUTDOWN):
            return
        self.fault_reason = reason
        self.enabled = False
        self._set_mode(FAULT, "fault", reason)

    def clear_fault(self, token: object, now_ns: int) -> None:
        """Leave fault for disabled (needs the lease). The next bad joint state faults again."""
        self.holder(token, now_ns)
        if self.mode == FAULT:
            self.fault_reason = ""
            self._set_mode(DISABLED, "fault_cleared", "fault cleared; enable to move")

    def shutdown(self, why: str) -> None:
        """Enter shutdown for good: rates ramp to zero and nothing re-enables motion."""
        if self.mode != SHUTDOWN:
            self.enabled = False
            self._set_mode(SHUTDOWN, "shutdown", why)

    # -- per tick --------------------------------------------------------------------------------

    def _set_mode(self, mode: str, event: str, detail: str) -> None:
        if mode != self.mode:
            self.mode = mode
        self.events.append((event, detail))

    def step(self, now_ns: int, twist_fresh: bool, joints_fresh: bool, at_rest: bool) -> str:
        """Advance the mode for this tick and return it.

        twist_fresh : a twist from the lease holder, received after the last enable, younger than
            its timeout. joints_fresh : joint state younger than its timeout. at_rest : every rate
            commanded last tick is exactly zero.
        """
        self._expire(now_ns)
        mode = self.mode
        if mode in (FAULT, SHUTDOWN):
            return mode
        if not self.enabled:
            new = DISABLED
        elif twist_fresh and joints_fresh:
            new = RUNNING
        elif at_rest:
            new = HOLDING
        else:
            new = STOPPING
        if new != mode:
            if new == RUNNING:
                self._set_mode(new, "running", "fresh twist and joint state")
            elif new == DISABLED:
                self.mode = new  # the cause ("disabled", "lease_expired", ...) was already reported
            elif mode == RUNNING:
                pairs = (("twist", twist_fresh), ("joint state", joints_fresh))
                stale = [name for name, ok in pairs if not ok]
                self._set_mode(new, "stale_input", f"{' and '.join(stale)} older than its timeout: stopping")
            elif new == HOLDING and mode == STOPPING:
                self._set_mode(new, "at_rest", "stopped; waiting for fresh input")
            else:
                self._set_mode(new, "mode", f"{mode} -> {new}")
        return self.mode
