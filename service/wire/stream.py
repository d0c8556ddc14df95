"""Encode/decode pairs of the stream messages: twist and joints (intake), command, health and event (output).

Stream messages travel as two ZeroMQ frames [topic, map]. The hot path (decode twist, decode joints,
encode command) is a lean hand check: the frame size is checked before unpacking, msgpack unpacks with
bounded lengths, then the exact key set, types (a bool is not a number), lengths, finiteness and
magnitudes are checked in plain Python (twistrate.service.wire.checks).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from twistrate.service.wire.checks import (
    HEADER_KEYS,
    check_header,
    dec_int,
    dec_joint_vec,
    dec_num,
    dec_str,
    dec_vec,
    enc_floats,
    enc_int,
    enc_str,
    header,
    input_fail,
    key_error,
    open_map,
    pack,
    packb,
    seq_stamp,
    unpack,
    wire_fail,
)
from twistrate.service.wire.constants import (
    HEALTH_STATES,
    INSTANCE_MAX,
    INSTANCE_MIN,
    KIND_COMMAND,
    KIND_EVENT,
    KIND_JOINTS,
    KIND_TWIST,
    MAX_ANGULAR_RADPS,
    MAX_COMMAND_BYTES,
    MAX_EVENT_BYTES,
    MAX_JOINT_POSITION,
    MAX_JOINT_VELOCITY,
    MAX_JOINTS,
    MAX_JOINTS_BYTES,
    MAX_LINEAR_MPS,
    MAX_NAME_CHARS,
    MAX_POINT_M,
    MAX_TEXT_CHARS,
    MAX_TOPIC_BYTES,
    MAX_TWIST_BYTES,
    MODES,
    PROTOCOL_VERSION,
    SEQ_MAX,
    TOPIC_COMMAND,
    TOPIC_EVENT,
    TOPIC_HEALTH,
    TOPIC_JOINTS,
    TOPIC_STATE,
    TOPIC_TWIST,
    TWIST_FRAMES,
)
from twistrate.service.wire.health import decode_health
from twistrate.service.wire.messages import (
    CommandMessage,
    EventMessage,
    JointsMessage,
    OutputMessage,
    TwistMessage,
)
from twistrate.service.wire.state import decode_state

_TWIST_REQUIRED = frozenset((*HEADER_KEYS, "linear", "angular", "frame", "lease"))
_TWIST_OPTIONAL = frozenset(("point",))
_TWIST_KEYS_WITH_POINT = _TWIST_REQUIRED | _TWIST_OPTIONAL


def encode_twist(*, seq: int, lease: str, linear: Sequence[float] | np.ndarray,
                 angular: Sequence[float] | np.ndarray, frame: str = "base",
                 point: Sequence[float] | np.ndarray | None = None, stamp_ns: int | None = None) -> bytes:
    """Encode a twist. linear : (3,) m/s; angular : (3,) rad/s; both in `frame` ("base" or "tool");
    point : (3,) m offset of the reference point from the tool origin, in `frame`, or None (omitted:
    the tool origin). lease : token from claim. stamp_ns : None for now."""
    m = header(KIND_TWIST, seq, stamp_ns)
    m["linear"] = enc_floats(linear, "twist.linear", 3, MAX_LINEAR_MPS)
    m["angular"] = enc_floats(angular, "twist.angular", 3, MAX_ANGULAR_RADPS)
    m["frame"] = enc_str(frame, "twist.frame", 8, TWIST_FRAMES)
    if point is not None:
        m["point"] = enc_floats(point, "twist.point", 3, MAX_POINT_M)
    m["lease"] = enc_str(lease, "twist.lease", MAX_NAME_CHARS)
    return pack(m, MAX_TWIST_BYTES, KIND_TWIST)


def decode_twist(data: bytes) -> TwistMessage:
    """Decode and check a twist map (the second frame). Raises WireError."""
    m = unpack(data, MAX_TWIST_BYTES, KIND_TWIST, True)
    check_header(m, KIND_TWIST)
    keys = m.keys()
    if keys != _TWIST_REQUIRED and keys != _TWIST_KEYS_WITH_POINT:
        raise key_error(m, KIND_TWIST, _TWIST_REQUIRED, _TWIST_OPTIONAL)
    seq, stamp = seq_stamp(m, KIND_TWIST)
    frame = m["frame"]
    if frame != "base" and frame != "tool":
        dec_str(frame, "twist.frame", 8, TWIST_FRAMES)
    lease = m["lease"]
    if type(lease) is not str or not lease:
        dec_str(lease, "twist.lease", MAX_NAME_CHARS)
    linear = dec_vec(m["linear"], "twist.linear", 3, MAX_LINEAR_MPS)
    angular = dec_vec(m["angular"], "twist.angular", 3, MAX_ANGULAR_RADPS)
    point = dec_vec(m["point"], "twist.point", 3, MAX_POINT_M) if "point" in m else np.zeros(3)
    return TwistMessage(seq, stamp, lease, linear, angular, frame, point)


# =================================================================================================
# joints (in, topic b"joints"; published by a robot driver or the simulated arm)
# =================================================================================================

_JOINTS_REQUIRED = frozenset((*HEADER_KEYS, "position"))
_JOINTS_OPTIONAL = frozenset(("velocity", "source"))
_JOINTS_KEYS_WITH_VELOCITY = _JOINTS_REQUIRED | {"velocity"}
_JOINTS_KEYS_WITH_SOURCE = _JOINTS_REQUIRED | {"source"}
_JOINTS_KEYS_WITH_BOTH = _JOINTS_REQUIRED | _JOINTS_OPTIONAL


def encode_joints(*, seq: int, position: Sequence[float] | np.ndarray,
                  velocity: Sequence[float] | np.ndarray | None = None, stamp_ns: int | None = None,
                  source: str | None = None) -> bytes:
    """Encode a measured joint state. position : (n,) rad or m; velocity : (n,) rad/s or m/s, or None;
    source : the driver's name (1 to MAX_NAME_CHARS characters, constant while it runs), or None."""
    m = header(KIND_JOINTS, seq, stamp_ns)
    pos = enc_floats(position, "joints.position", None, MAX_JOINT_POSITION)
    if not 1 <= len(pos) <= MAX_JOINTS:
        raise input_fail("joints.position", f"{len(pos)} entries", f"1 to {MAX_JOINTS} entries")
    m["position"] = pos
    if velocity is not None:
        m["velocity"] = enc_floats(velocity, "joints.velocity", len(pos), MAX_JOINT_VELOCITY)
    if source is not None:
        m["source"] = enc_str(source, "joints.source", MAX_NAME_CHARS)
    return pack(m, MAX_JOINTS_BYTES, KIND_JOINTS)


