"""The view model the dashboard and the terminal monitor share: fed decoded wire messages (encoded and
decoded by the protocol's own codec, docs/protocol.md section 7) and the fake feed, it keeps history
windows, mode and health state with their changes, refused input by reason, the lease holder, the
events, and sees an arm go and come back; the fake arm's ellipsoid is checked against its Jacobian
(Yoshikawa 1985, "Manipulability of robotic mechanisms": the ellipsoid's radii are the singular values
of J_v, its axes the left singular vectors)."""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.clients.watch.fake import FakeArm, chain, jacobian_linear
from twistrate.clients.watch.model import SERIES, ArmView, Fleet
from twistrate.service import wire


def _health(tick, sigma, state="clear", mode="running", rejected=None, overruns=0, stamp_ns=None):
    data = wire.encode_health(
        seq=tick,
        stamp_ns=stamp_ns if stamp_ns is not None else 1_000_000 * tick,
        tick=tick,
        manipulability=0.01,
        manipulability_linear=0.02,
        manipulability_angular=0.5,
        singular_values=np.array([1.0, 0.5, sigma]),
        inverse_condition=sigma,
        weakest_linear=np.array([1.0, 0, 0]),
        weakest_angular=np.zeros(3),
        damping=0.01,
        scale=0.9,
        limit_margin=np.array([0.3, 0.4, 0.5]),
        state=state,
        mode=mode,
        rejected=rejected or {},
        overruns=overruns,
    )
    return wire.decode_health(data)


def _event(tick, name, detail="", mode="running"):
    return wire.decode_event(
        wire.encode_event(seq=tick, tick=tick, event=name, detail=detail, mode=mode, instance=7)
    )


