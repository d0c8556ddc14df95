"""The features socket (docs/vision.md section 1): vservo's end (bind, SUB, newest frame) and a sender's
end (connect, PUB) for camera pipelines written in Python, the synthetic camera and the benchmark.

Every receive has a timeout; decode failures are counted by reason, never raised into the loop.
"""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Sequence

import numpy as np
import zmq

from twistrate.clients.vservo.features import PointFrame, PoseFrame
from twistrate.service import wire
from twistrate.solver.errors import WireError

#: Socket bounds (the protocol's habit, docs/protocol.md section 12).
MAX_MESSAGE_BYTES = 65536
RECEIVE_HWM = 100
SEND_HWM = 100


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

    def newest(self, timeout_s: float) -> tuple[wire.FeaturesMessage, float] | None:
        """Wait up to timeout_s for a message; then take every queued one and return the newest good one
        with its arrival time (time.monotonic(), s), or None. Every message taken is decoded (so each
        refusal is counted); the queue is drained with non-blocking receives, not a poll per message (a
        poll costs more than the receive)."""
        sock = self._sock
        if not self._poller.poll(max(0, int(timeout_s * 1000))):
            return None
        best = None
        while True:
            try:
                frames = sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return best
            arrived = time.monotonic()
            try:
                message = wire.decode_features_frames(frames)
            except WireError as exc:
                self.refused[exc.reason] += 1
                continue
            if message.camera != self.camera:
                self.refused["wrong_camera"] += 1
                continue
            self.received += 1
            best = (message, arrived)

    def close(self) -> None:
        self._sock.close(0)
        if self._own:
            self._ctx.term()


def to_frame(message: wire.FeaturesMessage, arrived_s: float, kind: str,
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
