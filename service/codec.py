"""The wire codec: encode/decode pairs for every message kind of protocol version 1 (docs/protocol.md).

Every message is a msgpack map carrying the common header (proto, kind, seq, stamp_ns) plus the
fields of its kind; stream messages travel as two ZeroMQ frames [topic, map], control requests and
replies as the map alone. Decoders check everything a peer could get wrong and raise
``WireError(reason, message)`` with a short stable ``reason`` (a counter key, see REASONS) and a
message naming the field, the value and what is accepted. Encoders raise ``InputError`` when the
caller hands in something the protocol cannot carry (a non-finite number, a wrong length, an
unknown mode); they never emit a message their own decoder would refuse.

The hot path (decode twist, decode joints, encode command) is a lean hand check: the frame size
is checked before unpacking, msgpack unpacks with bounded lengths, then the exact key set, types
(a bool is not a number), lengths, finiteness and magnitudes are checked in plain Python.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from functools import partial
from typing import Any, NamedTuple

import msgpack
import numpy as np

from twistrate.service.state import E_BAD_ARGUMENT, E_FAULT, E_LEASE_HELD, E_NO_LEASE, E_SHUTDOWN, MODES
from twistrate.solver.errors import InputError, WireError, field_error
from twistrate.solver.resolve import DesiredTwist

PROTOCOL_VERSION = 1

# --- topics (first frame of a stream message) and kinds (the `kind` header field) -------------------
TOPIC_TWIST = b"twist"
TOPIC_JOINTS = b"joints"
TOPIC_COMMAND = b"command"
TOPIC_HEALTH = b"health"
TOPIC_EVENT = b"event"
KIND_TWIST = "twist"
KIND_JOINTS = "joints"
KIND_COMMAND = "command"
KIND_HEALTH = "health"
KIND_EVENT = "event"
KIND_REQUEST = "request"
KIND_REPLY = "reply"
KINDS: tuple[str, ...] = (KIND_TWIST, KIND_JOINTS, KIND_COMMAND, KIND_HEALTH, KIND_EVENT, KIND_REQUEST,
                          KIND_REPLY)
INTAKE_TOPICS: tuple[bytes, ...] = (TOPIC_TWIST, TOPIC_JOINTS)
OUTPUT_TOPICS: tuple[bytes, ...] = (TOPIC_COMMAND, TOPIC_HEALTH, TOPIC_EVENT)

# --- default endpoints (the service binds, everyone else connects; loopback by default) -----------
DEFAULT_INTAKE = "tcp://127.0.0.1:47310"
DEFAULT_OUTPUT = "tcp://127.0.0.1:47311"
DEFAULT_CONTROL = "tcp://127.0.0.1:47312"

# --- enumerations --------------------------------------------------------------------------------
TWIST_FRAMES: tuple[str, ...] = ("base", "tool")
#: health states (singularity classifier with hysteresis)
HEALTH_STATES: tuple[str, ...] = ("normal", "approaching", "holding")
OPS: tuple[str, ...] = ("claim", "renew", "release", "enable", "disable", "status", "arm", "counters",
                        "set", "clear_fault")
#: stable error codes of a refused control request (reply.error.code): the state machine's own
#: (service/state.py) plus bad_request (undecodable request) and unknown_op (op not in OPS)
ERROR_CODES: tuple[str, ...] = ("bad_request", "unknown_op", E_NO_LEASE, E_LEASE_HELD, E_FAULT, E_SHUTDOWN,
                                E_BAD_ARGUMENT, "internal")
JOINT_KINDS: tuple[str, ...] = ("revolute", "prismatic")

#: stable reason keys of a refused message (WireError.reason; also the service's counter names)
REASONS: tuple[str, ...] = (
    "oversize",       # frame longer than the kind's cap, or a msgpack length beyond its bound
    "not_msgpack",    # bytes are not exactly one msgpack object
    "bad_frames",     # a stream message that is not exactly [topic, map]
    "bad_version",    # proto is not PROTOCOL_VERSION
    "unknown_kind",   # topic or kind not one of the protocol's
    "kind_mismatch",  # kind differs from the topic, or from what this socket carries
    "missing_field",  # a required key is absent
    "extra_field",    # a key the kind does not define
    "bad_type",       # wrong type (a bool is not a number; an int is accepted where a float is)
    "bad_length",     # wrong array length (3 for vectors, n for joint arrays)
    "non_finite",     # NaN or infinity
    "too_large",      # magnitude beyond the protocol's bound
    "bad_value",      # right type but not an accepted value (enum, negative counter, empty string)
    "unknown_op",     # a control request whose op is not one of OPS
)

# --- size caps (bytes of the map frame; checked before unpacking) --------------------------------
MAX_TWIST_BYTES = 512
MAX_JOINTS_BYTES = 2048
MAX_COMMAND_BYTES = 2048
MAX_HEALTH_BYTES = 8192
MAX_EVENT_BYTES = 4096
MAX_CONTROL_BYTES = 16384
MAX_TOPIC_BYTES = 16

# --- magnitude bounds (absurdity checks at the edge; the service applies the arm's own limits) -----
#: |each component| of a twist's linear velocity, m/s
MAX_LINEAR_MPS = 10.0
#: |each component| of a twist's angular velocity, rad/s
MAX_ANGULAR_RADPS = 20.0
#: |each component| of a twist's reference point offset, m
MAX_POINT_M = 5.0
#: |joint position|, rad or m (several turns of a continuous joint)
MAX_JOINT_POSITION = 1000.0
#: |joint velocity| (measured, or commanded rate), rad/s or m/s
MAX_JOINT_VELOCITY = 100.0
#: largest number of joints any message carries
MAX_JOINTS = 32
#: largest health measure (manipulability, singular values, damping), SI
MAX_MEASURE = 1e9
#: |each component| of the weakest direction's linear part, m/s per unit weighted twist (a component
#: of a unit vector: 1 plus rounding)
MAX_DIRECTION = 1.0 + 1e-9
#: smallest characteristic length L a service may be configured with, m ([solver]
#: characteristic_length); it bounds the weakest direction's angular part below
MIN_CHARACTERISTIC_LENGTH_M = 1e-3
#: |each component| of the weakest direction's angular part, rad/s per unit weighted twist: a component
#: of the unit weighted vector divided by L, so at most 1 / MIN_CHARACTERISTIC_LENGTH_M (plus rounding)
MAX_WEAKEST_ANGULAR = MAX_DIRECTION / MIN_CHARACTERISTIC_LENGTH_M
#: joint-limit margin as a fraction of the joint's range (twistrate.solver.health.limit_margins):
#: min(q - q_min, q_max - q) / (q_max - q_min) is at most 1/2 (mid-range; plus rounding) and negative
#: beyond a limit; the lower bound only refuses absurd values. nil on the wire for an unlimited joint.
MAX_MARGIN_FRACTION = 0.5 + 1e-9
MIN_MARGIN_FRACTION = -1e6
#: lease durations a client may ask for, ms
LEASE_MS_MIN = 1
LEASE_MS_MAX = 600_000
#: strings
MAX_NAME_CHARS = 64
MAX_TEXT_CHARS = 1024
MAX_PARAMS = 32
MAX_MAP_ENTRIES = 128
#: counters are unsigned 64-bit; stamps are signed 64-bit nanoseconds
SEQ_MAX = 2**64 - 1
STAMP_MAX = 2**63 - 1

# msgpack unpack bounds: lengths beyond these fail inside the unpacker, before any allocation.
# "hot" for twist, joints and command (short strings, joint arrays, small maps); "wide" for the rest.
_HOT_MAX_STR = MAX_NAME_CHARS
_HOT_MAX_ARRAY = MAX_JOINTS
_HOT_MAX_MAP = 16
_WIDE_MAX_STR = MAX_TEXT_CHARS * 4  # UTF-8 bytes of MAX_TEXT_CHARS characters
_WIDE_MAX_ARRAY = 256
_WIDE_MAX_MAP = MAX_MAP_ENTRIES

_HEADER = ("proto", "kind", "seq", "stamp_ns")


def _fail(reason: str, field_name: str, value: object, accepted: str) -> WireError:
    """A WireError in the house style: field, offending value, what is accepted."""
    return field_error(partial(WireError, reason), field_name, value, accepted)  # type: ignore[arg-type,return-value]


def _bad_input(field_name: str, value: object, accepted: str) -> InputError:
    return field_error(InputError, field_name, value, accepted)  # type: ignore[return-value]


def now_ns() -> int:
    """The sender's stamp: wall-clock nanoseconds (informative only; watchdogs use receive time)."""
    return time.time_ns()


