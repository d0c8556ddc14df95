"""The features message (docs/vision.md): round trip, the document's worked example, and refusals with
the protocol's reason keys (docs/protocol.md section 11)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import msgpack
import numpy as np
import pytest

from twistrate.service.wire import features as wf
from twistrate.solver.errors import InputError, WireError

ROOT = Path(__file__).resolve().parents[1]
DOC = ROOT / "docs" / "vision.md"


def _example() -> dict:
    block = DOC.read_text().split("## 7. Worked example")[1].split("```")[1]
    return json.loads(block)


def test_round_trip_points_and_pose() -> None:
    rng = np.random.default_rng(0)
    pixels = rng.uniform(0, 640, (5, 2))
    depths = rng.uniform(0.2, 0.4, 5)
    T = np.eye(4)
    T[:3, :3] = np.array([[1.0, 0, 0], [0, -1, 0], [0, 0, -1]])
    T[:3, 3] = [0.01, -0.02, 0.22]
    data = wf.encode_features(seq=3, camera="bench-cam", capture_ns=10**18, ids=[21, 22, 23, 24, 25],
                              pixels=pixels, depths=depths, T_cam_target=T, stamp_ns=10**18 + 5)
    m = wf.decode_features_frames([wf.TOPIC_FEATURES, data])
    assert (m.seq, m.camera, m.capture_ns, m.stamp_ns) == (3, "bench-cam", 10**18, 10**18 + 5)
    np.testing.assert_array_equal(m.ids, [21, 22, 23, 24, 25])
    np.testing.assert_array_equal(m.pixels, pixels)
    np.testing.assert_array_equal(m.depths, depths)
    np.testing.assert_array_equal(m.T_cam_target, T)
    empty = wf.decode_features(wf.encode_features(seq=4, camera="c", capture_ns=0))
    assert empty.ids.shape == (0,) and empty.pixels.shape == (0, 2)
    assert empty.depths is None and empty.T_cam_target is None


def test_the_documented_example_decodes() -> None:
    doc = _example()
    m = wf.decode_features(msgpack.packb(doc))
    assert m.camera == "bench-cam" and m.seq == 42 and len(m.ids) == 5 and m.depths is None
    assert (m.stamp_ns - m.capture_ns) / 1e6 == pytest.approx(8.0)


def test_a_frame_with_some_depths_missing_reports_none() -> None:
    doc = _example()
    doc["points"][0]["depth"] = 0.3
    assert wf.decode_features(msgpack.packb(doc)).depths is None


def _refused(doc: dict) -> str:
    with pytest.raises(WireError) as info:
        wf.decode_features(msgpack.packb(doc))
    return info.value.reason


@pytest.mark.parametrize(("change", "reason"), [
    (lambda d: d.update(extra=1), "extra_field"),
    (lambda d: d.pop("pose"), "missing_field"),
    (lambda d: d.update(proto=2), "bad_version"),
    (lambda d: d.update(kind="twist"), "kind_mismatch"),
    (lambda d: d["points"][0].update(u=True), "bad_type"),
    (lambda d: d["points"][0].update(v=math.nan), "non_finite"),
    (lambda d: d["points"][0].update(u=1e6), "too_large"),
    (lambda d: d["points"][0].update(id=-1), "bad_value"),
    (lambda d: d["points"][0].update(id=1.0), "bad_type"),
    (lambda d: d["points"][0].update(depth=0.0), "bad_value"),
    (lambda d: d["points"][0].pop("depth"), "missing_field"),
    (lambda d: d.update(points=[d["points"][0]] * 65), "bad_length"),
    (lambda d: d.update(camera=""), "bad_value"),
    (lambda d: d.update(pose={"position": [0, 0, 1], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, 1.0 + 1e-3]}),
     "too_large"),
    (lambda d: d.update(pose={"position": [0, 0, 1], "rotation": [0.9, 0, 0, 0, 1, 0, 0, 0, 1]}),
     "bad_rotation"),
    (lambda d: d.update(pose={"position": [0, 0, 1], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, -1]}),
     "bad_rotation"),  # a reflection: det -1
])
def test_refusals_name_the_reason(change, reason: str) -> None:
    doc = _example()
    change(doc)
    assert _refused(doc) == reason


def test_frames_size_and_topic() -> None:
    data = msgpack.packb(_example())
    with pytest.raises(WireError) as info:
        wf.decode_features_frames([wf.TOPIC_FEATURES])
    assert info.value.reason == "bad_frames"
    with pytest.raises(WireError) as info:
        wf.decode_features_frames([b"featuresX", data])
    assert info.value.reason == "unknown_kind"
    with pytest.raises(WireError) as info:
        wf.decode_features(b"\x00" * (wf.MAX_FEATURES_BYTES + 1))
    assert info.value.reason == "oversize"
    # the cap holds the largest frame: 64 points with depths, a pose and a 64-character camera name
    big = wf.encode_features(seq=2**64 - 1, camera="c" * 64, capture_ns=2**63 - 1, ids=np.arange(64) + 2**30,
                             pixels=np.full((64, 2), -12345.678901234), depths=np.full(64, 99.123456789),
                             T_cam_target=np.eye(4), stamp_ns=2**63 - 1)
    assert len(big) <= wf.MAX_FEATURES_BYTES


def test_encoder_refuses_what_the_decoder_would() -> None:
    with pytest.raises(InputError, match=r"features\.points\.uv"):
        wf.encode_features(seq=1, camera="c", capture_ns=0, ids=[1], pixels=[[math.nan, 0.0]])
    with pytest.raises(InputError, match=r"features\.pose\.rotation"):
        wf.encode_features(seq=1, camera="c", capture_ns=0, T_cam_target=np.diag([1.0, 1.0, -1.0, 1.0]))
    with pytest.raises(InputError, match=r"features\.points\.depth"):
        wf.encode_features(seq=1, camera="c", capture_ns=0, ids=[1, 2], pixels=[[0, 0], [1, 1]], depths=[0.3])


def test_feature_input_keeps_the_newest_good_frame_and_counts_refusals() -> None:
    import time

    import zmq

    from twistrate.clients.vservo.feed import FeatureInput, FeatureSender, to_frame

    ctx = zmq.Context()
    feed = FeatureInput("tcp://127.0.0.1:*", "bench-cam", ctx)
    good = FeatureSender(feed.endpoint, "bench-cam", ctx)
    other = FeatureSender(feed.endpoint, "side-cam", ctx)
    raw = ctx.socket(zmq.XPUB)
    raw.setsockopt(zmq.LINGER, 0)
    raw.connect(feed.endpoint)
    try:
        # slow joiner: wait for the subscription on each sender (docs/protocol.md section 1); libzmq
        # attaches a bound socket's new connections when its owner uses it, so the feed is polled
        raw_ready, deadline = False, time.monotonic() + 5.0
        while not (good.ready and other.ready and raw_ready) and time.monotonic() < deadline:
            assert feed.newest(0.01) is None
            good.wait_ready(0.01)
            other.wait_ready(0.01)
            raw_ready = raw_ready or (raw.poll(10) and raw.recv() == b"\x01features")
        assert good.ready and other.ready and raw_ready
        now = time.time_ns()
        good.send(now - 50_000_000, [21, 22], [[1.0, 2.0], [3.0, 4.0]])
        good.send(now - 10_000_000, [21, 22, 23], [[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])
        other.send(now, [21], [[0.0, 0.0]])
        raw.send_multipart([b"features", b"\xc1"])  # not msgpack
        deadline = time.monotonic() + 2.0
        newest = None
        while time.monotonic() < deadline and (feed.received < 2 or sum(feed.refused.values()) < 2):
            newest = feed.newest(0.1) or newest
        assert newest is not None
        message, arrived = newest
        assert message.seq == 2 and list(message.ids) == [21, 22, 23]
        assert feed.refused == {"wrong_camera": 1, "not_msgpack": 1}
        frame = to_frame(message, arrived, "points", wall_ns=now)
        assert arrived - frame.capture_s == pytest.approx(0.010)  # the capture was 10 ms before `now`
    finally:
        for s in (good, other):
            s.close()
        raw.close(0)
        feed.close()
        ctx.term()
