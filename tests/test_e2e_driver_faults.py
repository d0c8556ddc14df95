"""Faults of the driver and of the twist source, injected end to end, each test with the bound it proves.

* The driver process killed (SIGKILL) mid-motion: the joint state goes stale and the service commands
  rest within joints_timeout + the deceleration time + one period (docs/protocol.md 6 and 10,
  `stopping`).
* A driver whose stamps are an hour behind, zero, an hour ahead, jumping between them: accepted as if
  stamped now; fresh by arrival, stale by arrival (docs/protocol.md 6).
* A driver that repeats the same state: fine at rest; while motion is commanded the joint state is stale
  once the position stayed the same for joints_timeout (docs/protocol.md 7.2), and the arm is commanded
  to rest within joints_timeout + the time between two joint states + the deceleration time + one period.
* The twist source's clock jumping: twists are answered whatever their stamps, and a silent source is
  stopped twist_timeout after the last arrival (docs/protocol.md 6).

Stopping bounds: kinematics of constant deceleration (common practice): from rates qd0 the most
constrained joint needs max_i |qd0_i| / a_max_i at a_max_i; the service ramps by the time that really
passed (service/motion.py), so late ticks do not add to it.
"""

from __future__ import annotations

import contextlib
import itertools
import os
import signal
import threading
import time

import numpy as np
import pytest
import zmq
from service_harness import (
    DRIVER_CONFIG_TEXT,
    collect_commands,
    reap,
    serve_process,
    stream_until,
    twistrate,
    wait_for,
)

from twistrate.clients.link import Link
from twistrate.service import wire
from twistrate.service.joint_source import FROZEN_MOTION_M, FROZEN_MOTION_RAD, JointSourceGuard

pytestmark = pytest.mark.timeout(120)

#: Scheduling allowance, s: the wake-up delay of the tick that finds the input stale (or the state
#: frozen) and of the one that commands rest on a shared 2-core machine under load (measured up to
#: several ms each here). 25 ms, as in tests/test_e2e_watchdog.py and tests/test_e2e_load.py.
ALLOWANCE_S = 0.025
#: Wall stamps and the monotonic clock the ramp uses are read microseconds apart, s.
CLOCK_SLACK_S = 1e-4
#: The test driver sends a joint state every this many s (plus its own scheduling).
DRIVER_PERIOD_S = 0.002
HOUR_NS = 3600 * 10**9
#: The joint-state timeout of these tests, s: 100 ms, so that a driver process of normal priority beside
#: the suite's load still keeps the joint state fresh while it runs (50 ms, the default, is for drivers
#: with a real-time loop).
JOINTS_TIMEOUT_S = 0.100
#: Every streaming loop gives up after this long, s (a loaded machine starts processes slowly).
LIMIT_S = 30.0
FAST = ([0.25, 0.0, -0.1], [0.0, 0.3, 0.2])
CONFIG = DRIVER_CONFIG_TEXT + "[watchdog]\njoints_timeout_ms = 100.0\n"


def _ramp(cs):
    """The commands of the stop: the last one answering a twist .. the first all-zero one after it."""
    first = max(i for i, c in enumerate(cs) if c.answers >= 0)
    last = next(i for i in range(first + 1, len(cs)) if not cs[i].rate.any())
    return cs[first:last + 1]


def _check_ramp(ramp, a_max):
    for a, b in itertools.pairwise(ramp):  # each step within a_max times the time between the commands
        dt = (b.stamp_ns - a.stamp_ns) / 1e9
        assert np.all(np.abs(b.rate - a.rate) <= a_max * (dt + CLOCK_SLACK_S)), (dt, a.rate, b.rate)
    return float(np.max(np.abs(ramp[0].rate) / a_max))


