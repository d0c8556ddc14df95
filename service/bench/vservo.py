"""`twistrate bench vservo`: from a features message sent to the command that answers its twist.

`twistrate serve` (its built-in simulated arm, the packaged demo configuration on free ports) runs once;
two clients take turns answering the frames, in interleaved rounds, each its own process:

* `twistrate vservo --track` (the packaged panel-cell configuration): decode, gate, law, twist;
* the reference, a bare relay (service/bench/vservo_relay.py): the same features socket, client library
  and waiting pattern, and one fixed twist per message at once, no decoding, no law. Its figures are
  the floor of this machine (two loopback hops, two wake-ups of Python processes, the tick wait);
  vservo's minus the relay's are vservo's own cost.

This process plays the camera pipeline: it places the tool where the newest command puts it (forward
kinematics of the joint targets), projects the panel's dots and sends them as a features message
(docs/vision.md), stamped with its wall clock; it also watches every command. Frames come FRAME_HZ
per second on average with random gaps (uniform in [1 - JITTER, 1 + JITTER] periods, seeded), so a
frame lands at a random phase of the service's tick and the tick wait is sampled over the whole tick
(with fixed gaps that are a multiple of the tick, every frame of a run would see one phase). A client
answers each new frame with one twist at once and sends no other twists while frames keep coming
(vservo's keep-alive rate is set below the frame rate), so the first command after a frame whose
`answers` names a new twist is that frame's answer. Reported per client, over the measured windows
(median, p99, max):

* features sent -> command published: the command's stamp (the service's wall clock at its tick)
  minus the frame's send stamp (this process's wall clock; one machine, one clock);
* features sent -> command received here (adds the output transport and this process's wake-up);
* frames without an answer before the next frame;
* where the time goes, from the client's own record of each answer (`--timings`, wall clock, one
  machine): features sent -> taken off the client's socket (the input hop and the client's wake-up),
  -> its twist sent (the client's own work: decoding, the law, encoding), -> command published (the
  intake hop, the wait for the tick and the tick's own work);
* how long the client's thread waited for a CPU (runnable, not running; the kernel's account) from the
  start of the wait in which the frame came to its twist sent, and for the stalls (features sent ->
  twist sent > STALL_MS) the share of each that this wait covers: near 100 % means the machine's load,
  not the client's code, made the stall.

Target: p99 of sent -> published <= one service tick + 1 ms (the twist waits at most one tick; 1 ms
for two loopback hops, decoding, the law and vservo's wake-up).

Before the service starts, the per-frame path's cost in this process, vservo's form against the numpy
reference form (service/bench/vservo_path.py), hot and after a wait.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import zmq

from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo import synthetic
from twistrate.clients.vservo.feed import FeatureSender
from twistrate.clients.vservo.runner import read_timings
from twistrate.service import wire
from twistrate.service.bench.vservo_path import format_costs, path_costs
from twistrate.service.commands.help_text import first_paragraph
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
#: Frame gaps are uniform in [1 - JITTER, 1 + JITTER] frame periods (25 to 75 ms at 20 Hz: wider than any
#: service tick the benchmark accepts, so the phase of a frame in the tick is uniform).
JITTER = 0.5
SEED = 20261203
DEFAULT_SECONDS = 10.0
DEFAULT_RATE_HZ = 500.0
DEFAULT_ROUNDS = 2
#: Excluded from each round's figures: the client's start, the first approach, connections settling, s.
WARMUP_S = 2.0
#: vservo's keep-alive twist rate in the benchmark: below FRAME_HZ, so every twist answers a frame.
KEEPALIVE_HZ = 5.0
TARGET_EXTRA_MS = 1.0
#: The clients, in the order of each round (the reference first).
CLIENTS = ("relay", "vservo")
#: A client gets this long to come up (import, connect, claim, bind), s.
CLIENT_START_S = 30.0


def _spawn(args: list[str], err: Any, module: str = "twistrate.service.commands.cli") -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", module, *args], stdout=subprocess.DEVNULL, stderr=err)


def _stop(proc: subprocess.Popen, sig: int = signal.SIGTERM) -> None:
    if proc.poll() is None:
        proc.send_signal(sig)
    try:
        proc.wait(10.0)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5.0)


def _median(values: list[float]) -> float:
    return float(np.median(values)) if values else math.nan


def _summary(values_ms: list[float]) -> dict[str, float]:
    a = np.array(values_ms)
    if a.size == 0:
        return {"count": 0, "median_ms": math.nan, "p99_ms": math.nan, "max_ms": math.nan}
    return {"count": int(a.size), "median_ms": float(np.median(a)), "p99_ms": float(np.percentile(a, 99)),
            "max_ms": float(a.max())}


class _Run:
    """One benchmark run: the service, the vservo configuration, the command watcher, the files."""

    def __init__(self, rate_hz: float, tmp: str, realtime_priority: int = 0) -> None:
        service_config, text = synthetic_service_config(None, {"tick": {"rate_hz": rate_hz}})
        self.arm = service_config.load_arm()
        data = vc.load_config().model_dump()
        data["endpoints"] = {**data["endpoints"], "features": ANY_PORT}
        data["run"] = {**data["run"], "rate_hz": KEEPALIVE_HZ, "realtime_priority": realtime_priority}
        self.realtime_priority = realtime_priority
        data["camera"] = {**data["camera"], "rate_hz": FRAME_HZ}
        self.config = vc.config_from_dict(data, "bench vservo config")
        self.cell = synthetic.panel_cell(vc.intrinsics(self.config), vc.mount(self.config).T)
        names = ("service.toml", "vservo.toml", "endpoints.json", "stderr")
        self.paths = {name: str(Path(tmp) / name) for name in names}
        Path(self.paths["service.toml"]).write_text(text)
        Path(self.paths["vservo.toml"]).write_text(_toml_doc(data))
        self.tmp = tmp
        self.err = open(self.paths["stderr"], "w")  # noqa: SIM115 (closed by close())
        self.rng = np.random.default_rng(SEED)
        self.service = _spawn(["serve", "--config", self.paths["service.toml"], "--endpoints-file",
                               self.paths["endpoints.json"]], self.err)
        self.ctx = zmq.Context()
        self.sub: zmq.Socket | None = None

    def failure(self, what: str) -> RuntimeError:
        self.err.flush()
        return RuntimeError(f"{what}: {Path(self.paths['stderr']).read_text()[-800:]}")

    def watch(self) -> None:
        try:
            output = read_endpoints(self.paths["endpoints.json"], SERVE_START_S)["output"]
        except ConfigError as exc:
            raise self.failure(str(exc)) from None
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.SUBSCRIBE, wire.TOPIC_COMMAND)
        self.sub.connect(output)

    def client(self, kind: str, k: int, seconds: float) -> subprocess.Popen:
        features = str(Path(self.tmp) / f"features-{kind}-{k}.json")
        timings = str(Path(self.tmp) / f"timings-{kind}-{k}.csv")
        endpoints = ["--endpoints-file", self.paths["endpoints.json"], "--features-file", features,
                     "--timings", timings]
        limit = ["--seconds", str(seconds + CLIENT_START_S + WARMUP_S + 30.0)]
        if kind == "relay":
            proc = _spawn([*endpoints, *limit, "--keepalive-hz", str(KEEPALIVE_HZ), "--realtime",
                           str(self.realtime_priority)], self.err, "twistrate.service.bench.vservo_relay")
        else:
            proc = _spawn(["vservo", "--config", self.paths["vservo.toml"], *endpoints, "--track", *limit],
                          self.err)
        proc.features_file = features  # type: ignore[attr-defined]
        proc.timings_file = timings  # type: ignore[attr-defined]
        return proc

    def close(self) -> None:
        if self.sub is not None:
            self.sub.close(0)
        self.ctx.term()
        _stop(self.service)
        self.err.close()


def bench(rate_hz: float, seconds: float, rounds: int = DEFAULT_ROUNDS,
          realtime_priority: int = 0) -> dict[str, Any]:
    """One run at service tick rate `rate_hz`: `rounds` rounds, each the relay then vservo for
    seconds / rounds s after its warm-up; realtime_priority: both clients' [run] realtime_priority."""
    per_round = seconds / rounds
    load_before = os.getloadavg()[0]
    path = path_costs()  # before the service starts: this process alone
    samples: dict[str, dict[str, list]] = {kind: {"published": [], "received": [], "frames": [0],
                                                  "unanswered": [0],
                                                  **{part: [] for part in (*PARTS, *STALL_KEYS)}}
                                           for kind in CLIENTS}
    with tempfile.TemporaryDirectory(prefix="twistrate-bench-vservo-") as tmp:
        run = _Run(rate_hz, tmp, realtime_priority)
        try:
            run.watch()
            for k in range(rounds):
                for kind in CLIENTS:
                    proc = run.client(kind, k, per_round)
                    try:
                        features = read_features_file(proc.features_file, CLIENT_START_S)
                    except ConfigError as exc:
                        _stop(proc, signal.SIGINT)
                        raise run.failure(f"{kind}: {exc}") from None
                    sender = FeatureSender(features, run.config.camera.name, run.ctx)
                    try:
                        if not sender.wait_ready(CLIENT_START_S):
                            raise run.failure(f"{kind}: no subscription to the features socket")
                        got = _measure(run, sender, per_round)
                    finally:
                        sender.close()
                        _stop(proc, signal.SIGINT)
                    if got["frames"] == 0:
                        raise run.failure(f"{kind}: no frame was answered")
                    for part, values in _split(got["answers"], proc.timings_file).items():
                        samples[kind][part] += values
                    for key in ("published", "received"):
                        samples[kind][key] += got[key]
                    samples[kind]["frames"][0] += got["frames"]
                    samples[kind]["unanswered"][0] += got["unanswered"]
        finally:
            run.close()
    result: dict[str, Any] = {"path": path, "rate_hz": rate_hz, "seconds": seconds, "rounds": rounds,
                              "clients_realtime_priority": realtime_priority,
                              "frame_hz": FRAME_HZ,
                              "frame_jitter": JITTER, "target_p99_ms": 1000.0 / rate_hz + TARGET_EXTRA_MS,
                              "load_average_1min": [load_before, os.getloadavg()[0]]}
    for kind in CLIENTS:
        s = samples[kind]
        result[kind] = {"frames": s["frames"][0], "unanswered": s["unanswered"][0],
                        "sent_to_published": _summary(s["published"]),
                        "sent_to_received": _summary(s["received"]),
                        **{part: _summary(s[part]) for part in (*PARTS, CPU_WAIT, CPU_WAIT_ALL)},
                        "stalls": {"count": len(s["stall_ms"]), "over_ms": STALL_MS,
                                   "median_ms": _summary(s["stall_ms"])["median_ms"],
                                   "cpu_wait_share_median": _median(s["stall_wait_share"]),
                                   "cpu_wait_all_share_median": _median(s["stall_wait_all_share"])}}
    v, r = result["vservo"]["sent_to_published"], result["relay"]["sent_to_published"]
    result["vservo_minus_relay"] = {"median_ms": v["median_ms"] - r["median_ms"],
                                    "p99_ms": v["p99_ms"] - r["p99_ms"]}
    # figures of the former layout, kept for readers of earlier JSON: vservo's
    result.update(frames=result["vservo"]["frames"], unanswered=result["vservo"]["unanswered"],
                  sent_to_published=v, sent_to_received=result["vservo"]["sent_to_received"])
    return result


