"""The health message's keep-out fields (docs/protocol.md 7.4: `keepout`, `limiting`): round trips, the
map as plain msgpack reads it (the msgpack library as the reader, independent of our decoder), and the
decoder refusing malformed values with the reason keys of section 11."""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest

from twistrate.service import wire
from twistrate.solver import limiting as solver_limiting
from twistrate.solver.errors import InputError, WireError

N = 7


def _kwargs(**over):
    kw = dict(seq=4, stamp_ns=123, tick=99, manipulability=0.012, manipulability_linear=0.3,
              manipulability_angular=0.2, singular_values=np.array([0.9, 0.7, 0.5, 0.3, 0.2, 0.05]),
              inverse_condition=0.05 / 0.9, weakest_linear=np.array([0.6, 0.0, 0.0]),
              weakest_angular=np.array([0.0, 0.0, 0.8 / 0.3]), damping=0.0, scale=0.4,
              limit_margin=np.full(N, 0.25), state="clear", mode="running", rejected={}, overruns=0)
    kw.update(over)
    return kw


def _reason(data: bytes) -> str:
    with pytest.raises(WireError) as info:
        wire.decode_health(data, N)
    return info.value.reason


NEAR = wire.KeepoutNearest(0.0412, "forearm_roll", "bench", "zone")
LIMITS = [wire.Limiting("none"), wire.Limiting("joint", 3, "position"), wire.Limiting("joint", 0, "velocity"),
          wire.Limiting("joint", N - 1, "acceleration"),
          wire.Limiting("keepout", link="wrist_pitch", other="root")]


def test_enumerations_equal_the_solver_copies():
    assert solver_limiting.LIMITERS == wire.LIMITERS
    assert solver_limiting.BOUND_KINDS == wire.BOUND_KINDS


@pytest.mark.parametrize("limit", LIMITS)
@pytest.mark.parametrize("near", [None, NEAR, wire.KeepoutNearest(-0.002, "elbow", "upper_roll", "link")])
def test_round_trip(limit, near):
    data = wire.encode_health(**_kwargs(keepout=near, limiting=limit))
    plain = msgpack.unpackb(data)
    assert plain["limiting"] == limit._asdict()  # every key present, nil where unused (section 7.4)
    assert plain["keepout"] == (None if near is None else near._asdict())
    msg = wire.decode_health(data, N)
    assert msg.limiting == limit and msg.keepout == near
    assert wire.decode_health(data).limiting == limit  # n unknown to the receiver: bound by the margins


def test_default_is_no_keepout_and_nothing_limiting():
    plain = msgpack.unpackb(wire.encode_health(**_kwargs()))
    assert plain["keepout"] is None
    assert plain["limiting"] == {"by": "none", "joint": None, "bound": None, "link": None, "other": None}


def _tampered(field: str, key: str | None, value, base_near=NEAR, base_limit=LIMITS[1]) -> bytes:
    m = msgpack.unpackb(wire.encode_health(**_kwargs(keepout=base_near, limiting=base_limit)))
    if key is None:
        m[field] = value
    elif value is _DROP:
        del m[field][key]
    else:
        m[field][key] = value
    return msgpack.packb(m)


_DROP = object()


@pytest.mark.parametrize("field, key, value, reason", [
    ("keepout", "nearest_m", math.nan, "non_finite"),
    ("keepout", "nearest_m", math.inf, "non_finite"),
    ("keepout", "nearest_m", 2e6, "too_large"),
    ("keepout", "nearest_m", True, "bad_type"),
    ("keepout", "nearest_m", "0.1", "bad_type"),
    ("keepout", "link", "", "bad_value"),
    ("keepout", "link", "x" * 65, "bad_value"),
    ("keepout", "other", 3, "bad_type"),
    ("keepout", "other_kind", "wall", "bad_value"),
    ("keepout", "nearest_m", _DROP, "missing_field"),
    ("keepout", "extra", 1.0, "extra_field"),
    ("keepout", None, [0.1, "a", "b", "zone"], "bad_type"),
    ("limiting", "by", "zone", "bad_value"),
    ("limiting", "by", None, "bad_type"),
    ("limiting", "joint", N, "bad_value"),
    ("limiting", "joint", -1, "bad_value"),
    ("limiting", "joint", 1.0, "bad_type"),
    ("limiting", "bound", "torque", "bad_value"),
    ("limiting", "bound", None, "bad_type"),
    ("limiting", "link", "elbow", "bad_value"),  # a pair with by 'joint'
    ("limiting", "bound", _DROP, "missing_field"),
    ("limiting", "scale", 0.5, "extra_field"),
    ("limiting", None, None, "bad_type"),
])
def test_decoder_refuses_malformed_values(field, key, value, reason):
    assert _reason(_tampered(field, key, value)) == reason


def test_decoder_refuses_fields_that_do_not_match_by():
    none = _tampered("limiting", "joint", 2, base_limit=LIMITS[0])
    assert _reason(none) == "bad_value"
    keep = _tampered("limiting", "bound", "velocity", base_limit=LIMITS[4])
    assert _reason(keep) == "bad_value"
    missing_pair = _tampered("limiting", "other", None, base_limit=LIMITS[4])
    assert _reason(missing_pair) == "bad_type"
    m = msgpack.unpackb(wire.encode_health(**_kwargs()))
    del m["limiting"]
    assert _reason(msgpack.packb(m)) == "missing_field"


@pytest.mark.parametrize("bad", [
    dict(limiting=wire.Limiting("joint", N, "position")),
    dict(limiting=wire.Limiting("joint", 1, "torque")),
    dict(limiting=wire.Limiting("none", joint=1)),
    dict(limiting=wire.Limiting("joint", 1, "position", link="elbow")),
    dict(limiting=wire.Limiting("stuck")),
    dict(keepout=wire.KeepoutNearest(math.nan, "a", "b", "zone")),
    dict(keepout=wire.KeepoutNearest(0.1, "a", "b", "shelf")),
])
def test_encoder_refuses_what_the_protocol_cannot_carry(bad):
    with pytest.raises(InputError):
        wire.encode_health(**_kwargs(**bad))


def test_keepout_events_are_emitted_and_documented():
    from test_protocol_doc import _documented_event_names, _emitted_event_names
    assert set(wire.KEEPOUT_EVENTS) <= _emitted_event_names()
    assert set(wire.KEEPOUT_EVENTS) <= _documented_event_names()
