"""The features socket (docs/vision.md section 1): vservo's end (bind, SUB, newest frame) and a sender's
end (connect, PUB) for camera pipelines written in Python, the synthetic camera and the benchmark.

Every receive has a timeout; decode failures are counted by reason, never raised into the loop.

`decode_features` is vservo's decoder: the same checks as the protocol's reference decoder
(twistrate.service.wire.decode_features_frames, whose framing, size, msgpack, header and key checks it
calls), and for a points message with no pose, plain Python values (`PointsMessage`) instead of numpy
arrays: the servo's path stays on Python floats from the message to the twist (pointlaw's docstring
says why). Whatever its own checks do not pass goes to the reference decoder, which refuses it with the
field named (or, for a pose message, decodes it): one authority for every refusal.
"""

from __future__ import annotations

import math
import time
from collections import Counter
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import zmq

from twistrate.clients.vservo.features import PointFrame, PoseFrame
from twistrate.service import wire
from twistrate.service.wire.checks import check_header, unpack
from twistrate.service.wire.constants import (
    KIND_FEATURES,
    MAX_DEPTH_M,
    MAX_FEATURE_ID,
    MAX_FEATURE_POINTS,
    MAX_FEATURES_BYTES,
    MAX_NAME_CHARS,
    MAX_PIXEL,
    SEQ_MAX,
    STAMP_MAX,
)
from twistrate.solver.errors import WireError

#: Socket bounds (the protocol's habit, docs/protocol.md section 12).
MAX_MESSAGE_BYTES = 65536
RECEIVE_HWM = 100
SEND_HWM = 100


_KEYS = frozenset(("proto", "kind", "seq", "stamp_ns", "camera", "capture_ns", "points", "pose"))
_POINT_KEYS = frozenset(("id", "u", "v", "depth"))


class PointsMessage(NamedTuple):
    """A decoded features message of points without a pose (the fields of wire.FeaturesMessage): ids
    (N,) a tuple of int; pixels (N, 2) a tuple of (u, v) float pairs, px; depths (N,) a tuple of float,
    m, when every point carries one, else None; T_cam_target None."""

    seq: int
    stamp_ns: int
    camera: str
    capture_ns: int
    ids: tuple[int, ...]
    pixels: tuple[tuple[float, float], ...]
    depths: tuple[float, ...] | None
    T_cam_target: None = None


def decode_features(frames: list[bytes]) -> PointsMessage | wire.FeaturesMessage:
    """A two-frame [topic, map] features message, checked as the reference decoder checks it (docs/vision.md
    section 2). Raises WireError (reason, field) as the reference does; returns a PointsMessage for
    points without a pose, the reference's FeaturesMessage otherwise."""
    if len(frames) == 2 and frames[0] == wire.TOPIC_FEATURES:
        m = unpack(frames[1], MAX_FEATURES_BYTES, KIND_FEATURES, False)
        check_header(m, KIND_FEATURES)
        if m.keys() == _KEYS and m["pose"] is None:
            points = _points(m)
            if points is not None:
                return PointsMessage(m["seq"], m["stamp_ns"], m["camera"], m["capture_ns"], *points)
    return wire.decode_features_frames(frames)  # the reference: the refusal naming the field, or a pose


def _points(m: dict) -> tuple[tuple, tuple, tuple | None] | None:
    """(ids, pixels, depths) of a map whose key set and header passed, or None when any check fails."""
    seq, stamp, camera, capture, points = m["seq"], m["stamp_ns"], m["camera"], m["capture_ns"], m["points"]
    if not (type(seq) is int and 0 <= seq <= SEQ_MAX and type(stamp) is int and 0 <= stamp <= STAMP_MAX
            and type(camera) is str and 0 < len(camera) <= MAX_NAME_CHARS and type(capture) is int
            and 0 <= capture <= STAMP_MAX and type(points) is list and len(points) <= MAX_FEATURE_POINTS):
        return None
    ids, pixels, depths = [], [], []
    for p in points:
        if type(p) is not dict or p.keys() != _POINT_KEYS:
            return None
        i, u, v, z = p["id"], p["u"], p["v"], p["depth"]
        # type() excludes bool; the bounds exclude nan and inf
        if not (type(i) is int and 0 <= i <= MAX_FEATURE_ID and (type(u) is float or type(u) is int)
                and -MAX_PIXEL <= u <= MAX_PIXEL and (type(v) is float or type(v) is int)
                and -MAX_PIXEL <= v <= MAX_PIXEL):
            return None
        if z is not None:
            if not ((type(z) is float or type(z) is int) and 0.0 < z <= MAX_DEPTH_M):
                return None
            depths.append(float(z))
        ids.append(i)
        pixels.append((float(u), float(v)))
    return tuple(ids), tuple(pixels), tuple(depths) if depths and len(depths) == len(ids) else None