def _act_while_moving(link, act, after=False):
    """Stream FAST until the newest command (everything queued read) runs and moves the arm, then act() at
    once. Returns (the wall time just before act(), or just after it with `after`; [that command])."""
    end = time.monotonic() + LIMIT_S
    while time.monotonic() < end:
        link.send_twist(*FAST)
        newest = None
        with contextlib.suppress(TimeoutError):
            while True:
                newest = link.receive_command(timeout_s=0.0 if newest is not None else 0.01)
        if newest is not None and newest.mode == "running" and np.abs(newest.rate).max() > 0.05:
            t = time.time_ns()
            act()
            return (time.time_ns() if after else t), [newest]
    raise AssertionError(f"the arm never moved within {LIMIT_S} s")


def _xpub(ctx, intake, topic):
    """A PUB-like socket to the intake that returns once the service subscribed to `topic`."""
    sock = ctx.socket(zmq.XPUB)
    sock.setsockopt(zmq.LINGER, 0)
    sock.connect(intake)
    end = time.monotonic() + 10.0
    while time.monotonic() < end:
        if sock.poll(100) and sock.recv() == b"\x01" + topic:
            return sock
    raise AssertionError(f"the service never subscribed to {topic!r}")


class WireDriver:
    """A minimal robot driver over the wire (thread): integrates the newest command's rates and sends the
    joint state every DRIVER_PERIOD_S, stamped by stamp(seq). frozen: keep sending the same position."""

    def __init__(self, ep, q0, stamp=lambda seq: time.time_ns()):
        ctx = zmq.Context.instance()
        self.pub = _xpub(ctx, ep.intake, wire.TOPIC_JOINTS)
        self.sub = ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_COMMAND)
        self.sub.connect(ep.output)
        self.q, self.rate, self.stamp = np.array(q0, dtype=float), np.zeros(len(q0)), stamp
        self.frozen = self.stopped = False
        self.sent = 0
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        last = time.monotonic()
        while not self.stopped:
            while self.sub.poll(0):
                msg = wire.decode_output(self.sub.recv_multipart(), len(self.q))
                if type(msg) is wire.CommandMessage:
                    self.rate = msg.rate
            now = time.monotonic()
            if not self.frozen:
                self.q = self.q + self.rate * (now - last)
            last = now
            self.pub.send_multipart([wire.TOPIC_JOINTS, wire.encode_joints(
                seq=self.sent, position=self.q, stamp_ns=int(self.stamp(self.sent)), source="test-driver")])
            self.sent += 1
            time.sleep(DRIVER_PERIOD_S)

    def close(self):
        self.stopped = True
        self.thread.join(5.0)
        self.pub.close(0)
        self.sub.close(0)


# -- the frozen-state check, by hand (no clock) ---------------------------------------------------------

