"""The wire codec: round trips of every kind, every refusal class, fuzzing, and the documented example.

External references: the msgpack specification (https://github.com/msgpack/msgpack/blob/master/spec.md:
fixmap 0x80-0x8f, fixarray 0x90-0x9f, fixstr 0xa0-0xbf, float 64 0xcb big-endian IEEE 754, uint 64
0xcf) and IEEE 754-2008 binary64 (via Python's struct module, format '>d').
"""

from __future__ import annotations

import math
import re
import struct
from pathlib import Path

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from twistrate.service import wire
from twistrate.solver.errors import InputError, WireError

FUZZ = settings(max_examples=150, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow])
DOC = Path(__file__).resolve().parents[1] / "docs" / "protocol.md"
N = 7
RNG = np.random.default_rng(20260512)


def _twist_map(**over):
    m = {"proto": 1, "kind": "twist", "seq": 1, "stamp_ns": 5, "linear": [0.1, 0.0, -0.2],
         "angular": [0.0, 0.3, 0.0], "frame": "base", "lease": "token"}
    m.update(over)
    return m


def _joints_map(**over):
    m = {"proto": 1, "kind": "joints", "seq": 1, "stamp_ns": 5, "position": [0.1] * N}
    m.update(over)
    return m


def _pack(m) -> bytes:
    return msgpack.packb(m)


def _reason(fn, *args) -> tuple[str, str]:
    with pytest.raises(WireError) as info:
        fn(*args)
    return info.value.reason, str(info.value)


def _health_kwargs(n=N, **over):
    kw = dict(seq=4, stamp_ns=123, tick=99, manipulability=0.012, manipulability_linear=0.3,
              manipulability_angular=0.2, singular_values=np.array([0.9, 0.7, 0.5, 0.3, 0.2, 0.05]),
              inverse_condition=0.05 / 0.9, weakest_linear=np.array([0.6, 0.0, 0.0]),
              # a unit weighted twist with L = 0.3 m: 0.6^2 + (0.3 * 0.8 / 0.3)^2 = 1 (section 7.4)
              weakest_angular=np.array([0.0, 0.0, 0.8 / 0.3]), damping=0.01, scale=0.75,
              limit_margin=np.array([0.5, np.inf, -0.01] + [0.25] * (n - 3)), state="narrow",
              mode="running", rejected={"bad_type": 3, "not_leased": 1}, overruns=2)
    kw.update(over)
    return kw


# ---------------------------------------------------------------------------------------------------
# round trips
# ---------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("frame", wire.TWIST_FRAMES)
@pytest.mark.parametrize("point", [None, [0.0, -0.05, 0.12]])
def test_twist_round_trip(frame, point):
    linear, angular = RNG.uniform(-1, 1, 3), RNG.uniform(-2, 2, 3)
    data = wire.encode_twist(seq=17, lease="ab12", linear=linear, angular=angular, frame=frame, point=point,
                              stamp_ns=1_700_000_000_123_456_789)
    msg = wire.decode_twist(data)
    assert (msg.seq, msg.stamp_ns, msg.lease) == (17, 1_700_000_000_123_456_789, "ab12")
    assert msg.frame == frame
    np.testing.assert_array_equal(msg.linear, linear)  # float64 on the wire: exact
    np.testing.assert_array_equal(msg.angular, angular)
    np.testing.assert_array_equal(msg.point, np.zeros(3) if point is None else point)
    assert ("point" in msgpack.unpackb(data)) == (point is not None)


@pytest.mark.parametrize("with_velocity", [False, True])
@pytest.mark.parametrize("n", [1, 6, 7, wire.MAX_JOINTS])
def test_joints_round_trip(n, with_velocity):
    q = RNG.uniform(-3, 3, n)
    qd = RNG.uniform(-1, 1, n) if with_velocity else None
    msg = wire.decode_joints(wire.encode_joints(seq=3, position=q, velocity=qd, stamp_ns=9), n)
    assert (msg.seq, msg.stamp_ns) == (3, 9)
    np.testing.assert_array_equal(msg.position, q)
    if with_velocity:
        np.testing.assert_array_equal(msg.velocity, qd)
    else:
        assert msg.velocity is None


