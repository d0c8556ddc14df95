"""The client library against a scripted peer on loopback sockets (no service): what it sends is the
documented protocol, what it receives is checked, and nothing waits past its timeout.

The peer below binds the three sockets of docs/protocol.md section 1 and answers requests as that
document's section 8 describes; it is a test double, not the service (end-to-end tests live with
the service).
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest
import zmq

from twistrate.clients.link import CurveKeys, Endpoints, Link, LinkTimeoutError, plain
from twistrate.service import security, wire
from twistrate.solver.errors import ControlError, InputError, WireError

N = 7


class Peer:
    """Loopback stand-in for the service's sockets: records intake, answers control from a script."""

    def __init__(self, curve: tuple[tuple[bytes, bytes], frozenset[bytes]] | None = None) -> None:
        self.ctx = zmq.Context()
        self.auth = security.start_authenticator(self.ctx, curve[1]) if curve else None
        self.control = self.ctx.socket(zmq.ROUTER)
        self.intake = self.ctx.socket(zmq.SUB)
        self.output = self.ctx.socket(zmq.PUB)
        for sock in (self.control, self.intake, self.output):
            sock.setsockopt(zmq.LINGER, 0)
            if curve:
                security.apply_curve_server(sock, *curve[0])
        self.intake.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_TWIST)
        self.intake.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_JOINTS)
        ports = [s.bind_to_random_port("tcp://127.0.0.1") for s in (self.intake, self.output, self.control)]
        self.endpoints = Endpoints(*(f"tcp://127.0.0.1:{p}" for p in ports))
        self.requests: list[wire.RequestMessage] = []
        self.received: list[wire.TwistMessage | wire.JointsMessage] = []
        self.hold_first: set[str] = set()   # ops whose first request is answered only with the next one
        self.refuse: dict[str, tuple[str, str]] = {}
        self._held: list[list[bytes]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()

    def _result(self, req: wire.RequestMessage) -> dict:
        op = req.op
        if op == "claim":
            return {"lease": "feedc0de", "lease_ms": req.args.get("lease_ms", 1000),
                    "client": req.args["client"]}
        if op == "renew":
            return {"lease_ms": 1000}
        if op in ("enable", "clear_fault"):
            return {"mode": "running" if op == "enable" else "disabled"}
        if op == "disable":
            return {"mode": "stopping"}
        if op == "arm":
            return {"name": "reach7", "n": N, "home": [0.0] * N,
                    "joints": [{"name": f"j{i}", "kind": "revolute", "position_min": -1.0,
                                "position_max": 1.0, "velocity_max": 1.0, "acceleration_max": 5.0}
                               for i in range(N)]}
        if op == "counters":
            return {"counters": {"ticks": 12, "not_leased": 1}}
        if op == "set":
            return {"params": dict(req.args["params"])}
        if op == "status":
            return {"mode": "disabled", "health": "clear", "tick": 1, "tick_hz": 500.0, "health_hz": 50.0,
                    "arm": "reach7",
                    "n": N, "holder": None, "lease_remaining_ms": None, "fault": None, "simulated": True,
                    "reduced_speed": False, "position": [0.0] * N, "twist_age_ms": None,
                    "joints_age_ms": None, "realtime": False,
                    "instance": 7, "started_ns": 1_700_000_000_000_000_000,
                    "keepout": None,
                    "limiting": {"by": "none", "joint": None, "bound": None, "link": None, "other": None}}
        return {}

    def _answer(self, frames: list[bytes]) -> None:
        envelope, data = frames[:-1], frames[-1]
        try:
            req = wire.decode_request(data)
        except WireError as exc:
            seq, op = wire.peek_request(data)
            reply = wire.encode_reply(seq=seq, op=op, error=(wire.error_code(exc), str(exc)))
        else:
            self.requests.append(req)
            if req.op in self.hold_first:
                self.hold_first.discard(req.op)
                self._held.append(frames)
                return
            if req.op in self.refuse:
                reply = wire.encode_reply(seq=req.seq, op=req.op, error=self.refuse[req.op])
            else:
                reply = wire.encode_reply(seq=req.seq, op=req.op, result=self._result(req))
        for held in self._held:  # the late reply goes out first, ahead of this one
            late = wire.decode_request(held[-1])
            self.control.send_multipart([*held[:-1], wire.encode_reply(seq=late.seq, op=late.op,
                                                                          result=self._result(late))])
        self._held.clear()
        self.control.send_multipart([*envelope, reply])

    def _loop(self) -> None:
        poller = zmq.Poller()
        poller.register(self.control, zmq.POLLIN)
        poller.register(self.intake, zmq.POLLIN)
        while not self._stop.is_set():
            for sock, _ in poller.poll(20):
                if sock is self.control:
                    self._answer(self.control.recv_multipart())
                else:
                    self.received.append(wire.decode_intake(self.intake.recv_multipart(), N))

    def publish(self, topic: bytes, data: bytes) -> None:  # called from the test thread only
        self.output.send_multipart([topic, data])

    def close(self) -> None:
        self._stop.set()
        self._thread.join(2)
        for sock in (self.control, self.intake, self.output):
            sock.close(linger=0)
        if self.auth:
            self.auth.stop()
        self.ctx.term()


@pytest.fixture
def peer():
    p = Peer()
    yield p
    p.close()


@pytest.fixture
def link(peer):
    with Link(peer.endpoints, timeout_s=1.0, client="test") as lk:
        lk.wait_ready(2.0)
        yield lk


def _wait_for(predicate, timeout_s=2.0):
    deadline = time.monotonic() + timeout_s
    while not predicate():
        assert time.monotonic() < deadline, "condition not met in time"
        time.sleep(0.005)


def test_lease_and_motion_requests(link, peer):
    assert link.claim(lease_ms=2000) == "feedc0de"
    assert (link.lease, link.lease_ms) == ("feedc0de", 2000)
    assert link.enable() == "running"
    assert link.disable() == "stopping"
    assert link.clear_fault() == "disabled"
    assert link.renew() == 1000
    link.release()
    assert link.lease is None
    ops = [(r.op, r.args) for r in peer.requests]
    assert ops == [("claim", {"client": "test", "lease_ms": 2000}), ("enable", {"lease": "feedc0de"}),
                   ("disable", {"lease": "feedc0de"}), ("clear_fault", {"lease": "feedc0de"}),
                   ("renew", {"lease": "feedc0de"}), ("release", {"lease": "feedc0de"})]
    assert [r.seq for r in peer.requests] == list(range(1, 7))


def test_queries_and_set(link, peer):
    assert link.status()["mode"] == "disabled"
    assert link.arm()["n"] == N and link.n == N
    assert link.counters() == {"ticks": 12, "not_leased": 1}
    link.claim()
    assert link.set({"damping_max": 0.05}, reduced_speed=True) == {"damping_max": 0.05, "reduced_speed": True}
    assert peer.requests[-1].args == {"lease": "feedc0de",
                                      "params": {"damping_max": 0.05, "reduced_speed": True}}


def test_numpy_scalars_are_sent_as_plain_msgpack_numbers(link, peer):
    # a value computed with numpy (np.float64, np.int64, np.bool_) is what a caller naturally has; the
    # wire carries msgpack float64 / int / bool (docs/protocol.md section 3) and the codec stays strict
    with pytest.raises(InputError):
        wire.encode_request(seq=1, op="set", lease="t", params={"damping_max": np.float64(0.05)})
    link.claim(lease_ms=np.int64(1500))
    assert peer.requests[-1].args == {"client": "test", "lease_ms": 1500}
    got = link.set(damping_max=np.float64(0.03), reduced_speed=np.bool_(True), damping=np.str_("constant"))
    assert got == {"damping_max": 0.03, "reduced_speed": True, "damping": "constant"}
    params = peer.requests[-1].args["params"]
    assert [type(params[k]) for k in ("damping_max", "reduced_speed", "damping")] == [float, bool, str]
    assert plain({"a": [np.float32(0.5), (np.int8(3),)]}) == {"a": [0.5, [3]]}


def test_refusals_raise_control_error_with_the_code(link, peer):
    with pytest.raises(ControlError) as info:
        link.enable()  # no lease yet: refused locally, nothing sent
    assert info.value.code == "no_lease" and peer.requests == []
    peer.refuse["claim"] = ("lease_held", "claim: lease held by 'pad'")
    with pytest.raises(ControlError) as info:
        link.claim()
    assert info.value.code == "lease_held" and "pad" in str(info.value)
    assert str(info.value) == "claim: lease held by 'pad'"  # the op named once, not "claim: claim: ..."
    peer.refuse["claim"] = ("lease_held", "lease held by 'pad'")
    with pytest.raises(ControlError) as info:
        link.claim()
    assert str(info.value) == "claim: lease held by 'pad'"  # and named when the message does not


def test_timeout_then_late_reply_is_discarded(link, peer):
    peer.hold_first.add("status")
    t0 = time.monotonic()
    with pytest.raises(LinkTimeoutError, match="status"):
        link.request("status", timeout_s=0.2)
    assert 0.15 < time.monotonic() - t0 < 1.0
    # the peer now sends the late status reply and then the counters reply: the link must skip the former
    assert link.counters() == {"ticks": 12, "not_leased": 1}


def test_twists_and_joints_are_documented_messages(link, peer):
    link.claim()
    s1 = link.send_twist([0.01, 0.0, 0.0], [0.0, 0.0, 0.1])
    s2 = link.send_twist(np.array([0.0, 0.02, 0.0]), np.zeros(3), frame="tool", point=[0.0, 0.0, 0.1])
    link.send_joints(np.linspace(-1, 1, N), np.zeros(N))
    _wait_for(lambda: len(peer.received) == 3)
    t1, t2, joints = peer.received
    assert (s1, s2) == (1, 2) and (t1.seq, t2.seq) == (1, 2)
    assert t1.lease == t2.lease == "feedc0de"
    np.testing.assert_array_equal(t1.linear, [0.01, 0.0, 0.0])
    assert t2.frame == "tool"
    np.testing.assert_array_equal(t2.point, [0.0, 0.0, 0.1])
    np.testing.assert_array_equal(joints.position, np.linspace(-1, 1, N))


def test_stream_twists_paces_and_stops(link, peer):
    link.claim()
    seen: list[float] = []

    def twist_at(t: float):
        if len(seen) == 5:
            return None  # the source says stop
        seen.append(t)
        return [0.01 * len(seen), 0.0, 0.0], [0.0, 0.0, 0.0]

    sent = link.stream_twists(twist_at, rate_hz=100.0, seconds=5.0)
    assert sent == 5
    _wait_for(lambda: len(peer.received) == 5)
    assert [m.linear[0] for m in peer.received] == pytest.approx([0.01, 0.02, 0.03, 0.04, 0.05])
    # Paced on absolute deadlines: the fifth twist is due 4 periods after the first, never earlier.
    assert seen[-1] - seen[0] >= 4 * 0.01 - 1e-3


def test_send_twist_renews_the_lease_when_a_third_has_passed(link, peer):
    link.claim(lease_ms=60)
    link.send_twist([0, 0, 0], [0, 0, 0])
    assert [r.op for r in peer.requests] == ["claim"]
    time.sleep(0.03)  # > 60 ms / 3
    link.send_twist([0, 0, 0], [0, 0, 0])  # sends the renewal and returns: the reply is taken up later
    _wait_for(lambda: [r.op for r in peer.requests] == ["claim", "renew"])


def test_send_twist_without_lease_is_refused_locally(link, peer):
    with pytest.raises(ControlError, match="claim"):
        link.send_twist([0, 0, 0], [0, 0, 0])


def test_receive_decodes_and_filters_by_kind(peer):
    with Link(peer.endpoints, timeout_s=0.5, n=N) as lk:
        cmd = wire.encode_command(seq=1, stamp_ns=1, tick=1, rate=np.full(N, 0.1), target=np.zeros(N),
                                   answers=4, scale=1.0, mode="running", health="clear")
        ev = wire.encode_event(seq=0, tick=1, event="running", detail="", mode="running", instance=7)

        def publish_until_received():
            # PUB/SUB start-up: keep publishing until the subscription has reached the peer
            deadline = time.monotonic() + 2.0
            while time.monotonic() < deadline:
                peer.publish(wire.TOPIC_EVENT, ev)
                peer.publish(wire.TOPIC_COMMAND, cmd)
                try:
                    return lk.receive_command(timeout_s=0.02)
                except LinkTimeoutError:
                    continue
            raise AssertionError("nothing received")

        got = publish_until_received()
        assert got.answers == 4 and got.rate[0] == 0.1
        lk.drain()
        peer.publish(wire.TOPIC_EVENT, ev)
        assert lk.receive_event(timeout_s=0.5).event == "running"
        t0 = time.monotonic()
        with pytest.raises(LinkTimeoutError):
            lk.receive_health(timeout_s=0.1)
        assert time.monotonic() - t0 < 0.5
        peer.publish(wire.TOPIC_COMMAND, b"\xc1")
        with pytest.raises(WireError) as info:
            lk.receive(timeout_s=0.5)
        assert info.value.reason == "not_msgpack"


def test_receive_kind_gives_up_although_other_kinds_keep_coming(peer):
    with Link(peer.endpoints, timeout_s=0.5, n=N) as lk:
        ev = wire.encode_event(seq=0, tick=1, event="running", detail="", mode="running", instance=7)
        stop = threading.Event()

        def flood():
            while not stop.is_set():
                peer.publish(wire.TOPIC_EVENT, ev)
                time.sleep(0.001)

        # the flood publishes from a helper thread; the peer's PUB is used by no other thread meanwhile
        thread = threading.Thread(target=flood, daemon=True)
        thread.start()
        try:
            t0 = time.monotonic()
            with pytest.raises(LinkTimeoutError):
                lk.receive_command(timeout_s=0.2)
            assert time.monotonic() - t0 < 1.0
        finally:
            stop.set()
            thread.join(2)


def test_no_service_means_timeouts_not_hangs():
    ctx = zmq.Context()
    ports = []
    for _ in range(3):  # free ports nobody listens on
        s = ctx.socket(zmq.PUB)
        ports.append(s.bind_to_random_port("tcp://127.0.0.1"))
        s.close(linger=0)
    ctx.term()
    with Link(Endpoints(*(f"tcp://127.0.0.1:{p}" for p in ports)), timeout_s=0.2) as lk:
        t0 = time.monotonic()
        with pytest.raises(LinkTimeoutError):
            lk.wait_ready()
        with pytest.raises(LinkTimeoutError):
            lk.status()
        with pytest.raises(LinkTimeoutError):
            lk.receive()
        assert time.monotonic() - t0 < 2.0


def test_curve_link(tmp_path):
    _, server_secret = security.write_keypair(tmp_path, "service")
    _, client_secret = security.write_keypair(tmp_path / "clients", "pad")
    server_public_file = tmp_path / "service.key"
    allowed = security.load_allow_list([tmp_path / "clients"])
    p = Peer(curve=(security.load_secret_keypair(server_secret), allowed))
    try:
        keys = CurveKeys.from_files(server_public_file, client_secret)
        with Link(p.endpoints, keys, timeout_s=1.0) as lk:
            lk.wait_ready(2.0)
            assert lk.claim() == "feedc0de"
        stranger = zmq.curve_keypair()
        with Link(p.endpoints, CurveKeys(keys.server_public, *stranger), timeout_s=0.3) as lk, \
                pytest.raises(LinkTimeoutError):
            lk.status()
    finally:
        p.close()