# =================================================================================================
# decoded messages (named tuples: cheap to build on the hot path, immutable)
# =================================================================================================


class TwistMessage(NamedTuple):
    """A decoded twist. twist : the desired tool twist (linear m/s, angular rad/s, frame, point m)."""

    seq: int
    stamp_ns: int
    lease: str
    twist: DesiredTwist


class JointsMessage(NamedTuple):
    """A decoded joint state. position : (n,) rad or m; velocity : (n,) rad/s or m/s, or None."""

    seq: int
    stamp_ns: int
    position: np.ndarray
    velocity: np.ndarray | None


class CommandMessage(NamedTuple):
    """A decoded command (one per tick).

    rate : (n,) commanded joint rates, rad/s or m/s, joint order.
    target : (n,) q + rate * T, the position the joint should reach at the next tick, rad or m.
    answers : seq of the twist this command answers, -1 when none (at rest, stale or not leased).
    scale : task scaling in [0, 1] applied by the hard limits.
    """

    seq: int
    stamp_ns: int
    tick: int
    rate: np.ndarray
    target: np.ndarray
    answers: int
    scale: float
    mode: str
    health: str


class HealthMessage(NamedTuple):
    """A decoded health report.

    manipulability, manipulability_linear, manipulability_angular : Yoshikawa measures (whole,
        translational rows, rotational rows) of the task-weighted Jacobian.
    singular_values : (k,) k = min(6, n), descending, m (task-weighted).
    inverse_condition : smallest / largest singular value, in [0, 1].
    weakest_linear : (3,) m/s and weakest_angular : (3,) rad/s: the weakest task direction, base frame,
        as twistrate.solver.health gives it: the left singular vector u (6,) of the smallest singular
        value of the task-weighted Jacobian, as a twist (linear = u[:3], angular = u[3:] / L, L the
        characteristic length), so |linear|^2 + L^2 |angular|^2 = 1; sign: the largest-magnitude
        component of u is positive.
    damping : lambda applied, m. scale : task scaling in [0, 1].
    limit_margin : (n,) margin of each joint to its nearer position limit as a fraction of its range,
        min(q - q_min, q_max - q) / (q_max - q_min): 0.5 mid-range, 0 on a limit, negative beyond it;
        +inf for a joint without position limits (nil on the wire).
    rejected : {reason: count} of refused intake messages since start.
    overruns : ticks that missed their deadline since start.
    """

    seq: int
    stamp_ns: int
    tick: int
    manipulability: float
    manipulability_linear: float
    manipulability_angular: float
    singular_values: np.ndarray
    inverse_condition: float
    weakest_linear: np.ndarray
    weakest_angular: np.ndarray
    damping: float
    scale: float
    limit_margin: np.ndarray
    state: str
    mode: str
    rejected: dict[str, int]
    overruns: int


class EventMessage(NamedTuple):
    """A decoded event: a state change or fault. event : name; detail : human-readable text."""

    seq: int
    stamp_ns: int
    tick: int
    event: str
    detail: str
    mode: str


class RequestMessage(NamedTuple):
    """A decoded control request. args : the op's own fields (see REQUEST_ARGS)."""

    seq: int
    stamp_ns: int
    op: str
    args: dict[str, Any]


class ReplyMessage(NamedTuple):
    """A decoded control reply. result : the op's result map when ok; error_code/message when not."""

    seq: int
    stamp_ns: int
    op: str
    ok: bool
    result: dict[str, Any]
    error_code: str | None
    error_message: str | None


# =================================================================================================
# shared checks
# =================================================================================================


def _unpack(data: bytes, cap: int, kind: str, hot: bool) -> dict:
    """Size-check then unpack one msgpack map; raise WireError oversize / not_msgpack / bad_type."""
    if type(data) is not bytes:
        if isinstance(data, (bytearray, memoryview)):
            data = bytes(data)
        else:
            raise _fail("bad_type", kind, type(data).__name__, "bytes")
    if len(data) > cap:
        raise _fail("oversize", kind, f"{len(data)} bytes", f"at most {cap} bytes")
    try:
        if hot:
            m = msgpack.unpackb(data, max_str_len=_HOT_MAX_STR, max_bin_len=0, max_array_len=_HOT_MAX_ARRAY,
                                max_map_len=_HOT_MAX_MAP, max_ext_len=0)
        else:
            m = msgpack.unpackb(data, max_str_len=_WIDE_MAX_STR, max_bin_len=0, max_array_len=_WIDE_MAX_ARRAY,
                                max_map_len=_WIDE_MAX_MAP, max_ext_len=0)
    except ValueError as exc:  # msgpack's FormatError, ExtraData, StackError, limits, bad UTF-8
        text = str(exc)
        if "map key" in text:  # strict_map_key: only str (and bin, bounded to b"") keys
            raise _fail("bad_type", kind, text, "a map with string keys") from None
        if "exceeds max" in text:
            raise _fail("oversize", kind, text,
                        "arrays, maps and strings within the protocol's bounds") from None
        raise _fail("not_msgpack", kind, f"{len(data)} bytes", "exactly one msgpack map") from None
    except Exception:  # anything else the unpacker can raise on hostile bytes
        raise _fail("not_msgpack", kind, f"{len(data)} bytes", "exactly one msgpack map") from None
    if type(m) is not dict:
        raise _fail("bad_type", kind, type(m).__name__, "a msgpack map")
    return m