@pytest.mark.parametrize("mode", wire.MODES)
@pytest.mark.parametrize("health", wire.HEALTH_STATES)
def test_command_round_trip(mode, health):
    rate, target = RNG.uniform(-2, 2, N), RNG.uniform(-3, 3, N)
    data = wire.encode_command(seq=8, stamp_ns=77, tick=8, rate=rate, target=target, answers=-1, scale=0.5,
                                mode=mode, health=health)
    for n in (N, None):
        msg = wire.decode_command(data, n)
        assert (msg.seq, msg.stamp_ns, msg.tick, msg.answers, msg.scale, msg.mode, msg.health) == \
            (8, 77, 8, -1, 0.5, mode, health)
        np.testing.assert_array_equal(msg.rate, rate)
        np.testing.assert_array_equal(msg.target, target)


def test_health_round_trip_with_unlimited_joint():
    kw = _health_kwargs()
    data = wire.encode_health(**kw)
    assert msgpack.unpackb(data)["limit_margin"][1] is None  # +inf travels as nil (section 7.4)
    msg = wire.decode_health(data, N)
    for key, value in kw.items():
        got = getattr(msg, key)
        if isinstance(value, np.ndarray):
            np.testing.assert_array_equal(got, value)
        else:
            assert got == value, key


def test_event_round_trip_and_detail_truncation():
    msg = wire.decode_event(wire.encode_event(seq=2, tick=40, event="stale_input", detail="twist old",
                                                mode="stopping", instance=7, stamp_ns=1))
    assert msg == wire.EventMessage(2, 1, 40, "stale_input", "twist old", "stopping", 7)
    data = wire.encode_event(seq=0, tick=0, event="fault", detail="é" * 5000, mode="fault", instance=7)
    long = wire.decode_event(data)
    assert long.detail == "é" * wire.MAX_TEXT_CHARS


REQUEST_EXAMPLES = {
    "claim": {"client": "pad", "lease_ms": 1500},
    "renew": {"lease": "t"},
    "release": {"lease": "t"},
    "enable": {"lease": "t"},
    "disable": {"lease": "t"},
    "status": {},
    "arm": {},
    "counters": {},
    "set": {"lease": "t", "params": {"damping_max": 0.05, "reduced_speed": True, "damping": "constant"}},
    "clear_fault": {"lease": "t"},
}

RESULT_EXAMPLES = {
    "claim": {"lease": "0123456789abcdef", "lease_ms": 1000, "client": "pad"},
    "renew": {"lease_ms": 1000},
    "release": {},
    "enable": {"mode": "holding"},
    "disable": {"mode": "disabled"},
    "status": {"mode": "running", "health": "clear", "tick": 10, "tick_hz": 500.0, "health_hz": 50.0,
               "arm": "reach7", "n": 2,
               "holder": None, "lease_remaining_ms": None, "fault": None, "simulated": True,
               "reduced_speed": False, "position": [0.0, 1.0], "twist_age_ms": 1.5, "joints_age_ms": None,
               "realtime": True, "instance": 2**64 - 1, "started_ns": 1_700_000_000_000_000_000,
               "keepout": {"nearest_m": 0.125, "link": "elbow", "other": "table", "other_kind": "zone"},
               "limiting": {"by": "joint", "joint": 1, "bound": "velocity", "link": None, "other": None}},
    "arm": {"name": "x", "n": 1, "joints": [{"name": "j", "kind": "revolute", "position_min": None,
                                             "position_max": 1.0, "velocity_max": 2.0,
                                             "acceleration_max": 5.0}], "home": [0.0]},
    "counters": {"counters": {"ticks": 5, "bad_type": 0}},
    "set": {"params": {"damping_max": 0.05}},
    "clear_fault": {"mode": "disabled"},
}