#: The parts of features sent -> command published, from the client's timings file (module docstring),
#: and the client's thread waiting for a CPU (runnable, not running) from the start of the wait in which
#: the frame came to its twist sent (runner.Timings).
PARTS = ("sent_to_taken", "taken_to_twist", "twist_to_published")
CPU_WAIT, CPU_WAIT_ALL = "cpu_wait", "cpu_wait_all"
#: An answer is a stall when features sent -> its twist sent takes longer than this, ms.
STALL_MS = 5.0
STALL_KEYS = (CPU_WAIT, CPU_WAIT_ALL, "stall_ms", "stall_wait_share", "stall_wait_all_share")


def _split(answers: list[tuple[int, int, int]], path: str) -> dict[str, list[float]]:
    """The three parts (ms) of each counted answer (twist seq, frame send stamp ns, command stamp ns),
    joined by twist seq with the client's timings file (missing file or rows: those answers left out),
    the client thread's CPU wait (ms) over each answer's window, and for each stall the share of it
    that this wait covers."""
    out: dict[str, list[float]] = {part: [] for part in (*PARTS, *STALL_KEYS)}
    try:
        t = read_timings(path)
        rows = {seq: (taken, out_ns, (own, every) if own >= 0 else None) for seq, taken, out_ns, own, every
                in zip(t["twist_seq"], t["received_ns"], t["sent_ns"], t["cpu_wait_ns"], t["cpu_wait_all_ns"],
                       strict=True)}
    except (OSError, ValueError, IndexError, KeyError):
        return out
    for twist_seq, sent_ns, stamp_ns in answers:
        if twist_seq not in rows:
            continue
        taken, out_ns, wait_ns = rows[twist_seq]
        out["sent_to_taken"].append((taken - sent_ns) / 1e6)
        out["taken_to_twist"].append((out_ns - taken) / 1e6)
        out["twist_to_published"].append((stamp_ns - out_ns) / 1e6)
        if wait_ns is not None:
            out[CPU_WAIT].append(wait_ns[0] / 1e6)
            out[CPU_WAIT_ALL].append(wait_ns[1] / 1e6)
            if (out_ns - sent_ns) / 1e6 > STALL_MS:
                out["stall_ms"].append((out_ns - sent_ns) / 1e6)
                out["stall_wait_share"].append(wait_ns[0] / (out_ns - sent_ns))
                out["stall_wait_all_share"].append(wait_ns[1] / (out_ns - sent_ns))
    return out


