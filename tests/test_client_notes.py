"""What docs/protocol.md section 16 ("Notes for client writers") promises, checked: control requests in
other framings are answered with the same envelope, every intake reason is in `counters` from the
start, a claim while the lease is held answers `lease_held` before checking `lease_ms`, a secret key
file others may read is refused, and bin/ext values are refused as `oversize`."""

from __future__ import annotations

import os
import time

import msgpack
import pytest
import zmq
from service_harness import make_config, running_service

from twistrate.service import security, wire
from twistrate.service.state import ServiceState
from twistrate.service.telemetry import INTAKE_REASONS
from twistrate.solver.errors import ConfigError, ControlError, WireError

pytestmark = pytest.mark.timeout(60)


def test_control_requests_in_other_framings_are_answered_behind_the_same_frames():
    with running_service(make_config()) as run:
        ctx = zmq.Context.instance()
        dealer = ctx.socket(zmq.DEALER)
        dealer.setsockopt(zmq.LINGER, 0)
        dealer.setsockopt(zmq.RCVTIMEO, 5000)
        dealer.connect(run.endpoints.control)
        try:
            for seq, before in enumerate(([], [b""], [b"tag"], [b"", b"more"]), start=1):
                body = wire.encode_request(seq=seq, op="status")
                dealer.send_multipart([*before, body])
                frames = dealer.recv_multipart()
                assert frames[:-1] == before  # every frame before the body comes back in front
                reply = wire.decode_reply(frames[-1])
                assert reply.seq == seq and reply.ok
        finally:
            dealer.close()


def test_every_intake_reason_is_counted_from_the_start_and_status_reports_the_health_rate():
    with running_service(make_config(tick={"rate_hz": 500.0, "health_hz": 50.0})) as run:
        link = run.link()
        assert link.status()["health_hz"] == 50.0
        counters = link.counters()
        for reason in INTAKE_REASONS:
            assert counters[f"rejected_{reason}"] == 0
        assert counters["rejected_total"] == 0 and counters["superseded"] == 0


def test_a_claim_while_the_lease_is_held_is_refused_as_held_before_its_lease_ms_is_checked():
    state = ServiceState(1000.0, 50.0, 60_000.0)
    state.claim("first", 1000.0, 0)
    with pytest.raises(ControlError) as err:
        state.claim("second", 10**9, 1)
    assert err.value.code == "lease_held"
    state.release(state.lease.token, 2)
    with pytest.raises(ControlError) as err:
        state.claim("second", 10**9, 3)
    assert err.value.code == "bad_argument"


def test_a_secret_key_file_others_may_read_is_refused(tmp_path):
    _, secret = security.write_keypair(tmp_path, "service")
    security.load_secret_keypair(secret)  # 0600: accepted
    os.chmod(secret, 0o640)
    with pytest.raises(ConfigError) as err:
        security.load_secret_keypair(secret)
    assert "chmod 600" in str(err.value) and "0640" in str(err.value)
    with pytest.raises(ConfigError) as err:
        security.load_secret_keypair(tmp_path / "missing.key_secret")
    assert "readable secret key file" in str(err.value)


def test_bin_and_ext_values_are_refused_as_oversize():
    m = {"proto": 1, "kind": "twist", "seq": 1, "stamp_ns": time.time_ns(), "linear": [0.0, 0.0, 0.0],
         "angular": [0, 0, 0], "frame": "base", "lease": "a" * 16}
    assert wire.decode_twist(msgpack.packb(m)).linear.tolist() == [0.0, 0.0, 0.0]  # ints for floats
    for value in (b"ab", msgpack.ExtType(1, b"x")):
        with pytest.raises(WireError) as err:
            wire.decode_twist(msgpack.packb({**m, "lease": value}))
        assert err.value.reason == "oversize"
    with pytest.raises(WireError) as err:  # a stamp written as a float (a 2^53-limited encoder)
        wire.decode_twist(msgpack.packb({**m, "stamp_ns": float(m["stamp_ns"])}))
    assert err.value.reason == "bad_type"