def test_every_op_has_examples():
    assert set(REQUEST_EXAMPLES) == set(wire.OPS) == set(RESULT_EXAMPLES) == set(wire.REPLY_RESULTS)


@pytest.mark.parametrize("op", wire.OPS)
def test_request_round_trip(op):
    msg = wire.decode_request(wire.encode_request(seq=5, op=op, stamp_ns=3, **REQUEST_EXAMPLES[op]))
    assert msg == wire.RequestMessage(5, 3, op, REQUEST_EXAMPLES[op])


def test_claim_without_lease_ms():
    assert wire.decode_request(wire.encode_request(seq=0, op="claim", client="c")).args == {"client": "c"}


@pytest.mark.parametrize("op", wire.OPS)
def test_reply_round_trip(op):
    msg = wire.decode_reply(wire.encode_reply(seq=5, op=op, result=RESULT_EXAMPLES[op], stamp_ns=4))
    assert msg == wire.ReplyMessage(5, 4, op, True, RESULT_EXAMPLES[op], None, None)


@pytest.mark.parametrize("code", wire.ERROR_CODES)
def test_error_reply_round_trip(code):
    msg = wire.decode_reply(wire.encode_reply(seq=-1, op="", error=(code, "why"), stamp_ns=4))
    assert msg == wire.ReplyMessage(-1, 4, "", False, {}, code, "why")


def test_reply_result_keys_are_the_documented_ones():
    with pytest.raises(InputError, match=r"reply\(enable\)\.result"):
        wire.encode_reply(seq=1, op="enable", result={"mode": "running", "extra": 1})
    with pytest.raises(InputError, match="finite"):
        wire.encode_reply(seq=1, op="status", result={**RESULT_EXAMPLES["status"], "twist_age_ms": math.inf})
    bad = {"proto": 1, "kind": "reply", "seq": 1, "stamp_ns": 1, "op": "enable", "ok": True, "result": {}}
    assert _reason(wire.decode_reply, _pack(bad))[0] == "missing_field"


@pytest.mark.parametrize("frames,n,cls", [
    ([b"twist", wire.encode_twist(seq=0, lease="t", linear=[0, 0, 0], angular=[0, 0, 0])], N,
     wire.TwistMessage),
    ([b"joints", wire.encode_joints(seq=0, position=[0.0] * N)], N, wire.JointsMessage),
])
def test_decode_intake_dispatches_by_topic(frames, n, cls):
    assert isinstance(wire.decode_intake(frames, n), cls)


def test_decode_output_dispatches_by_topic():
    cmd = wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=np.zeros(N), target=np.zeros(N), answers=-1,
                               scale=1.0, mode="disabled", health="clear")
    assert isinstance(wire.decode_output([b"command", cmd]), wire.CommandMessage)
    assert isinstance(wire.decode_output([b"health", wire.encode_health(**_health_kwargs())], N),
                      wire.HealthMessage)
    ev = wire.encode_event(seq=0, tick=0, event="running", detail="", mode="running", instance=7)
    assert isinstance(wire.decode_output([b"event", ev]), wire.EventMessage)


# ---------------------------------------------------------------------------------------------------
# refusals: each class, with the right reason and a message naming the field
# ---------------------------------------------------------------------------------------------------