def _check_header(m: dict, kind: str) -> None:
    """proto == PROTOCOL_VERSION and kind == `kind` (checked before the key set)."""
    proto = m.get("proto")
    if type(proto) is not int or proto != PROTOCOL_VERSION:
        if "proto" not in m:
            raise _fail("missing_field", f"{kind}.proto", None, f"protocol version {PROTOCOL_VERSION}")
        raise _fail("bad_version", f"{kind}.proto", proto, f"protocol version {PROTOCOL_VERSION}")
    got = m.get("kind")
    if got != kind:
        if "kind" not in m:
            raise _fail("missing_field", f"{kind}.kind", None, f"{kind!r}")
        if type(got) is not str:
            raise _fail("bad_type", f"{kind}.kind", got, f"the string {kind!r}")
        if got not in KINDS:
            raise _fail("unknown_kind", f"{kind}.kind", got, f"one of {', '.join(KINDS)}")
        raise _fail("kind_mismatch", f"{kind}.kind", got, f"{kind!r} on this topic/socket")


def _key_error(m: dict, kind: str, required: frozenset[str], optional: frozenset[str]) -> WireError:
    missing = sorted(required - m.keys())
    if missing:
        return _fail("missing_field", f"{kind}.{missing[0]}", None,
                     f"required fields {', '.join(sorted(required))}")
    extra = sorted(str(k) for k in m.keys() - required - optional)
    allowed = sorted(required | optional)
    return _fail("extra_field", f"{kind}.{extra[0]}", m.get(extra[0]),
                 f"only the fields {', '.join(allowed)}")


def _int(v: object, name: str, lo: int, hi: int) -> int:
    if type(v) is not int:
        raise _fail("bad_type", name, v, f"an integer in [{lo}, {hi}]")
    if v < lo or v > hi:
        raise _fail("bad_value", name, v, f"an integer in [{lo}, {hi}]")
    return v


def _num(v: object, name: str, lo: float, hi: float) -> float:
    t = type(v)
    if t is not float and t is not int:
        raise _fail("bad_type", name, v, "a number (float or integer; not a bool)")
    if not lo <= v <= hi:  # type: ignore[operator]
        if not math.isfinite(v):  # type: ignore[arg-type]
            raise _fail("non_finite", name, v, f"a finite number in [{lo}, {hi}]")
        raise _fail("too_large", name, v, f"a number in [{lo}, {hi}]")
    return float(v)  # type: ignore[arg-type]


def _str(v: object, name: str, max_chars: int, choices: tuple[str, ...] | None = None,
         allow_empty: bool = False) -> str:
    if type(v) is not str:
        raise _fail("bad_type", name, v, "a string")
    if choices is not None:
        if v not in choices:
            raise _fail("bad_value", name, v, f"one of {', '.join(choices)}")
        return v
    if len(v) > max_chars or (not v and not allow_empty):
        raise _fail("bad_value", name, v, f"a {'' if allow_empty else 'non-empty '}string of at most "
                    f"{max_chars} characters")
    return v


def _vec(v: object, name: str, n: int, bound: float) -> np.ndarray:
    """A list of exactly n finite numbers, each within +-bound, as a float (n,) array."""
    if type(v) is not list or len(v) != n:
        if type(v) is not list:
            raise _fail("bad_type", name, v, f"an array of {n} numbers")
        raise _fail("bad_length", name, f"{len(v)} entries", f"exactly {n} entries")
    for x in v:
        t = type(x)
        if (t is not float and t is not int) or not -bound <= x <= bound:
            _vec_diagnose(v, name, bound)
    return np.array(v, dtype=float)


def _vec_diagnose(v: list, name: str, bound: float) -> None:
    for i, x in enumerate(v):
        _num(x, f"{name}[{i}]", -bound, bound)


def _vec_any(v: object, name: str, bound: float, lo_len: int, hi_len: int) -> np.ndarray:
    """A list of finite numbers of length in [lo_len, hi_len]."""
    if type(v) is not list:
        raise _fail("bad_type", name, v, f"an array of {lo_len} to {hi_len} numbers")
    if not lo_len <= len(v) <= hi_len:
        raise _fail("bad_length", name, f"{len(v)} entries", f"{lo_len} to {hi_len} entries")
    return _vec(v, name, len(v), bound)


def _seq_stamp(m: dict, kind: str) -> tuple[int, int]:
    seq = m["seq"]
    stamp = m["stamp_ns"]
    if type(seq) is not int or not 0 <= seq <= SEQ_MAX:
        _int(seq, f"{kind}.seq", 0, SEQ_MAX)
    if type(stamp) is not int or not 0 <= stamp <= STAMP_MAX:
        _int(stamp, f"{kind}.stamp_ns", 0, STAMP_MAX)
    return seq, stamp


def _finite_list(a: object, name: str, n: int | None, bound: float) -> list[float]:
    """Encoder side: `a` as a list of n finite floats within +-bound, or InputError naming `name`."""
    try:
        values = np.asarray(a, dtype=float).reshape(-1).tolist() if not isinstance(a, list) else \
            [float(x) for x in a]
    except (TypeError, ValueError):
        raise _bad_input(name, a, "an array of numbers") from None
    if n is not None and len(values) != n:
        raise _bad_input(name, f"{len(values)} entries", f"exactly {n} entries")
    for x in values:
        if not -bound <= x <= bound:
            raise _bad_input(name, values, f"finite numbers within +-{bound:g}")
    return values


def _enc_int(v: object, name: str, lo: int, hi: int) -> int:
    if type(v) is not int and not isinstance(v, np.integer):
        raise _bad_input(name, v, f"an integer in [{lo}, {hi}]")
    v = int(v)  # type: ignore[arg-type]
    if not lo <= v <= hi:
        raise _bad_input(name, v, f"an integer in [{lo}, {hi}]")
    return v


