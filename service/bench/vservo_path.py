"""vservo's per-frame path in one process: decode, servo step, twist transform, encode, one panel frame.

Part of `twistrate bench vservo`. Two forms of the same path run in this process, interleaved sample by
sample, on the same features message of the packaged panel configuration:

* vservo's: feed.decode_features (tuples), Servo.step (pointlaw on plain floats), servo.wire_twist;
* the reference: the wire's reference decoder (numpy arrays) and the numpy law (interaction.estimate,
  the SVD pseudo-inverse of laws.ibvs_twist, transforms.camera_point_twist), as the servo ran before;

then the twist's encoding (wire.encode_twist, the same for both). Each is timed back to back ("hot")
and right after a sleep of SLEEP_S ("after a wait", as a frame finds the process: the caches have gone
cold), median per stage over SAMPLES samples. Both forms give the same twist (checked here, within
pointlaw's bound), so the ratio of their times is the path's saving on this machine at this moment.
"""

from __future__ import annotations

import gc
import time
from statistics import median
from typing import Any

import numpy as np

from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo import laws, transforms
from twistrate.clients.vservo.feed import decode_features, to_frame
from twistrate.clients.vservo.interaction import estimate
from twistrate.clients.vservo.servo import Servo, wire_twist
from twistrate.service import wire

SAMPLES = 60
SLEEP_S = 0.05
STAGES = ("decode", "step", "twist", "encode")
#: The frame: the panel goal's dots moved by this many pixels (u, v), depths 5 % beyond the goal's.
OFFSET_PX = (7.0, -4.0)


def _reference_step(servo: Servo, message: wire.FeaturesMessage) -> np.ndarray:
    """The numpy law on a full view in the goal's order: -lambda L_hat^+ e, saturated (camera frame)."""
    s, goal = servo.settings, servo.goal
    xy, xy_star = s.intrinsics.normalised(message.pixels), s.intrinsics.normalised(goal.pixels)
    e = (xy - xy_star).ravel()
    L_hat = estimate(s.depth, xy, message.depths, xy_star, goal.depths)
    return np.array(laws.saturate(laws.ibvs_twist(L_hat, e, s.gain(float(np.linalg.norm(e)))),
                                  s.linear_max, s.angular_max))


def path_costs(samples: int = SAMPLES, sleep_s: float = SLEEP_S) -> dict[str, Any]:
    """Median µs per stage of both forms, hot and after a sleep; and their largest twist difference."""
    cfg = vc.load_config()
    goal, mount = vc.goal(cfg), vc.mount(cfg)
    servo = Servo(vc.settings(cfg), goal, vc.convergence(cfg))
    data = wire.encode_features(seq=1, camera=cfg.camera.name, capture_ns=time.time_ns(), ids=goal.ids,
                                pixels=goal.pixels + np.array(OFFSET_PX), depths=goal.depths * 1.05)
    frames = [wire.TOPIC_FEATURES, data]
    clock = time.perf_counter_ns

    def ours() -> tuple[list[int], tuple]:
        t0 = clock()
        message = decode_features(frames)
        t1 = clock()
        step = servo.step(to_frame(message, 0.0, "points", 0), 0.0, 0.0)
        t2 = clock()
        twist = wire_twist(step.twist, mount)
        t3 = clock()
        wire.encode_twist(seq=1, lease="bench", linear=twist["linear"], angular=twist["angular"],
                          frame=twist["frame"], point=twist["point"])
        return [t1 - t0, t2 - t1, t3 - t2, clock() - t3], step.twist

    def reference() -> tuple[list[int], np.ndarray]:
        t0 = clock()
        message = wire.decode_features_frames(frames)
        t1 = clock()
        V = _reference_step(servo, message)
        t2 = clock()
        linear, angular, point = transforms.camera_point_twist(V, mount.T)
        twist = {"linear": linear.tolist(), "angular": angular.tolist(), "frame": "tool",
                 "point": point.tolist()}
        t3 = clock()
        wire.encode_twist(seq=1, lease="bench", linear=twist["linear"], angular=twist["angular"],
                          frame=twist["frame"], point=twist["point"])
        return [t1 - t0, t2 - t1, t3 - t2, clock() - t3], V

    _, a = ours()
    _, b = reference()
    out: dict[str, Any] = {"samples": samples, "sleep_s": sleep_s,
                           "twist_difference": float(np.abs(np.array(a) - b).max()),
                           "twist_size": float(np.abs(b).max())}
    was = gc.isenabled()
    gc.disable()
    try:
        for mode, pause in (("hot", 0.0), ("after_wait", sleep_s)):
            times: dict[str, list[list[int]]] = {"vservo": [], "reference": []}
            for _ in range(samples):
                for name, run in (("vservo", ours), ("reference", reference)):
                    if pause:
                        time.sleep(pause)
                    times[name].append(run()[0])
            for name, rows in times.items():
                out.setdefault(name, {})[mode] = {stage: median(r[k] for r in rows) / 1000.0
                                                   for k, stage in enumerate(STAGES)}
                out[name][mode]["total"] = median(sum(r) for r in rows) / 1000.0
    finally:
        if was:
            gc.enable()
    return out


def format_costs(c: dict[str, Any]) -> list[str]:
    lines = [f"  per-frame path in one process (panel frame; median of {c['samples']} samples, us; after a "
             f"wait: each sample follows a {c['sleep_s'] * 1000:g} ms sleep; twists agree within "
             f"{c['twist_difference']:.1e} of {c['twist_size']:.1e}):"]
    for mode, label in (("hot", "hot"), ("after_wait", "after a wait")):
        for name in ("vservo", "reference"):
            r = c[name][mode]
            parts = ", ".join(f"{stage} {r[stage]:.1f}" for stage in STAGES)
            lines.append(f"    {label:<12} {name:<9} total {r['total']:6.1f}: {parts}")
    return lines
