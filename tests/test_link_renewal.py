"""The blocking Link's renewal off the streaming path and its notice of a restarted service, against the
scripted peer of test_link.py (no service)."""

from __future__ import annotations

import time

import numpy as np
import pytest
from test_link import N, Peer, _wait_for

from twistrate.clients.link import Link, LinkTimeoutError
from twistrate.service import wire
from twistrate.solver.errors import ControlError


@pytest.fixture
def peer():
    p = Peer()
    yield p
    p.close()


def test_a_renewal_without_reply_does_not_hold_up_twists(peer):
    with Link(peer.endpoints, timeout_s=1.0, client="test") as link:
        link.wait_ready(2.0)
        link.claim(lease_ms=60)
        peer.hold_first.add("renew")  # the peer answers this renewal only with the next request
        time.sleep(0.03)  # > 60 ms / 3: due
        for _ in range(20):
            link.send_twist([0.01, 0, 0], [0, 0, 0])  # each returns at once: nothing waits for the reply
        _wait_for(lambda: len(peer.received) == 20)
        assert [r.op for r in peer.requests] == ["claim", "renew"], "one renewal in flight, not one per twist"
        renewed_before = link._renewed_at
        link.status()  # the held renew reply arrives first and is taken up, not dropped
        assert link._renewing is None and link._renewed_at > renewed_before and link.lease == "feedc0de"


def test_a_refused_renewal_loses_the_lease_and_says_why(peer):
    with Link(peer.endpoints, timeout_s=1.0, client="test") as link:
        link.wait_ready(2.0)
        link.claim(lease_ms=60)
        peer.refuse["renew"] = ("no_lease", "lease: expired")
        time.sleep(0.03)
        link.send_twist([0, 0, 0], [0, 0, 0])  # sends the renewal
        _wait_for(lambda: any(r.op == "renew" for r in peer.requests))
        with pytest.raises(ControlError, match=r"lost \(renew: lease: expired\).*claim again"):
            for _ in range(200):
                link.send_twist([0, 0, 0], [0, 0, 0])
                time.sleep(0.005)


def test_a_restarted_service_is_noticed_from_its_tick_counter(peer):
    restarts = []
    with Link(peer.endpoints, timeout_s=0.5, n=N, on_restart=lambda: restarts.append(1)) as link:
        link.wait_ready(2.0)
        link.claim()

        def command(tick: int) -> bytes:
            return wire.encode_command(seq=tick, stamp_ns=1, tick=tick, rate=np.zeros(N), target=np.zeros(N),
                                       answers=-1, scale=1.0, mode="disabled", health="clear")

        deadline = time.monotonic() + 2.0
        while time.monotonic() < deadline:  # PUB/SUB start-up
            peer.publish(wire.TOPIC_COMMAND, command(5000))
            try:
                link.receive_command(timeout_s=0.02)
                break
            except LinkTimeoutError:
                continue
        link.drain()
        peer.publish(wire.TOPIC_COMMAND, command(5001))
        assert link.receive_command(timeout_s=0.5).tick == 5001 and not restarts and link.lease
        peer.publish(wire.TOPIC_COMMAND, command(2))  # a new instance starts again from tick 0
        assert link.receive_command(timeout_s=0.5).tick == 2
        assert restarts == [1] and link.lease is None and link.restart.restarts == 1
        with pytest.raises(ControlError, match="service restarted"):
            link.send_twist([0, 0, 0], [0, 0, 0])