def _enc_num(v: object, name: str, lo: float, hi: float) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)):
        raise _bad_input(name, v, "a number")
    v = float(v)
    if not lo <= v <= hi:
        raise _bad_input(name, v, f"a finite number in [{lo:g}, {hi:g}]")
    return v


def _enc_str(v: object, name: str, max_chars: int, choices: tuple[str, ...] | None = None,
             allow_empty: bool = False) -> str:
    if type(v) is not str:
        raise _bad_input(name, v, "a string")
    if choices is not None:
        if v not in choices:
            raise _bad_input(name, v, f"one of {', '.join(repr(c) for c in choices)}")
        return v
    if len(v) > max_chars or (not v and not allow_empty):
        raise _bad_input(name, v, f"a string of 1 to {max_chars} characters")
    return v


def _header(kind: str, seq: int, stamp_ns: int | None) -> dict:
    seq = _enc_int(seq, f"{kind}.seq", 0, SEQ_MAX)
    stamp = now_ns() if stamp_ns is None else _enc_int(stamp_ns, f"{kind}.stamp_ns", 0, STAMP_MAX)
    return {"proto": PROTOCOL_VERSION, "kind": kind, "seq": seq, "stamp_ns": stamp}


def _pack(m: dict, cap: int, kind: str) -> bytes:
    data = msgpack.packb(m, use_bin_type=True)
    if len(data) > cap:
        raise _bad_input(kind, f"{len(data)} bytes", f"at most {cap} bytes (shorten the strings)")
    return data


# =================================================================================================
# twist (in, topic b"twist")
# =================================================================================================

_TWIST_REQUIRED = frozenset((*_HEADER, "linear", "angular", "frame", "lease"))
_TWIST_OPTIONAL = frozenset(("point",))
_TWIST_KEYS_WITH_POINT = _TWIST_REQUIRED | _TWIST_OPTIONAL


def encode_twist(*, seq: int, lease: str, linear: Sequence[float] | np.ndarray,
                 angular: Sequence[float] | np.ndarray, frame: str = "base",
                 point: Sequence[float] | np.ndarray | None = None, stamp_ns: int | None = None) -> bytes:
    """Encode a twist. linear : (3,) m/s; angular : (3,) rad/s; both in `frame` ("base" or "tool");
    point : (3,) m offset of the reference point from the tool origin, in `frame`, or None (omitted:
    the tool origin). lease : token from claim. stamp_ns : None for now."""
    m = _header(KIND_TWIST, seq, stamp_ns)
    m["linear"] = _finite_list(linear, "twist.linear", 3, MAX_LINEAR_MPS)
    m["angular"] = _finite_list(angular, "twist.angular", 3, MAX_ANGULAR_RADPS)
    m["frame"] = _enc_str(frame, "twist.frame", 8, TWIST_FRAMES)
    if point is not None:
        m["point"] = _finite_list(point, "twist.point", 3, MAX_POINT_M)
    m["lease"] = _enc_str(lease, "twist.lease", MAX_NAME_CHARS)
    return _pack(m, MAX_TWIST_BYTES, KIND_TWIST)


def decode_twist(data: bytes) -> TwistMessage:
    """Decode and check a twist map (the second frame). Raises WireError."""
    m = _unpack(data, MAX_TWIST_BYTES, KIND_TWIST, True)
    _check_header(m, KIND_TWIST)
    keys = m.keys()
    if keys != _TWIST_REQUIRED and keys != _TWIST_KEYS_WITH_POINT:
        raise _key_error(m, KIND_TWIST, _TWIST_REQUIRED, _TWIST_OPTIONAL)
    seq, stamp = _seq_stamp(m, KIND_TWIST)
    frame = m["frame"]
    if frame != "base" and frame != "tool":
        _str(frame, "twist.frame", 8, TWIST_FRAMES)
    lease = m["lease"]
    if type(lease) is not str or not lease:
        _str(lease, "twist.lease", MAX_NAME_CHARS)
    linear = _vec(m["linear"], "twist.linear", 3, MAX_LINEAR_MPS)
    angular = _vec(m["angular"], "twist.angular", 3, MAX_ANGULAR_RADPS)
    point = _vec(m["point"], "twist.point", 3, MAX_POINT_M) if "point" in m else np.zeros(3)
    return TwistMessage(seq, stamp, lease, DesiredTwist(linear, angular, frame, point))


# =================================================================================================
# joints (in, topic b"joints"; published by a robot driver or the simulated arm)
# =================================================================================================

_JOINTS_REQUIRED = frozenset((*_HEADER, "position"))
_JOINTS_OPTIONAL = frozenset(("velocity",))
_JOINTS_KEYS_WITH_VELOCITY = _JOINTS_REQUIRED | _JOINTS_OPTIONAL


def encode_joints(*, seq: int, position: Sequence[float] | np.ndarray,
                  velocity: Sequence[float] | np.ndarray | None = None, stamp_ns: int | None = None) -> bytes:
    """Encode a measured joint state. position : (n,) rad or m; velocity : (n,) rad/s or m/s, or None."""
    m = _header(KIND_JOINTS, seq, stamp_ns)
    pos = _finite_list(position, "joints.position", None, MAX_JOINT_POSITION)
    if not 1 <= len(pos) <= MAX_JOINTS:
        raise _bad_input("joints.position", f"{len(pos)} entries", f"1 to {MAX_JOINTS} entries")
    m["position"] = pos
    if velocity is not None:
        m["velocity"] = _finite_list(velocity, "joints.velocity", len(pos), MAX_JOINT_VELOCITY)
    return _pack(m, MAX_JOINTS_BYTES, KIND_JOINTS)


def decode_joints(data: bytes, n: int) -> JointsMessage:
    """Decode and check a joint state of an n-joint arm. Raises WireError (bad_length when not n)."""
    m = _unpack(data, MAX_JOINTS_BYTES, KIND_JOINTS, True)
    _check_header(m, KIND_JOINTS)
    keys = m.keys()
    if keys != _JOINTS_REQUIRED and keys != _JOINTS_KEYS_WITH_VELOCITY:
        raise _key_error(m, KIND_JOINTS, _JOINTS_REQUIRED, _JOINTS_OPTIONAL)
    seq, stamp = _seq_stamp(m, KIND_JOINTS)
    position = _vec(m["position"], "joints.position", n, MAX_JOINT_POSITION)
    velocity = _vec(m["velocity"], "joints.velocity", n, MAX_JOINT_VELOCITY) if "velocity" in m else None
    return JointsMessage(seq, stamp, position, velocity)


