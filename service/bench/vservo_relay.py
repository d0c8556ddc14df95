"""The reference client of `twistrate bench vservo`: a bare relay from the features socket to the service.

It stands where vservo stands and does the least a camera client can do: the same features socket (a
SUB bound with vservo's options, twistrate.clients.vservo.feed), the same client library to the
service (twistrate.clients.link: claim, enable, auto-renewed lease), the same waiting pattern (a poll
with a timeout of at most 50 ms, the queue drained, a keep-alive twist when no message came, as
vservo's loop), and for every message it receives it sends one fixed twist (1 mm/s, its sign
alternating, tool frame, at the camera point) at once: no decoding, no law. The benchmark's
figures for vservo minus the relay's are vservo's own cost; the relay's are the machine's floor
(two loopback hops, two wake-ups of Python processes, the tick wait). With --timings it writes the same
file as `twistrate vservo --timings` (features_seq 0: the relay does not decode).

    python -m twistrate.service.bench.vservo_relay --endpoints-file FILE --features-file FILE
"""

from __future__ import annotations

import argparse
import math
import signal
import threading
import time

import zmq

from twistrate.clients.link import Endpoints, Link
from twistrate.clients.vservo.feed import MAX_MESSAGE_BYTES, RECEIVE_HWM
from twistrate.clients.vservo.runner import Timings
from twistrate.clients.vservo.sched import realtime
from twistrate.service import wire
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.commands.vservo import ANY_PORT, SERVE_START_S, write_features_file
from twistrate.service.wire.discovery import read_endpoints

#: The longest single wait, s: vservo's loop waits at most this long per poll too (runner.Runner._loop).
POLL_S = 0.05
#: The fixed twist: 1 mm/s along the tool's x axis, its sign alternating from one twist to the next (so
#: the arm dithers by tens of micrometres and stays put), tool frame, at a point 4 cm off the tool origin
#: (like the panel camera's). Not zero: the service then solves a moving twist, as for vservo's.
SPEED = 0.001
ANGULAR = (0.0, 0.0, 0.0)
POINT = (0.04, 0.0, 0.02)


def relay(endpoints: Endpoints, features_file: str, seconds: float, stop: threading.Event,
          keepalive_hz: float = 5.0, timings: Timings | None = None, realtime_priority: int = 0) -> int:
    """Relay until `seconds` or `stop`; returns the number of twists sent. Like vservo, it also sends
    its twist `keepalive_hz` times per second while no message arrives (the lease is renewed from the
    twists it sends); the benchmark's frames come faster, so every twist then answers a frame.
    timings: told of every twist that answered a message (as vservo's Runner tells its on_sent);
    realtime_priority: as vservo's [run] realtime_priority (sched.realtime, for the loop)."""
    ctx = zmq.Context()
    sock = ctx.socket(zmq.SUB)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.MAXMSGSIZE, MAX_MESSAGE_BYTES)
    sock.setsockopt(zmq.RCVHWM, RECEIVE_HWM)
    sock.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_FEATURES)
    sock.bind(ANY_PORT)
    sent = 0
    try:
        with Link(endpoints, client="vservo-relay", topics=(), timeout_s=2.0, context=ctx) as link:
            link.wait_ready(timeout_s=10.0)
            link.claim("vservo-relay", lease_ms=3000)
            link.enable()
            write_features_file(features_file, sock.getsockopt_string(zmq.LAST_ENDPOINT))
            end = time.monotonic() + seconds
            next_send = time.monotonic()
            rt = realtime(realtime_priority)
            try:
                while not stop.is_set() and time.monotonic() < end:
                    now = time.monotonic()
                    received_ns = 0
                    if timings is not None:
                        timings.waiting()
                    if sock.poll(math.ceil(min(max(0.0, next_send - now), POLL_S) * 1000), zmq.POLLIN):
                        while sock.getsockopt(zmq.EVENTS) & zmq.POLLIN:  # drain, as vservo's feed does
                            try:
                                sock.recv_multipart(zmq.NOBLOCK)
                            except zmq.Again:
                                break
                            received_ns = time.time_ns()
                    elif time.monotonic() < next_send:
                        continue
                    # a message arrived, or the keep-alive is due (renews the lease, as vservo's does)
                    sign = 1.0 if sent % 2 == 0 else -1.0
                    seq = link.send_twist((sign * SPEED, 0.0, 0.0), ANGULAR, "tool", POINT)
                    if received_ns and timings is not None:
                        timings(0, seq, received_ns, time.time_ns())
                    sent += 1
                    next_send = time.monotonic() + 1.0 / keepalive_hz
            finally:
                rt.restore()
                link.send_twist((0.0, 0.0, 0.0), ANGULAR)
                link.disable()
                link.release()
    finally:
        sock.close(0)
        ctx.term()
    return sent


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="vservo_relay", description=first_paragraph(__doc__))
    parser.add_argument("--endpoints-file", required=True, help="the service's endpoints file")
    parser.add_argument("--features-file", required=True, help="where to write the bound features socket")
    parser.add_argument("--seconds", type=float, default=120.0, help="stop after this long, s")
    parser.add_argument("--keepalive-hz", type=float, default=5.0, help="twists per second without messages")
    parser.add_argument("--timings", metavar="FILE", help="after the run, write the receive and send times")
    parser.add_argument("--realtime", type=int, default=0, metavar="PRIORITY",
                        help="SCHED_FIFO priority of the loop and its ZeroMQ I/O threads (0: off)")
    args = parser.parse_args(argv)
    stop = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: stop.set())
    timings = Timings() if args.timings else None
    relay(Endpoints(**read_endpoints(args.endpoints_file, SERVE_START_S)), args.features_file, args.seconds,
          stop, args.keepalive_hz, timings, max(0, min(args.realtime, 99)))
    if timings is not None:
        timings.write(args.timings)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
