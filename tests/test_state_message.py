"""The `state` output message: codec round trip and refusals, and end to end the pose it reports is the
forward kinematics of the joint positions it reports (our kinematics are checked against pinocchio in
test_kinematics_oracle.py), with the manipulability ellipsoid of J_v (Yoshikawa 1985, IJRR 4(2),
"Manipulability of robotic mechanisms": the set {J_v qd : |qd| <= 1}, semi-axes the singular values)."""

from __future__ import annotations

import msgpack
import numpy as np
import pytest
from service_harness import make_config, running_service, stream_until

from twistrate.service import wire
from twistrate.solver.errors import InputError, WireError
from twistrate.solver.kinematics import forward, geometric_jacobian

N = 3


def _kw(**over):
    kw = dict(seq=4, stamp_ns=1_700_000_000_000_000_000, tick=9, position=np.array([0.1, -0.2, 0.3]),
              rate=np.array([0.0, 0.5, -0.5]), tool_position=np.array([0.4, 0.0, 0.3]),
              tool_rotation=np.eye(3), origins=np.arange(15, dtype=float).reshape(5, 3) * 0.01,
              ellipsoid_radii=np.array([0.6, 0.2, 0.0]), ellipsoid_axes=np.eye(3)[:, [2, 0, 1]])
    kw.update(over)
    return kw


def test_state_round_trip():
    data = wire.encode_state(**_kw())
    msg = wire.decode_output([wire.TOPIC_STATE, data], N)
    assert isinstance(msg, wire.StateMessage) and (msg.seq, msg.tick) == (4, 9)
    np.testing.assert_array_equal(msg.origins, _kw()["origins"])
    np.testing.assert_array_equal(msg.ellipsoid_axes, _kw()["ellipsoid_axes"])  # row-major on the wire
    np.testing.assert_array_equal(msg.tool_rotation, np.eye(3))
    assert msg.position.shape == msg.rate.shape == (N,)


@pytest.mark.parametrize(("field", "value", "reason"), [
    ("origins", [[0.0, 0.0, 0.0]] * 4, "bad_length"),
    ("tool", {"position": [0.0, 0.0, 1e3], "rotation": [1.0] + [0.0] * 8}, "too_large"),
    ("ellipsoid", {"radii": [1.0, -0.1, 0.0], "axes": [0.0] * 9}, "bad_value"),
    ("ellipsoid", {"radii": [1.0, 0.1, 0.0]}, "missing_field"),
    ("rate", [0.0, float("nan"), 0.0], "non_finite"),
])
def test_state_refusals_name_the_field(field, value, reason):
    m = msgpack.unpackb(wire.encode_state(**_kw()))
    m[field] = value
    with pytest.raises(WireError) as info:
        wire.decode_state(msgpack.packb(m), N)
    assert info.value.reason == reason and f"state.{field}" in str(info.value)


def test_the_encoder_refuses_what_the_decoder_would():
    with pytest.raises(InputError, match=r"state\.origins"):
        wire.encode_state(**_kw(origins=np.zeros((4, 3))))
    with pytest.raises(InputError, match=r"state\.tool\.rotation"):
        wire.encode_state(**_kw(tool_rotation=2 * np.eye(3)))


def test_the_service_reports_the_pose_of_the_positions_it_reports():
    cfg = make_config(simulation={"lag_s": 0.0})
    with running_service(cfg) as run:
        link = run.link()
        link.claim("test")
        link.enable()
        v, w = [0.03, 0.0, 0.02], [0.0, 0.1, 0.0]
        stream_until(link, v, w, lambda cs: sum(c.answers >= 0 for c in cs) > 30)
        link.send_twist(v, w)
        msg = link.receive_state(timeout_s=2.0)
    arm = run.service.arm
    frames = forward(arm, msg.position)
    T = frames.T_base_tool
    np.testing.assert_allclose(msg.tool_position, T[:3, 3], atol=1e-12)
    np.testing.assert_allclose(msg.tool_rotation, T[:3, :3], atol=1e-12)
    np.testing.assert_allclose(msg.origins[0], 0.0)
    np.testing.assert_allclose(msg.origins[1:-1], frames.p_base, atol=1e-12)
    np.testing.assert_allclose(msg.origins[-1], T[:3, 3], atol=1e-12)
    assert np.abs(msg.rate).max() > 0  # the rates commanded while moving
    Jv = geometric_jacobian(arm, frames)[:3]
    # the ellipsoid: J_v J_v^T = A diag(r^2) A^T, A orthonormal, radii descending
    A, r = msg.ellipsoid_axes, msg.ellipsoid_radii
    np.testing.assert_allclose(A.T @ A, np.eye(3), atol=1e-9)
    np.testing.assert_allclose(A @ np.diag(r**2) @ A.T, Jv @ Jv.T, atol=1e-9)
    assert np.all(np.diff(r) <= 0)


def test_health_carries_the_achieved_twist_its_error_and_the_foresight_of_the_solver():
    # the service's health message as solver.foresight and the Resolution give them (themselves checked
    # against finite differences and the planar two-link closed form in test_foresight.py)
    cfg = make_config(simulation={"lag_s": 0.0})
    with running_service(cfg) as run:
        link = run.link()
        link.claim("test")
        link.enable()
        v, w = [0.05, 0.0, -0.03], [0.0, 0.0, 0.2]
        stream_until(link, v, w, lambda cs: sum(c.answers >= 0 for c in cs) > 30)
        link.send_twist(v, w)
        h = link.receive_health(timeout_s=2.0)
        while h.mode != "running":
            link.send_twist(v, w)
            h = link.receive_health(timeout_s=2.0)
    assert h.twist_achieved is not None and h.twist_error is not None
    np.testing.assert_allclose(h.twist_achieved - h.twist_error, np.r_[v, w], atol=1e-9)  # the asked twist
    assert h.tracking is False and h.sigma_min_rate_m_s is not None
    assert h.time_to_limit_s.shape == (run.service.arm.n,)
    if h.first_limit_joint is not None:
        assert h.time_to_first_limit_s == pytest.approx(float(h.time_to_limit_s.min()))