# =================================================================================================
# command (out, topic b"command", every tick)
# =================================================================================================

_COMMAND_KEYS = frozenset((*_HEADER, "tick", "rate", "target", "answers", "scale", "mode", "health"))


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
            raise _bad_input("command.rate", r, f"finite numbers within +-{vb:g}")
    for x in t:
        if not -pb <= x <= pb:
            raise _bad_input("command.target", t, f"finite numbers within +-{pb:g}")
    if len(r) != len(t) or not 1 <= len(r) <= MAX_JOINTS:
        raise _bad_input("command.target", f"{len(t)} entries", f"as many entries as rate ({len(r)})")
    if not 0.0 <= scale <= 1.0:
        raise _bad_input("command.scale", scale, "a finite number in [0, 1]")
    if type(seq) is not int or type(stamp_ns) is not int or type(tick) is not int \
            or type(answers) is not int or seq < 0 or stamp_ns < 0 or tick < 0 or answers < -1:
        raise _bad_input("command", {"seq": seq, "stamp_ns": stamp_ns, "tick": tick, "answers": answers},
                         "Python ints: seq, stamp_ns, tick >= 0 and answers >= -1")
    if mode not in MODES:
        raise _bad_input("command.mode", mode, f"one of {', '.join(MODES)}")
    if health not in HEALTH_STATES:
        raise _bad_input("command.health", health, f"one of {', '.join(HEALTH_STATES)}")
    try:
        return msgpack.packb({"proto": PROTOCOL_VERSION, "kind": KIND_COMMAND, "seq": seq,
                              "stamp_ns": stamp_ns, "tick": tick, "rate": r, "target": t,
                              "answers": answers, "scale": float(scale), "mode": mode, "health": health})
    except OverflowError as exc:  # a counter beyond 64 bits
        raise _bad_input("command", (seq, stamp_ns, tick, answers),
                         f"counters within 64 bits ({exc})") from None


def decode_command(data: bytes, n: int | None = None) -> CommandMessage:
    """Decode and check a command; n : expected joint count, or None to accept 1..MAX_JOINTS."""
    m = _unpack(data, MAX_COMMAND_BYTES, KIND_COMMAND, True)
    _check_header(m, KIND_COMMAND)
    if m.keys() != _COMMAND_KEYS:
        raise _key_error(m, KIND_COMMAND, _COMMAND_KEYS, frozenset())
    seq, stamp = _seq_stamp(m, KIND_COMMAND)
    tick = _int(m["tick"], "command.tick", 0, SEQ_MAX)
    if n is None:
        rate = _vec_any(m["rate"], "command.rate", MAX_JOINT_VELOCITY, 1, MAX_JOINTS)
        n = len(rate)
    else:
        rate = _vec(m["rate"], "command.rate", n, MAX_JOINT_VELOCITY)
    target = _vec(m["target"], "command.target", n, MAX_JOINT_POSITION)
    answers = _int(m["answers"], "command.answers", -1, SEQ_MAX)
    scale = _num(m["scale"], "command.scale", 0.0, 1.0)
    mode = _str(m["mode"], "command.mode", MAX_NAME_CHARS, MODES)
    health = _str(m["health"], "command.health", MAX_NAME_CHARS, HEALTH_STATES)
    return CommandMessage(seq, stamp, tick, rate, target, answers, scale, mode, health)


# =================================================================================================
# health (out, topic b"health", at the configured publish rate)
# =================================================================================================

_HEALTH_KEYS = frozenset((*_HEADER, "tick", "manipulability", "singular_values", "inverse_condition",
                          "weakest", "damping", "scale", "limit_margin", "state", "mode", "rejected",
                          "overruns"))
_MANIP_KEYS = frozenset(("whole", "linear", "angular"))
_WEAKEST_KEYS = frozenset(("linear", "angular"))


def encode_health(*, seq: int, stamp_ns: int | None, tick: int, manipulability: float,
                  manipulability_linear: float, manipulability_angular: float,
                  singular_values: np.ndarray, inverse_condition: float, weakest_linear: np.ndarray,
                  weakest_angular: np.ndarray, damping: float, scale: float, limit_margin: np.ndarray,
                  state: str, mode: str, rejected: Mapping[str, int], overruns: int) -> bytes:
    """Encode a health report (fields as HealthMessage). limit_margin entries may be +inf (sent as nil)."""
    m = _header(KIND_HEALTH, seq, stamp_ns)
    m["tick"] = _enc_int(tick, "health.tick", 0, SEQ_MAX)
    m["manipulability"] = {
        "whole": _enc_num(manipulability, "health.manipulability.whole", 0.0, MAX_MEASURE),
        "linear": _enc_num(manipulability_linear, "health.manipulability.linear", 0.0, MAX_MEASURE),
        "angular": _enc_num(manipulability_angular, "health.manipulability.angular", 0.0, MAX_MEASURE),
    }
    sv = _finite_list(singular_values, "health.singular_values", None, MAX_MEASURE)
    if not 1 <= len(sv) <= 6 or min(sv) < 0.0:
        raise _bad_input("health.singular_values", sv, "1 to 6 non-negative numbers")
    m["singular_values"] = sv
    m["inverse_condition"] = _enc_num(inverse_condition, "health.inverse_condition", 0.0, 1.0)
    m["weakest"] = {"linear": _finite_list(weakest_linear, "health.weakest.linear", 3, MAX_DIRECTION),
                    "angular": _finite_list(weakest_angular, "health.weakest.angular", 3,
                                            MAX_WEAKEST_ANGULAR)}
    m["damping"] = _enc_num(damping, "health.damping", 0.0, MAX_MEASURE)
    m["scale"] = _enc_num(scale, "health.scale", 0.0, 1.0)
    margins = np.asarray(limit_margin, dtype=float).reshape(-1)
    if not 1 <= margins.size <= MAX_JOINTS:
        raise _bad_input("health.limit_margin", f"{margins.size} entries", f"1 to {MAX_JOINTS} entries")
    wire_margins: list[float | None] = []
    for x in margins.tolist():
        if x == math.inf:
            wire_margins.append(None)
        elif MIN_MARGIN_FRACTION <= x <= MAX_MARGIN_FRACTION:
            wire_margins.append(x)
        else:
            raise _bad_input("health.limit_margin", margins.tolist(),
                             f"fractions of the joint range in [{MIN_MARGIN_FRACTION:g}, 0.5], or +inf for "
                             "an unlimited joint")
    m["limit_margin"] = wire_margins
    m["state"] = _enc_str(state, "health.state", MAX_NAME_CHARS, HEALTH_STATES)
    m["mode"] = _enc_str(mode, "health.mode", MAX_NAME_CHARS, MODES)
    if len(rejected) > MAX_MAP_ENTRIES:
        raise _bad_input("health.rejected", f"{len(rejected)} entries", f"at most {MAX_MAP_ENTRIES}")
    m["rejected"] = {_enc_str(k, "health.rejected key", MAX_NAME_CHARS):
                     _enc_int(v, f"health.rejected.{k}", 0, SEQ_MAX) for k, v in rejected.items()}
    m["overruns"] = _enc_int(overruns, "health.overruns", 0, SEQ_MAX)
    return _pack(m, MAX_HEALTH_BYTES, KIND_HEALTH)


