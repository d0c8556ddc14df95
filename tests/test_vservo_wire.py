"""The features message (docs/vision.md): round trip, the document's worked example, and refusals with
the protocol's reason keys (docs/protocol.md section 11); vservo's own decoder (feed.decode_features)
against the protocol's reference decoder (twistrate.service.wire.features)."""

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


CHANGES = [
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
    (lambda d: d.update(seq=-1), "bad_value"),
    (lambda d: d.update(stamp_ns=2**63), "bad_value"),
    (lambda d: d.update(capture_ns=1.5), "bad_type"),
    (lambda d: d.update(camera="c" * 65), "bad_value"),
    (lambda d: d.update(points={"id": 1}), "bad_type"),
    (lambda d: d["points"].append([1, 2]), "bad_type"),
    (lambda d: d["points"][1].update(extra=0), "extra_field"),
    (lambda d: d["points"][2].update(v=-math.inf), "non_finite"),
    (lambda d: d["points"][3].update(id=2**31), "bad_value"),
    (lambda d: d["points"][4].update(depth=100.5), "too_large"),
    (lambda d: d["points"][4].update(depth=False), "bad_type"),
]


@pytest.mark.parametrize(("change", "reason"), CHANGES)
def test_refusals_name_the_reason(change, reason: str) -> None:
    doc = _example()
    change(doc)
    assert _refused(doc) == reason


def _both(frames: list[bytes]) -> tuple[object, object]:
    """(reference, vservo's) result of decoding `frames`: the message, or the WireError's (reason, text)."""
    from twistrate.clients.vservo.feed import decode_features

    out = []
    for decode in (wf.decode_features_frames, decode_features):
        try:
            out.append(decode(frames))
        except WireError as exc:
            out.append((exc.reason, str(exc)))
    return out[0], out[1]


def _same_message(ref: object, got: object) -> None:
    assert type(got).__name__ in ("FeaturesMessage", "PointsMessage")
    assert (got.seq, got.stamp_ns, got.camera, got.capture_ns) == (ref.seq, ref.stamp_ns, ref.camera,
                                                                  ref.capture_ns)
    np.testing.assert_array_equal(np.asarray(got.ids, dtype=np.int64).reshape(-1), ref.ids)
    np.testing.assert_array_equal(np.asarray(got.pixels, dtype=float).reshape(-1, 2), ref.pixels)
    assert (got.depths is None) == (ref.depths is None)
    if ref.depths is not None:
        np.testing.assert_array_equal(got.depths, ref.depths)
    assert (got.T_cam_target is None) == (ref.T_cam_target is None)
    if ref.T_cam_target is not None:
        np.testing.assert_array_equal(got.T_cam_target, ref.T_cam_target)


@pytest.mark.parametrize(("change", "reason"), CHANGES)
def test_vservos_decoder_refuses_as_the_reference_does(change, reason: str) -> None:
    # feed.decode_features takes its own quick checks and leaves every doubt to the reference decoder:
    # each refusal must be the reference's, reason and text (the field named) alike.
    doc = _example()
    change(doc)
    ref, got = _both([wf.TOPIC_FEATURES, msgpack.packb(doc)])
    assert ref == got and ref[0] == reason


def test_vservos_decoder_gives_the_references_values() -> None:
    # Random well-formed messages (points with and without depths, some depths missing, integer pixels,
    # no points, a pose) decode to the reference's values; vservo's gives plain tuples for points.
    from twistrate.clients.vservo.feed import PointsMessage

    rng = np.random.default_rng(5)
    for k in range(300):
        n = int(rng.integers(0, 12))
        doc = _example()
        doc["seq"], doc["capture_ns"] = int(rng.integers(0, 2**62)), int(rng.integers(0, 2**62))
        depth_kind = k % 3  # all depths, none, some
        with_depth = [depth_kind == 0 or (depth_kind == 2 and j % 2 == 1) for j in range(n)]
        doc["points"] = [{"id": int(rng.integers(0, 2**31)),
                          "u": float(rng.uniform(-1e5, 1e5)) if k % 5 else int(rng.integers(-1000, 1000)),
                          "v": float(rng.uniform(-1e5, 1e5)),
                          "depth": float(rng.uniform(1e-3, 100.0)) if with_depth[j] else None}
                         for j in range(n)]
        if k % 7 == 0:
            doc["pose"] = {"position": [0.01, -0.02, 0.3], "rotation": [1.0, 0, 0, 0, -1.0, 0, 0, 0, -1.0]}
        frames = [wf.TOPIC_FEATURES, msgpack.packb(doc)]
        ref, got = _both(frames)
        _same_message(ref, got)
        assert isinstance(got, PointsMessage) == (doc["pose"] is None)
    for frames in ([wf.TOPIC_FEATURES], [b"featuresX", msgpack.packb(_example())],
                   [wf.TOPIC_FEATURES, b"\x00" * (wf.MAX_FEATURES_BYTES + 1)], [wf.TOPIC_FEATURES, b"\xc1"],
                   [wf.TOPIC_FEATURES, msgpack.packb([1, 2])]):
        ref, got = _both(frames)
        assert isinstance(ref, tuple) and ref == got


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
