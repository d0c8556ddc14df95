"""One joint-state source per service: the jump bound (velocity limit times the elapsed receive time plus
the documented tolerance) computed by hand, the `source` field on the wire, and end to end: a jump, a
change of source, and two `twistrate sim` processes on one service each fault it with a reason naming
the joint and the jump (or the two sources); a service that simulates its arm still refuses outside
joint state."""

from __future__ import annotations

import time

import msgpack
import numpy as np
import pytest
from service_harness import make_config, reap, running_service, twistrate, wait_for

from twistrate.service import wire
from twistrate.service.joint_source import JUMP_TOLERANCE_M, JUMP_TOLERANCE_RAD, JointSourceGuard
from twistrate.service.wire.discovery import write_endpoints
from twistrate.solver.errors import WireError

pytestmark = pytest.mark.timeout(120)

NAMES = ("j1", "j2", "rail")
V_MAX = np.array([2.0, 1.0, 0.5])
REVOLUTE = np.array([True, True, False])


def test_the_bound_is_velocity_limit_times_elapsed_time_plus_tolerance():
    g = JointSourceGuard(NAMES, V_MAX, REVOLUTE)
    q0 = np.zeros(3)
    assert g.check(q0, 0, None) is None  # the first state is the reference
    dt_ns = 10_000_000  # 10 ms
    # just inside for each joint: 2.0 * 0.01 + 0.05 = 0.07 rad, 1.0 * 0.01 + 0.05 = 0.06, 0.5 * 0.01 + 0.01 m
    inside = np.array([0.0699, 0.0, 0.0])
    assert g.check(inside, dt_ns, None) is None
    reason = g.check(inside + np.array([0.0, 0.061, 0.0]), 2 * dt_ns, None)
    assert reason is not None and "j2" in reason and "0.061" in reason and "jumped" in reason
    # a refused state is not the reference: the same q a moment later is measured from `inside` again
    assert g.check(inside + np.array([0.0, 0.0, 0.0149]), 2 * dt_ns, None) is None
    reason = g.check(inside + np.array([0.0, 0.0, 0.0149 + 0.0151]), 3 * dt_ns, None)
    assert reason is not None and "rail" in reason
    assert JUMP_TOLERANCE_RAD == 0.05 and JUMP_TOLERANCE_M == 0.01  # docs/protocol.md 7.2 states these


def test_a_change_of_source_is_refused():
    g = JointSourceGuard(NAMES, V_MAX, REVOLUTE)
    assert g.check(np.zeros(3), 0, "drive-a") is None
    assert g.check(np.zeros(3), 1_000_000, "drive-a") is None
    reason = g.check(np.zeros(3), 2_000_000, "drive-b")
    assert reason is not None and "'drive-b'" in reason and "'drive-a'" in reason
    assert g.check(np.zeros(3), 3_000_000, None) is not None  # dropping the name is a change too


def test_source_on_the_wire_round_trips_and_is_checked():
    data = wire.encode_joints(seq=1, position=[0.1, 0.2], source="drive-a")
    assert wire.decode_joints(data, 2).source == "drive-a"
    assert wire.decode_joints(wire.encode_joints(seq=1, position=[0.1, 0.2]), 2).source is None
    both = wire.encode_joints(seq=1, position=[0.1, 0.2], velocity=[0.0, 0.0], source="x")
    assert wire.decode_joints(both, 2).source == "x"
    m = msgpack.unpackb(data)
    m["source"] = 7
    with pytest.raises(WireError) as err:
        wire.decode_joints(msgpack.packb(m), 2)
    assert err.value.reason == "bad_type"
    m["source"] = "x" * (wire.MAX_NAME_CHARS + 1)
    with pytest.raises(WireError):
        wire.decode_joints(msgpack.packb(m), 2)


def _driver_config():
    return make_config(simulation={"enabled": False}, watchdog={"joints_timeout_ms": 50.0})


def _send_steady(link, q, source=None, count=10):
    for _ in range(count):
        link.send_joints(q, source=source)
        time.sleep(0.005)


def test_a_jump_faults_the_service_naming_the_joint_and_the_jump():
    with running_service(_driver_config()) as run:
        link = run.link()
        arm = run.service.arm
        q = arm.q_home.copy()
        _send_steady(link, q, "drive-a")
        wait_for(lambda: link.status()["joints_age_ms"] is not None)
        assert link.status()["mode"] == "disabled"
        other = q.copy()
        other[2] += 0.5  # a second driver's configuration: 0.5 rad away in a few ms
        link.send_joints(other, source="drive-a")
        wait_for(lambda: link.status()["mode"] == "fault")
        fault = link.status()["fault"]
        assert "jumped" in fault and arm.joint_names[2] in fault and "0.5" in fault
        assert run.service.counters()["faults"] == 1


def test_a_change_of_source_faults_the_service():
    with running_service(_driver_config()) as run:
        link = run.link()
        q = run.service.arm.q_home.copy()
        _send_steady(link, q, "drive-a")
        link.claim("test")
        link.enable()
        _send_steady(link, q, "drive-b", count=2)
        wait_for(lambda: link.status()["mode"] == "fault")
        fault = link.status()["fault"]
        assert "second source" in fault and "drive-b" in fault and "drive-a" in fault
        # clear_fault: the check starts again from the newest state (the one driver left)
        _send_steady(link, q, "drive-b", count=3)
        assert link.clear_fault() == "disabled"
        _send_steady(link, q, "drive-b", count=5)
        assert link.status()["mode"] == "disabled"


def test_a_simulating_service_still_refuses_outside_joint_state():
    with running_service(make_config()) as run:
        link = run.link()
        _send_steady(link, run.service.arm.q_home, "drive-a", count=3)
        wait_for(lambda: run.service.counters().get("rejected_unexpected_joints", 0) >= 1)
        assert link.status()["mode"] != "fault"


def test_two_sim_processes_on_one_service_fault_it(tmp_path):
    cfg_path = tmp_path / "driver.toml"
    cfg_path.write_text('[simulation]\nenabled = false\n[watchdog]\njoints_timeout_ms = 100.0\n'
                        '[endpoints]\nintake = "tcp://127.0.0.1:*"\noutput = "tcp://127.0.0.1:*"\n'
                        'control = "tcp://127.0.0.1:*"\n')
    sims = []
    with running_service(_driver_config()) as run:
        ep_file = write_endpoints(tmp_path / "ep.json", run.service.endpoints)
        link = run.link()
        try:
            sims.append(twistrate("sim", "--config", str(cfg_path), "--endpoints-file", str(ep_file)))
            wait_for(lambda: (link.status()["joints_age_ms"] or 1e9) < 50, limit_s=20.0)
            assert link.status()["mode"] == "disabled"
            sims.append(twistrate("sim", "--config", str(cfg_path), "--endpoints-file", str(ep_file)))
            wait_for(lambda: link.status()["mode"] == "fault", limit_s=20.0)
            assert "second source" in link.status()["fault"]
        finally:
            for sim in sims:
                sim.terminate()
            for sim in sims:
                sim.communicate(timeout=20)
            reap(*sims)
