"""The wire protocol of twistrate, version 1 (docs/protocol.md): constants, message types and the wire.

Imports nothing of ours but the exception module (twistrate.solver.errors), so every client can use it
without the service or the solver. Use it as a namespace: `from twistrate.service import wire`, then
`wire.encode_twist(...)`, `wire.TOPIC_TWIST`, `wire.TwistMessage`.
"""

from twistrate.service.wire.checks import now_ns
from twistrate.service.wire.constants import *  # noqa: F403 (the protocol's constants are its API)
from twistrate.service.wire.control import (
    decode_reply,
    decode_request,
    encode_reply,
    encode_request,
    error_code,
    peek_request,
)
from twistrate.service.wire.features import decode_features, decode_features_frames, encode_features
from twistrate.service.wire.health import decode_health, encode_health
from twistrate.service.wire.messages import (
    CommandMessage,
    EventMessage,
    FeaturesMessage,
    HealthMessage,
    IntakeMessage,
    JointsMessage,
    KeepoutNearest,
    Limiting,
    OutputMessage,
    ReplyMessage,
    RequestMessage,
    StateMessage,
    TwistMessage,
)
from twistrate.service.wire.state import decode_state, encode_state
from twistrate.service.wire.stream import (
    decode_command,
    decode_event,
    decode_intake,
    decode_joints,
    decode_output,
    decode_twist,
    encode_command,
    encode_event,
    encode_joints,
    encode_twist,
)

__all__ = [
    "CommandMessage",
    "EventMessage",
    "FeaturesMessage",
    "HealthMessage",
    "IntakeMessage",
    "JointsMessage",
    "KeepoutNearest",
    "Limiting",
    "OutputMessage",
    "ReplyMessage",
    "RequestMessage",
    "StateMessage",
    "TwistMessage",
    "decode_command",
    "decode_event",
    "decode_features",
    "decode_features_frames",
    "decode_health",
    "decode_intake",
    "decode_joints",
    "decode_output",
    "decode_reply",
    "decode_request",
    "decode_state",
    "decode_twist",
    "encode_command",
    "encode_event",
    "encode_features",
    "encode_health",
    "encode_joints",
    "encode_reply",
    "encode_request",
    "encode_state",
    "encode_twist",
    "error_code",
    "now_ns",
    "peek_request",
]
