"""The tick pipeline driven whole (prepare, command, finish) on a scripted clock, with no thread, no socket
and no monkeypatching: the published commands answer the newest twist with the solver's rates, the
speculative solve is used when nothing changed, a silent source brings the arm to rest within the
acceleration limits, and a control operation submitted between ticks runs at the next tick boundary."""

from __future__ import annotations

import itertools
import math

import msgpack
import numpy as np
from service_harness import make_config

from twistrate.service import wire
from twistrate.service.operations import carry_out
from twistrate.service.pipeline import Pipeline
from twistrate.service.tick import Ticker
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.resolve import DesiredTwist, resolve_from_kinematics


class Rig:
    """A pipeline on a scripted clock: one tick per period, prepare 0.5 ms before each deadline."""

    def __init__(self, **sections) -> None:
        self.t = 10**9
        config = make_config(simulation={"lag_s": 0.0}, **sections)
        self.pipe = Pipeline(config, config.load_arm(), Ticker(round(1e9 / config.tick.rate_hz)),
                             clock=lambda: self.t, wall_clock=lambda: self.t)
        self.inbox: list[list[bytes]] = []
        self.out: list[tuple[bytes, bytes]] = []
        self.pipe.bind(lambda: self.inbox.pop(0) if self.inbox else None,
                       lambda topic, data: self.out.append((topic, data)))
        self.pipe.start(self.t)
        self.seq = itertools.count(1)
        self.deadline = self.t
        #: the clock at each tick's command()
        self.command_ns: list[int] = []

    def tick(self, twist: tuple[list[float], list[float]] | None = None, token: str | None = None,
             late_ns: int = 0) -> None:
        """One tick; late_ns: the tick thread wakes that long after its deadline (a stalled CPU)."""
        p = self.pipe
        deadline = self.deadline + p.period_ns
        while deadline - 500_000 < self.t:  # the next slot on the grid still ahead (service/tick.py)
            deadline += p.period_ns
        self.deadline = deadline
        self.t = deadline - 500_000 + late_ns
        if twist is not None:
            self.inbox.append([wire.TOPIC_TWIST, wire.encode_twist(seq=next(self.seq), lease=token,
                                                                  linear=twist[0], angular=twist[1],
                                                                  stamp_ns=self.t)])
        p.prepare(deadline)
        self.t = deadline + late_ns
        p.command(deadline)
        self.command_ns.append(self.t)
        p.finish()
        self.t = deadline + late_ns + 100_000

    def commands(self) -> list[wire.CommandMessage]:
        return [wire.decode_command(data, self.pipe.n) for topic, data in self.out
                if topic == wire.TOPIC_COMMAND]


def _enable(rig: Rig) -> str:
    token = carry_out(rig.pipe, "claim", {"client": "test", "lease_ms": 60_000}, rig.t)["lease"]
    carry_out(rig.pipe, "enable", {"lease": token}, rig.t)
    return token


def test_commands_answer_the_newest_twist_with_the_solvers_rates_and_reuse_the_speculation():
    rig = Rig()
    token = _enable(rig)
    twist = ([0.02, -0.01, 0.01], [0.0, 0.05, 0.0])
    for _ in range(30):
        q_before = rig.pipe.intake.q
        qd_before = rig.pipe.qd
        rig.tick(twist, token)
    cmd = rig.commands()[-1]
    assert cmd.mode == "running" and cmd.answers == 30
    # the same tick computed independently from the inputs it had (q, previous rates, the twist)
    p = rig.pipe
    frames = forward(p.arm, q_before)
    res, _ = resolve_from_kinematics(p.arm, q_before, qd_before, DesiredTwist(np.array(twist[0]),
                                     np.array(twist[1])), p.period_s, p.options, frames,
                                     geometric_jacobian(p.arm, frames))
    np.testing.assert_allclose(cmd.rate, res.qd, rtol=0, atol=1e-12)
    np.testing.assert_allclose(cmd.target, q_before + res.qd * p.period_s, atol=1e-12)
    # nothing arrived between prepare and the deadline: every running tick sent the speculative bytes
    running = sum(c.mode == "running" for c in rig.commands())
    assert p.telemetry.counts["speculation_used"] == running > 20


def test_a_silent_source_brings_the_arm_to_rest_within_the_acceleration_limits():
    rig = Rig()
    token = _enable(rig)
    for _ in range(100):
        rig.tick(([0.1, 0.0, 0.0], [0.0, 0.0, 0.3]), token)
    p = rig.pipe
    moving = rig.commands()[-1]
    assert moving.mode == "running" and np.abs(moving.rate).max() > 0.05
    timeout_ticks = math.ceil(p.twist_timeout_ns / p.period_ns)
    for _ in range(timeout_ticks + 200):
        rig.tick()
    cs = rig.commands()[99:]
    modes = [c.mode for c in cs]
    assert "stopping" in modes and modes[-1] == "holding" and not cs[-1].rate.any()
    first_stop = modes.index("stopping")
    assert first_stop <= timeout_ticks + 1  # the twist went stale on the clock
    for a, b in itertools.pairwise(cs[first_stop - 1:]):  # every step within a_max * T
        assert np.all(np.abs(b.rate - a.rate) <= p.arm.a_max * p.period_s * (1 + 1e-9))
    # at rest after the deceleration the limits allow (common factor ramp: the slowest joint decides)
    ramp_ticks = math.ceil(float(np.max(np.abs(cs[first_stop - 1].rate) / p.arm.a_max)) / p.period_s)
    at_rest = next(i for i, c in enumerate(cs) if i > first_stop and not c.rate.any())
    assert at_rest - first_stop <= ramp_ticks + 1


