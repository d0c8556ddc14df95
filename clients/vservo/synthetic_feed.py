"""The synthetic camera as a camera pipeline over the wire: a thread that reads the service's newest
`state` output (the tool pose the tick used, docs/protocol.md 7.6), captures a frame of the cell at
`rate_hz` (twistrate.clients.vservo.synthetic) and sends what the camera delivers to vservo's features
socket (docs/vision.md). Capturing starts at `begin(t0)`, the origin (time.monotonic()) of the
camera's times, so blackouts count from the start of the run.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import zmq

from twistrate.clients.vservo import synthetic
from twistrate.clients.vservo.feed import FeatureSender
from twistrate.service import wire
from twistrate.solver.errors import TwistrateError, WireError


class SyntheticPipeline:
    """camera: the synthetic camera; output: the service's output endpoint; features: vservo's features
    endpoint; name: the camera name vservo expects; rate_hz: frames per second."""

    def __init__(self, camera: synthetic.SyntheticCamera, output: str, features: str, name: str,
                 rate_hz: float) -> None:
        self.camera = camera
        self.rate_hz = rate_hz
        self.sent = 0
        self.states = 0
        self.error: str | None = None
        self.T_base_tool: np.ndarray | None = None
        self.t0: float | None = None
        self._ctx = zmq.Context()
        self._state = self._ctx.socket(zmq.SUB)
        self._state.setsockopt(zmq.LINGER, 0)
        self._state.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_STATE)
        self._state.connect(output)
        self._sender = FeatureSender(features, name, self._ctx)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="synthetic-camera", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def begin(self, t0: float) -> None:
        self.t0 = t0

    def stop(self) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(5.0)
        self._sender.close()
        self._state.close(0)
        self._ctx.term()

    def _newest_pose(self) -> None:
        newest = None
        while self._state.poll(0, zmq.POLLIN):
            newest = self._state.recv_multipart()
        if newest is None:
            return
        try:
            message = wire.decode_output(newest)
        except WireError:
            return
        if isinstance(message, wire.StateMessage):
            T = np.eye(4)
            T[:3, :3], T[:3, 3] = message.tool_rotation, message.tool_position
            self.T_base_tool = T
            self.states += 1

    def _run(self) -> None:
        period = 1.0 / self.rate_hz
        next_capture = time.monotonic()
        try:
            while not self._stop.wait(max(0.0, next_capture - time.monotonic())):
                next_capture += period
                self._newest_pose()
                if self.T_base_tool is None or self.t0 is None:
                    continue
                now = time.monotonic()
                self.camera.capture(self.T_base_tool, now - self.t0)
                frame = self.camera.poll(now - self.t0)
                if frame is None:
                    continue
                capture_ns = time.time_ns() - int((now - self.t0 - frame.capture_s) * 1e9)
                if self.camera.pose:
                    self._sender.send(capture_ns, T_cam_target=frame.T_cam_target)
                else:
                    self._sender.send(capture_ns, frame.ids, frame.pixels, frame.depths)
                self.sent += 1
        except (TwistrateError, zmq.ZMQError) as exc:
            self.error = str(exc)
