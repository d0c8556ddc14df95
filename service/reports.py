"""The pipeline's reports: the health and state messages at the health rate (measures of
twistrate.solver.health; the arm's pose) and the events of the tick, encoded and handed to the
pipeline's publish function."""

from __future__ import annotations

import logging
import secrets
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from twistrate.service import wire
from twistrate.solver.errors import InputError
from twistrate.solver.foresight import foresight, task_joint_weight
from twistrate.solver.health import STATES, assess, next_state
from twistrate.solver.kinematics import Frames
from twistrate.solver.svd import svd_full

if TYPE_CHECKING:
    from twistrate.service.pipeline import Pipeline

log = logging.getLogger("twistrate.service")


class HealthReporter:
    """Health and events of one pipeline (tick thread only)."""

    #: the health state a service starts in
    initial_state = STATES[0]

    def __init__(self, pipeline: Pipeline) -> None:
        self.p = pipeline
        #: this instance's id and start time (docs/protocol.md section 6): in status and every event
        self.instance, self.started_ns = 1 + secrets.randbelow(wire.INSTANCE_MAX), pipeline.wall_clock()
        #: the last health measures published (encode_health's keyword arguments)
        self.last: dict[str, Any] = {}
        self._q: np.ndarray | None = None
        #: the (6, n) task and joint weighting of the foresight, for the options it was made for
        self._weight: np.ndarray | None = None
        self._weight_for: Any = None
        #: publish_state's arguments for the last health tick, sent on the next tick (docs/protocol.md 7.6)
        self._state_due: tuple[Any, ...] | None = None

    def measure(self, q: np.ndarray) -> dict[str, Any]:
        """Health measures at q as encode_health's keyword arguments: from this tick's resolution when
        running, else from the Jacobian at q (which then also drives the health state)."""
        p = self.p
        res = p.last_resolution
        if res is None:
            if self._q is not None and np.array_equal(q, self._q) and self.last:
                # at rest: the measures are unchanged (the thresholds may not be)
                p.set_health(next_state(p.health_state, p.sigma_min, p.thresholds))
                return self.last
            _, J = p.kinematics(q)
            h = assess(p.arm, q, J, p.options)
            p.sigma_min = h.sigma_min
            p.manipulability = h.manipulability
            p.set_health(next_state(p.health_state, h.sigma_min, p.thresholds))
        else:
            h = assess(p.arm, q, res, p.options)
        self._q = q
        return {**self._motion(q, res), **{
            "manipulability": h.manipulability,
            "manipulability_linear": h.manipulability_translational,
            "manipulability_angular": h.manipulability_rotational,
            "singular_values": h.singular_values,
            "inverse_condition": h.inverse_condition,
            # exactly as twistrate.solver.health gives them (docs/protocol.md 7.4)
            "weakest_linear": h.weakest_linear,
            "weakest_angular": h.weakest_angular,
            "limit_margin": h.limit_margin,
            **p.keepout_watch.health(q),
        }}

    def _motion(self, q: np.ndarray, res: Any) -> dict[str, Any]:
        """The tick's twist achieved and its error, tracking, and the foresight along its rates (keyword
        arguments of encode_health); none (the at-rest defaults) when the tick did not solve."""
        if res is None:
            return {}
        p = self.p
        if self._weight_for is not p.options:
            self._weight = task_joint_weight(p.n, p.options.characteristic_length, p.options.joint_weights)
            self._weight_for = p.options
        f = foresight(p.arm, q, res.qd, res.J, res.U, res.singular_values, self._weight,
                      p.thresholds.pinched_below)
        return {"tracking": bool(res.tracking), "twist_achieved": res.twist_achieved,
                "twist_error": res.twist_error, "sigma_min_rate_m_s": f.sigma_min_rate_m_s,
                "time_to_pinched_s": f.time_to_pinched_s, "time_to_limit_s": f.time_to_limit_s,
                "first_limit_joint": f.first_limit_joint, "time_to_first_limit_s": f.time_to_first_limit_s}

    def _publish(self, kind: str, topic: bytes, encode: Callable[[int], bytes]) -> None:
        """Encode (with the kind's next seq) and publish one report; a failure is counted and logged at a
        bounded rate, never raised into the tick."""
        p = self.p
        tel = p.telemetry
        try:
            data = encode(tel.out_seq[kind])
        except (InputError, np.linalg.LinAlgError, ValueError) as exc:
            tel.counts["publish_failed"] += 1
            p.rlog.warning(kind, p.clock(), f"{kind} not published: {exc}")
            return
        p.publish(topic, data)
        tel.out_seq[kind] += 1
        tel.counts[f"{kind}_messages"] += 1

    def publish_due(self, wall: int, q: np.ndarray | None, qd: np.ndarray) -> None:
        """After each tick (wall: its stamp, ns; q (n,) its joint state or None; qd (n,) its rates): the
        state message held from the last health tick, then on a health tick its health message; that
        tick's state (pose and kinematics, at hand now) goes out on the next tick, so the two reports'
        work never falls in one tick (at once when health goes out every tick)."""
        p = self.p
        due, self._state_due = self._state_due, None
        if due is not None:
            self.publish_state(*due)
        if p.tick % p.health_every == 0 and q is not None:
            self.publish_health(wall, q)
            state = (wall, q, qd, p.tick, *p.kinematics(q))
            if p.health_every == 1:
                self.publish_state(*state)
            else:
                self._state_due = state

    def publish_health(self, wall: int, q: np.ndarray) -> None:
        p = self.p

        def encode(seq: int) -> bytes:
            h = self.measure(q)
            self.last = h
            return wire.encode_health(seq=seq, stamp_ns=wall, tick=p.tick, damping=p.damping,
                                      scale=min(1.0, max(0.0, p.scale)), state=p.health_state, mode=p.mode,
                                      rejected=p.telemetry.rejected, overruns=p.telemetry.ticker.overruns,
                                      **h)

        self._publish("health", wire.TOPIC_HEALTH, encode)

    def publish_state(self, wall: int, q: np.ndarray, qd: np.ndarray, tick: int, frames: Frames,
                      J: np.ndarray) -> None:
        """The state message of tick `tick` (wall : its wall-clock stamp, ns) at q (n,) with the rates
        commanded then qd (n,) and that tick's kinematics (frames; J (6, n) geometric Jacobian, base frame,
        tool point): tool pose, joint origins and the translational manipulability ellipsoid (singular
        value decomposition of J_v = J[:3], base frame). It may go out a tick later (docs/protocol.md
        7.6): it describes the tick it names."""

        def encode(seq: int) -> bytes:
            U, s, _ = svd_full(J[:3])  # numpy.linalg.svd's LAPACK call, less overhead
            radii = np.zeros(3)
            radii[:s.size] = s
            T = frames.T_base_tool
            origins = np.vstack((np.zeros((1, 3)), frames.p_base, T[None, :3, 3]))
            return wire.encode_state(seq=seq, stamp_ns=wall, tick=tick, position=q, rate=qd,
                                     tool_position=T[:3, 3], tool_rotation=T[:3, :3], origins=origins,
                                     ellipsoid_radii=radii, ellipsoid_axes=U)

        self._publish("state", wire.TOPIC_STATE, encode)

    def publish_events(self, wall: int) -> None:
        p = self.p
        tel = p.telemetry
        events = p.state.events
        for name, detail in events:
            seq = tel.out_seq["event"]
            data = wire.encode_event(seq=seq, tick=p.tick, event=name, detail=detail, mode=p.mode,
                                     instance=self.instance, stamp_ns=wall)
            p.publish(wire.TOPIC_EVENT, data)
            tel.out_seq["event"] = seq + 1
            tel.counts["events"] += 1
            log.info("event %s: %s (mode %s)", name, detail, p.mode)
        events.clear()