def _toml_doc(data: dict[str, Any]) -> str:
    from twistrate.service.commands.vservo import _toml

    lines = []
    for section, values in data.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {_toml(v)}" for k, v in values.items() if v is not None]
    return "\n".join(lines) + "\n"


def _gap(run: _Run) -> float:
    """The next frame gap, s: uniform in [1 - JITTER, 1 + JITTER] frame periods."""
    return float(run.rng.uniform(1.0 - JITTER, 1.0 + JITTER)) / FRAME_HZ


def _measure(run: _Run, sender: FeatureSender, seconds: float) -> dict[str, Any]:
    """Frames to one client for its warm-up and `seconds`; the latencies of the answered ones."""
    sub, arm = run.sub, run.arm
    assert sub is not None
    start = time.monotonic()
    end = start + CLIENT_START_S + WARMUP_S + seconds  # bounded: the client gets that long to answer
    measuring_from = None
    next_frame = time.monotonic()
    target = None
    answers = None
    pending: tuple[int, bool] | None = None  # (send stamp ns, counted) of the newest unanswered frame
    published, received, unanswered, frames = [], [], 0, 0
    answered: list[tuple[int, int, int]] = []  # (twist seq, frame send stamp, command stamp) when counted
    while time.monotonic() < end:
        if sub.poll(max(0, int((next_frame - time.monotonic()) * 1000)), zmq.POLLIN):
            newest = None
            while True:  # every command (the first answering a frame counts), read lightly: on a busy
                try:     # machine a full decode of each could not keep up with the tick rate
                    data = sub.recv_multipart(zmq.NOBLOCK)[1]
                except zmq.Again:
                    break
                got = time.time_ns()
                newest = data
                m = msgpack.unpackb(data)
                if answers is None:
                    answers = m["answers"]  # the previous client's last twist: no answer of ours
                elif m["answers"] != answers and m["answers"] >= 0:
                    answers = m["answers"]
                    if pending is not None and pending[1]:
                        published.append((m["stamp_ns"] - pending[0]) / 1e6)
                        received.append((got - pending[0]) / 1e6)
                        answered.append((answers, pending[0], m["stamp_ns"]))
                    if measuring_from is None:
                        measuring_from = time.monotonic() + WARMUP_S
                        end = measuring_from + seconds
                    pending = None
            if newest is not None:
                target = wire.decode_command(newest, arm.n).target  # checked in full: the newest one
            continue
        if time.monotonic() < next_frame:
            continue
        next_frame += _gap(run)
        if target is None:
            continue
        if pending is not None and pending[1]:
            unanswered += 1
        ids, pixels, depths = run.cell.view(tool_pose(arm, target))
        counted = measuring_from is not None and time.monotonic() >= measuring_from
        stamp = time.time_ns()
        sender.send(stamp, ids, pixels, depths)
        pending = (stamp, counted)
        frames += counted
    if measuring_from is None:
        return {"frames": 0}
    return {"frames": frames, "unanswered": unanswered, "published": published, "received": received,
            "answers": answered}