def test_a_repeated_position_is_frozen_only_while_motion_is_commanded_for_the_whole_timeout():
    # states every 10 ms, timeout 50 ms, joint j1 commanded at 0.1 rad/s: the commanded motion since the
    # last change is 0.1 * 0.01 * k rad after k repeats (> 1 mrad from k = 2), and the position has been
    # the same for 10 k ms (> 50 ms from k = 6): the sixth repeat is the first frozen one
    g = JointSourceGuard(("j1", "j2", "rail"), np.ones(3), np.array([True, True, False]), 50_000_000)
    q = np.array([0.1, 0.2, 0.3])
    qd = np.array([0.1, 0.0, 0.0])
    assert g.frozen(q, 0, qd) is None
    for k in range(1, 6):
        assert g.frozen(q.copy(), k * 10_000_000, qd) is None, k
    reason = g.frozen(q.copy(), 60_000_000, qd)
    assert reason is not None and "frozen" in reason and "j1" in reason and "60 ms" in reason
    assert g.changed_ns == 0  # the joint state is fresh only from the last change
    # once the arm is commanded to rest, the same position is live again: the check starts afresh
    assert g.frozen(q.copy(), 70_000_000, np.zeros(3)) is None and g.changed_ns == 70_000_000
    assert g.frozen(q.copy(), 80_000_000, qd) is None
    # at rest a live driver repeats itself: never frozen, however long
    g = JointSourceGuard(("j1", "j2", "rail"), np.ones(3), np.array([True, True, False]), 50_000_000)
    for k in range(100):
        assert g.frozen(q.copy(), k * 10_000_000, np.zeros(3)) is None
    # a driver sending faster than its encoder updates (a change every 40 ms, < the timeout): never frozen
    g = JointSourceGuard(("j1", "j2", "rail"), np.ones(3), np.array([True, True, False]), 50_000_000)
    for k in range(100):
        held = q + np.array([1e-3 * (k // 4), 0.0, 0.0])
        assert g.frozen(held, k * 10_000_000, qd) is None, k
    # the thresholds: 1 mrad revolute, 0.1 mm prismatic; motion below them never counts
    assert FROZEN_MOTION_RAD == 1e-3 and FROZEN_MOTION_M == 1e-4
    g = JointSourceGuard(("j1", "j2", "rail"), np.ones(3), np.array([True, True, False]), 50_000_000)
    slow = np.array([0.0, 0.0, 0.9e-4 / 0.2])  # the rail: 0.9e-4 m in 0.2 s, below 0.1 mm
    assert all(g.frozen(q.copy(), k * 10_000_000, slow) is None for k in range(21))  # 0.9e-4 m by 200 ms
    reason = g.frozen(q.copy(), 230_000_000, slow)  # 1.035e-4 m by 230 ms
    assert reason is not None and "rail" in reason


# -- end to end -------------------------------------------------------------------------------------------

def test_sigkill_of_the_driver_mid_motion_stops_the_arm_within_the_joint_state_bound(tmp_path):
    """Bound: rest commanded within joints_timeout (100 ms) + max_i |qd0_i| / a_max_i + one period
    (2 ms) + ALLOWANCE_S of the SIGKILL."""
    path = tmp_path / "service.toml"
    path.write_text(CONFIG)
    ep_file = tmp_path / "endpoints.json"
    proc, ep = serve_process(path, ep_file)
    sim = twistrate("sim", "--config", str(path), "--endpoints-file", str(ep_file))
    try:
        with Link(ep, timeout_s=5.0) as link:
            link.wait_ready(timeout_s=10.0, topics=(b"twist", b"joints"))
            arm = link.arm()
            a_max = np.array([j["acceleration_max"] for j in arm["joints"]])
            wait_for(lambda: link.counters()["accepted_joints"] > 0, limit_s=30.0)  # the driver is heard
            link.claim("test", lease_ms=60_000)
            link.enable()
            stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 50, limit_s=LIMIT_S)
            t_kill, before = _act_while_moving(link, lambda: os.kill(sim.pid, signal.SIGKILL))
            # the twist source goes on: only the joint state is stale
            cs = before + stream_until(link, *FAST, lambda cs: any(c.answers == -1 for c in cs) and
                                       not cs[-1].rate.any() and cs[-1].answers == -1)
            status = link.status()
        ramp = _ramp(cs)
        stop_s = _check_ramp(ramp, a_max)
        elapsed = (ramp[-1].stamp_ns - t_kill) / 1e9
        bound = JOINTS_TIMEOUT_S + stop_s + 1.0 / 500 + ALLOWANCE_S
        print(f"rest commanded {elapsed * 1e3:.1f} ms after the driver's SIGKILL, bound {bound * 1e3:.1f} ms")
        assert elapsed <= bound
        assert ramp[1].mode == "stopping" and status["mode"] in ("stopping", "holding")
        assert status["fault"] is None
    finally:
        reap(sim, proc)


class _Served:
    """A `twistrate serve` process for one test: endpoints, the arm's limits (from the `arm` op), links."""

    def __init__(self, ep):
        self.endpoints, self.links = ep, []
        first = self.link()
        joints = first.arm()["joints"]
        self.a_max = np.array([j["acceleration_max"] for j in joints])
        self.q_home = np.array(first.arm()["home"])
        self.period_s = 1.0 / float(first.status()["tick_hz"])

    def link(self):
        link = Link(self.endpoints, timeout_s=5.0)
        self.links.append(link)
        link.wait_ready(timeout_s=10.0, topics=(b"twist", b"joints"))
        link.arm()
        return link


@contextlib.contextmanager
def _service_process(tmp_path, simulated=False):
    """The service in its own process (so the test's threads never hold its interpreter lock), at 500 Hz;
    driver mode with the joint-state timeout of JOINTS_TIMEOUT_S, or simulated."""
    path = tmp_path / "service.toml"
    path.write_text(CONFIG.replace("enabled = false", "enabled = true") if simulated else CONFIG)
    proc, ep = serve_process(path, tmp_path / "endpoints.json")
    served = None
    try:
        served = _Served(ep)
        yield served
    finally:
        for link in served.links if served is not None else ():
            link.close()
        reap(proc)


def test_a_driver_clock_behind_ahead_or_jumping_changes_nothing(tmp_path):
    """Stamps cycling through an hour behind, 0, an hour ahead and now: the service runs on them (fresh by
    arrival: stamps behind would otherwise be stale at once) and stops when they stop, within joints_timeout
    + the deceleration time + one period + ALLOWANCE_S of the driver's last state (stamps ahead would
    otherwise keep it fresh for an hour)."""
    def wrong(seq):
        return (time.time_ns() - HOUR_NS, 0, time.time_ns() + HOUR_NS, time.time_ns())[seq % 4]

    with _service_process(tmp_path) as run:
        driver = WireDriver(run.endpoints, run.q_home, stamp=wrong)
        try:
            link = run.link()
            wait_for(lambda: link.counters()["accepted_joints"] > 20)
            link.claim("test", lease_ms=60_000)
            link.enable()
            cs = stream_until(link, *FAST, lambda cs: sum(c.mode == "running" and c.answers >= 0 for c in cs)
                              > 50, limit_s=LIMIT_S)
            assert len({tuple(c.target) for c in cs[-20:]}) > 1  # the driver's positions move
            t_silent, before = _act_while_moving(link, driver.close, after=True)  # its last state went
        finally:
            driver.close()
        cs = before + stream_until(link, *FAST, lambda cs: any(c.answers == -1 for c in cs) and
                                   not cs[-1].rate.any() and cs[-1].answers == -1)
        ramp = _ramp(cs)
        stop_s = _check_ramp(ramp, run.a_max)
        elapsed = (ramp[-1].stamp_ns - t_silent) / 1e9
        bound = JOINTS_TIMEOUT_S + stop_s + run.period_s + ALLOWANCE_S
        print(f"rest commanded {elapsed * 1e3:.1f} ms after the driver with a wrong clock fell silent, "
              f"bound {bound * 1e3:.1f} ms")
        assert elapsed <= bound
        c = link.counters()
        assert c["rejected_total"] == 0 and c["faults"] == 0 and c["accepted_joints"] > 50


def test_a_driver_repeating_one_state_is_fine_at_rest_and_stale_when_frozen_in_motion(tmp_path):
    """At rest (disabled, then enabled without twists) the same position for six joint timeouts is live
    joint state. Frozen while moving: stale, rest commanded within joints_timeout + one driver period +
    the deceleration time + one tick period + ALLOWANCE_S of the freeze (docs/protocol.md 7.2), no fault;
    once the driver is live again the twists move the arm again."""
    with _service_process(tmp_path) as run:
        period = run.period_s
        driver = WireDriver(run.endpoints, run.q_home)
        try:
            link = run.link()
            wait_for(lambda: link.counters()["accepted_joints"] > 20)
            link.claim("test", lease_ms=60_000)
            time.sleep(0.3)  # the position never changes: commands are all zero
            assert link.status()["mode"] == "disabled"
            link.enable()
            time.sleep(0.3)
            c = link.counters()
            assert link.status()["mode"] in ("holding", "stopping") and c["faults"] == c["joints_frozen"] == 0
            # commands queued since the link connected carry ticks far below the status's: read them
            # before streaming (the link would take them for a restarted service, clients/linkbase.py)
            link.drain()
            stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 50, limit_s=LIMIT_S)
            t_freeze, before = _act_while_moving(link, lambda: setattr(driver, "frozen", True))
            # the twists go on: only the joint state stops moving
            cs = before + stream_until(link, *FAST, lambda cs: any(c.answers == -1 for c in cs) and
                                       not cs[-1].rate.any() and cs[-1].answers == -1)
            ramp = _ramp(cs)
            stop_s = _check_ramp(ramp, run.a_max)
            elapsed = (ramp[-1].stamp_ns - t_freeze) / 1e9
            bound = JOINTS_TIMEOUT_S + DRIVER_PERIOD_S + stop_s + period + ALLOWANCE_S
            print(f"frozen driver: rest commanded {elapsed * 1e3:.1f} ms after the freeze, bound "
                  f"{bound * 1e3:.1f} ms")
            assert elapsed <= bound
            assert ramp[1].mode == "stopping"
            c = link.counters()
            assert c["joints_frozen"] >= 1 and c["faults"] == 0 and link.status()["fault"] is None
            # a live driver again: the twists move the arm again
            driver.frozen = False
            link.drain()
            stream_until(link, *FAST, lambda cs: sum(c.mode == "running" and c.answers >= 0 for c in cs) > 50
                         and np.abs(cs[-1].rate).max() > 0.05, limit_s=LIMIT_S)
        finally:
            driver.close()


def test_a_twist_source_clock_jumping_changes_nothing(tmp_path):
    """Twists stamped an hour behind, 0, an hour ahead and now in turn are answered (fresh by arrival), and
    the source falling silent stops the arm within twist_timeout (100 ms) + the deceleration time + one
    period + ALLOWANCE_S of the command that answered its last twist (docs/protocol.md 6)."""
    with _service_process(tmp_path, simulated=True) as run:
        link = run.link()
        link.claim("test", lease_ms=60_000)
        link.enable()
        pub = _xpub(zmq.Context.instance(), run.endpoints.intake, wire.TOPIC_TWIST)
        stamps = itertools.cycle((-HOUR_NS, None, HOUR_NS, 0))
        seq = itertools.count(1)
        sent = []

        def send():
            offset = next(stamps)
            stamp = 0 if offset is None else time.time_ns() + offset
            sent.append(next(seq))
            pub.send_multipart([wire.TOPIC_TWIST, wire.encode_twist(
                seq=sent[-1], lease=link.lease, linear=FAST[0], angular=FAST[1], stamp_ns=stamp)])

        try:
            commands = []
            end = time.monotonic() + 10.0
            while time.monotonic() < end and sum(c.answers >= 0 for c in commands) < 100:
                send()
                commands += collect_commands(link, lambda cs: len(cs) >= 5)
            answered = {c.answers for c in commands if c.answers >= 0}
            assert len(answered) > 20 and answered <= set(sent)  # twists of every stamp were answered
            assert {s % 4 for s in answered} == {0, 1, 2, 3}
            last = sent[-1]
            cs = collect_commands(link, lambda cs: any(c.answers == last for c in cs) and
                                  any(c.answers == -1 for c in cs) and not cs[-1].rate.any())
        finally:
            pub.close(0)
        everything = commands + cs
        everything = everything[next(i for i, c in enumerate(everything) if c.answers >= 0):]
        t_answered = next(c.stamp_ns for c in everything if c.answers == last)
        ramp = _ramp(everything)
        stop_s = _check_ramp(ramp, run.a_max)
        elapsed = (ramp[-1].stamp_ns - t_answered) / 1e9
        bound = 0.100 + stop_s + run.period_s + ALLOWANCE_S
        print(f"rest commanded {elapsed * 1e3:.1f} ms after the last twist (clock jumping) was answered, "
              f"bound {bound * 1e3:.1f} ms")
        assert elapsed <= bound
        c = link.counters()
        assert c["rejected_total"] == 0 and c["faults"] == 0