BAD_TWISTS = [
    # (description, bytes, reason, field named in the message)
    ("not msgpack", b"\xc1\xc1", "not_msgpack", "twist"),
    ("trailing bytes", _pack(_twist_map()) + b"\x00", "not_msgpack", "twist"),
    ("truncated", _pack(_twist_map())[:-3], "not_msgpack", "twist"),
    ("not a map", _pack([1, 2, 3]), "bad_type", "twist"),
    ("version 2", _pack(_twist_map(proto=2)), "bad_version", "twist.proto"),
    ("version as float", _pack(_twist_map(proto=1.0)), "bad_version", "twist.proto"),
    ("no version", _pack({k: v for k, v in _twist_map().items() if k != "proto"}), "missing_field",
     "twist.proto"),
    ("unknown kind", _pack(_twist_map(kind="wrench")), "unknown_kind", "twist.kind"),
    ("other kind", _pack(_twist_map(kind="joints")), "kind_mismatch", "twist.kind"),
    ("kind not str", _pack(_twist_map(kind=7)), "bad_type", "twist.kind"),
    ("missing field", _pack({k: v for k, v in _twist_map().items() if k != "angular"}), "missing_field",
     "twist.angular"),
    ("missing lease", _pack({k: v for k, v in _twist_map().items() if k != "lease"}), "missing_field",
     "twist.lease"),
    ("extra field", _pack(_twist_map(speed=1.0)), "extra_field", "twist.speed"),
    ("short vector", _pack(_twist_map(linear=[0.0, 0.0])), "bad_length", "twist.linear"),
    ("long vector", _pack(_twist_map(angular=[0.0] * 4)), "bad_length", "twist.angular"),
    ("vector not array", _pack(_twist_map(linear=0.1)), "bad_type", "twist.linear"),
    ("bool as number", _pack(_twist_map(linear=[True, 0.0, 0.0])), "bad_type", "twist.linear[0]"),
    ("string as number", _pack(_twist_map(angular=[0.0, "1", 0.0])), "bad_type", "twist.angular[1]"),
    ("nil as number", _pack(_twist_map(angular=[0.0, 0.0, None])), "bad_type", "twist.angular[2]"),
    ("NaN", _pack(_twist_map(linear=[0.0, math.nan, 0.0])), "non_finite", "twist.linear[1]"),
    ("infinity", _pack(_twist_map(angular=[-math.inf, 0.0, 0.0])), "non_finite", "twist.angular[0]"),
    ("absurd linear", _pack(_twist_map(linear=[0.0, 0.0, 10.5])), "too_large", "twist.linear[2]"),
    ("absurd angular", _pack(_twist_map(angular=[0.0, -21, 0.0])), "too_large", "twist.angular[1]"),
    ("absurd point", _pack(_twist_map(point=[6.0, 0.0, 0.0])), "too_large", "twist.point[0]"),
    ("huge int", _pack(_twist_map(linear=[2**63, 0, 0])), "too_large", "twist.linear[0]"),
    ("bad frame", _pack(_twist_map(frame="world")), "bad_value", "twist.frame"),
    ("frame not str", _pack(_twist_map(frame=1)), "bad_type", "twist.frame"),
    ("empty lease", _pack(_twist_map(lease="")), "bad_value", "twist.lease"),
    ("lease not str", _pack(_twist_map(lease=5)), "bad_type", "twist.lease"),
    ("negative seq", _pack(_twist_map(seq=-1)), "bad_value", "twist.seq"),
    ("float seq", _pack(_twist_map(seq=1.0)), "bad_type", "twist.seq"),
    ("bool stamp", _pack(_twist_map(stamp_ns=True)), "bad_type", "twist.stamp_ns"),
    ("oversize frame", _pack(_twist_map(lease="x" * 40)) + b"\x00" * 600, "oversize", "twist"),
    ("string beyond bound", _pack(_twist_map(lease="x" * 65)), "oversize", "twist"),
    ("bin value", _pack(_twist_map(lease=b"tok")), "oversize", "twist"),
    ("ext value", _pack(_twist_map(lease=msgpack.ExtType(1, b"ab"))), "oversize", "twist"),
]


@pytest.mark.parametrize("what,data,reason,field", BAD_TWISTS, ids=[b[0] for b in BAD_TWISTS])
def test_bad_twist_is_refused_with_reason_and_field(what, data, reason, field):
    got, message = _reason(wire.decode_twist, data)
    assert got == reason, message
    assert got in wire.REASONS
    assert message.startswith(field + ":") or message.startswith(field + " "), message
    assert "accepted:" in message


def test_oversize_is_checked_before_unpacking():
    # 600 bytes of a valid msgpack str: a cap check after unpacking would see a str and say bad_type
    assert _reason(wire.decode_twist, _pack("x" * 600))[0] == "oversize"


