"""The invented arms on the wire (clients/watch/fake_wire.py), the dashboard benchmark's stand-ins for
services: what they publish and answer passes the protocol's own codec as a client reads it (the
status result with every field and the instance id; health with its foresight; events with the id)."""

from __future__ import annotations

import socket
import time

import pytest

from twistrate.clients.link import Endpoints, Link
from twistrate.clients.watch.fake_wire import FakeService
from twistrate.service import wire
from twistrate.service.wire import EventMessage, HealthMessage

pytestmark = pytest.mark.timeout(60)


def _ports(k: int) -> list[int]:
    socks = [socket.socket() for _ in range(k)]
    for s in socks:
        s.bind(("127.0.0.1", 0))
    ports = [s.getsockname()[1] for s in socks]
    for s in socks:
        s.close()
    return ports


def test_a_fake_service_answers_and_publishes_what_the_codec_accepts():
    out_port, ctl_port, intake_port = _ports(3)
    output, control = f"tcp://127.0.0.1:{out_port}", f"tcp://127.0.0.1:{ctl_port}"
    fake = FakeService("f1", output, control).start()
    try:
        with Link(Endpoints(f"tcp://127.0.0.1:{intake_port}", output, control), timeout_s=2.0,
                  topics=(wire.TOPIC_HEALTH, wire.TOPIC_EVENT)) as link:
            status = link.request("status")  # decoded by the codec: every field, the id checked
            assert frozenset(status) == wire.REPLY_RESULTS["status"]
            assert status["instance"] == fake.arm.instance and status["health_hz"] == fake.health_hz
            assert link.restart.instance == fake.arm.instance
            arm = link.request("arm")
            assert arm["n"] == 4 and [j["name"] for j in arm["joints"]] == ["turn", "lift", "bend", "nod"]
            kinds: dict[type, object] = {}
            end = time.monotonic() + 20.0
            while len(kinds) < 2 and time.monotonic() < end:  # health at once, events within 0.2 s
                msg = link.receive(timeout_s=1.0)
                kinds.setdefault(type(msg), msg)
            health, event = kinds[HealthMessage], kinds[EventMessage]
            assert health.time_to_limit_s.shape == (4,)
            assert event.instance == fake.arm.instance
    finally:
        fake.stop()
    assert fake.published_health > 0 and not fake._thread.is_alive()