def test_health_messages_fill_history_and_state_changes():
    view = ArmView("a", window_s=1.0)
    for k in range(100):  # 2 s at 50 Hz; health ticks 10 apart at 500 Hz: 1 ms stamps per tick
        state = "narrow" if 40 <= k < 60 else "clear"
        view.on_health(_health(10 * k, 0.1 - 0.001 * k, state, rejected={"not_leased": k // 10}), 0.02 * k)
    assert view.health == "clear" and view.mode == "running"
    # the window keeps the last second only
    t = [r[1] for r in view.history]
    assert t[0] >= 0.02 * 99 - 1.0 - 1e-9 and t[-1] == pytest.approx(0.02 * 99)
    assert view.series("sigma_min")[-1] == pytest.approx(0.1 - 0.099)
    assert view.series("scale")[-1] == pytest.approx(0.9)
    changes = [(c["what"], c["from"], c["to"]) for c in view.changes]
    assert changes == [("health", "clear", "narrow"), ("health", "narrow", "clear")]
    assert view.rejected == {"not_leased": 9}
    assert view.tick_hz == pytest.approx(1000.0)  # 10 ticks per 10 ms of stamps
    snap = view.snapshot(since=view.index - 3, now=2.0)
    assert len(snap["history"]) == 2 and snap["series"] == list(SERIES)
    assert snap["rejected_total"] == 9 and snap["latest"]["singular_values"][-1] == pytest.approx(0.001)


def test_lease_holder_from_events_and_status_and_event_list():
    view = ArmView("a")
    view.on_event(_event(1, "lease_claimed", "by 'hand-bridge' for 2000 ms", "disabled"), 0.0)
    assert view.holder == "hand-bridge" and view.mode == "disabled"
    view.on_event(_event(2, "enabled", "", "holding"), 0.1)
    view.on_event(_event(3, "lease_expired", "lease of 'hand-bridge' not renewed", "disabled"), 0.2)
    assert view.holder is None
    view.set_status({"holder": "planner", "tick_hz": 500.0, "mode": "running", "health": "clear"}, 0.3)
    assert view.holder == "planner" and view.tick_hz == 500.0 and view.health == "clear"
    assert [e["event"] for e in view.events] == ["lease_claimed", "enabled", "lease_expired"]
    assert [(c["from"], c["to"]) for c in view.changes if c["what"] == "mode"] == [
        ("disabled", "holding"),
        ("holding", "disabled"),
        ("disabled", "running"),
    ]


def test_command_and_state_messages_give_joint_positions_and_rates():
    view = ArmView("a")
    cmd = wire.decode_command(
        wire.encode_command(
            seq=1,
            stamp_ns=5,
            tick=7,
            rate=np.array([0.1, -0.2]),
            target=np.array([1.0, 2.0]),
            answers=-1,
            scale=1.0,
            mode="running",
            health="narrow",
        )
    )
    view.on_command(cmd, 0.0)
    assert view.rate == [0.1, -0.2] and view.position == [1.0, 2.0] and view.health == "narrow"
    view.on_state(
        {
            "tick": 8,
            "position": [0.5, 0.6],
            "rate": [0.0, 0.1],
            "tool": {"position": [0.1, 0.2, 0.3], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, 1]},
            "origins": [[0, 0, 0]] * 4,
            "ellipsoid": {"radii": [0.3, 0.2, 0.1], "axes": [1, 0, 0, 0, 1, 0, 0, 0, 1]},
        },
        0.01,
    )
    view.on_command(cmd, 0.02)  # once `state` arrives it is the source of the positions
    assert view.position == [0.5, 0.6] and view.ellipsoid["radii"] == [0.3, 0.2, 0.1]


def test_gone_and_back_and_restart():
    view = ArmView("a", gone_after_s=1.0)
    assert not view.check(100.0)  # never connected: waiting, not gone
    view.on_health(_health(1000, 0.1), 0.0)
    assert not view.check(0.9) and not view.gone
    assert view.check(1.2) and view.gone and not view.check(1.3)  # reported once
    view.on_health(_health(1010, 0.1), 3.0)
    assert not view.gone
    view.on_health(_health(5, 0.1), 3.1)  # ticks from 0 again: a new service process
    assert view.restarts == 1
    assert [e["event"] for e in view.events] == ["gone", "back", "restarted"]
    assert view.snapshot(now=3.5)["age_s"] == pytest.approx(0.4)


def test_fleet_routes_messages_by_kind_and_name():
    fleet = Fleet(gone_after_s=0.5)
    fleet.feed("x", "health", _health(1, 0.2), 0.0)
    fleet.feed("y", "event", _event(1, "enabled"), 0.0)
    fleet.feed("y", "nonsense", {}, 0.0)  # other kinds are ignored (receivers tolerate them)
    assert list(fleet.arms) == ["x", "y"] and fleet.arms["x"].received["health"] == 1
    assert sorted(fleet.check(1.0)) == ["x", "y"]


def test_fake_arm_ellipsoid_is_the_svd_of_its_jacobian_and_crosses_the_thresholds():
    arm = FakeArm("f", period_s=10.0)
    seen = set()
    for t in np.arange(0.0, 10.0, 0.1):
        msgs = dict(arm.messages(float(t), 1.7e9 + t))
        state, health = msgs["state"], msgs["health"]
        q = np.asarray(state["position"])
        Jv = jacobian_linear(q)
        # the geometric Jacobian from the joint axes against central differences of the tool position
        # (an independent derivation; step 1e-6 rad, error O(h^2))
        h = 1e-6
        J_ref = np.column_stack([(chain(q + h * e)[0][-1] - chain(q - h * e)[0][-1]) / (2 * h)
                                 for e in np.eye(4)])
        np.testing.assert_allclose(Jv, J_ref, atol=1e-7)
        radii = np.asarray(state["ellipsoid"]["radii"])
        axes = np.asarray(state["ellipsoid"]["axes"]).reshape(3, 3)
        # J_v J_v^T = A diag(r^2) A^T (Yoshikawa 1985)
        np.testing.assert_allclose(axes @ np.diag(radii**2) @ axes.T, Jv @ Jv.T, atol=1e-8)
        assert len(state["origins"]) == 4 + 2
        np.testing.assert_allclose(state["origins"][-1], chain(q)[0][-1])
        seen.add(health["state"])
    assert seen == {"clear", "narrow", "pinched"}


def test_decoded_state_message_is_kept_in_the_wire_layout():
    # a rotation about z by 90 degrees and an ellipsoid whose principal axes are its columns
    R = np.array([[0.0, -1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    origins = np.array([[0, 0, 0], [0, 0, 0.1], [0.2, 0, 0.3], [0.3, 0.1, 0.3]], dtype=float)
    msg = wire.decode_state(
        wire.encode_state(
            seq=1,
            stamp_ns=1,
            tick=9,
            position=np.array([0.1, 0.2]),
            rate=np.array([0.0, 0.5]),
            tool_position=origins[-1],
            tool_rotation=R,
            origins=origins,
            ellipsoid_radii=np.array([0.3, 0.2, 0.1]),
            ellipsoid_axes=R,
        )
    )
    view = ArmView("a")
    view.on_state(msg, 0.0)
    assert view.position == [0.1, 0.2] and view.rate == [0.0, 0.5]
    assert view.origins == origins.tolist() and view.tool["position"] == origins[-1].tolist()
    assert view.tool["rotation"] == R.reshape(-1).tolist()  # row-major, as on the wire
    assert view.ellipsoid == {"radii": [0.3, 0.2, 0.1], "axes": R.reshape(-1).tolist()}