def test_a_map_key_that_is_not_a_string_is_refused():
    assert _reason(wire.decode_twist, _pack({**_twist_map(), 1: 2}))[0] == "bad_type"
    assert _reason(wire.decode_twist, _pack({**_twist_map(), b"": 2}))[0] == "extra_field"


@pytest.mark.parametrize("data,reason,field", [
    (_pack(_joints_map(position=[0.1] * (N - 1))), "bad_length", "joints.position"),
    (_pack(_joints_map(velocity=[0.1] * (N + 1))), "bad_length", "joints.velocity"),
    (_pack(_joints_map(position=[0.1] * 6 + [math.nan])), "non_finite", "joints.position[6]"),
    (_pack(_joints_map(position=[0.1] * 6 + [1001.0])), "too_large", "joints.position[6]"),
    (_pack(_joints_map(velocity=[101.0] + [0.0] * 6)), "too_large", "joints.velocity[0]"),
    (_pack(_joints_map(position=[False] * N)), "bad_type", "joints.position[0]"),
    (_pack(_joints_map(position=[0.0] * 33)), "oversize", "joints"),
    (_pack(_joints_map(effort=[0.0] * N)), "extra_field", "joints.effort"),
    (_pack(_twist_map()), "kind_mismatch", "joints.kind"),
])
def test_bad_joints_are_refused(data, reason, field):
    got, message = _reason(wire.decode_joints, data, N)
    assert (got, message.split(":")[0]) == (reason, field), message


def test_decode_intake_refuses_bad_framing():
    twist = wire.encode_twist(seq=0, lease="t", linear=[0, 0, 0], angular=[0, 0, 0])
    assert _reason(wire.decode_intake, [twist], N)[0] == "bad_frames"
    assert _reason(wire.decode_intake, [b"twist", twist, b""], N)[0] == "bad_frames"
    # prefix subscriptions let b"twistX" through: it must be refused, not decoded as a twist
    assert _reason(wire.decode_intake, [b"twistX", twist], N)[0] == "unknown_kind"
    assert _reason(wire.decode_intake, [b"joints", twist], N)[0] == "kind_mismatch"
    assert _reason(wire.decode_intake, [b"command", twist], N)[0] == "unknown_kind"


@pytest.mark.parametrize("m,reason,field", [
    ({"op": "fly"}, "unknown_op", "request.op"),
    ({"op": 3}, "bad_type", "request.op"),
    ({"op": "claim"}, "missing_field", "request.client"),
    ({"op": "claim", "client": "c", "lease": "t"}, "extra_field", "request.lease"),
    ({"op": "claim", "client": "c", "lease_ms": 0}, "bad_value", "request.lease_ms"),
    ({"op": "claim", "client": "c", "lease_ms": 10.0}, "bad_type", "request.lease_ms"),
    ({"op": "status", "lease": "t"}, "extra_field", "request.lease"),
    ({"op": "set", "lease": "t", "params": {}}, "bad_length", "request.params"),
    ({"op": "set", "lease": "t", "params": [1]}, "bad_type", "request.params"),
    ({"op": "set", "lease": "t", "params": {"damping_max": math.nan}}, "non_finite",
     "request.params.damping_max"),
    ({"op": "set", "lease": "t", "params": {"x": [1]}}, "bad_type", "request.params.x"),
    ({"op": "renew", "lease": ""}, "bad_value", "request.lease"),
])
def test_bad_requests_are_refused(m, reason, field):
    data = _pack({"proto": 1, "kind": "request", "seq": 1, "stamp_ns": 1, **m})
    got, message = _reason(wire.decode_request, data)
    assert (got, message.split(":")[0]) == (reason, field), message
    expected_code = "unknown_op" if reason == "unknown_op" else "bad_request"
    assert wire.error_code(WireError(got, message)) == expected_code