def _submap(v: object, name: str, keys: frozenset[str]) -> dict:
    if type(v) is not dict:
        raise _fail("bad_type", name, v, f"a map with the fields {', '.join(sorted(keys))}")
    if v.keys() != keys:
        raise _key_error(v, name, keys, frozenset())
    return v


def decode_health(data: bytes, n: int | None = None) -> HealthMessage:
    """Decode and check a health report; n : expected joint count, or None to accept 1..MAX_JOINTS."""
    m = _unpack(data, MAX_HEALTH_BYTES, KIND_HEALTH, False)
    _check_header(m, KIND_HEALTH)
    if m.keys() != _HEALTH_KEYS:
        raise _key_error(m, KIND_HEALTH, _HEALTH_KEYS, frozenset())
    seq, stamp = _seq_stamp(m, KIND_HEALTH)
    tick = _int(m["tick"], "health.tick", 0, SEQ_MAX)
    man = _submap(m["manipulability"], "health.manipulability", _MANIP_KEYS)
    whole = _num(man["whole"], "health.manipulability.whole", 0.0, MAX_MEASURE)
    lin = _num(man["linear"], "health.manipulability.linear", 0.0, MAX_MEASURE)
    ang = _num(man["angular"], "health.manipulability.angular", 0.0, MAX_MEASURE)
    sv = _vec_any(m["singular_values"], "health.singular_values", MAX_MEASURE, 1, 6)
    if sv.min() < 0.0:
        raise _fail("bad_value", "health.singular_values", sv.tolist(), "non-negative numbers")
    inv = _num(m["inverse_condition"], "health.inverse_condition", 0.0, 1.0)
    weak = _submap(m["weakest"], "health.weakest", _WEAKEST_KEYS)
    wl = _vec(weak["linear"], "health.weakest.linear", 3, MAX_DIRECTION)
    wa = _vec(weak["angular"], "health.weakest.angular", 3, MAX_WEAKEST_ANGULAR)
    damping = _num(m["damping"], "health.damping", 0.0, MAX_MEASURE)
    scale = _num(m["scale"], "health.scale", 0.0, 1.0)
    raw_margin = m["limit_margin"]
    if type(raw_margin) is not list:
        raise _fail("bad_type", "health.limit_margin", raw_margin, "an array of numbers or nil")
    if n is not None and len(raw_margin) != n:
        raise _fail("bad_length", "health.limit_margin", f"{len(raw_margin)} entries", f"exactly {n} entries")
    if not 1 <= len(raw_margin) <= MAX_JOINTS:
        raise _fail("bad_length", "health.limit_margin", f"{len(raw_margin)} entries",
                    f"1 to {MAX_JOINTS} entries")
    margin = np.array([math.inf if x is None else
                       _num(x, f"health.limit_margin[{i}]", MIN_MARGIN_FRACTION, MAX_MARGIN_FRACTION)
                       for i, x in enumerate(raw_margin)], dtype=float)
    state = _str(m["state"], "health.state", MAX_NAME_CHARS, HEALTH_STATES)
    mode = _str(m["mode"], "health.mode", MAX_NAME_CHARS, MODES)
    raw_rej = m["rejected"]
    if type(raw_rej) is not dict:
        raise _fail("bad_type", "health.rejected", raw_rej, "a map of reason -> count")
    rejected = {_str(k, "health.rejected key", MAX_NAME_CHARS): _int(v, f"health.rejected.{k}", 0, SEQ_MAX)
                for k, v in raw_rej.items()}
    overruns = _int(m["overruns"], "health.overruns", 0, SEQ_MAX)
    return HealthMessage(seq, stamp, tick, whole, lin, ang, sv, inv, wl, wa, damping, scale, margin, state,
                         mode, rejected, overruns)


# =================================================================================================
# event (out, topic b"event")
# =================================================================================================

_EVENT_KEYS = frozenset((*_HEADER, "tick", "event", "detail", "mode"))


def encode_event(*, seq: int, tick: int, event: str, detail: str, mode: str,
                 stamp_ns: int | None = None) -> bytes:
    """Encode an event. event : a name of at most 64 characters (see docs/protocol.md "Events");
    detail : human-readable text, truncated to MAX_TEXT_CHARS."""
    m = _header(KIND_EVENT, seq, stamp_ns)
    m["tick"] = _enc_int(tick, "event.tick", 0, SEQ_MAX)
    m["event"] = _enc_str(event, "event.event", MAX_NAME_CHARS)
    if type(detail) is not str:
        raise _bad_input("event.detail", detail, "a string")
    m["detail"] = detail[:MAX_TEXT_CHARS]
    m["mode"] = _enc_str(mode, "event.mode", MAX_NAME_CHARS, MODES)
    return _pack(m, MAX_EVENT_BYTES, KIND_EVENT)


def decode_event(data: bytes) -> EventMessage:
    """Decode and check an event."""
    m = _unpack(data, MAX_EVENT_BYTES, KIND_EVENT, False)
    _check_header(m, KIND_EVENT)
    if m.keys() != _EVENT_KEYS:
        raise _key_error(m, KIND_EVENT, _EVENT_KEYS, frozenset())
    seq, stamp = _seq_stamp(m, KIND_EVENT)
    tick = _int(m["tick"], "event.tick", 0, SEQ_MAX)
    event = _str(m["event"], "event.event", MAX_NAME_CHARS)
    detail = _str(m["detail"], "event.detail", MAX_TEXT_CHARS, allow_empty=True)
    mode = _str(m["mode"], "event.mode", MAX_NAME_CHARS, MODES)
    return EventMessage(seq, stamp, tick, event, detail, mode)


# =================================================================================================
# stream framing helpers
# =================================================================================================