def test_late_ticks_ramp_by_the_time_that_passed_and_rest_comes_on_time():
    """Ticks arriving 0 to 14 periods late during the stop: each rate is where the acceleration limit puts
    it at that time since the last command (|change| <= a_max * elapsed), never above the straight line
    from the stop's start to rest, and the arm is at rest by the timeout + the deceleration time + one
    (late) tick gap after the last twist, not one period per tick later (constant deceleration from qd0
    takes max_i |qd0_i| / a_max_i: kinematics, common practice)."""
    rig = Rig()
    token = _enable(rig)
    for _ in range(100):
        rig.tick(([0.1, 0.0, 0.0], [0.0, 0.0, 0.3]), token)
    p = rig.pipe
    last_twist_ns = rig.command_ns[-1]
    rng = np.random.default_rng(11)
    n_before = len(rig.commands())
    lates = []
    for _ in range(400):
        late = int(rng.choice([0, 0, 1, 3, 14]) * p.period_ns + rng.integers(0, p.period_ns // 2))
        lates.append(late)
        rig.tick(late_ns=late)
        if rig.commands()[-1].mode == "holding":
            break
    cs = rig.commands()[n_before - 1:]
    times = rig.command_ns[n_before - 1:]
    modes = [c.mode for c in cs]
    assert modes[-1] == "holding" and not cs[-1].rate.any() and "stopping" in modes
    assert max(lates) > 10 * p.period_ns  # ticks really were late
    first_stop = modes.index("stopping")
    qd0, t0 = cs[first_stop - 1].rate, times[first_stop - 1]  # the last answering rates, when sent
    stop_s = float(np.max(np.abs(qd0) / p.arm.a_max))
    for (a, ta), (b, tb) in itertools.pairwise(zip(cs[first_stop - 1:], times[first_stop - 1:], strict=True)):
        assert np.all(np.abs(b.rate - a.rate) <= p.arm.a_max * (tb - ta) / 1e9 * (1 + 1e-9))
        assert np.all(np.abs(b.rate) <= np.abs(qd0) * max(0.0, 1 - (tb - t0) / 1e9 / stop_s) + 1e-12)
    at_rest = next(i for i, c in enumerate(cs) if i > first_stop and not c.rate.any())
    # the first tick at or after t0 + stop_s commands rest
    assert times[at_rest - 1] < t0 + stop_s * 1e9 <= times[at_rest] + 1_000
    gap = max(b - a for a, b in itertools.pairwise(times))
    assert times[at_rest] - last_twist_ns <= p.twist_timeout_ns + stop_s * 1e9 + gap
    # fewer ticks than a ramp counted in ticks needs (ceil(stop_s / T)): the late ones removed more
    assert at_rest - first_stop + 1 < math.ceil(stop_s / p.period_s)


def test_control_operations_run_at_the_next_tick_boundary_and_report_its_mode():
    rig = Rig()
    token = _enable(rig)
    rig.tick(([0.01, 0.0, 0.0], [0.0, 0.0, 0.0]), token)
    fut = rig.pipe.submit(lambda now: carry_out(rig.pipe, "disable", {"lease": token}, now))
    assert not fut.done()
    rig.tick()
    assert fut.result(timeout=0) == {"mode": "disabled"}
    events = [msgpack.unpackb(data)["event"] for topic, data in rig.out if topic == wire.TOPIC_EVENT]
    # docs/protocol.md section 10: enabled with a fresh twist at hand, the first tick runs
    assert events == ["lease_claimed", "enabled", "running", "disabled"]


def test_state_goes_out_on_the_tick_after_each_health():
    # docs/protocol.md 7.6: health at the health rate, the state message on the tick after each health,
    # describing the health's tick (same tick, positions and rates as that tick's command); both at 50 Hz
    # of a 500 Hz tick here, one every 10 ticks.
    rig = Rig(tick={"rate_hz": 500.0, "health_hz": 50.0})
    token = _enable(rig)
    for _ in range(60):
        rig.tick(([0.02, 0.0, 0.01], [0.0, 0.0, 0.05]), token)
    n = rig.pipe.n
    kinds = [t for t, _ in rig.out if t in (wire.TOPIC_HEALTH, wire.TOPIC_STATE)]
    assert kinds == [wire.TOPIC_HEALTH, wire.TOPIC_STATE] * 6  # the state after its health
    health = [wire.decode_health(d, n).tick for t, d in rig.out if t == wire.TOPIC_HEALTH]
    states = [wire.decode_state(d, n) for t, d in rig.out if t == wire.TOPIC_STATE]
    commands = {c.tick: c for c in rig.commands()}
    assert health == list(range(0, 60, 10)) and [s.tick for s in states] == health
    sent_after = []  # the tick of the last command sent before each state message
    last_command = None
    for topic, data in rig.out:
        if topic == wire.TOPIC_COMMAND:
            last_command = wire.decode_command(data, n).tick
        elif topic == wire.TOPIC_STATE:
            sent_after.append(last_command)
    assert sent_after == [k + 1 for k in health], "sent on the next tick, after that tick's command"
    for s in states:  # the health tick's positions and the rates commanded at it (its command's)
        cmd = commands[s.tick]
        np.testing.assert_allclose(s.rate, cmd.rate, rtol=0, atol=1e-12)
        np.testing.assert_allclose(s.position + s.rate * rig.pipe.period_s, cmd.target, rtol=0, atol=1e-12)
    every_tick = Rig(tick={"rate_hz": 50.0, "health_hz": 50.0})
    for _ in range(3):
        every_tick.tick()
    topics = [t for t, _ in every_tick.out if t != wire.TOPIC_COMMAND]
    assert topics == [wire.TOPIC_HEALTH, wire.TOPIC_STATE] * 3