def decode_joints(data: bytes, n: int) -> JointsMessage:
    """Decode and check a joint state of an n-joint arm. Raises WireError (bad_length when not n)."""
    m = unpack(data, MAX_JOINTS_BYTES, KIND_JOINTS, True)
    check_header(m, KIND_JOINTS)
    keys = m.keys()
    if keys != _JOINTS_REQUIRED and keys != _JOINTS_KEYS_WITH_VELOCITY and keys != _JOINTS_KEYS_WITH_SOURCE \
            and keys != _JOINTS_KEYS_WITH_BOTH:
        raise key_error(m, KIND_JOINTS, _JOINTS_REQUIRED, _JOINTS_OPTIONAL)
    seq, stamp = seq_stamp(m, KIND_JOINTS)
    position = dec_vec(m["position"], "joints.position", n, MAX_JOINT_POSITION)
    velocity = dec_vec(m["velocity"], "joints.velocity", n, MAX_JOINT_VELOCITY) if "velocity" in m else None
    source = dec_str(m["source"], "joints.source", MAX_NAME_CHARS) if "source" in m else None
    return JointsMessage(seq, stamp, position, velocity, source)


# =================================================================================================
# command (out, topic b"command", every tick)
# =================================================================================================

_COMMAND_KEYS = frozenset((*HEADER_KEYS, "tick", "rate", "target", "answers", "scale", "mode", "health"))


def encode_command(*, seq: int, stamp_ns: int, tick: int, rate: np.ndarray, target: np.ndarray,
                   answers: int, scale: float, mode: str, health: str) -> bytes:
    """Encode one tick's command (hot path). rate : (n,) rad/s or m/s; target : (n,) rad or m.

    Raises InputError (never publishes) when any number is non-finite or out of the protocol's
    bounds, or mode/health is not one of MODES/HEALTH_STATES. Callers pass ints and floats.
    """
    r = rate.tolist()
    t = target.tolist()
    vb = MAX_JOINT_VELOCITY
    pb = MAX_JOINT_POSITION
    for x in r:
        if not -vb <= x <= vb:
            raise input_fail("command.rate", r, f"finite numbers within +-{vb:g}")
    for x in t:
        if not -pb <= x <= pb:
            raise input_fail("command.target", t, f"finite numbers within +-{pb:g}")
    if len(r) != len(t) or not 1 <= len(r) <= MAX_JOINTS:
        raise input_fail("command.target", f"{len(t)} entries", f"as many entries as rate ({len(r)})")
    if not 0.0 <= scale <= 1.0:
        raise input_fail("command.scale", scale, "a finite number in [0, 1]")
    if type(seq) is not int or type(stamp_ns) is not int or type(tick) is not int \
            or type(answers) is not int or seq < 0 or stamp_ns < 0 or tick < 0 or answers < -1:
        raise input_fail("command", {"seq": seq, "stamp_ns": stamp_ns, "tick": tick, "answers": answers},
                         "Python ints: seq, stamp_ns, tick >= 0 and answers >= -1")
    if mode not in MODES:
        raise input_fail("command.mode", mode, f"one of {', '.join(MODES)}")
    if health not in HEALTH_STATES:
        raise input_fail("command.health", health, f"one of {', '.join(HEALTH_STATES)}")
    try:
        return packb({"proto": PROTOCOL_VERSION, "kind": KIND_COMMAND, "seq": seq,
                              "stamp_ns": stamp_ns, "tick": tick, "rate": r, "target": t,
                              "answers": answers, "scale": float(scale), "mode": mode, "health": health})
    except OverflowError as exc:  # a counter beyond 64 bits
        raise input_fail("command", (seq, stamp_ns, tick, answers),
                         f"counters within 64 bits ({exc})") from None


