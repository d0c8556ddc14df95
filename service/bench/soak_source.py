"""The twist sources of `twistrate bench soak`: two clients in one process that hand the lease to each
other, stream and fall silent in turn, and provoke refusals of known reasons after each handover.

`source_main(endpoints, seconds, handover_s, stream_s, silent_s)` prints one JSON line at the end: what
was sent, by kind (twists_leased, twists_released_token, bad_version, not_msgpack) and the control
operations that succeeded (claims, releases, enables).
"""

from __future__ import annotations

import json
import math
import time

import msgpack
import zmq

from twistrate.clients.link import Endpoints, Link
from twistrate.service import wire

#: Twists per second while streaming.
SOURCE_HZ = 200.0
#: Lease of each holder, ms (renewed while streaming and while silent).
LEASE_MS = 5000
#: After each release: twists with the released token, sent this far apart (one drain each, s).
RELEASED_TOKEN_TWISTS = 3
RELEASED_TOKEN_GAP_S = 0.005
#: Pause after the provoked refusals, before the next claim, s.
SETTLE_S = 0.02
#: A streaming phase shorter than this is not started, s.
STREAM_MIN_S = 0.2
#: Peak tool speed of the streamed profile, m/s and rad/s.
LINEAR_PEAK = 0.05
ANGULAR_PEAK = 0.2


def profile(period_s: float):
    """twist_at(t) for one streaming phase of period_s: sinusoids that start and end at rest and
    integrate to zero over the phase (the tool returns near where it started: no drift in a long run).
    linear (3,) m/s and angular (3,) rad/s, base frame."""
    w = 2.0 * math.pi / period_s

    def twist_at(t: float):
        s1, s2 = math.sin(w * t), math.sin(2.0 * w * t)
        return (LINEAR_PEAK * s1, 0.5 * LINEAR_PEAK * s2, 0.0), (0.0, 0.0, ANGULAR_PEAK * s1)

    return twist_at


def _silent(link: Link, until: float) -> None:
    """Send nothing until `until` (monotonic s), renewing the lease when due."""
    while (left := until - time.monotonic()) > 0:
        time.sleep(min(0.05, left))
        link.renew_if_due()


def source_main(ep: Endpoints, seconds: float, handover_s: float, stream_s: float, silent_s: float) -> int:
    sent = dict.fromkeys(("twists_leased", "twists_released_token", "bad_version", "not_msgpack", "claims",
                          "releases", "enables"), 0)
    ctx = zmq.Context()
    links = [Link(ep, client=f"soak-source-{k}", topics=(), timeout_s=10.0, context=ctx) for k in "ab"]
    raw = ctx.socket(zmq.XPUB)  # the provoked refusals, sent once the service subscribed
    raw.setsockopt(zmq.LINGER, 0)
    raw.connect(ep.intake)
    try:
        for link in links:
            link.wait_ready(timeout_s=30.0)
        if not raw.poll(30_000) or raw.recv()[:1] != b"\x01":
            raise RuntimeError("soak source: the service never subscribed")
        end = time.monotonic() + seconds
        turn, seq = 0, 0
        while time.monotonic() < end:
            link = links[turn % 2]
            slot_end = min(end, time.monotonic() + handover_s)
            link.claim(lease_ms=LEASE_MS)
            sent["claims"] += 1
            link.enable()
            sent["enables"] += 1
            while (left := slot_end - time.monotonic()) >= STREAM_MIN_S + silent_s:
                phase = min(stream_s, left - silent_s)
                sent["twists_leased"] += link.stream_twists(profile(phase), SOURCE_HZ, phase)
                _silent(link, time.monotonic() + silent_s)
            _silent(link, slot_end)
            link.disable()
            token = link.lease
            link.release()
            sent["releases"] += 1
            for _ in range(RELEASED_TOKEN_TWISTS):  # refused not_leased: the token was released
                seq += 1
                raw.send_multipart([wire.TOPIC_TWIST, wire.encode_twist(
                    seq=seq, lease=token, linear=[0.01, 0.0, 0.0], angular=[0.0, 0.0, 0.0])])
                sent["twists_released_token"] += 1
                time.sleep(RELEASED_TOKEN_GAP_S)
            other = {"proto": 2, "kind": "twist", "seq": seq, "stamp_ns": time.time_ns()}
            raw.send_multipart([wire.TOPIC_TWIST, msgpack.packb(other)])  # refused bad_version
            sent["bad_version"] += 1
            time.sleep(RELEASED_TOKEN_GAP_S)
            raw.send_multipart([wire.TOPIC_TWIST, b"\xc1 not msgpack"])  # refused not_msgpack
            sent["not_msgpack"] += 1
            time.sleep(SETTLE_S)
            turn += 1
    finally:
        for link in links:
            link.close()
        raw.close(0)
        ctx.term()
    print(json.dumps(sent), flush=True)
    return 0
