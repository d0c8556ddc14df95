"""The service instance id on the wire (docs/protocol.md section 6): `instance` in every event and, with
`started_ns`, in the status result; round trips at the bounds, and refusals that name the field."""

from __future__ import annotations

import msgpack
import pytest

from twistrate.service import wire
from twistrate.solver.errors import InputError, WireError

STATUS = {"mode": "disabled", "health": "clear", "tick": 3, "tick_hz": 500.0, "health_hz": 50.0,
          "arm": "reach7", "n": 1, "holder": None, "lease_remaining_ms": None, "fault": None,
          "simulated": True, "reduced_speed": False, "position": [0.0], "twist_age_ms": None,
          "joints_age_ms": None, "realtime": False, "instance": 1, "started_ns": 0,
          "keepout": None,
          "limiting": {"by": "none", "joint": None, "bound": None, "link": None, "other": None}}


def _event(instance):
    return wire.encode_event(seq=1, tick=2, event="enabled", detail="", mode="holding", instance=instance,
                             stamp_ns=5)


@pytest.mark.parametrize("instance", [wire.INSTANCE_MIN, 0x5EED_1D, wire.INSTANCE_MAX])
def test_event_carries_the_instance_id_at_its_bounds(instance):
    msg = wire.decode_event(_event(instance))
    assert msg.instance == instance and type(msg.instance) is int
    assert msg == wire.EventMessage(1, 5, 2, "enabled", "", "holding", instance)


@pytest.mark.parametrize("bad", [0, -1, wire.INSTANCE_MAX + 1, 1.0, True, "1"])
def test_event_encoder_refuses_an_instance_outside_the_protocol(bad):
    with pytest.raises(InputError, match=r"event\.instance"):
        _event(bad)


def _raw_event(**change):
    m = msgpack.unpackb(_event(9))
    m.update(change)
    for key in [k for k, v in change.items() if v is None]:
        del m[key]
    return msgpack.packb(m)


@pytest.mark.parametrize(("change", "reason"), [
    ({"instance": None}, "missing_field"),  # an event without an id is not version 1's
    ({"instance": 0}, "bad_value"),
    ({"instance": 2.0}, "bad_type"),
    ({"instance": False}, "bad_type"),
])
def test_event_decoder_refuses_a_missing_or_bad_instance(change, reason):
    with pytest.raises(WireError) as info:
        wire.decode_event(_raw_event(**change))
    assert info.value.reason == reason and "event.instance" in str(info.value)


@pytest.mark.parametrize(("instance", "started_ns"), [(1, 0), (wire.INSTANCE_MAX, wire.STAMP_MAX),
                                                      (123456789, 1_764_720_000_000_000_000)])
def test_status_carries_instance_and_start_time(instance, started_ns):
    result = {**STATUS, "instance": instance, "started_ns": started_ns}
    msg = wire.decode_reply(wire.encode_reply(seq=4, op="status", result=result, stamp_ns=6))
    assert msg.result["instance"] == instance and msg.result["started_ns"] == started_ns
    assert msg.result == result


@pytest.mark.parametrize(("key", "bad"), [("instance", 0), ("instance", 2**64), ("instance", 1.5),
                                          ("started_ns", -1), ("started_ns", 2**63), ("started_ns", None)])
def test_status_encoder_refuses_a_bad_identity(key, bad):
    with pytest.raises(InputError, match=rf"result\.{key}"):
        wire.encode_reply(seq=4, op="status", result={**STATUS, key: bad})


@pytest.mark.parametrize(("key", "bad", "reason"), [
    ("instance", 0, "bad_value"), ("instance", 3.0, "bad_type"),
    ("started_ns", -5, "bad_value"), ("started_ns", None, "bad_type")])
def test_status_decoder_refuses_a_bad_identity(key, bad, reason):
    good = msgpack.unpackb(wire.encode_reply(seq=4, op="status", result=STATUS, stamp_ns=6))
    good["result"][key] = bad
    with pytest.raises(WireError) as info:
        wire.decode_reply(msgpack.packb(good))
    assert info.value.reason == reason and f"result.{key}" in str(info.value)


def test_status_without_the_identity_is_refused():
    good = msgpack.unpackb(wire.encode_reply(seq=4, op="status", result=STATUS, stamp_ns=6))
    del good["result"]["instance"]
    with pytest.raises(WireError) as info:
        wire.decode_reply(msgpack.packb(good))
    assert info.value.reason == "missing_field"


_NEAR = {"nearest_m": 0.125, "link": "elbow", "other": "table", "other_kind": "zone"}


def test_status_keepout_and_limiting_round_trip():
    # the maps of the health message (docs/protocol.md 7.4), in the status reply (8.2)
    result = {**STATUS, "keepout": _NEAR,
              "limiting": {"by": "keepout", "joint": None, "bound": None, "link": "elbow", "other": "table"}}
    msg = wire.decode_reply(wire.encode_reply(seq=4, op="status", result=result, stamp_ns=6))
    assert msg.result == result
    tuples = {**STATUS, "keepout": wire.KeepoutNearest(*_NEAR.values()),
              "limiting": wire.Limiting("joint", 0, "velocity")}
    msg = wire.decode_reply(wire.encode_reply(seq=4, op="status", result=tuples, stamp_ns=6))
    assert msg.result["keepout"] == _NEAR
    joint = {"by": "joint", "joint": 0, "bound": "velocity", "link": None, "other": None}
    assert msg.result["limiting"] == joint


@pytest.mark.parametrize(("field", "key", "bad", "reason"), [
    ("keepout", "nearest_m", float("nan"), "non_finite"), ("keepout", "other_kind", "floor", "bad_value"),
    ("limiting", "by", "wall", "bad_value"), ("limiting", "joint", 3, "bad_value")])
def test_status_decoder_refuses_a_bad_keepout_or_limiting(field, key, bad, reason):
    result = {**STATUS, "keepout": _NEAR,
              "limiting": {"by": "joint", "joint": 0, "bound": "position", "link": None, "other": None}}
    good = msgpack.unpackb(wire.encode_reply(seq=4, op="status", result=result, stamp_ns=6))
    good["result"][field][key] = bad  # joint 3 is out of range for STATUS's n = 1
    with pytest.raises(WireError) as info:
        wire.decode_reply(msgpack.packb(good))
    assert info.value.reason == reason and f"reply(status).result.{field}.{key}" in str(info.value)
    with pytest.raises(InputError, match=rf"result\.{field}\.{key}"):
        wire.encode_reply(seq=4, op="status", result={**result, field: {**result[field], key: bad}})