def _lines(name: str, r: dict[str, Any]) -> list[str]:
    p, q = r["sent_to_published"], r["sent_to_received"]
    w, wa, st = r[CPU_WAIT], r[CPU_WAIT_ALL], r["stalls"]
    labels = ("to its socket", "to its twist", "to published")
    parts = ", ".join(f"{label} {r[k]['median_ms']:.3f} / {r[k]['p99_ms']:.3f} / {r[k]['max_ms']:.3f}"
                      for k, label in zip(PARTS, labels, strict=True))
    return [f"  {name}: {r['frames']} frames, {r['unanswered']} without an answer",
            f"    features sent -> command published: median {p['median_ms']:.3f} ms, "
            f"p99 {p['p99_ms']:.3f} ms, max {p['max_ms']:.3f} ms ({p['count']} answers)",
            f"    features sent -> command received: median {q['median_ms']:.3f} ms, "
            f"p99 {q['p99_ms']:.3f} ms, max {q['max_ms']:.3f} ms",
            f"    parts, median / p99 / max ms ({r[PARTS[0]]['count']} answers): {parts}",
            f"    waiting for a CPU from its wait for the frame to the twist, median / p99 / max ms: its "
            f"loop's thread {w['median_ms']:.3f} / {w['p99_ms']:.3f} / {w['max_ms']:.3f}, all its threads "
            f"{wa['median_ms']:.3f} / {wa['p99_ms']:.3f} / {wa['max_ms']:.3f}",
            f"    {st['count']} stalls (features sent -> twist sent > {st['over_ms']:g} ms)"
            + (f", median {st['median_ms']:.1f} ms: CPU wait covers "
               f"{st['cpu_wait_share_median'] * 100:.0f} % of each (median; all threads "
               f"{st['cpu_wait_all_share_median'] * 100:.0f} %)"
               if st["count"] else "")]


