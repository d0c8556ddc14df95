"""End to end: every class of bad input reaches the service over a real socket, is counted under its reason
(docs/protocol.md section 11) and does not disturb the command stream; CURVE refuses an unknown key."""

from __future__ import annotations

import itertools
import time

import msgpack
import numpy as np
import pytest
import zmq
from service_harness import make_config, running_service, stream_until, wait_for

from twistrate.clients.link import CurveKeys, Link
from twistrate.service import security

pytestmark = pytest.mark.timeout(90)


def _twist(lease: str, **change):
    m = {"proto": 1, "kind": "twist", "seq": 7, "stamp_ns": time.time_ns(), "linear": [0.01, 0.0, 0.0],
         "angular": [0.0, 0.0, 0.0], "frame": "base", "lease": lease}
    m.update(change)
    return [b"twist", msgpack.packb(m)]


def _bad_messages(lease: str) -> dict[str, list[list[bytes]]]:
    """reason -> messages that must be refused for that reason (docs/protocol.md section 11)."""
    drop_frame = _twist(lease)
    m = msgpack.unpackb(drop_frame[1])
    del m["frame"]
    return {
        "not_msgpack": [[b"twist", b"\xc1not msgpack"]],
        "bad_frames": [[b"twist"], [b"twist", drop_frame[1], b"extra"]],
        "bad_version": [_twist(lease, proto=2)],
        "unknown_kind": [[b"twistX", drop_frame[1]]],
        "kind_mismatch": [_twist(lease, kind="joints")],
        "missing_field": [[b"twist", msgpack.packb(m)]],
        "extra_field": [_twist(lease, colour="red")],
        "bad_type": [_twist(lease, linear=[True, 0.0, 0.0]), _twist(lease, seq=1.0)],
        "bad_length": [_twist(lease, linear=[0.0, 0.0])],
        "non_finite": [_twist(lease, angular=[float("nan"), 0.0, 0.0]),
                       _twist(lease, linear=[float("inf"), 0.0, 0.0])],
        "too_large": [_twist(lease, linear=[11.0, 0.0, 0.0])],
        "bad_value": [_twist(lease, frame="world"), _twist(lease, seq=-1)],
        "oversize": [[b"twist", b"\x80" + b" " * 600]],
        "not_leased": [_twist("0000000000000000")],
    }


def test_every_bad_input_class_is_counted_and_the_stream_continues():
    cfg = make_config()
    with running_service(cfg) as run:
        link = run.link()
        lease = link.claim("test")
        link.enable()
        stream_until(link, [0.01, 0, 0], [0, 0, 0], lambda cs: any(c.answers >= 0 for c in cs))
        pub = zmq.Context.instance().socket(zmq.PUB)
        pub.setsockopt(zmq.LINGER, 0)
        pub.connect(run.endpoints.intake)
        for _ in range(30):  # let the subscription reach the new PUB, streaming meanwhile
            link.send_twist([0.01, 0, 0], [0, 0, 0])
            time.sleep(0.01)
        bad = _bad_messages(lease)
        expected = {reason: len(msgs) for reason, msgs in bad.items()}
        link.drain()
        commands = []
        for msgs in bad.values():
            for frames in msgs:
                pub.send_multipart(frames)
                link.send_twist([0.01, 0, 0], [0, 0, 0])
                time.sleep(0.01)
                budget = time.monotonic() + 0.01  # collect what came, without starving the stream
                while time.monotonic() < budget:
                    try:
                        commands.append(link.receive_command(timeout_s=0.003))
                    except TimeoutError:
                        break

        def counted():
            c = link.counters()
            return all(c.get(f"rejected_{r}", 0) == k for r, k in expected.items())

        wait_for(counted, limit_s=5.0)
        counters = link.counters()
        assert counters["rejected_total"] == sum(expected.values())
        assert counters["faults"] == 0
        # the stream went on: consecutive ticks, running, answering the good twists
        assert len(commands) > 50
        assert all(b.tick == a.tick + 1 for a, b in itertools.pairwise(commands))
        assert all(c.mode == "running" for c in commands), [c for c in commands if c.mode != "running"][:3]
        assert all(c.answers >= 0 for c in commands)
        link.drain()  # a health message still queued may predate the last refusal (a loaded machine)
        health = link.receive_health()
        assert health.rejected == {r: k for r, k in expected.items()}
        pub.close()


def test_curve_service_refuses_an_unknown_client_key(tmp_path):
    server_pub, server_secret = security.write_keypair(tmp_path / "server", "service")
    client_pub, client_secret = security.write_keypair(tmp_path / "clients", "pad")
    security.write_keypair(tmp_path / "strangers", "stranger")
    cfg = make_config(base_dir=str(tmp_path),
                      security={"server_secret_key": str(server_secret),
                                "client_public_keys": [str(tmp_path / "clients")]})
    with running_service(cfg) as run:
        known = CurveKeys.from_files(server_pub, client_secret)
        stranger = CurveKeys.from_files(server_pub, tmp_path / "strangers" / "stranger.key_secret")
        with Link(run.endpoints, known, timeout_s=3.0) as link:
            link.wait_ready(timeout_s=5.0)
            assert link.status()["mode"] == "disabled"
            link.claim("pad")
            link.enable()
            cs = stream_until(link, [0.01, 0, 0], [0, 0, 0], lambda cs: any(c.answers >= 0 for c in cs))
            assert np.all(np.isfinite(cs[-1].rate))
        with Link(run.endpoints, stranger, timeout_s=0.5) as link:
            with pytest.raises(TimeoutError):
                link.status()
            with pytest.raises(TimeoutError):
                link.receive_command(timeout_s=0.5)
            with pytest.raises(TimeoutError):
                link.wait_ready(timeout_s=0.5)
        assert run.service.counters()["accepted_twist"] > 0
        del client_pub
