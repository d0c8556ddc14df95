"""The `features` message of a camera pipeline (docs/vision.md): image points with ids, or a target pose.

Its own socket (the pipeline's PUB to vservo's SUB), framed, encoded and checked like the stream
messages of docs/protocol.md (exact key sets, a bool is not a number, finite numbers within bounds).
The decoder returns arrays: ids (N,) int, pixels (N, 2) px, depths (N,) m or None, T_cam_target (4, 4)
or None.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from twistrate.service.wire.checks import (
    HEADER_KEYS,
    check_header,
    dec_int,
    dec_num,
    dec_str,
    dec_vec,
    enc_floats,
    enc_int,
    enc_num,
    enc_str,
    header,
    input_fail,
    key_error,
    pack,
    seq_stamp,
    submap,
    unpack,
    wire_fail,
)
from twistrate.service.wire.constants import (
    KIND_FEATURES,
    MAX_DEPTH_M,
    MAX_FEATURE_ID,
    MAX_FEATURE_POINTS,
    MAX_FEATURES_BYTES,
    MAX_NAME_CHARS,
    MAX_PIXEL,
    MAX_TARGET_M,
    MAX_TOPIC_BYTES,
    ROTATION_TOL,
    STAMP_MAX,
    TOPIC_FEATURES,
)
from twistrate.service.wire.messages import FeaturesMessage

_KEYS = frozenset((*HEADER_KEYS, "camera", "capture_ns", "points", "pose"))
_POINT_KEYS = frozenset(("id", "u", "v", "depth"))
_POSE_KEYS = frozenset(("position", "rotation"))
_NO_IDS = np.zeros(0, dtype=np.int64)
_NO_PIXELS = np.zeros((0, 2))


def _check_rotation(R: np.ndarray, name: str, fail) -> None:
    if (np.abs(R @ R.T - np.eye(3)).max() > ROTATION_TOL or abs(np.linalg.det(R) - 1.0) > ROTATION_TOL):
        raise fail(name, R.ravel().tolist(), f"a rotation: orthonormal, det +1, within {ROTATION_TOL:g}")


def _bad_rotation(name: str, value: object, accepted: str):
    return wire_fail("bad_rotation", name, value, accepted)


def encode_features(*, seq: int, camera: str, capture_ns: int,
                    ids: Sequence[int] | np.ndarray = (), pixels: Sequence | np.ndarray = (),
                    depths: Sequence | np.ndarray | None = None, T_cam_target: np.ndarray | None = None,
                    stamp_ns: int | None = None) -> bytes:
    """Encode one frame's features: ids (N,) int with pixels (N, 2) px and depths (N,) m or None, and/or
    T_cam_target (4, 4) or None. Raises InputError for what the protocol cannot carry."""
    m = header(KIND_FEATURES, seq, stamp_ns)
    m["camera"] = enc_str(camera, "features.camera", MAX_NAME_CHARS)
    m["capture_ns"] = enc_int(capture_ns, "features.capture_ns", 0, STAMP_MAX)
    id_list = [enc_int(i, "features.points.id", 0, MAX_FEATURE_ID) for i in np.asarray(ids).reshape(-1)]
    n = len(id_list)
    if n > MAX_FEATURE_POINTS:
        raise input_fail("features.points", f"{n} points", f"at most {MAX_FEATURE_POINTS}")
    try:
        flat = np.asarray(pixels, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise input_fail("features.points.uv", pixels, f"{n} pixel pairs (u, v)") from None
    uv = enc_floats(flat, "features.points.uv", 2 * n, MAX_PIXEL)
    zs: list[float | None] = [None] * n
    if depths is not None:
        zs = [enc_num(z, "features.points.depth", 0.0, MAX_DEPTH_M) for z in np.asarray(depths).reshape(-1)]
        if len(zs) != n or any(z <= 0.0 for z in zs):
            raise input_fail("features.points.depth", zs, f"{n} depths in (0, {MAX_DEPTH_M:g}] m")
    m["points"] = [{"id": id_list[k], "u": uv[2 * k], "v": uv[2 * k + 1], "depth": zs[k]} for k in range(n)]
    if T_cam_target is None:
        m["pose"] = None
    else:
        T = np.asarray(T_cam_target, dtype=float)
        if T.shape != (4, 4):
            raise input_fail("features.pose", T.shape, "a (4, 4) transform")
        _check_rotation(T[:3, :3], "features.pose.rotation", input_fail)
        m["pose"] = {"position": enc_floats(T[:3, 3], "features.pose.position", 3, MAX_TARGET_M),
                     "rotation": enc_floats(T[:3, :3], "features.pose.rotation", 9, 1.0 + ROTATION_TOL)}
    return pack(m, MAX_FEATURES_BYTES, KIND_FEATURES)


def decode_features(data: bytes) -> FeaturesMessage:
    """Decode and check a features map (the second frame). Raises WireError."""
    m = unpack(data, MAX_FEATURES_BYTES, KIND_FEATURES, False)
    check_header(m, KIND_FEATURES)
    if m.keys() != _KEYS:
        raise key_error(m, KIND_FEATURES, _KEYS, frozenset())
    seq, stamp = seq_stamp(m, KIND_FEATURES)
    camera = dec_str(m["camera"], "features.camera", MAX_NAME_CHARS)
    capture = dec_int(m["capture_ns"], "features.capture_ns", 0, STAMP_MAX)
    points = m["points"]
    if type(points) is not list:
        raise wire_fail("bad_type", "features.points", points,
                        f"an array of 0 to {MAX_FEATURE_POINTS} points")
    if len(points) > MAX_FEATURE_POINTS:
        raise wire_fail("bad_length", "features.points", f"{len(points)} entries",
                        f"at most {MAX_FEATURE_POINTS} points")
    n = len(points)
    ids = np.empty(n, dtype=np.int64) if n else _NO_IDS
    pixels = np.empty((n, 2)) if n else _NO_PIXELS
    depths = np.empty(n)
    all_depths = True
    for k, p in enumerate(points):
        name = f"features.points[{k}]"
        p = submap(p, name, _POINT_KEYS)
        ids[k] = dec_int(p["id"], f"{name}.id", 0, MAX_FEATURE_ID)
        pixels[k, 0] = dec_num(p["u"], f"{name}.u", -MAX_PIXEL, MAX_PIXEL)
        pixels[k, 1] = dec_num(p["v"], f"{name}.v", -MAX_PIXEL, MAX_PIXEL)
        z = p["depth"]
        if z is None:
            all_depths = False
        else:
            depths[k] = dec_num(z, f"{name}.depth", 0.0, MAX_DEPTH_M)
            if depths[k] <= 0.0:
                raise wire_fail("bad_value", f"{name}.depth", z, f"a depth in (0, {MAX_DEPTH_M:g}] m, or nil")
    pose = m["pose"]
    T = None
    if pose is not None:
        pose = submap(pose, "features.pose", _POSE_KEYS)
        T = np.eye(4)
        T[:3, 3] = dec_vec(pose["position"], "features.pose.position", 3, MAX_TARGET_M)
        T[:3, :3] = dec_vec(pose["rotation"], "features.pose.rotation", 9, 1.0 + ROTATION_TOL).reshape(3, 3)
        _check_rotation(T[:3, :3], "features.pose.rotation", _bad_rotation)
    known = depths if (all_depths and n) else None
    return FeaturesMessage(seq, stamp, camera, capture, ids, pixels, known, T)


def decode_features_frames(frames: list[bytes]) -> FeaturesMessage:
    """Decode a two-frame [topic, map] features message. Raises WireError (bad_frames, unknown_kind)."""
    if len(frames) != 2:
        raise wire_fail("bad_frames", "features", f"{len(frames)} frames", "exactly 2 frames: [topic, map]")
    topic = frames[0]
    if len(topic) > MAX_TOPIC_BYTES or topic != TOPIC_FEATURES:
        raise wire_fail("unknown_kind", "features.topic", bytes(topic[:MAX_TOPIC_BYTES]), "b'features'")
    return decode_features(frames[1])
