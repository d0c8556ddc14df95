"""Invented arms on the wire, for the dashboard's load check: each publishes like a service would.

A FakeService binds an output PUB socket and a control ROUTER socket on loopback, publishes health,
state and event messages of a FakeArm (clients/watch/fake.py) at the health rate, encoded by the
protocol's own codec, and answers the read-only control ops `status`, `counters` and `arm`. It has
no tick and no intake: it stands in for the stream side of a service so that many arms cost the
machine little, and the dashboard's own cost can be measured.
"""

from __future__ import annotations

import threading
import time
from typing import Any

import numpy as np
import zmq

from twistrate.clients.watch.fake import FakeArm
from twistrate.service import wire
from twistrate.solver.errors import WireError


class FakeService:
    """One invented arm publishing at health_hz on `output`, answering status/arm on `control`."""

    def __init__(
        self,
        name: str,
        output: str,
        control: str,
        health_hz: float = 50.0,
        phase: float = 0.0,
        context: zmq.Context | None = None,
    ) -> None:
        self.name = name
        self.arm = FakeArm(name, phase=phase)
        self.health_hz = health_hz
        self._ctx = context or zmq.Context.instance()
        self._pub = self._ctx.socket(zmq.PUB)
        self._pub.setsockopt(zmq.LINGER, 0)
        self._pub.bind(output)
        self._router = self._ctx.socket(zmq.ROUTER)
        self._router.setsockopt(zmq.LINGER, 0)
        self._router.bind(control)
        self.published = 0
        self.published_health = 0
        self._t0 = time.monotonic()
        self.started_ns = time.time_ns()
        self._t1: float | None = None
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name=f"fake-{name}", daemon=True)

    def start(self) -> FakeService:
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5.0)
        self._t1 = time.monotonic()

    def elapsed(self) -> float:
        """Seconds it published (start to stop, or to now)."""
        return (self._t1 or time.monotonic()) - self._t0

    def _status(self) -> dict[str, Any]:
        return {
            "mode": self.arm.mode,
            "health": self.arm.health,
            "tick": self.arm.seq,
            "tick_hz": self.arm.tick_hz,
            "health_hz": self.health_hz,
            "arm": f"fake-{self.name}",
            "n": 4,
            "holder": "fake-operator",
            "lease_remaining_ms": 1500,
            "fault": None,
            "simulated": True,
            "reduced_speed": False,
            "position": [0.0] * 4,
            "twist_age_ms": None,
            "joints_age_ms": None,
            "realtime": False,
            "instance": self.arm.instance,
            "started_ns": self.started_ns,
            "keepout": None,
            "limiting": {"by": "none", "joint": None, "bound": None, "link": None, "other": None},
        }

    def _answer(self) -> None:
        while self._router.poll(0, zmq.POLLIN):
            frames = self._router.recv_multipart()
            envelope, body = frames[:-1], frames[-1]
            try:
                req = wire.decode_request(body)
            except WireError:
                continue
            if req.op == "status":
                reply = wire.encode_reply(seq=req.seq, op=req.op, result=self._status())
            elif req.op == "counters":
                reply = wire.encode_reply(
                    seq=req.seq,
                    op=req.op,
                    result={
                        "counters": {
                            "lateness_median_ns": 20_000,
                            "lateness_p99_ns": 60_000,
                            "lateness_max_ns": 200_000,
                        }
                    },
                )
            elif req.op == "arm":
                reply = wire.encode_reply(seq=req.seq, op=req.op, result=self.arm.description())
            else:
                reply = wire.encode_reply(
                    seq=req.seq, op=req.op, error=("unknown_op", "a watcher's stand-in")
                )
            self._router.send_multipart([*envelope, reply])

    def _run(self) -> None:
        period = 1.0 / self.health_hz
        t0 = time.monotonic()
        next_t = t0
        while not self._stop.is_set():
            now = time.monotonic()
            for kind, msg in self.arm.messages(now - t0, time.time()):
                if kind == "health":
                    data = wire.encode_health(**{k: msg[k] for k in _HEALTH_ARGS})
                    self._pub.send_multipart([wire.TOPIC_HEALTH, data])
                    self.published_health += 1
                elif kind == "event":
                    data = wire.encode_event(
                        seq=msg["seq"],
                        tick=msg["tick"],
                        event=msg["event"],
                        detail=msg["detail"],
                        mode=msg["mode"],
                        instance=msg["instance"],
                    )
                    self._pub.send_multipart([wire.TOPIC_EVENT, data])
                elif kind == "state":
                    data = wire.encode_state(
                        seq=msg["seq"],
                        stamp_ns=msg["stamp_ns"],
                        tick=msg["tick"],
                        position=msg["position"],
                        rate=msg["rate"],
                        tool_position=np.asarray(msg["tool"]["position"]),
                        tool_rotation=np.asarray(msg["tool"]["rotation"]),
                        origins=np.asarray(msg["origins"]),
                        ellipsoid_radii=np.asarray(msg["ellipsoid"]["radii"]),
                        ellipsoid_axes=np.asarray(msg["ellipsoid"]["axes"]),
                    )
                    self._pub.send_multipart([wire.TOPIC_STATE, data])
                else:
                    continue
                self.published += 1
            self._answer()
            next_t += period
            self._stop.wait(max(0.0, next_t - time.monotonic()))
        self._pub.close()
        self._router.close()


_HEALTH_ARGS = (
    "seq",
    "stamp_ns",
    "tick",
    "manipulability",
    "manipulability_linear",
    "manipulability_angular",
    "singular_values",
    "inverse_condition",
    "weakest_linear",
    "weakest_angular",
    "damping",
    "scale",
    "limit_margin",
    "state",
    "mode",
    "rejected",
    "overruns",
    "sigma_min_rate_m_s",
    "time_to_pinched_s",
    "time_to_limit_s",
    "first_limit_joint",
    "time_to_first_limit_s",
)
