"""Encode/decode pair of the `state` output message (docs/protocol.md 7.6): where the arm is, at the health
rate, for drawing it and for clients that need the tool pose (a synthetic camera, a dashboard)."""

from __future__ import annotations

import numpy as np

from twistrate.service.wire.checks import (
    HEADER_KEYS,
    dec_int,
    dec_joint_vec,
    dec_vec,
    enc_floats,
    enc_int,
    header,
    input_fail,
    open_map,
    pack,
    submap,
    wire_fail,
)
from twistrate.service.wire.constants import (
    KIND_STATE,
    MAX_JOINT_POSITION,
    MAX_JOINT_VELOCITY,
    MAX_JOINTS,
    MAX_MEASURE,
    MAX_REACH_M,
    MAX_STATE_BYTES,
    MAX_UNIT,
    SEQ_MAX,
)
from twistrate.service.wire.messages import StateMessage

_STATE_KEYS = frozenset((*HEADER_KEYS, "tick", "position", "rate", "tool", "origins", "ellipsoid"))
_TOOL_KEYS = frozenset(("position", "rotation"))
_ELLIPSOID_KEYS = frozenset(("radii", "axes"))


def encode_state(*, seq: int, stamp_ns: int | None, tick: int, position: np.ndarray, rate: np.ndarray,
                 tool_position: np.ndarray, tool_rotation: np.ndarray, origins: np.ndarray,
                 ellipsoid_radii: np.ndarray, ellipsoid_axes: np.ndarray) -> bytes:
    """Encode a state report (fields as StateMessage; matrices are sent row-major, 9 numbers)."""
    m = header(KIND_STATE, seq, stamp_ns)
    m["tick"] = enc_int(tick, "state.tick", 0, SEQ_MAX)
    pos = enc_floats(position, "state.position", None, MAX_JOINT_POSITION)
    if not 1 <= len(pos) <= MAX_JOINTS:
        raise input_fail("state.position", f"{len(pos)} entries", f"1 to {MAX_JOINTS} entries")
    m["position"] = pos
    m["rate"] = enc_floats(rate, "state.rate", len(pos), MAX_JOINT_VELOCITY)
    m["tool"] = {"position": enc_floats(tool_position, "state.tool.position", 3, MAX_REACH_M),
                 "rotation": enc_floats(tool_rotation, "state.tool.rotation", 9, MAX_UNIT)}
    points = np.asarray(origins, dtype=float)
    if points.shape != (len(pos) + 2, 3):
        raise input_fail("state.origins", points.shape, f"({len(pos) + 2}, 3): base, each joint, tool")
    m["origins"] = [enc_floats(p, f"state.origins[{i}]", 3, MAX_REACH_M) for i, p in enumerate(points)]
    radii = enc_floats(ellipsoid_radii, "state.ellipsoid.radii", 3, MAX_MEASURE)
    if min(radii) < 0.0:
        raise input_fail("state.ellipsoid.radii", radii, "3 non-negative numbers")
    m["ellipsoid"] = {"radii": radii, "axes": enc_floats(ellipsoid_axes, "state.ellipsoid.axes", 9, MAX_UNIT)}
    return pack(m, MAX_STATE_BYTES, KIND_STATE)


def decode_state(data: bytes, n: int | None = None) -> StateMessage:
    """Decode and check a state report; n : expected joint count, or None to accept 1..MAX_JOINTS."""
    m, seq, stamp = open_map(data, MAX_STATE_BYTES, KIND_STATE, _STATE_KEYS, False)
    tick = dec_int(m["tick"], "state.tick", 0, SEQ_MAX)
    position = dec_joint_vec(m["position"], "state.position", n, MAX_JOINT_POSITION)
    n = len(position)
    rate = dec_vec(m["rate"], "state.rate", n, MAX_JOINT_VELOCITY)
    tool = submap(m["tool"], "state.tool", _TOOL_KEYS)
    tool_position = dec_vec(tool["position"], "state.tool.position", 3, MAX_REACH_M)
    tool_rotation = dec_vec(tool["rotation"], "state.tool.rotation", 9, MAX_UNIT).reshape(3, 3)
    raw = m["origins"]
    if type(raw) is not list:
        raise wire_fail("bad_type", "state.origins", raw, f"an array of {n + 2} points [x, y, z]")
    if len(raw) != n + 2:
        raise wire_fail("bad_length", "state.origins", f"{len(raw)} entries", f"exactly {n + 2} points")
    origins = np.array([dec_vec(p, f"state.origins[{i}]", 3, MAX_REACH_M) for i, p in enumerate(raw)])
    ell = submap(m["ellipsoid"], "state.ellipsoid", _ELLIPSOID_KEYS)
    radii = dec_vec(ell["radii"], "state.ellipsoid.radii", 3, MAX_MEASURE)
    if radii.min() < 0.0:
        raise wire_fail("bad_value", "state.ellipsoid.radii", radii.tolist(), "non-negative numbers")
    axes = dec_vec(ell["axes"], "state.ellipsoid.axes", 9, MAX_UNIT).reshape(3, 3)
    return StateMessage(seq, stamp, tick, position, rate, tool_position, tool_rotation, origins, radii, axes)
