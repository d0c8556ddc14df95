"""The control operations that read or change tick state, carried out on the tick thread (handed over with
Pipeline.submit by the control plane, service/control.py): lease, enable/disable, clear_fault, status and
the installation of validated tunables. Each returns the op's result map (wire.REPLY_RESULTS) or raises
ControlError."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from twistrate.service import state as st
from twistrate.service.tick import is_realtime
from twistrate.solver.errors import ControlError

if TYPE_CHECKING:
    from twistrate.service.pipeline import Pipeline


def carry_out(p: Pipeline, op: str, args: dict[str, Any], now: int) -> dict[str, Any]:
    """Carry out one decoded control op (not `arm`, `counters` or `set`, which the control plane answers
    or validates itself)."""
    s = p.state
    if op == "claim":
        lease = s.claim(args["client"], args.get("lease_ms"), now)
        return {"lease": lease.token, "lease_ms": lease.duration_ns // 1_000_000, "client": lease.client}
    if op == "renew":
        lease = s.renew(args["lease"], now)
        return {"lease_ms": lease.duration_ns // 1_000_000}
    if op == "release":
        s.release(args["lease"], now)
        return {}
    if op == "enable":
        s.enable(args["lease"], now)
        return {"mode": s.mode}
    if op == "disable":
        s.disable(args["lease"], now)
        return {"mode": s.mode}
    if op == "clear_fault":
        s.clear_fault(args["lease"], now)
        return {"mode": s.mode}
    if op == "status":
        return status(p, now)
    raise ControlError("internal", f"op: got {op!r}; accepted: an op the tick thread carries out")


def apply_tunables(p: Pipeline, token: str, tunables: Any, now: int) -> dict[str, Any]:
    """Install validated tunables at this tick boundary (needs the lease); an event names what changed."""
    p.state.holder(token, now)
    old = p.tunables
    p.install_tunables(tunables)
    changed = [k for k, v in tunables.model_dump().items() if getattr(old, k) != v]
    if changed:
        p.emit_event("parameters", ", ".join(f"{k} = {getattr(tunables, k)!r}" for k in changed))
    return {"params": tunables.model_dump()}


def status(p: Pipeline, now: int) -> dict[str, Any]:
    """The `status` op's result (docs/protocol.md section 8)."""
    s, intake = p.state, p.intake
    lease = s.lease if s.lease is not None and now < s.lease.expires_ns else None
    q = intake.q
    return {
        "mode": p.mode,
        "health": p.health_state,
        "tick": p.tick,
        "tick_hz": p.rate_hz,
        "health_hz": p.rate_hz / p.health_every,
        "arm": p.arm.name,
        "n": p.n,
        "holder": None if lease is None else lease.client,
        "lease_remaining_ms": None if lease is None else (lease.expires_ns - now) // 1_000_000,
        "fault": s.fault_reason if s.mode == st.FAULT else None,
        "simulated": p.sim is not None,
        "reduced_speed": p.tunables.reduced_speed,
        "position": [0.0] * p.n if q is None else q.tolist(),
        "twist_age_ms": None if intake.twist is None else (now - intake.twist_rx_ns) / 1e6,
        "joints_age_ms": None if q is None or intake.q_rx_ns == 0 else (now - intake.q_rx_ns) / 1e6,
        "realtime": is_realtime(),  # the tick thread's own policy (status runs on it)
        "instance": p.reports.instance, "started_ns": p.reports.started_ns,
        **p.keepout_watch.status(),  # keepout (the newest health report's nearest pair), limiting
    }
