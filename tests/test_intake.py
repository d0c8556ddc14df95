"""The intake's drain on a scripted clock: only the newest twist and joint state are decoded, the older
ones taken with them are counted as superseded, a refused newest one falls back to the next older one,
and a flood costs the drain its time budget, not more; every frame taken is counted exactly once."""

from __future__ import annotations

import logging

import msgpack
import numpy as np

from twistrate.service import wire
from twistrate.service.intake import DRAIN_BUDGET_NS, Intake
from twistrate.service.state import ServiceState
from twistrate.service.telemetry import RateLimitedLog, Telemetry
from twistrate.service.tick import Ticker

N = 6


class Clock:
    """Monotonic ns that advance `step` at every reading (the cost of the work between readings)."""

    def __init__(self, step: int = 0) -> None:
        self.t, self.step = 10**9, step

    def __call__(self) -> int:
        self.t += self.step
        return self.t


def _intake(clock: Clock, simulated: bool = False) -> tuple[Intake, str, list[str]]:
    state = ServiceState(1000.0, 50.0, 60_000.0)
    token = state.claim("test", 60_000.0, clock.t).token
    faults: list[str] = []
    intake = Intake(N, simulated, state, Telemetry(Ticker(2_000_000)),
                    RateLimitedLog(logging.getLogger("test"), 10.0), clock, faults.append)
    return intake, token, faults


def _twist(seq: int, lease: str) -> list[bytes]:
    return [wire.TOPIC_TWIST, wire.encode_twist(seq=seq, lease=lease, linear=[0.001 * (seq % 100), 0, 0],
                                                angular=[0, 0, 0])]


def _joints(seq: int, value: float) -> list[bytes]:
    return [wire.TOPIC_JOINTS, wire.encode_joints(seq=seq, position=np.full(N, value))]


def _poll(inbox: list[list[bytes]]):
    return lambda: inbox.pop(0) if inbox else None


def _taken_counted(intake: Intake) -> int:
    c = intake.telemetry.counters()
    return c["accepted_twist"] + c["accepted_joints"] + c["rejected_total"] + c["superseded"]


def test_only_the_newest_is_decoded_and_the_older_ones_are_superseded():
    clock = Clock()
    intake, token, _ = _intake(clock)
    inbox = [_twist(s, token) for s in range(1, 6)] + [_joints(s, 0.1 * s) for s in range(1, 4)]
    intake.drain(_poll(inbox), clock())
    c = intake.telemetry.counters()
    assert intake.twist.seq == 5 and c["accepted_twist"] == 1
    np.testing.assert_array_equal(intake.q, np.full(N, 0.1 * 3))
    assert c["accepted_joints"] == 1 and c["superseded"] == 4 + 2 and c["rejected_total"] == 0
    assert not inbox and _taken_counted(intake) == 8


def test_a_refused_newest_twist_falls_back_to_the_older_valid_one():
    clock = Clock()
    intake, token, _ = _intake(clock)
    inbox = [_twist(1, token), _twist(2, token), _twist(3, "0" * 16), [wire.TOPIC_TWIST, b"\xc1"]]
    intake.drain(_poll(inbox), clock())
    c = intake.telemetry.counters()
    assert intake.twist.seq == 2
    assert c["rejected_not_leased"] == 1 and c["rejected_not_msgpack"] == 1 and c["superseded"] == 1
    assert _taken_counted(intake) == 4


def test_a_non_finite_newest_joint_state_still_faults_in_driver_mode():
    clock = Clock()
    intake, _, faults = _intake(clock)
    inbox = [_joints(1, 0.1), _joints(2, 0.2), _joints_nan()]
    intake.drain(_poll(inbox), clock())
    c = intake.telemetry.counters()
    assert c["rejected_non_finite"] == 1 and faults and "joint state refused" in faults[0]
    np.testing.assert_array_equal(intake.q, np.full(N, 0.1 * 2))  # the newest valid one is still taken
    assert c["superseded"] == 1 and _taken_counted(intake) == 3


def _joints_nan() -> list[bytes]:
    m = {"proto": 1, "kind": "joints", "seq": 3, "stamp_ns": 1, "position": [float("nan")] * N}
    return [wire.TOPIC_JOINTS, msgpack.packb(m)]


def test_a_flood_costs_the_drain_its_budget_and_what_is_not_taken_waits_for_the_next():
    # every clock reading 3 us later: the cost of a poll and of a decode between readings
    clock = Clock(step=3_000)
    intake, token, _ = _intake(clock)
    stranger = "f" * 16
    inbox = [_twist(s, stranger) for s in range(1, 5001)]  # a non-holder floods: all refused
    inbox.insert(100, _twist(9999, token))
    total = len(inbox)
    start = clock()
    intake.drain(_poll(inbox), start, DRAIN_BUDGET_NS)
    spent = clock.t - start
    taken = total - len(inbox)
    # taking stops at half the budget (a reading per frame), decoding at the budget; one decode (the
    # newest, always decoded) and one reading may run over
    assert spent <= DRAIN_BUDGET_NS + 2 * clock.step
    assert 0 < taken <= DRAIN_BUDGET_NS // 2 // clock.step + 1
    c = intake.telemetry.counters()
    assert c["superseded"] > 0 and c["rejected_not_leased"] > 0 and c["accepted_twist"] == 0
    assert _taken_counted(intake) == taken
    # drained again and again, everything is taken at last and counted once
    for _ in range(10_000):
        if not inbox:
            break
        intake.drain(_poll(inbox), clock(), DRAIN_BUDGET_NS)
    assert not inbox and _taken_counted(intake) == total
