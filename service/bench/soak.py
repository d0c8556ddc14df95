"""`twistrate bench soak --minutes N [--rate HZ] [--json FILE]`: the service held at its tick rate for a
long time with everything moving around it, then every counter checked.

Processes: `twistrate serve` (driver mode, default 1 kHz), a driver (the simulated arm over the wire,
as `twistrate sim` runs it: service/sim_driver.py), a twist-source process with two clients that hand
the lease to each other, and this process as the health watcher (every command, health and event).

* The twist sources: the lease changes hands every HANDOVER_S (60 s; a run shorter than 4 minutes
  scales it to a quarter of the run, and says so). The holder claims, enables, then streams for a
  while and falls silent for a while, in turn (the service stops the arm on the stale twist, holds,
  and resumes on the next twist), then disables and releases; after each release the old holder sends
  a few twists with its released token and two malformed frames, so refusals are counted by reason.
* Resident memory of the service (/proc/PID/status VmRSS) is sampled through the run; the growth is
  the least-squares slope after the warm-up, in MB per hour (service/bench/soak_checks.py).
* Overruns of the service beside the machine's floor: after the service stopped, the bare loop of
  service/bench/floor.py with the same rate and scheduling (`bench service` does the same).
* At the end (sources and driver stopped, the intake quiet) every identity of soak_checks.py is
  checked; the exit code is 1 when one fails (or the service faulted or died), 0 otherwise.
"""

from __future__ import annotations

import argparse
import contextlib
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

import zmq

from twistrate.clients.link import Endpoints, Link
from twistrate.service import wire
from twistrate.service.bench.service import CONFIG_TEXT, cpu_seconds, load_average, measure_floor
from twistrate.service.bench.soak_checks import identities, memory_growth, warmup_s
from twistrate.service.bench.soak_source import source_main
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import WireError

#: The lease changes hands this often in a run of at least HANDOVER_FULL_RUN_S, s.
HANDOVER_S = 60.0
HANDOVER_FULL_RUN_S = 240.0
#: Streaming and silent phases of the holder, s (scaled down with the handover interval).
STREAM_S, SILENT_S = 8.0, 2.0
#: A silent phase lasts at least this long (the twist timeout, 100 ms, plus the stop and a margin), s.
SILENT_MIN_S = 0.3
#: High-water marks of the soak's sockets (messages): far beyond any stall (100 s at 1 kHz), so the
#: intake and command identities see every message.
SOAK_HWM = 100_000
#: Waits: the service's endpoints file, the first command, the intake going quiet, s.
SERVE_START_S = 30.0
FIRST_COMMAND_S = 60.0
QUIET_S = 0.3
QUIET_LIMIT_S = 20.0
#: The floor runs at most this long (a sample of the machine's stalls), s.
FLOOR_MAX_S = 300.0
RUN_LIMIT_MIN = 600.0
#: The service bench's configuration, with queues deep enough that the counter identities are exact.
SOCKETS_TEXT = "[sockets]\nsend_hwm = {hwm}\nreceive_hwm = {hwm}\n"


