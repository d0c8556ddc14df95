"""`twistrate bench vservo`: from a features message sent to the command that answers its twist.

Three processes: `twistrate serve` (its built-in simulated arm, the packaged demo configuration on free
ports), `twistrate vservo --track` (the packaged panel-cell configuration), and this one, which plays
the camera pipeline: at FRAME_HZ it places the tool where the newest command puts it (forward
kinematics of the joint targets), projects the panel's dots and sends them as a features message
(docs/vision.md), stamped with its wall clock; it also watches every command. vservo answers each new
frame with one twist at once and sends no other twists while frames keep coming (its keep-alive rate
is set below the frame rate), so the first command after a frame whose `answers` names a new twist is
that frame's answer. Reported, over the measured window (median, p99, max):

* features sent -> command published: the command's stamp (the service's wall clock at its tick)
  minus the frame's send stamp (this process's wall clock; one machine, one clock);
* features sent -> command received here (adds the output transport and this process's wake-up);
* frames without an answer before the next frame.

Target: p99 of sent -> published <= one service tick + 1 ms (the twist waits at most one tick; 1 ms
for two loopback hops, decoding, the law and vservo's wake-up).
"""

from __future__ import annotations

import argparse
import json
import math
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo import synthetic
from twistrate.clients.vservo.feed import FeatureSender
from twistrate.service import wire
from twistrate.service.commands.vservo import (
    ANY_PORT,
    SERVE_START_S,
    read_features_file,
    synthetic_service_config,
)
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import ConfigError
from twistrate.solver.kinematics import tool_pose

FRAME_HZ = 20.0
DEFAULT_SECONDS = 10.0
DEFAULT_RATE_HZ = 500.0
#: Excluded from the figures: start-up, the first approach, connections settling, s.
WARMUP_S = 2.0
#: vservo's keep-alive twist rate in the benchmark: below FRAME_HZ, so every twist answers a frame.
KEEPALIVE_HZ = 5.0
TARGET_EXTRA_MS = 1.0


def _spawn(args: list[str], err: Any) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "twistrate.service.commands.cli", *args],
                            stdout=subprocess.DEVNULL, stderr=err)


def _stop(proc: subprocess.Popen, sig: int = signal.SIGTERM) -> None:
    if proc.poll() is None:
        proc.send_signal(sig)
    try:
        proc.wait(10.0)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5.0)


def _summary(values_ms: list[float]) -> dict[str, float]:
    a = np.array(values_ms)
    if a.size == 0:
        return {"count": 0, "median_ms": math.nan, "p99_ms": math.nan, "max_ms": math.nan}
    return {"count": int(a.size), "median_ms": float(np.median(a)), "p99_ms": float(np.percentile(a, 99)),
            "max_ms": float(a.max())}


def bench(rate_hz: float, seconds: float) -> dict[str, Any]:
    """One measured run at service tick rate `rate_hz` for `seconds` after the warm-up."""
    service_config, text = synthetic_service_config(None, {"tick": {"rate_hz": rate_hz}})
    arm = service_config.load_arm()
    data = vc.load_config().model_dump()
    data["endpoints"] = {**data["endpoints"], "features": ANY_PORT}
    data["run"] = {**data["run"], "rate_hz": KEEPALIVE_HZ}
    data["camera"] = {**data["camera"], "rate_hz": FRAME_HZ}
    config = vc.config_from_dict(data, "bench vservo config")
    cell = synthetic.panel_cell(vc.intrinsics(config), vc.mount(config).T)
    with tempfile.TemporaryDirectory(prefix="twistrate-bench-vservo-") as tmp:
        paths = {name: str(Path(tmp) / name) for name in ("service.toml", "vservo.toml", "endpoints.json",
                                                          "features.json", "stderr")}
        Path(paths["service.toml"]).write_text(text)
        Path(paths["vservo.toml"]).write_text(_toml_doc(data))
        err = open(paths["stderr"], "w")  # noqa: SIM115 (closed below)
        endpoints = ["--endpoints-file", paths["endpoints.json"]]
        service = _spawn(["serve", "--config", paths["service.toml"], *endpoints], err)
        vservo = _spawn(["vservo", "--config", paths["vservo.toml"], *endpoints, "--features-file",
                         paths["features.json"], "--track", "--seconds", str(WARMUP_S + seconds + 40.0)], err)
        try:
            output = read_endpoints(paths["endpoints.json"], SERVE_START_S)["output"]
            features = read_features_file(paths["features.json"], SERVE_START_S)
        except ConfigError as exc:
            _stop(vservo, signal.SIGINT)
            _stop(service)
            err.close()
            raise RuntimeError(f"{exc}: {Path(paths['stderr']).read_text()[-800:]}") from None
        ctx = zmq.Context()
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_COMMAND)
        sub.connect(output)
        sender = FeatureSender(features, config.camera.name, ctx)
        try:
            result = _measure(sub, sender, arm, cell, seconds)
        finally:
            sender.close()
            sub.close(0)
            ctx.term()
            _stop(vservo, signal.SIGINT)
            _stop(service)
            err.close()
        if result["frames"] == 0:
            raise RuntimeError("no frame was answered: " + Path(paths["stderr"]).read_text()[-800:])
    period_ms = 1000.0 / rate_hz
    result.update(rate_hz=rate_hz, seconds=seconds, frame_hz=FRAME_HZ,
                  target_p99_ms=period_ms + TARGET_EXTRA_MS)
    return result