def decode_command(data: bytes, n: int | None = None) -> CommandMessage:
    """Decode and check a command; n : expected joint count, or None to accept 1..MAX_JOINTS."""
    m, seq, stamp = open_map(data, MAX_COMMAND_BYTES, KIND_COMMAND, _COMMAND_KEYS, True)
    tick = dec_int(m["tick"], "command.tick", 0, SEQ_MAX)
    rate = dec_joint_vec(m["rate"], "command.rate", n, MAX_JOINT_VELOCITY)
    n = len(rate)
    target = dec_vec(m["target"], "command.target", n, MAX_JOINT_POSITION)
    answers = dec_int(m["answers"], "command.answers", -1, SEQ_MAX)
    scale = dec_num(m["scale"], "command.scale", 0.0, 1.0)
    mode = dec_str(m["mode"], "command.mode", MAX_NAME_CHARS, MODES)
    health = dec_str(m["health"], "command.health", MAX_NAME_CHARS, HEALTH_STATES)
    return CommandMessage(seq, stamp, tick, rate, target, answers, scale, mode, health)


# =================================================================================================
# event (out, topic b"event")
# =================================================================================================

_EVENT_KEYS = frozenset((*HEADER_KEYS, "tick", "event", "detail", "mode", "instance"))


def encode_event(*, seq: int, tick: int, event: str, detail: str, mode: str, instance: int,
                 stamp_ns: int | None = None) -> bytes:
    """Encode an event. event : a name of at most 64 characters (see docs/protocol.md "Events");
    detail : human-readable text, truncated to MAX_TEXT_CHARS; instance : the service's instance id
    (INSTANCE_MIN ... INSTANCE_MAX, random at its start; docs/protocol.md section 6)."""
    m = header(KIND_EVENT, seq, stamp_ns)
    m["tick"] = enc_int(tick, "event.tick", 0, SEQ_MAX)
    m["event"] = enc_str(event, "event.event", MAX_NAME_CHARS)
    if type(detail) is not str:
        raise input_fail("event.detail", detail, "a string")
    m["detail"] = detail[:MAX_TEXT_CHARS]
    m["mode"] = enc_str(mode, "event.mode", MAX_NAME_CHARS, MODES)
    m["instance"] = enc_int(instance, "event.instance", INSTANCE_MIN, INSTANCE_MAX)
    return pack(m, MAX_EVENT_BYTES, KIND_EVENT)


def decode_event(data: bytes) -> EventMessage:
    """Decode and check an event."""
    m, seq, stamp = open_map(data, MAX_EVENT_BYTES, KIND_EVENT, _EVENT_KEYS, False)
    tick = dec_int(m["tick"], "event.tick", 0, SEQ_MAX)
    event = dec_str(m["event"], "event.event", MAX_NAME_CHARS)
    detail = dec_str(m["detail"], "event.detail", MAX_TEXT_CHARS, allow_empty=True)
    mode = dec_str(m["mode"], "event.mode", MAX_NAME_CHARS, MODES)
    instance = dec_int(m["instance"], "event.instance", INSTANCE_MIN, INSTANCE_MAX)
    return EventMessage(seq, stamp, tick, event, detail, mode, instance)


# =================================================================================================
# stream framing helpers
# =================================================================================================


def decode_intake(frames: Sequence[bytes], n: int) -> TwistMessage | JointsMessage:
    """Decode one message from the intake SUB socket: frames [topic, map]. n : the arm's joint count."""
    if len(frames) != 2:
        raise wire_fail("bad_frames", "frames", f"{len(frames)} frames", "exactly 2 frames: [topic, map]")
    topic = frames[0]
    if topic == TOPIC_TWIST:
        return decode_twist(frames[1])
    if topic == TOPIC_JOINTS:
        return decode_joints(frames[1], n)
    raise wire_fail("unknown_kind", "topic", bytes(topic[:MAX_TOPIC_BYTES]), "b'twist' or b'joints'")



def decode_output(frames: Sequence[bytes], n: int | None = None) -> OutputMessage:
    """Decode one message from the output PUB socket: frames [topic, map]."""
    if len(frames) != 2:
        raise wire_fail("bad_frames", "frames", f"{len(frames)} frames", "exactly 2 frames: [topic, map]")
    topic = frames[0]
    if topic == TOPIC_COMMAND:
        return decode_command(frames[1], n)
    if topic == TOPIC_HEALTH:
        return decode_health(frames[1], n)
    if topic == TOPIC_EVENT:
        return decode_event(frames[1])
    if topic == TOPIC_STATE:
        return decode_state(frames[1], n)
    raise wire_fail("unknown_kind", "topic", bytes(topic[:MAX_TOPIC_BYTES]),
                    "b'command', b'health', b'event' or b'state'")