def test_peek_request_for_error_replies():
    assert wire.peek_request(_pack({"seq": 4, "op": "enable", "x": 1})) == (4, "enable")
    assert wire.peek_request(_pack({"seq": 4, "op": "fly"})) == (4, "")
    assert wire.peek_request(b"\xc1") == (-1, "")
    assert wire.peek_request(_pack({"seq": -3, "op": None})) == (-1, "")


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_encode_command_never_emits_a_non_finite_number(bad):
    rate, target = np.zeros(N), np.zeros(N)
    rate[3] = bad
    with pytest.raises(InputError, match=r"command\.rate"):
        wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=rate, target=target, answers=-1, scale=1.0,
                             mode="running", health="clear")
    with pytest.raises(InputError, match=r"command\.target"):
        wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=target, target=rate, answers=-1, scale=1.0,
                             mode="running", health="clear")
    with pytest.raises(InputError, match=r"command\.scale"):
        wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=target, target=target, answers=-1, scale=bad,
                             mode="running", health="clear")


def test_encode_command_refuses_unknown_mode_and_wrong_lengths():
    z = np.zeros(N)
    with pytest.raises(InputError, match=r"command\.mode"):
        wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=z, target=z, answers=-1, scale=1.0, mode="idle",
                             health="clear")
    with pytest.raises(InputError, match=r"command\.health"):
        wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=z, target=z, answers=-1, scale=1.0,
                             mode="running", health="fine")
    with pytest.raises(InputError, match=r"command\.target"):
        wire.encode_command(seq=0, stamp_ns=0, tick=0, rate=z, target=np.zeros(N + 1), answers=-1,
                             scale=1.0, mode="running", health="clear")
    with pytest.raises(InputError, match="command"):
        wire.encode_command(seq=0, stamp_ns=0, tick=np.float64(1.5), rate=z, target=z, answers=-1, scale=1.0,
                             mode="running", health="clear")


@pytest.mark.parametrize("kwargs,field", [
    ({"linear": [math.nan, 0, 0]}, "twist.linear"),
    ({"angular": [0, 0, 25.0]}, "twist.angular"),
    ({"linear": [0, 0]}, "twist.linear"),
    ({"frame": "world"}, "twist.frame"),
    ({"lease": ""}, "twist.lease"),
    ({"point": [0, 0, 9.0]}, "twist.point"),
    ({"seq": -2}, "twist.seq"),
])
def test_encode_twist_refuses_what_decode_would(kwargs, field):
    args = {"seq": 1, "lease": "t", "linear": [0, 0, 0], "angular": [0, 0, 0], **kwargs}
    with pytest.raises(InputError, match=re.escape(field)):
        wire.encode_twist(**args)


def test_encode_health_sends_unlimited_margin_as_nil_but_refuses_nan():
    with pytest.raises(InputError, match="limit_margin"):
        wire.encode_health(**_health_kwargs(limit_margin=np.array([math.nan] * N)))
    with pytest.raises(InputError, match="limit_margin"):
        wire.encode_health(**_health_kwargs(limit_margin=np.array([-np.inf] * N)))
    with pytest.raises(InputError, match="singular_values"):
        wire.encode_health(**_health_kwargs(singular_values=np.array([0.5, -0.1])))


def test_health_margin_is_a_fraction_of_the_range_at_most_one_half():
    # min(q - q_min, q_max - q) / (q_max - q_min) <= 1/2 for any q (the nearer limit is at most half the
    # range away; twistrate.solver.health.limit_margins): more is refused on both sides of the wire
    for margin in (0.5, 0.5 + 1e-12, 0.0, -3.0):
        msg = wire.decode_health(wire.encode_health(**_health_kwargs(limit_margin=np.full(N, margin))), N)
        assert msg.limit_margin[0] == margin
    with pytest.raises(InputError, match="limit_margin"):
        wire.encode_health(**_health_kwargs(limit_margin=np.full(N, 0.6)))
    m = msgpack.unpackb(wire.encode_health(**_health_kwargs()))
    m["limit_margin"] = [0.6] + [0.1] * (N - 1)
    assert _reason(wire.decode_health, _pack(m), N)[0] == "too_large"
    m["limit_margin"] = [-2e6] + [0.1] * (N - 1)
    assert _reason(wire.decode_health, _pack(m), N)[0] == "too_large"