def _toml_doc(data: dict[str, Any]) -> str:
    from twistrate.service.commands.vservo import _toml

    lines = []
    for section, values in data.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {_toml(v)}" for k, v in values.items() if v is not None]
    return "\n".join(lines) + "\n"


def _measure(sub: zmq.Socket, sender: FeatureSender, arm: Any, cell: synthetic.Cell,
             seconds: float) -> dict[str, Any]:
    period = 1.0 / FRAME_HZ
    start = time.monotonic()
    end = start + 30.0 + WARMUP_S + seconds  # bounded: the service and vservo get 30 s to come up
    measuring_from = None
    next_frame = time.monotonic()
    target = None
    answers = -1
    pending: tuple[int, bool] | None = None  # (send stamp ns, counted) of the newest unanswered frame
    published, received, unanswered, frames = [], [], 0, 0
    while time.monotonic() < end:
        if sub.poll(max(0, int((next_frame - time.monotonic()) * 1000)), zmq.POLLIN):
            while sub.poll(0, zmq.POLLIN):
                frames_in = sub.recv_multipart()
                got = time.time_ns()
                command = wire.decode_command(frames_in[1], arm.n)
                target = command.target
                if command.answers != answers and command.answers >= 0:
                    answers = command.answers
                    if pending is not None and pending[1]:
                        published.append((command.stamp_ns - pending[0]) / 1e6)
                        received.append((got - pending[0]) / 1e6)
                    pending = None
            continue
        if time.monotonic() < next_frame:
            continue
        next_frame += period
        if target is None:
            continue
        if measuring_from is None and answers >= 0:
            measuring_from = time.monotonic() + WARMUP_S
            end = measuring_from + seconds
        if pending is not None and pending[1]:
            unanswered += 1
        ids, pixels, depths = cell.view(tool_pose(arm, target))
        counted = measuring_from is not None and time.monotonic() >= measuring_from
        stamp = time.time_ns()
        sender.send(stamp, ids, pixels, depths)
        pending = (stamp, counted)
        frames += counted
    if measuring_from is None:
        return {"frames": 0}
    return {"frames": frames, "unanswered": unanswered, "sent_to_published": _summary(published),
            "sent_to_received": _summary(received)}


def format_result(r: dict[str, Any]) -> str:
    p, q = r["sent_to_published"], r["sent_to_received"]
    verdict = "meets" if p["p99_ms"] <= r["target_p99_ms"] else "MISSES"
    return "\n".join([
        f"vservo at service tick {r['rate_hz']:g} Hz, frames {r['frame_hz']:g} Hz, {r['seconds']:g} s: "
        f"{r['frames']} frames, {r['unanswered']} without an answer",
        f"  features sent -> command published: median {p['median_ms']:.3f} ms, p99 {p['p99_ms']:.3f} ms, "
        f"max {p['max_ms']:.3f} ms ({p['count']} answers; target p99 <= {r['target_p99_ms']:.1f} ms: "
        f"{verdict})",
        f"  features sent -> command received: median {q['median_ms']:.3f} ms, p99 {q['p99_ms']:.3f} ms, "
        f"max {q['max_ms']:.3f} ms",
    ])


def run(argv: list[str] | None = None) -> int:
    """`twistrate bench vservo [--seconds S] [--rate HZ] [--json FILE]`."""
    parser = argparse.ArgumentParser(prog="twistrate bench vservo", description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS, help="measured window, s")
    parser.add_argument("--rate", type=float, default=DEFAULT_RATE_HZ, help="service tick rate, Hz")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    args = parser.parse_args(argv)
    if not 0.5 <= args.seconds <= 600.0 or not 10.0 <= args.rate <= 2000.0:
        print("twistrate bench vservo: accepted: 0.5 <= --seconds <= 600, 10 <= --rate <= 2000",
              file=sys.stderr)
        return 2
    result = bench(args.rate, args.seconds)
    print(format_result(result))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2, default=float))
    return 0


def main(argv: list[str] | None = None) -> int:
    return run(argv)


if __name__ == "__main__":
    raise SystemExit(main())