def decode_intake(frames: Sequence[bytes], n: int) -> TwistMessage | JointsMessage:
    """Decode one message from the intake SUB socket: frames [topic, map]. n : the arm's joint count."""
    if len(frames) != 2:
        raise _fail("bad_frames", "frames", f"{len(frames)} frames", "exactly 2 frames: [topic, map]")
    topic = frames[0]
    if topic == TOPIC_TWIST:
        return decode_twist(frames[1])
    if topic == TOPIC_JOINTS:
        return decode_joints(frames[1], n)
    raise _fail("unknown_kind", "topic", bytes(topic[:MAX_TOPIC_BYTES]), "b'twist' or b'joints'")


OutputMessage = CommandMessage | HealthMessage | EventMessage


def decode_output(frames: Sequence[bytes], n: int | None = None) -> OutputMessage:
    """Decode one message from the output PUB socket: frames [topic, map]."""
    if len(frames) != 2:
        raise _fail("bad_frames", "frames", f"{len(frames)} frames", "exactly 2 frames: [topic, map]")
    topic = frames[0]
    if topic == TOPIC_COMMAND:
        return decode_command(frames[1], n)
    if topic == TOPIC_HEALTH:
        return decode_health(frames[1], n)
    if topic == TOPIC_EVENT:
        return decode_event(frames[1])
    raise _fail("unknown_kind", "topic", bytes(topic[:MAX_TOPIC_BYTES]), "b'command', b'health' or b'event'")


# =================================================================================================
# control request / reply (control ROUTER; the map is the only frame after the envelope)
# =================================================================================================

#: op -> (required argument fields, optional argument fields)
REQUEST_ARGS: dict[str, tuple[frozenset[str], frozenset[str]]] = {
    "claim": (frozenset(("client",)), frozenset(("lease_ms",))),
    "renew": (frozenset(("lease",)), frozenset()),
    "release": (frozenset(("lease",)), frozenset()),
    "enable": (frozenset(("lease",)), frozenset()),
    "disable": (frozenset(("lease",)), frozenset()),
    "status": (frozenset(), frozenset()),
    "arm": (frozenset(), frozenset()),
    "counters": (frozenset(), frozenset()),
    "set": (frozenset(("lease", "params")), frozenset()),
    "clear_fault": (frozenset(("lease",)), frozenset()),
}

#: op -> exact key set of reply.result when ok
REPLY_RESULTS: dict[str, frozenset[str]] = {
    "claim": frozenset(("lease", "lease_ms", "client")),
    "renew": frozenset(("lease_ms",)),
    "release": frozenset(),
    "enable": frozenset(("mode",)),
    "disable": frozenset(("mode",)),
    "status": frozenset(("mode", "health", "tick", "tick_hz", "arm", "n", "holder", "lease_remaining_ms",
                         "fault", "simulated", "reduced_speed", "position", "twist_age_ms", "joints_age_ms",
                         "realtime")),
    "arm": frozenset(("name", "n", "joints", "home")),
    "counters": frozenset(("counters",)),
    "set": frozenset(("params",)),
    "clear_fault": frozenset(("mode",)),
}

_REQUEST_HEADER = frozenset((*_HEADER, "op"))


def _param_value(v: object, name: str) -> bool | int | float | str:
    t = type(v)
    if t is bool:
        return v  # type: ignore[return-value]
    if t is int or t is float:
        if not math.isfinite(v):  # type: ignore[arg-type]
            raise _fail("non_finite", name, v, "a finite number")
        return v  # type: ignore[return-value]
    if t is str:
        return _str(v, name, MAX_NAME_CHARS)
    raise _fail("bad_type", name, v, "a bool, number or string")


def _check_args(args: Mapping[str, Any]) -> dict[str, Any]:
    """Type and bound checks of a request's argument fields; raises WireError naming the field."""
    out: dict[str, Any] = {}
    for key, v in args.items():
        name = f"request.{key}"
        if key in ("client", "lease"):
            out[key] = _str(v, name, MAX_NAME_CHARS)
        elif key == "lease_ms":
            out[key] = _int(v, name, LEASE_MS_MIN, LEASE_MS_MAX)
        elif key == "params":
            if type(v) is not dict:
                raise _fail("bad_type", name, v, f"a map of 1 to {MAX_PARAMS} name -> value entries")
            if not 1 <= len(v) <= MAX_PARAMS:
                raise _fail("bad_length", name, f"{len(v)} entries", f"1 to {MAX_PARAMS} entries")
            out[key] = {_str(k, f"{name} key", MAX_NAME_CHARS): _param_value(p, f"{name}.{k}")
                        for k, p in v.items()}
    return out


def _args_error(op: str, given: frozenset[str]) -> tuple[str, str, str]:
    """(reason, field, accepted) for a request whose argument fields do not match its op."""
    required, optional = REQUEST_ARGS[op]
    accepted = f"for op {op!r}: {', '.join(sorted(required)) or 'no fields'}" + (
        f" (optional: {', '.join(sorted(optional))})" if optional else "")
    missing = sorted(required - given)
    if missing:
        return "missing_field", f"request.{missing[0]}", accepted
    return "extra_field", f"request.{sorted(map(str, given - required - optional))[0]}", accepted


def encode_request(*, seq: int, op: str, stamp_ns: int | None = None, **args: Any) -> bytes:
    """Encode a control request: op plus its argument fields (REQUEST_ARGS), e.g.
    encode_request(seq=1, op="claim", client="pad", lease_ms=1000)."""
    m = _header(KIND_REQUEST, seq, stamp_ns)
    m["op"] = _enc_str(op, "request.op", MAX_NAME_CHARS, OPS)
    required, optional = REQUEST_ARGS[op]
    given = frozenset(args)
    if not required <= given <= required | optional:
        _, name, accepted = _args_error(op, given)
        raise _bad_input(name, sorted(given), accepted)
    try:
        m.update(_check_args(args))
    except WireError as exc:
        raise InputError(str(exc)) from None
    return _pack(m, MAX_CONTROL_BYTES, KIND_REQUEST)