def rss_mb(pid: int) -> float:
    """Resident memory of a process, MB (Linux /proc/PID/status VmRSS, kB)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1000.0
    return math.nan


def schedule(total_s: float) -> dict[str, float]:
    """The handover interval and the streaming / silent phases for a run of total_s."""
    handover = HANDOVER_S if total_s >= HANDOVER_FULL_RUN_S else total_s / 4.0
    scale = handover / HANDOVER_S
    return {"handover_s": handover, "stream_s": STREAM_S * scale,
            "silent_s": max(SILENT_MIN_S, SILENT_S * scale), "scaled": handover < HANDOVER_S}


def _driver_main(config_path: str, ep_file: str) -> int:
    """The driver process: the simulated arm over the wire (SimDriver) whose joint-state socket is an XPUB,
    so its first state goes out once the service subscribed (none lost to the publish/subscribe start);
    prints {"joints_sent", "commands_received"} as JSON at SIGTERM."""
    from twistrate.service.config import load_config
    from twistrate.service.sim_driver import SimDriver

    config = load_config(config_path)
    driver = SimDriver(config, endpoints=read_endpoints(ep_file, SERVE_START_S))
    driver.joints.close(0)
    pub = driver.joints = driver.ctx.socket(zmq.XPUB)
    pub.setsockopt(zmq.LINGER, 0)
    pub.setsockopt(zmq.SNDHWM, config.sockets.send_hwm)
    pub.connect(driver.endpoints["intake"])
    if not pub.poll(int(SERVE_START_S * 1000)) or pub.recv() != b"\x01" + wire.TOPIC_JOINTS:
        print("soak driver: the service never subscribed to joint state", file=sys.stderr)
        return 1
    signal.signal(signal.SIGTERM, driver.stop)
    signal.signal(signal.SIGINT, driver.stop)
    try:
        driver.run()
    finally:
        # deliver what is still queued (counted as sent): with linger 0 a loaded machine's last states
        # were dropped at exit, 41 of 3.4 million in a 60-minute soak, and the intake identity failed
        pub.close(linger=2000)
        print(json.dumps({"joints_sent": driver.seq, "commands_received": driver.received}), flush=True)
        driver.close()
    return 0


class Watcher:
    """The health watcher: every command, health and event from the output, checked as it comes."""

    def __init__(self, output: str, n: int) -> None:
        self.ctx = zmq.Context()
        self.sub = self.ctx.socket(zmq.SUB)
        self.sub.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.RCVHWM, SOAK_HWM)
        for topic in (wire.TOPIC_COMMAND, wire.TOPIC_HEALTH, wire.TOPIC_EVENT):
            self.sub.setsockopt(zmq.SUBSCRIBE, topic)
        self.sub.connect(output)
        self.n = n
        self.s: dict[str, Any] = {"commands": 0, "first_seq": -1, "last_seq": -1, "seq_minus_tick": None,
                                  "offsets_seen": 0, "events": {}, "event_gaps": 0, "health": 0,
                                  "health_overruns_decreased": 0, "health_rejected_max": {},
                                  "undecodable": 0, "modes": {}}
        self._event_seq: int | None = None
        self._overruns = -1

    def take(self, timeout_ms: int) -> int:
        """Read what arrives within timeout_ms (then what is queued); return the number read."""
        got = 0
        while self.sub.poll(timeout_ms if got == 0 else 0):
            try:
                self._see(wire.decode_output(self.sub.recv_multipart(), self.n))
            except WireError:
                self.s["undecodable"] += 1
            got += 1
            if got >= 10_000:
                break
        return got

    def _see(self, msg: Any) -> None:
        s = self.s
        if type(msg) is wire.CommandMessage:
            if s["commands"] == 0:
                s["first_seq"] = msg.seq
            s["commands"] += 1
            s["last_seq"] = msg.seq
            if msg.seq - msg.tick != s["seq_minus_tick"]:
                s["seq_minus_tick"] = msg.seq - msg.tick
                s["offsets_seen"] += 1
            s["modes"][msg.mode] = s["modes"].get(msg.mode, 0) + 1
        elif type(msg) is wire.HealthMessage:
            s["health"] += 1
            s["health_overruns_decreased"] += msg.overruns < self._overruns
            self._overruns = msg.overruns
            hr = s["health_rejected_max"]
            for k, v in msg.rejected.items():
                hr[k] = max(hr.get(k, 0), v)
        elif type(msg) is wire.EventMessage:
            if self._event_seq is not None:
                s["event_gaps"] += max(0, msg.seq - self._event_seq - 1)
            self._event_seq = msg.seq
            s["events"][msg.event] = s["events"].get(msg.event, 0) + 1

    def close(self) -> None:
        self.sub.close(0)
        self.ctx.term()


def _spawn(args: list[str], out: Any = subprocess.DEVNULL) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", *args], stdout=out, stderr=subprocess.PIPE, text=True)


def _stop(proc: subprocess.Popen, timeout_s: float = 20.0) -> tuple[str, str]:
    """SIGTERM (SIGKILL after timeout_s); (stdout, stderr)."""
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    try:
        out, err = proc.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate()
    return out or "", err or ""


def _last_json(name: str, proc: subprocess.Popen, out: str, err: str) -> dict[str, Any]:
    """The last JSON line a helper process printed; else an error with its exit code and stderr."""
    for line in reversed(out.strip().splitlines()):
        with contextlib.suppress(ValueError):
            return json.loads(line)
    raise RuntimeError(f"bench soak: the {name} process (exit code {proc.returncode}) printed no figures; "
                       f"its stderr ends: {err.strip()[-600:]!r}")


def _taken(c: dict[str, int]) -> int:
    return c["accepted_twist"] + c["accepted_joints"] + c["rejected_total"] + c["superseded"]


def soak(minutes: float, rate_hz: float, floor_s: float | None = None) -> dict[str, Any]:
    """Run the soak; return its figures and identities (see the module docstring)."""
    total_s = minutes * 60.0
    plan = schedule(total_s)
    sample_s = min(5.0, max(0.25, total_s / 300.0))
    errors: list[str] = []
    with tempfile.TemporaryDirectory() as tmp:
        cfg = Path(tmp) / "soak.toml"
        cfg.write_text(CONFIG_TEXT.format(rate_hz=rate_hz) + SOCKETS_TEXT.format(hwm=SOAK_HWM))
        ep_file = str(Path(tmp) / "endpoints.json")
        serve = _spawn(["twistrate.service.commands.cli", "serve", "--config", str(cfg), "--endpoints-file",
                        ep_file])
        procs = [serve]
        try:
            ep = Endpoints(**read_endpoints(ep_file, SERVE_START_S))
            driver = _spawn(["twistrate.service.bench.soak", "--driver", str(cfg), ep_file], subprocess.PIPE)
            procs.append(driver)
            link = Link(ep, client="soak-watch", topics=(), timeout_s=10.0)
            n = int(link.arm()["n"])
            watch = Watcher(ep.output, n)
            give_up = time.monotonic() + FIRST_COMMAND_S
            while watch.s["commands"] == 0:  # the driver is heard: commands flow
                if time.monotonic() > give_up:
                    raise RuntimeError(f"bench soak: no command within {FIRST_COMMAND_S:g} s of the start")
                watch.take(100)
            source = _spawn(["twistrate.service.bench.soak", "--source", ep.intake, ep.output, ep.control,
                             f"{total_s:g}", f"{plan['handover_s']:g}", f"{plan['stream_s']:g}",
                             f"{plan['silent_s']:g}"], subprocess.PIPE)
            procs.append(source)
            c0, t0, cpu0 = link.counters(), time.monotonic(), cpu_seconds(serve.pid)
            load0 = load_average()
            samples: list[tuple[float, float]] = [(0.0, rss_mb(serve.pid))]
            next_sample = t0 + sample_s
            limit = t0 + total_s + 120.0
            while source.poll() is None and time.monotonic() < limit:
                watch.take(50)
                if time.monotonic() >= next_sample:
                    samples.append((time.monotonic() - t0, rss_mb(serve.pid)))
                    next_sample += sample_s
            t1, cpu1 = time.monotonic(), cpu_seconds(serve.pid)
            src_out, src_err = _stop(source)
            sent = _last_json("twist source", source, src_out, src_err)
            drv_out, drv_err = _stop(driver)
            driver_counts = _last_json("driver", driver, drv_out, drv_err)
            errors += [e.strip().splitlines()[-1] for e in (src_err, drv_err) if "Traceback" in e]
            quiet_until, last, give_up = time.monotonic() + QUIET_S, -1, time.monotonic() + QUIET_LIMIT_S
            while time.monotonic() < quiet_until and time.monotonic() < give_up:
                watch.take(20)
                taken = _taken(c1 := link.counters())
                if taken != last:
                    last, quiet_until = taken, time.monotonic() + QUIET_S
            c1 = link.counters()
            watch.take(200)
            status = link.status()
            link.close()
            watch.close()
        finally:
            outs = [_stop(p) for p in reversed(procs)]
    serve_err = outs[-1][1]
    if "Traceback" in serve_err or serve.returncode not in (0, -signal.SIGTERM):
        errors.append(f"service exit {serve.returncode}: {serve_err.strip()[-300:]}")
    ticks, overruns = c1["ticks"] - c0["ticks"], c1["overruns"] - c0["overruns"]
    stalled = c1.get("overruns_after_stalled_wake", 0) - c0.get("overruns_after_stalled_wake", 0)
    floor = measure_floor(rate_hz, min(floor_s if floor_s is not None else t1 - t0, FLOOR_MAX_S), None)
    fraction = overruns / ticks if ticks else math.nan
    checks = identities(sent, driver_counts, c1, watch.s)
    checks.append({"name": "no fault, service alive", "ok": c1["faults"] == 0 and not errors,
                   "detail": f"faults {c1['faults']}, mode at the end {status['mode']}; "
                             f"process errors: {errors or 'none'}"})
    return {
        "minutes": minutes, "rate_hz": rate_hz, "measured_s": t1 - t0, "schedule": plan,
        "memory": {**memory_growth(samples, warmup_s(t1 - t0)), "sample_s": sample_s, "rss": samples},
        "ticks": ticks, "overruns": overruns, "overrun_fraction": fraction,
        # overruns after a wake-up that ended more than half a period late (the machine's; the rest: work)
        "overruns_after_stalled_wake": stalled,
        "lateness_p99_us": c1["lateness_p99_ns"] / 1000.0, "lateness_max_us": c1["lateness_max_ns"] / 1000.0,
        "floor": floor, "overrun_points_above_floor": 100.0 * (fraction - floor["overrun_fraction"]),
        "realtime": bool(status["realtime"]), "cpu_fraction": (cpu1 - cpu0) / (t1 - t0),
        "load_average_before": load0, "load_average_after": load_average(),
        "sent": sent, "driver": driver_counts, "counters": c1, "watch": watch.s,
        "identities": checks, "ok": all(ch["ok"] for ch in checks),
    }


def format_result(r: dict[str, Any]) -> str:
    p, m, f, s = r["schedule"], r["memory"], r["floor"], r["sent"]
    ev = r["watch"]["events"]
    lines = [
        f"soak at {r['rate_hz']:g} Hz for {r['measured_s']:.1f} s ({r['ticks']} ticks; scheduling "
        f"{'real-time' if r['realtime'] else 'normal'}; service CPU {100 * r['cpu_fraction']:.1f} % of one "
        f"core; load average {r['load_average_before']:.2f} -> {r['load_average_after']:.2f})",
        f"  lease             changes hands every {p['handover_s']:g} s"
        + (f" (scaled down from {HANDOVER_S:g} s for a run under {HANDOVER_FULL_RUN_S / 60:g} min)"
           if p["scaled"] else "")
        + f"; {s['claims']} claims, {s['releases']} releases",
        f"  twist sources     stream {p['stream_s']:.3g} s, silent {p['silent_s']:.3g} s, in turn: "
        f"{ev.get('stale_input', 0)} stops on a stale twist, {ev.get('running', 0)} starts",
        f"  resident memory   {m['rss_first_mb']:.1f} -> {m['rss_last_mb']:.1f} MB "
        f"(max {m['rss_max_mb']:.1f}); "
        f"growth {m['growth_mb_per_h']:+.2f} MB/h (least squares over {m['fitted_samples']} samples after "
        f"a {m['warmup_s']:.0f} s warm-up, one every {m['sample_s']:g} s)",
        f"  overruns          {r['overruns']} of {r['ticks']} ({100 * r['overrun_fraction']:.3f} %); floor "
        f"(bare loop, {f['seconds']:.0f} s) {f['overruns']} of {f['ticks']} "
        f"({100 * f['overrun_fraction']:.3f} %);"
        f" ours {r['overrun_points_above_floor']:+.3f} points",
        f"                    of ours {r['overruns_after_stalled_wake']} after a wake-up that ended more "
        f"than half a period late (the machine's), {r['overruns'] - r['overruns_after_stalled_wake']} after "
        f"work that ran long",
        f"  tick lateness     p99 {r['lateness_p99_us']:.1f} us, max {r['lateness_max_us']:.1f} us "
        "(whole run)",
        "  identities",
    ]
    lines += [f"    [{'ok' if ch['ok'] else 'FAILED'}] {ch['name']}: {ch['detail']}"
              for ch in r["identities"]]
    return "\n".join(lines)


def run(argv: list[str] | None = None) -> int:
    """`twistrate bench soak --minutes N [--rate HZ] [--json FILE] [--floor-seconds S]`."""
    parser = argparse.ArgumentParser(prog="twistrate bench soak", description=first_paragraph(__doc__))
    parser.add_argument("--minutes", type=float, default=60.0, help="how long the sources run (default 60)")
    parser.add_argument("--rate", type=float, default=1000.0, help="tick rate, Hz (default 1000)")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    parser.add_argument("--floor-seconds", type=float, default=None,
                        help="how long the bare loop runs (default: as long as the soak, at most "
                             f"{FLOOR_MAX_S:g})")
    parser.add_argument("--driver", nargs=2, help=argparse.SUPPRESS)
    parser.add_argument("--source", nargs=7, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.driver:
        return _driver_main(*args.driver)
    if args.source:
        intake, output, control, *numbers = args.source
        return source_main(Endpoints(intake, output, control), *(float(x) for x in numbers))
    if not 0.05 <= args.minutes <= RUN_LIMIT_MIN:
        print(f"twistrate bench soak: --minutes: got {args.minutes:g}; accepted: 0.05 to {RUN_LIMIT_MIN:g}",
              file=sys.stderr)
        return 2
    if not 10.0 <= args.rate <= 2000.0:
        print(f"twistrate bench soak: --rate: got {args.rate:g}; accepted: 10 to 2000 Hz", file=sys.stderr)
        return 2
    r = soak(args.minutes, args.rate, args.floor_seconds)
    print(format_result(r), flush=True)
    if args.json:
        machine = {"cpus": os.cpu_count(), "python": sys.version.split()[0]}
        doc = {"benchmark": "soak", "machine": machine, **r}
        Path(args.json).write_text(json.dumps(doc, indent=2, default=float))
    return 0 if r["ok"] else 1


def main(argv: list[str] | None = None) -> int:
    return run(argv)


if __name__ == "__main__":
    raise SystemExit(run(sys.argv[1:]))