def test_health_weakest_angular_part_is_bounded_by_the_shortest_characteristic_length():
    # angular = u[3:] / L with |u| = 1 and L >= MIN_CHARACTERISTIC_LENGTH_M: each component <= 1 / L_min
    top = 1.0 / wire.MIN_CHARACTERISTIC_LENGTH_M
    data = wire.encode_health(**_health_kwargs(weakest_angular=np.array([0.0, top, 0.0])))
    msg = wire.decode_health(data)
    assert msg.weakest_angular[1] == top
    with pytest.raises(InputError, match=re.escape("health.weakest.angular")):
        wire.encode_health(**_health_kwargs(weakest_angular=np.array([0.0, 1.01 * top, 0.0])))
    with pytest.raises(InputError, match=re.escape("health.weakest.linear")):
        wire.encode_health(**_health_kwargs(weakest_linear=np.array([0.0, 1.01, 0.0])))
    m = msgpack.unpackb(wire.encode_health(**_health_kwargs()))
    m["weakest"]["angular"] = [1.01 * top, 0.0, 0.0]
    assert _reason(wire.decode_health, _pack(m), N)[0] == "too_large"


# ---------------------------------------------------------------------------------------------------
# fuzz: decoders raise nothing but WireError
# ---------------------------------------------------------------------------------------------------

DECODERS = [wire.decode_twist, lambda b: wire.decode_joints(b, N), wire.decode_command,
            wire.decode_health, wire.decode_event, wire.decode_request, wire.decode_reply]


def _only_wire_errors(data: bytes) -> None:
    for decode in DECODERS:
        try:
            decode(data)
        except WireError as exc:
            assert exc.reason in wire.REASONS


@FUZZ
@given(st.binary(max_size=700))
def test_fuzz_arbitrary_bytes(data):
    _only_wire_errors(data)


_scalars = st.one_of(st.none(), st.booleans(), st.integers(-(2**63), 2**64 - 1), st.floats(),
                     st.text(max_size=70), st.binary(max_size=8))
_values = st.recursive(_scalars, lambda inner: st.lists(inner, max_size=8)
                       | st.dictionaries(st.text(max_size=10), inner, max_size=8), max_leaves=20)


@FUZZ
@given(st.sampled_from(["twist", "joints", "request", "reply", "health", "command", "event"]),
       st.sampled_from(["proto", "kind", "seq", "stamp_ns", "linear", "angular", "frame", "point", "lease",
                        "position", "velocity", "op", "ok", "result", "error", "params", "rate", "tick"]),
       _values)
def test_fuzz_one_field_replaced(kind, key, value):
    base = {**_twist_map(), "kind": kind, "position": [0.0] * N, "op": "status", "ok": True}
    base[key] = value
    try:
        data = msgpack.packb(base)
    except (OverflowError, ValueError, TypeError):
        return
    _only_wire_errors(data)


@FUZZ
@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=3, max_size=3),
       st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=3, max_size=3))
def test_fuzz_twist_numbers_accepted_iff_finite_and_bounded(linear, angular):
    data = msgpack.packb(_twist_map(linear=linear, angular=angular))
    ok = all(math.isfinite(x) and abs(x) <= wire.MAX_LINEAR_MPS for x in linear) and \
        all(math.isfinite(x) and abs(x) <= wire.MAX_ANGULAR_RADPS for x in angular)
    try:
        msg = wire.decode_twist(data)
    except WireError as exc:
        assert not ok and exc.reason in ("non_finite", "too_large")
    else:
        assert ok
        np.testing.assert_array_equal(msg.linear, linear)


# ---------------------------------------------------------------------------------------------------
# the document agrees with the code
# ---------------------------------------------------------------------------------------------------


def _doc_example_bytes() -> bytes:
    text = DOC.read_text()
    block = text.split("## 14.")[1].split("```")[3]  # the second fenced block of section 14: the hex dump
    hex_digits = "".join(re.match(r"\s*((?:[0-9a-f]{2} ?)*)", line).group(1) for line in block.splitlines())
    return bytes.fromhex(hex_digits.replace(" ", ""))