def decode_request(data: bytes) -> RequestMessage:
    """Decode and check a control request. Raises WireError (an op not in OPS: reason unknown_op)."""
    m = _unpack(data, MAX_CONTROL_BYTES, KIND_REQUEST, False)
    _check_header(m, KIND_REQUEST)
    for key in ("seq", "stamp_ns", "op"):
        if key not in m:
            raise _fail("missing_field", f"request.{key}", None,
                        f"required fields {', '.join(sorted(_REQUEST_HEADER))}")
    seq, stamp = _seq_stamp(m, KIND_REQUEST)
    op = m["op"]
    if op not in OPS:
        if type(op) is not str:
            raise _fail("bad_type", "request.op", op, f"one of {', '.join(OPS)}")
        raise _fail("unknown_op", "request.op", op, f"one of {', '.join(OPS)}")
    required, optional = REQUEST_ARGS[op]
    given = frozenset(m.keys() - _REQUEST_HEADER)
    if not required <= given <= required | optional:
        reason, name, accepted = _args_error(op, given)
        raise _fail(reason, name, m.get(name.split(".", 1)[1]), accepted)
    return RequestMessage(seq, stamp, op, _check_args({k: m[k] for k in given}))


def error_code(exc: WireError) -> str:
    """The reply error code for a request that failed to decode: unknown_op or bad_request."""
    return "unknown_op" if exc.reason == "unknown_op" else "bad_request"


def peek_request(data: bytes) -> tuple[int, str]:
    """Best-effort (seq, op) of a request that failed to decode, for the error reply: (-1, "") when
    unreadable; op is "" unless it is one of OPS."""
    try:
        m = _unpack(data, MAX_CONTROL_BYTES, KIND_REQUEST, False)
    except Exception:
        return -1, ""
    if type(m) is not dict:
        return -1, ""
    seq = m.get("seq")
    op = m.get("op")
    return (seq if type(seq) is int and 0 <= seq <= SEQ_MAX else -1), (op if op in OPS else "")


_REPLY_OK_KEYS = frozenset((*_HEADER, "op", "ok", "result"))
_REPLY_ERR_KEYS = frozenset((*_HEADER, "op", "ok", "error"))
_ERROR_KEYS = frozenset(("code", "message"))


def _plain(v: Any, name: str, depth: int = 0) -> Any:
    """A result value as plain msgpack data (dict/list/str/int/float/bool/None); finite floats only."""
    if depth > 8:
        raise _bad_input(name, "...", "nesting at most 8 levels deep")
    if v is None or type(v) in (bool, int, str):
        return v
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(v):
            raise _bad_input(name, v, "a finite number (send nil for an absent or unbounded value)")
        return float(v)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.ndarray):
        return _plain(v.tolist(), name, depth + 1)
    if isinstance(v, Mapping):
        return {str(k): _plain(x, f"{name}.{k}", depth + 1) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x, f"{name}[{i}]", depth + 1) for i, x in enumerate(v)]
    raise _bad_input(name, v, "plain data: map, array, string, number, bool or nil")


def encode_reply(*, seq: int, op: str, result: Mapping[str, Any] | None = None,
                 error: tuple[str, str] | None = None, stamp_ns: int | None = None) -> bytes:
    """Encode a control reply: ok with `result` (exact keys REPLY_RESULTS[op]) or refused with
    error=(code, message), code one of ERROR_CODES. seq echoes the request's seq (-1 if unreadable);
    op echoes the request's op ("" if unreadable or unknown, which only an error reply may carry)."""
    if (result is None) == (error is None):
        raise _bad_input("reply", (result, error), "exactly one of result (ok) or error (refused)")
    seq = _enc_int(seq, "reply.seq", -1, SEQ_MAX)
    stamp = now_ns() if stamp_ns is None else _enc_int(stamp_ns, "reply.stamp_ns", 0, STAMP_MAX)
    m: dict[str, Any] = {"proto": PROTOCOL_VERSION, "kind": KIND_REPLY, "seq": seq, "stamp_ns": stamp}
    if error is not None:
        code, message = error
        m["op"] = _enc_str(op, "reply.op", MAX_NAME_CHARS, (*OPS, ""))
        m["ok"] = False
        m["error"] = {"code": _enc_str(code, "reply.error.code", MAX_NAME_CHARS, ERROR_CODES),
                      "message": str(message)[:MAX_TEXT_CHARS]}
    else:
        m["op"] = _enc_str(op, "reply.op", MAX_NAME_CHARS, OPS)
        m["ok"] = True
        assert result is not None
        if frozenset(result) != REPLY_RESULTS[op]:
            raise _bad_input(f"reply({op}).result", sorted(result),
                             f"exactly the fields {sorted(REPLY_RESULTS[op])}")
        m["result"] = _plain(result, f"reply({op}).result")
    return _pack(m, MAX_CONTROL_BYTES, KIND_REPLY)


def decode_reply(data: bytes) -> ReplyMessage:
    """Decode and check a control reply (result key set per op; values are plain msgpack data)."""
    m = _unpack(data, MAX_CONTROL_BYTES, KIND_REPLY, False)
    _check_header(m, KIND_REPLY)
    ok = m.get("ok")
    if type(ok) is not bool:
        if "ok" not in m:
            raise _fail("missing_field", "reply.ok", None, "true or false")
        raise _fail("bad_type", "reply.ok", ok, "true or false")
    keys = _REPLY_OK_KEYS if ok else _REPLY_ERR_KEYS
    if m.keys() != keys:
        raise _key_error(m, "reply", keys, frozenset())
    seq = _int(m["seq"], "reply.seq", -1, SEQ_MAX)
    stamp = _int(m["stamp_ns"], "reply.stamp_ns", 0, STAMP_MAX)
    if not ok:
        op = _str(m["op"], "reply.op", MAX_NAME_CHARS, (*OPS, ""))
        err = _submap(m["error"], "reply.error", _ERROR_KEYS)
        code = _str(err["code"], "reply.error.code", MAX_NAME_CHARS, ERROR_CODES)
        message = _str(err["message"], "reply.error.message", MAX_TEXT_CHARS, allow_empty=True)
        return ReplyMessage(seq, stamp, op, False, {}, code, message)
    op = _str(m["op"], "reply.op", MAX_NAME_CHARS, OPS)
    result = _submap(m["result"], f"reply({op}).result", REPLY_RESULTS[op])
    _check_plain(result, f"reply({op}).result")
    return ReplyMessage(seq, stamp, op, True, result, None, None)


def _check_plain(v: Any, name: str) -> None:
    """Floats inside a reply result are finite."""
    t = type(v)
    if t is float:
        if not math.isfinite(v):
            raise _fail("non_finite", name, v, "finite numbers")
    elif t is dict:
        for k, x in v.items():
            _check_plain(x, f"{name}.{k}")
    elif t is list:
        for i, x in enumerate(v):
            _check_plain(x, f"{name}[{i}]")
    elif v is not None and t not in (bool, int, str):
        raise _fail("bad_type", name, v, "plain data: map, array, string, number, bool or nil")