def format_result(r: dict[str, Any]) -> str:
    v, f, d = r["vservo"]["sent_to_published"], r["relay"]["sent_to_published"], r["vservo_minus_relay"]
    target = r["target_p99_ms"]
    verdict = "meets" if v["p99_ms"] <= target else "MISSES"
    floor = "meets" if f["p99_ms"] <= target else "misses"
    return "\n".join([
        f"vservo at service tick {r['rate_hz']:g} Hz, frames {r['frame_hz']:g} Hz on average (gaps "
        f"+-{r['frame_jitter'] * 100:g} %, random tick phase), {r['rounds']} rounds, {r['seconds']:g} s "
        f"each client; load average {r['load_average_1min'][0]:.1f} -> {r['load_average_1min'][1]:.1f}"
        + (f"; clients SCHED_FIFO {r['clients_realtime_priority']} (if permitted)"
           if r.get("clients_realtime_priority") else ""),
        *_lines("relay (reference: same sockets, fixed twist, no law)", r["relay"]),
        *_lines("vservo", r["vservo"]),
        f"  vservo minus relay (vservo's own cost): median {d['median_ms']:+.3f} ms, "
        f"p99 {d['p99_ms']:+.3f} ms",
        f"  target p99 <= one tick + {TARGET_EXTRA_MS:g} ms = {target:.1f} ms: vservo {verdict} it "
        f"(p99 {v['p99_ms']:.3f} ms); the relay's floor {floor} it (p99 {f['p99_ms']:.3f} ms)",
        *format_costs(r["path"]),
    ])


def run(argv: list[str] | None = None) -> int:
    """`twistrate bench vservo [--seconds S] [--rate HZ] [--rounds N] [--realtime PRIORITY] [--json FILE]`."""
    parser = argparse.ArgumentParser(prog="twistrate bench vservo", description=first_paragraph(__doc__))
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS,
                        help="measured window per client, s (split over the rounds)")
    parser.add_argument("--rate", type=float, default=DEFAULT_RATE_HZ, help="service tick rate, Hz")
    parser.add_argument("--rounds", type=int, default=DEFAULT_ROUNDS,
                        help="interleaved rounds (relay, then vservo, each round)")
    parser.add_argument("--realtime", type=int, default=0, metavar="PRIORITY",
                        help="both clients' loops under SCHED_FIFO at this priority, if permitted (0: off; "
                             "vservo's [run] realtime_priority)")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    args = parser.parse_args(argv)
    if (not 0.5 <= args.seconds <= 600.0 or not 10.0 <= args.rate <= 2000.0 or not 1 <= args.rounds <= 20
            or not 0 <= args.realtime <= 99):
        print("twistrate bench vservo: accepted: 0.5 <= --seconds <= 600, 10 <= --rate <= 2000, "
              "1 <= --rounds <= 20, 0 <= --realtime <= 99", file=sys.stderr)
        return 2
    result = bench(args.rate, args.seconds, args.rounds, args.realtime)
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2, default=float))
    print(format_result(result))
    return 0


def main(argv: list[str] | None = None) -> int:
    return run(argv)


if __name__ == "__main__":
    raise SystemExit(main())
