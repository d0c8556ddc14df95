"""An intake flood: a local peer sending twists as fast as one process can, for the flood benchmark option
(`twistrate bench service --flood`) and the flood test.

`python -m twistrate.service.bench.flood INTAKE SECONDS` connects a PUB socket to the service's intake
and sends one pre-encoded, well-formed twist under a lease nobody holds in a tight loop for SECONDS (so
each one costs the service a full decode before it is refused `not_leased`, the dearest refusal), then
prints the number of messages it handed to ZeroMQ (after a line `flooding` when it starts). ZeroMQ
drops what the socket's send high-water mark does not hold; the service counts what it took
(rejected_not_leased, superseded).
"""

from __future__ import annotations

import sys
import time

import zmq

from twistrate.service import wire

#: A flood never runs longer than this, s (bounded even when its parent is gone).
FLOOD_LIMIT_S = 600.0
#: The lease token of the flood: the right length, held by nobody.
STRANGER_LEASE = "f" * 16


def flood(intake: str, seconds: float) -> int:
    """Send the flood for `seconds` (at most FLOOD_LIMIT_S); return how many messages were sent."""
    ctx = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.connect(intake)
    data = wire.encode_twist(seq=1, lease=STRANGER_LEASE, linear=[0.01, 0.0, 0.0], angular=[0.0, 0.0, 0.0])
    frames = (wire.TOPIC_TWIST, data)
    send = pub.send_multipart
    sent = 0
    print("flooding", flush=True)  # started (imports done): a parent may time its window from here
    end = time.monotonic() + min(seconds, FLOOD_LIMIT_S)
    try:
        while True:
            for _ in range(1000):
                send(frames)
            sent += 1000
            if time.monotonic() >= end:
                break
    finally:
        pub.close(0)
        ctx.term()
    return sent


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 2:
        print("usage: python -m twistrate.service.bench.flood INTAKE SECONDS", file=sys.stderr)
        return 2
    sent = flood(args[0], float(args[1]))
    print(sent, flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
