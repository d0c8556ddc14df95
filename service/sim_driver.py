"""The simulated arm as a driver process (`twistrate sim`): plays a robot driver over the wire protocol.

It connects to a running service like a real driver would: subscribes to `command` on the output,
applies the newest command's rates to the simulated arm (service/simarm.py, the config's lag and the
arm's own limits), and answers each command with `joints` (position and velocity) on the intake.
Like a drive with its own watchdog, it ramps to rest within the acceleration limits when no command
has arrived for COMMAND_TIMEOUT_S (so it is at rest within COMMAND_TIMEOUT_S + max_i |qd_i| / a_max_i +
one loop period after the last command, whatever happened to the service: tests/test_e2e_faults.py
kills the service with SIGKILL mid-motion). The service must run with `[simulation] enabled = false` to
use it.
"""

from __future__ import annotations

import os
import time

import numpy as np
import zmq

from twistrate.service import wire
from twistrate.service.config import ServiceConfig
from twistrate.service.motion import ramp_to_rest
from twistrate.service.simarm import SimArm
from twistrate.service.tick import set_timer_slack
from twistrate.solver.errors import WireError

#: No command for this long and the simulated drive ramps to rest on its own, s.
COMMAND_TIMEOUT_S = 0.1
#: At most this many queued commands are taken per loop; only the newest decodable one is used.
MAX_TAKE = 1000


class SimDriver:
    """A simulated arm behind the protocol: commands in, joint state out, at `rate_hz`.

    endpoints : {intake, output, control} of the service (default: the config's endpoints)."""

    def __init__(self, config: ServiceConfig, context: zmq.Context | None = None,
                 rate_hz: float | None = None, endpoints: dict[str, str] | None = None) -> None:
        self.config = config
        self.arm = config.load_arm()
        posture = config.initial_posture(self.arm)
        self.sim = SimArm.from_arm(self.arm, config.simulation.lag_s,
                                   None if posture is None else np.array(posture))
        self.rate_hz = float(rate_hz or config.tick.rate_hz)
        self._own = context is None
        self.ctx = context or zmq.Context()
        sk = config.sockets
        #: where the service listens: `endpoints` (from its endpoints file) or the configured ones
        self.endpoints = dict(endpoints or config.endpoints.model_dump())
        ep = self.endpoints
        self.commands = self.ctx.socket(zmq.SUB)
        self.joints = self.ctx.socket(zmq.PUB)
        for sock in (self.commands, self.joints):
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.MAXMSGSIZE, sk.max_message_bytes)
            sock.setsockopt(zmq.RCVHWM, sk.receive_hwm)
            sock.setsockopt(zmq.SNDHWM, sk.send_hwm)
        self.commands.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_COMMAND)
        self.commands.connect(ep["output"])
        self.joints.connect(ep["intake"])
        #: the driver's name in every joint state (docs/protocol.md 7.2): one per process
        self.source = f"twistrate-sim-{os.getpid()}"
        self.seq = 0
        self.received = 0
        self.refused = 0
        self.stopped = False

    def close(self) -> None:
        self.commands.close(0)
        self.joints.close(0)
        if self._own:
            self.ctx.term()

    def run(self, seconds: float | None = None) -> None:
        """Loop until stop() (or `seconds`). Event-driven like a drive's command interface: each command
        that arrives advances the simulation by the time since the previous step (at the previous
        command's rates), takes the new rates and publishes the joint state at once. Without commands,
        joint state still goes out every `1 / rate_hz` s (the service needs it before its first command)."""
        set_timer_slack(1_000)
        n = self.arm.n
        idle_ms = max(1, round(1000.0 / self.rate_hz))
        end = None if seconds is None else time.monotonic_ns() + int(seconds * 1e9)
        clock = time.monotonic_ns
        last_step = last_cmd = clock()
        rate = np.zeros(n)
        sock = self.commands
        poller = zmq.Poller()
        poller.register(sock, zmq.POLLIN)
        while not self.stopped and (end is None or clock() < end):
            got = False
            if poller.poll(idle_ms):
                # take what is queued (at most MAX_TAKE), decode the newest first: a loop that fell
                # behind catches up at once instead of decoding a backlog it can never finish
                taken = []
                while len(taken) < MAX_TAKE and sock.getsockopt(zmq.EVENTS) & zmq.POLLIN:
                    taken.append(sock.recv_multipart())
                self.received += len(taken)
                for frames in reversed(taken):
                    try:
                        msg = wire.decode_output(frames, n)
                    except WireError:
                        self.refused += 1
                        continue
                    if type(msg) is wire.CommandMessage:
                        rate = msg.rate
                        got = True
                        break
            now = clock()
            dt = (now - last_step) * 1e-9
            self.sim.step(dt)  # the motion since the last step, at the old rates
            last_step = now
            if got:
                last_cmd = now
            elif now - last_cmd > COMMAND_TIMEOUT_S * 1e9:  # the drive's own watchdog
                # by the time that really passed (a late loop removes more, never beyond a_max dt)
                rate = ramp_to_rest(self.sim.qd, self.arm.a_max, dt)
            self.sim.command(rate)
            data = wire.encode_joints(seq=self.seq, position=self.sim.q, velocity=self.sim.qd,
                                      source=self.source)
            self.joints.send_multipart((wire.TOPIC_JOINTS, data))
            self.seq += 1

    def stop(self, *_: object) -> None:
        self.stopped = True
