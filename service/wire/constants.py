"""The protocol's constants (version 1, docs/protocol.md): topics, kinds, default endpoints, enumerations,
reason keys, size caps and magnitude bounds. The one source every other module and the docs test import.
"""

from __future__ import annotations

PROTOCOL_VERSION = 1

# --- topics (first frame of a stream message) and kinds (the `kind` header field) -------------------
TOPIC_TWIST = b"twist"
TOPIC_JOINTS = b"joints"
TOPIC_COMMAND = b"command"
TOPIC_HEALTH = b"health"
TOPIC_EVENT = b"event"
TOPIC_STATE = b"state"
KIND_TWIST = "twist"
KIND_JOINTS = "joints"
KIND_COMMAND = "command"
KIND_HEALTH = "health"
KIND_EVENT = "event"
KIND_STATE = "state"
KIND_REQUEST = "request"
KIND_REPLY = "reply"
KINDS: tuple[str, ...] = (KIND_TWIST, KIND_JOINTS, KIND_COMMAND, KIND_HEALTH, KIND_EVENT, KIND_STATE,
                          KIND_REQUEST, KIND_REPLY)
INTAKE_TOPICS: tuple[bytes, ...] = (TOPIC_TWIST, TOPIC_JOINTS)
OUTPUT_TOPICS: tuple[bytes, ...] = (TOPIC_COMMAND, TOPIC_HEALTH, TOPIC_EVENT, TOPIC_STATE)

# --- default endpoints (the service binds, everyone else connects; loopback by default) -----------
DEFAULT_INTAKE = "tcp://127.0.0.1:47310"
DEFAULT_OUTPUT = "tcp://127.0.0.1:47311"
DEFAULT_CONTROL = "tcp://127.0.0.1:47312"

# --- enumerations --------------------------------------------------------------------------------
TWIST_FRAMES: tuple[str, ...] = ("base", "tool")
#: health states, from the smallest task-weighted singular value: clear; narrow (the weakest direction of
#: motion narrowing); pinched (nearly shut). They only report: the arm keeps moving, damped.
HEALTH_STATES: tuple[str, ...] = ("clear", "narrow", "pinched")
OPS: tuple[str, ...] = ("claim", "renew", "release", "enable", "disable", "status", "arm", "counters",
                        "set", "clear_fault")
#: modes of the service (the `mode` field of command, health and event; service/state.py drives them)
MODE_DISABLED = "disabled"
MODE_RUNNING = "running"
MODE_STOPPING = "stopping"
MODE_HOLDING = "holding"
MODE_FAULT = "fault"
MODE_SHUTDOWN = "shutdown"
MODES: tuple[str, ...] = (MODE_DISABLED, MODE_RUNNING, MODE_STOPPING, MODE_HOLDING, MODE_FAULT, MODE_SHUTDOWN)
#: what limited the task scale this tick (health.limiting.by): nothing, a joint bound, a keep-out damper
#: (the solver's copy, twistrate.solver.limiting.LIMITERS, must equal it)
LIMITERS: tuple[str, ...] = ("none", "joint", "keepout")
#: the kind of joint bound that limited it (health.limiting.bound; twistrate.solver.limiting.BOUND_KINDS)
BOUND_KINDS: tuple[str, ...] = ("position", "velocity", "acceleration")
#: what the nearest keep-out pair's second member is (health.keepout.other_kind): a zone of the
#: service config, or another link of the arm (self-collision)
KEEPOUT_OTHER_KINDS: tuple[str, ...] = ("zone", "link")
#: the keep-out events (docs/protocol.md section 10): a damper started / stopped limiting the scale
EVENT_KEEPOUT_LIMITING = "keepout_limiting"
EVENT_KEEPOUT_RELEASED = "keepout_released"
KEEPOUT_EVENTS: tuple[str, ...] = (EVENT_KEEPOUT_LIMITING, EVENT_KEEPOUT_RELEASED)
#: damping policies a `set` of the `damping` tunable may name (the solver's own list must equal it)
DAMPING_POLICIES: tuple[str, ...] = ("none", "constant", "manipulability", "singular_value", "selective")

#: stable error codes of a refused control request (reply.error.code)
E_BAD_REQUEST = "bad_request"  # the request could not be decoded
E_UNKNOWN_OP = "unknown_op"  # op not in OPS
E_NO_LEASE = "no_lease"
E_LEASE_HELD = "lease_held"
E_FAULT = "fault"
E_SHUTDOWN = "shutting_down"
E_BAD_ARGUMENT = "bad_argument"
E_INTERNAL = "internal"
ERROR_CODES: tuple[str, ...] = (E_BAD_REQUEST, E_UNKNOWN_OP, E_NO_LEASE, E_LEASE_HELD, E_FAULT, E_SHUTDOWN,
                                E_BAD_ARGUMENT, E_INTERNAL)
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
MAX_STATE_BYTES = 8192
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
#: |each component| of a point of the arm in the base frame (state.tool, state.origins), m
MAX_REACH_M = 100.0
#: |each entry| of a rotation matrix or a unit axis (1 plus rounding)
MAX_UNIT = 1.0 + 1e-9
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
#: |health.keepout.nearest_m|, m: a signed distance between the arm and a zone of its cell (negative:
#: overlap); the bound only refuses absurd values
MAX_KEEPOUT_DISTANCE_M = 1e6
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
#: the service instance id (status.instance, event.instance): random at each start, never 0 (a client
#: may use 0 for "not known yet")
INSTANCE_MIN = 1
INSTANCE_MAX = 2**64 - 1

# --- control ops: argument and result fields --------------------------------------------------

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
    "status": frozenset(("mode", "health", "tick", "tick_hz", "health_hz", "arm", "n", "holder",
                         "lease_remaining_ms",
                         "fault", "simulated", "reduced_speed", "position", "twist_age_ms", "joints_age_ms",
                         "realtime", "instance", "started_ns", "keepout", "limiting")),
    "arm": frozenset(("name", "n", "joints", "home")),
    "counters": frozenset(("counters",)),
    "set": frozenset(("params",)),
    "clear_fault": frozenset(("mode",)),
}

# --- the features message of a camera pipeline (docs/vision.md; its own socket, vservo binds it) ----
TOPIC_FEATURES = b"features"
KIND_FEATURES = "features"
DEFAULT_FEATURES = "tcp://127.0.0.1:47315"
#: map frame cap, bytes (the largest frame, 64 points with depths, a pose and a 64-character name: 3.2 kB)
MAX_FEATURES_BYTES = 4096
MAX_FEATURE_POINTS = 64
MAX_FEATURE_ID = 2**31 - 1
#: |u|, |v|, px
MAX_PIXEL = 1e5
#: depth of a point, m (exclusive 0)
MAX_DEPTH_M = 100.0
#: |each component| of the target position, m
MAX_TARGET_M = 100.0
#: |each rotation entry| <= 1 + this; |R R^T - I| and |det R - 1| <= this
ROTATION_TOL = 1e-6
#: reason keys of the features message beyond REASONS (docs/vision.md section 2)
FEATURE_REASONS: tuple[str, ...] = ("bad_rotation", "wrong_camera")
