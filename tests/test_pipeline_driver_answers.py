"""The tick with a driver in its own process answering each command with a joint state, on a scripted
clock: when that answer keeps arriving between the prepare and the deadline, the prepare stops solving
on the older state (the tick solves once, at the deadline) and every command is still the solver's
rates for the inputs the tick had; a driver that reports less often than the tick (the older state is
still the newest at the deadline) keeps the prepared command being sent. No thread, no socket."""

from __future__ import annotations

import itertools

import numpy as np
from service_harness import make_config

from twistrate.service import wire
from twistrate.service.operations import carry_out
from twistrate.service.pipeline import STALE_PREPARE_PAYS, Pipeline
from twistrate.service.simarm import SimArm
from twistrate.service.tick import Ticker
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.resolve import DesiredTwist, resolve_from_kinematics

TWIST = ([0.02, -0.01, 0.01], [0.0, 0.05, 0.0])
#: the prepare runs this long before each deadline, ns
PREPARE_LEAD_NS = 400_000
#: the "slow" driver reports every this many ticks
SLOW_EVERY = 3


class DriverRig:
    """A pipeline in driver mode (simulation off) and a simulated arm standing in for the driver: after
    command it reports the arm's joint state: "in_window", an answer to each command, delivered after the
    next prepare and before the next deadline; "slow", every SLOW_EVERY ticks, before the prepare."""

    def __init__(self, answer: str) -> None:
        self.t = 10**9
        self.answer = answer
        config = make_config(simulation={"enabled": False}, tick={"rate_hz": 1000})
        arm = config.load_arm()
        self.pipe = Pipeline(config, arm, Ticker(round(1e9 / config.tick.rate_hz)), clock=lambda: self.t,
                             wall_clock=lambda: self.t)
        self.arm = SimArm.from_arm(arm, 0.0, None)
        self.inbox: list[list[bytes]] = []
        self.out: list[tuple[bytes, bytes]] = []
        self.pipe.bind(lambda: self.inbox.pop(0) if self.inbox else None,
                       lambda topic, data: self.out.append((topic, data)))
        self.pipe.start(self.t)
        self.seq = itertools.count(1)
        self.deadline = self.t
        self.ticks = 0
        #: per tick: (q, previous rates, desired) the command was made from
        self.inputs: list[tuple[np.ndarray, np.ndarray, DesiredTwist]] = []
        self._joints()

    def _joints(self) -> None:
        self.inbox.append([wire.TOPIC_JOINTS, wire.encode_joints(seq=next(self.seq), position=self.arm.q,
                                                                  velocity=self.arm.qd, source="rig")])

    def tick(self, token: str) -> None:
        p = self.pipe
        self.deadline += p.period_ns
        self.t = self.deadline - PREPARE_LEAD_NS
        self.inbox.append([wire.TOPIC_TWIST, wire.encode_twist(seq=next(self.seq), lease=token,
                                                              linear=TWIST[0], angular=TWIST[1],
                                                              stamp_ns=self.t)])
        if self.answer == "slow" and self.ticks % SLOW_EVERY == 0:
            self._joints()
        p.prepare(self.deadline)
        if self.answer == "in_window" and self.ticks > 0:
            self._joints()  # the answer to the last command, after the prepare
        self.t = self.deadline + 1_000
        qd_prev = p.qd
        p.command(self.deadline)
        self.inputs.append((p.intake.q, qd_prev, p.intake.desired))
        p.finish()
        self.t = self.deadline + 100_000
        self.arm.command(p.qd)
        self.arm.step(p.period_s)
        self.ticks += 1

    def commands(self) -> list[wire.CommandMessage]:
        return [wire.decode_command(data, self.pipe.n) for topic, data in self.out
                if topic == wire.TOPIC_COMMAND]


def _run(answer: str, ticks: int) -> tuple[DriverRig, str]:
    rig = DriverRig(answer)
    token = carry_out(rig.pipe, "claim", {"client": "test", "lease_ms": 60_000}, rig.t)["lease"]
    carry_out(rig.pipe, "enable", {"lease": token}, rig.t)
    for _ in range(ticks):
        rig.tick(token)
    return rig, token


def _solved_independently(rig: DriverRig, k: int) -> np.ndarray:
    p = rig.pipe
    q, qd_prev, desired = rig.inputs[k]
    frames = forward(p.arm, q)
    res, _ = resolve_from_kinematics(p.arm, q, qd_prev, desired, p.period_s, p.options, frames,
                                     geometric_jacobian(p.arm, frames))
    return res.qd


def test_an_answer_between_prepare_and_deadline_stops_the_prepare_solving_on_the_older_state():
    rig, token = _run("in_window", 60)
    p = rig.pipe
    assert p.stale_still_newest < STALE_PREPARE_PAYS  # learnt: the older state never lasts
    solves = p.telemetry.hist["solve"].count
    for _ in range(20):
        rig.tick(token)
    assert p.telemetry.hist["solve"].count - solves == 20  # one solve a tick, at the deadline
    cs = rig.commands()
    assert all(c.mode == "running" for c in cs[-20:])
    for k in range(len(cs) - 20, len(cs)):  # the solver's rates for the inputs at the deadline
        np.testing.assert_allclose(cs[k].rate, _solved_independently(rig, k), rtol=0, atol=1e-12)


def test_a_driver_slower_than_the_tick_keeps_the_prepared_command():
    rig, _ = _run("slow", 60)
    p = rig.pipe
    assert p.stale_still_newest >= STALE_PREPARE_PAYS  # the older state lasts to the deadline
    cs = rig.commands()
    running = sum(c.mode == "running" for c in cs)
    assert running > 50
    # every running tick sent the bytes its prepare made (nothing arrived in between)
    assert p.telemetry.counts["speculation_used"] >= running - 1
    for k in range(len(cs) - 20, len(cs)):
        np.testing.assert_allclose(cs[k].rate, _solved_independently(rig, k), rtol=0, atol=1e-12)