def test_documented_example_decodes_to_the_documented_twist():
    data = _doc_example_bytes()
    assert len(data) == 181
    msg = wire.decode_twist(data)
    assert (msg.seq, msg.stamp_ns, msg.lease, msg.frame) == (3, 1_700_000_000_000_000_000,
                                                                   "ab12cd34ef56ab78", "tool")
    np.testing.assert_array_equal(msg.linear, [0.1, 0.0, 0.2])
    np.testing.assert_array_equal(msg.angular, [0.0, 0.0, 0.5])
    np.testing.assert_array_equal(msg.point, [0.0, 0.0, 0.1])
    # and our encoder produces exactly these bytes (same field order)
    assert wire.encode_twist(seq=3, lease="ab12cd34ef56ab78", linear=[0.1, 0, 0.2], angular=[0, 0, 0.5],
                              frame="tool", point=[0, 0, 0.1], stamp_ns=1_700_000_000_000_000_000) == data


def test_documented_example_bytes_follow_the_msgpack_spec():
    data = _doc_example_bytes()
    assert data[0] == 0x80 | 9                           # fixmap with 9 entries
    assert data[1:7] == bytes([0xa0 | 5]) + b"proto"     # fixstr of 5 bytes
    i = data.index(b"linear") + len(b"linear")
    assert data[i] == 0x90 | 3                           # fixarray of 3
    assert data[i + 1:i + 10] == b"\xcb" + struct.pack(">d", 0.1)   # float 64, big-endian IEEE 754
    j = data.index(b"stamp_ns") + len(b"stamp_ns")
    assert data[j:j + 9] == b"\xcf" + struct.pack(">Q", 1_700_000_000_000_000_000)  # uint 64


def test_documented_reasons_and_codes_match_the_code():
    text = DOC.read_text()
    for reason in wire.REASONS:
        assert f"| `{reason}`" in text, reason
    for code in wire.ERROR_CODES:
        assert f"| `{code}`" in text, code
    for mode in wire.MODES:
        assert f"| `{mode}`" in text, mode
    for op in wire.OPS:
        assert f"| `{op}`" in text, op


def test_sketch_style_plain_maps_decode():
    """A client built from docs/protocol.md section 15 (plain msgpack dicts, ints where floats go)."""
    twist = {"proto": 1, "kind": "twist", "seq": 1, "stamp_ns": 1, "linear": [0.02, 0, 0],
             "angular": [0, 0, 0], "frame": "base", "lease": "abc"}
    assert wire.decode_twist(msgpack.packb(twist)).linear[0] == 0.02
    req = {"proto": 1, "kind": "request", "seq": 2, "stamp_ns": 1, "op": "claim", "client": "sketch",
           "lease_ms": 2000}
    assert wire.decode_request(msgpack.packb(req)).args == {"client": "sketch", "lease_ms": 2000}
    # float32 from another language's encoder is still a number
    f32 = msgpack.packb({**twist, "linear": [0.5, 0, 0]}, use_single_float=True)
    assert wire.decode_twist(f32).linear[0] == 0.5


def test_the_reused_packer_gives_packbs_bytes_per_thread_and_is_empty_after_a_failure():
    """service/wire/checks.py packb keeps one Packer per thread: its bytes equal msgpack.packb's (the
    reference encoder), threads do not mix their output, and a failed pack leaves nothing behind."""
    import threading

    import msgpack

    from twistrate.service.wire.checks import packb

    with pytest.raises(OverflowError):
        packb({"big": 2**70})
    assert packb({"a": [1.5, 2]}) == msgpack.packb({"a": [1.5, 2]})
    errors = []

    def work(k):
        for i in range(2000):
            m = {"thread": k, "i": i, "v": [float(i)] * 7}
            if packb(m) != msgpack.packb(m):
                errors.append((k, i))

    threads = [threading.Thread(target=work, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