class FeatureInput:
    """Binds a SUB to the features endpoint; `newest(timeout_s)` returns the newest good message.

    camera: the only camera name accepted (others are counted `wrong_camera`)."""

    def __init__(self, endpoint: str, camera: str, context: zmq.Context | None = None) -> None:
        self.camera = camera
        self.refused: Counter[str] = Counter()
        self.received = 0
        self._own = context is None
        self._ctx = context or zmq.Context()
        self._sock = self._ctx.socket(zmq.SUB)
        self._sock.setsockopt(zmq.LINGER, 0)
        self._sock.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
        self._sock.setsockopt(zmq.RCVHWM, RECEIVE_HWM)
        self._sock.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_FEATURES)
        self._sock.bind(endpoint)
        self.endpoint = self._sock.getsockopt_string(zmq.LAST_ENDPOINT)
        self._poller = zmq.Poller()  # made once: Socket.poll builds a new one per call
        self._poller.register(self._sock, zmq.POLLIN)
        #: wall-clock arrival (time.time_ns()) of the newest good message `newest` returned
        self.arrived_ns = 0

    def newest(self, timeout_s: float) -> tuple[PointsMessage | wire.FeaturesMessage, float] | None:
        """Wait up to timeout_s (rounded up to whole ms: a positive wait never becomes a busy poll) for a
        message; then take every queued one and return the newest good one with its arrival time
        (time.monotonic(), s), or None. Every message taken is decoded (so each refusal is counted); the
        queue is drained with non-blocking receives while the socket's events say a message waits (no
        poll per message, and no exception at the end of the queue)."""
        sock = self._sock
        if not self._poller.poll(max(0, math.ceil(timeout_s * 1000))):
            return None
        best = None
        while sock.getsockopt(zmq.EVENTS) & zmq.POLLIN:
            try:
                frames = sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:  # not expected after POLLIN; harmless
                break
            arrived, arrived_ns = time.monotonic(), time.time_ns()
            try:
                message = decode_features(frames)
            except WireError as exc:
                self.refused[exc.reason] += 1
                continue
            if message.camera != self.camera:
                self.refused["wrong_camera"] += 1
                continue
            self.received += 1
            best = (message, arrived)
            self.arrived_ns = arrived_ns
        return best

    def close(self) -> None:
        self._sock.close(0)
        if self._own:
            self._ctx.term()


def to_frame(message: PointsMessage | wire.FeaturesMessage, arrived_s: float, kind: str,
             wall_ns: int | None = None) -> PointFrame | PoseFrame:
    """The servo's frame of a decoded message: kind "points" or "pose". capture_s is the arrival time
    (monotonic) minus the capture age on the wall clock (0 when the capture stamp lies ahead of it)."""
    now_ns = time.time_ns() if wall_ns is None else wall_ns
    capture_s = arrived_s - max(0.0, (now_ns - message.capture_ns) / 1e9)
    if kind == "pose":
        return PoseFrame(message.T_cam_target, capture_s)
    return PointFrame(message.ids, message.pixels, message.depths, capture_s)


class FeatureSender:
    """Connects an XPUB to vservo's features endpoint and sends frames (seq counted here). The XPUB
    sees vservo's subscription arrive (`wait_ready`), so the first frames are not lost to the
    publish/subscribe start-up (docs/protocol.md section 1)."""

    def __init__(self, endpoint: str, camera: str, context: zmq.Context | None = None) -> None:
        self.camera = camera
        self.seq = 0
        self._own = context is None
        self._ctx = context or zmq.Context()
        self._sock = self._ctx.socket(zmq.XPUB)
        self._sock.setsockopt(zmq.LINGER, 0)
        self._sock.setsockopt(zmq.SNDHWM, SEND_HWM)
        self._sock.connect(endpoint)
        self.ready = False

    def wait_ready(self, timeout_s: float) -> bool:
        """Wait up to timeout_s for vservo's subscription to the features topic; True once it is up."""
        deadline = time.monotonic() + timeout_s
        while not self.ready:
            remaining = deadline - time.monotonic()
            if remaining <= 0 or not self._sock.poll(int(remaining * 1000) + 1, zmq.POLLIN):
                return False
            message = self._sock.recv()
            if message == b"\x01" + wire.TOPIC_FEATURES:
                self.ready = True
        return True

    def send(self, capture_ns: int, ids: Sequence[int] | np.ndarray = (), pixels: np.ndarray | Sequence = (),
             depths: np.ndarray | None = None, T_cam_target: np.ndarray | None = None) -> int:
        """Send one frame; returns its seq. Raises InputError for values the message cannot carry."""
        self.seq += 1
        data = wire.encode_features(seq=self.seq, camera=self.camera, capture_ns=capture_ns, ids=ids,
                                  pixels=pixels, depths=depths, T_cam_target=T_cam_target)
        self._sock.send_multipart([wire.TOPIC_FEATURES, data])
        return self.seq

    def close(self) -> None:
        self._sock.close(0)
        if self._own:
            self._ctx.term()
