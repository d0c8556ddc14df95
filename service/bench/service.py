"""`twistrate bench service`: the service as deployed, timed from outside, at 500 Hz and 1 kHz.

Per tick rate, in one run: `twistrate serve` (driver mode), `twistrate sim` (the simulated arm as an
external driver) and a twist source each run as their own process; this process is the watching
client. It reports

* whether the service's tick ran with real-time scheduling (status op): the service runs with its
  default, SCHED_FIFO when the operating system permits it (--rt-priority overrides);
* tick lateness (wake time - deadline: median, p99, max) and overruns, measured by the service itself
  (counters op) over the whole run;
* twist arrival to command publish (median, p99, max), measured by the service on its own monotonic
  clock: from the last intake poll that found no message waiting before the twist was taken (the twist
  was not there then, so it arrived later) to the publish of the first command answering it. An upper
  bound of the true figure: the service cannot see when ZeroMQ queued the message;
* twist send to command publish (median, p99): from the twist's send stamp (the source's wall clock) to
  that publish; end to end, with the loopback transport and the source process's own scheduling;
* tick to command received by a client (median, p99): this process's receive time minus the command's
  stamp (the service's wall clock at the tick's wake-up);
* the service process's CPU share over the measured window (/proc/PID/stat utime + stime: all its
  threads, as a fraction of one core), against its target, with the tick lateness p99 on the same line
  (the spin before each deadline trades CPU for lateness); and the same per thread
  (/proc/PID/task/TID/stat): the tick thread, ZeroMQ's I/O thread, the main thread (the control plane
  under `twistrate serve`) and any other; and of the tick thread's, the time it spun on the clock before
  its deadlines (counters `spin_ns`: busy waiting, CPU time);
* the floor: right after the service stopped, a bare loop (service/bench/floor.py) with the same rate,
  scheduling and CPU wake-up request and no work, for as long; its overruns and lateness beside ours
  (target: our overrun fraction at most the floor's + 0.05 percentage points);
* with --flood, each rate runs a second time with an intake flood beside it (service/bench/flood.py: a
  local process sending refused twists as fast as it can): what it sent, what the service took
  (refused, superseded), and the same figures;
* context: the CPU of all benchmark processes, the load average, and the CPU wake-up latency request in
  force on the machine during the window (the service holds 0 µs when it runs real-time; see
  docs/operation.md).

Targets (this 2-core machine): lateness p99 <= 100 us at 500 Hz and <= 150 us at 1 kHz; overruns
< 0.1 % of ticks; service CPU <= 20 % of one core at 500 Hz and <= 35 % at 1 kHz; arrival to publish
p99 <= one period + 300 us.
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

import numpy as np

from twistrate.clients.link import Endpoints, Link
from twistrate.service.bench.service_dashboard import add_option as add_dashboard_option
from twistrate.service.bench.service_dashboard import run_pairs
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.tick import (
    ARRIVAL_TARGET_EXTRA_US,
    DEFAULT_RT_PRIORITY,
    TICK_THREAD_OS_NAME,
    cpu_wake_latency_in_force_us,
)
from twistrate.service.wire.discovery import read_endpoints

DEFAULT_RATES = (500.0, 1000.0)
DEFAULT_SECONDS = 10.0
#: Run before the measured window (processes start, connections settle, caches warm), s.
WARMUP_S = 2.0
#: The warm-up waits at most this much longer for the driver and the source to be heard, s.
START_LIMIT_S = 60.0
#: Twists per second of the source.
SOURCE_HZ = 200.0
TARGET_LATENESS_P99_US = {500.0: 100.0, 1000.0: 150.0}
TARGET_OVERRUN_FRACTION = 0.001
#: The service process's CPU (all its threads), fraction of one core, per tick rate.
TARGET_CPU_FRACTION = {500.0: 0.20, 1000.0: 0.35}
#: Overruns of the service at most this many percentage points above the bare loop's (the floor).
TARGET_POINTS_ABOVE_FLOOR = 0.05
#: What the kernel reports as the CPU wake-up latency when nobody requests one, us (Linux PM QoS,
#: PM_QOS_CPU_LATENCY_DEFAULT_VALUE: 2000 s).
NO_WAKE_LATENCY_REQUEST_US = 2_000_000_000
CLK_TCK = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100


#: The per-thread CPU line's names of the roles of thread_cpu_seconds.
THREAD_LABELS = {"tick": "tick", "zmq_io": "ZeroMQ I/O", "main": "main (control)", "other": "other"}
#: How long the benchmark waits for the service to bind and write its endpoints file, s.
SERVE_START_S = 20.0
CONFIG_TEXT = """[arm]
file = "reach7"
[tick]
rate_hz = {rate_hz}
health_hz = 50
[endpoints]
intake = "tcp://127.0.0.1:*"
output = "tcp://127.0.0.1:*"
control = "tcp://127.0.0.1:*"
[simulation]
enabled = false
lag_s = 0.02
[logging]
level = "warning"
"""


def cpu_seconds(pid: int) -> float:
    """utime + stime of a process, s (Linux /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / CLK_TCK


def thread_cpu_seconds(pid: int) -> dict[str, float]:
    """utime + stime of each thread of a process, s, summed per role (Linux /proc/PID/task): "tick" (the
    thread named TICK_THREAD_OS_NAME), "zmq_io" (ZeroMQ's I/O threads, ZMQbg/IO/N), "main" (the main
    thread: the control plane under `twistrate serve`) and "other" (logging listener, recorder, ...)."""
    out = dict.fromkeys(("tick", "zmq_io", "main", "other"), 0.0)
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            text = (task / "stat").read_text()
        except OSError:  # the thread ended meanwhile
            continue
        comm = text[text.index("(") + 1:text.rindex(")")]
        fields = text.rsplit(")", 1)[1].split()
        role = ("main" if task.name == str(pid) else "tick" if comm == TICK_THREAD_OS_NAME else
                "zmq_io" if comm.startswith("ZMQbg/IO") else "other")
        out[role] += (int(fields[11]) + int(fields[12])) / CLK_TCK
    return out


def load_average() -> float:
    """The 1-minute load average (Linux /proc/loadavg): context for the figures on a shared machine."""
    try:
        return float(Path("/proc/loadavg").read_text().split()[0])
    except (OSError, ValueError, IndexError):
        return math.nan


def _source(ep: Endpoints, seconds: float) -> int:
    """The twist source process: a slow circle with a gentle turn, SOURCE_HZ twists per second."""
    with Link(ep, client="bench-source", topics=(), timeout_s=2.0) as link:
        link.wait_ready(timeout_s=10.0)
        link.claim(lease_ms=2000)
        link.enable()
        w = 2.0 * math.pi * 0.25

        def circle(t: float) -> tuple[tuple[float, ...], tuple[float, ...]]:
            return ((0.04 * math.cos(w * t), 0.04 * math.sin(w * t), 0.01 * math.sin(2 * w * t)),
                    (0.0, 0.0, 0.1 * math.sin(w * t)))

        link.stream_twists(circle, SOURCE_HZ, seconds)
        with contextlib.suppress(Exception):
            link.disable()
            link.release()
    return 0


def _flowing(counters: dict[str, int]) -> bool:
    """The driver's joint state and the source's twists both reach the service."""
    return counters.get("accepted_joints", 0) > 0 and counters.get("accepted_twist", 0) > 0


def measure_floor(rate_hz: float, seconds: float, rt_priority: int | None) -> dict[str, Any]:
    """The bare loop (service/bench/floor.py) at the same rate and scheduling, right after the service
    stopped, in its own process for `seconds`."""
    prio = DEFAULT_RT_PRIORITY if rt_priority is None else rt_priority
    out = subprocess.run([sys.executable, "-m", "twistrate.service.bench.floor", f"{rate_hz:g}",
                          f"{seconds:g}", str(prio)], capture_output=True, text=True,
                         timeout=seconds + 60.0, check=True)
    return json.loads(out.stdout)


def _spawn(args: list[str]) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", *args], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True)


def _stop(proc: subprocess.Popen, timeout_s: float = 10.0) -> str:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    try:
        _, err = proc.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        _, err = proc.communicate()
    return err or ""


def bench_rate(rate_hz: float, seconds: float, rt_priority: int | None = None,
               flood: bool = False, beside: Any = None) -> dict[str, Any]:
    """Run serve + sim + source at `rate_hz` for WARMUP_S + seconds; return the figures.
    rt_priority : the service's --rt-priority (None: its configured default).
    flood : also run an intake flood (service/bench/flood.py) through the measured window.
    beside : None, or a function of the service's Endpoints giving a context manager that runs from
    the service's binding to its stop (service/bench/service_dashboard.py: the dashboard attached)."""
    attached = contextlib.ExitStack()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.toml"
        path.write_text(CONFIG_TEXT.format(rate_hz=rate_hz))
        ep_file = str(Path(tmp) / "endpoints.json")
        serve_args = ["twistrate.service.commands.cli", "serve", "--config", str(path), "--endpoints-file",
                      ep_file]
        if rt_priority is not None:
            serve_args += ["--rt-priority", str(rt_priority)]
        serve = _spawn(serve_args)
        procs = [serve]
        flooder = flood_sent = None
        try:
            ep = Endpoints(**read_endpoints(ep_file, SERVE_START_S))
            if beside is not None:
                attached.enter_context(beside(ep))
            procs.append(_spawn(["twistrate.service.commands.cli", "sim", "--config", str(path),
                                 "--endpoints-file", ep_file]))
            with Link(ep, client="bench-watch", topics=(b"command",), timeout_s=5.0) as link:
                link.wait_ready(timeout_s=20.0, topics=(b"twist", b"joints"))
                link.arm()
                realtime = bool(link.status()["realtime"])
                procs.append(_spawn(["twistrate.service.bench.service", "--source", ep.intake, ep.output,
                                     ep.control, str(WARMUP_S + seconds + 1.0)]))
                end_warmup = time.monotonic() + WARMUP_S
                give_up = end_warmup + START_LIMIT_S
                while time.monotonic() < end_warmup or not _flowing(link.counters()):
                    if time.monotonic() > give_up:  # a loaded machine starts processes slowly
                        raise RuntimeError("bench service: no joint state or twist reached the service "
                                           f"within {START_LIMIT_S:g} s of the warm-up")
                    link.drain()
                    time.sleep(0.05)
                link.drain()
                if flood:
                    flooder = subprocess.Popen([sys.executable, "-m", "twistrate.service.bench.flood",
                                                ep.intake, str(seconds)], stdout=subprocess.PIPE,
                                               stderr=subprocess.PIPE, text=True)
                    procs.append(flooder)
                c0 = link.counters()
                ours = [serve.pid, *(p.pid for p in procs[1:]), os.getpid()]
                threads0 = thread_cpu_seconds(serve.pid)
                cpu0, wall0 = cpu_seconds(serve.pid), time.monotonic()
                ours0, load0 = sum(cpu_seconds(pid) for pid in ours), load_average()
                wake_latency = cpu_wake_latency_in_force_us()
                received: list[int] = []
                running = 0
                end = wall0 + seconds
                while time.monotonic() < end:
                    with contextlib.suppress(TimeoutError):
                        cmd = link.receive_command(timeout_s=0.1)
                        received.append(time.time_ns() - cmd.stamp_ns)
                        running += cmd.mode == "running"
                cpu1, wall1 = cpu_seconds(serve.pid), time.monotonic()
                threads1 = thread_cpu_seconds(serve.pid)
                ours1, load1 = sum(cpu_seconds(pid) for pid in ours), load_average()
                c1 = link.counters()
                if flooder is not None:
                    with contextlib.suppress(subprocess.TimeoutExpired, ValueError):
                        flood_sent = int(flooder.communicate(timeout=10.0)[0].split()[-1])
        finally:
            attached.close()
            errors = [_stop(p) for p in reversed(procs) if p is not flooder or flooder.returncode is None]
    floor = None if flood else measure_floor(rate_hz, seconds, rt_priority)
    ticks = c1["ticks"] - c0["ticks"]
    overruns = c1["overruns"] - c0["overruns"]
    stalled = c1.get("overruns_after_stalled_wake", 0) - c0.get("overruns_after_stalled_wake", 0)
    lat = np.array(received, dtype=float) / 1000.0
    period_us = 1e6 / rate_hz
    result = {
        "rate_hz": rate_hz,
        "seconds": seconds,
        "ticks": ticks,
        "ticks_total": c1["ticks"],
        "overruns": overruns,
        "overrun_fraction": overruns / ticks if ticks else math.nan,
        # overruns after a wake-up that ended more than half a period late (the machine's; the rest: work)
        "overruns_after_stalled_wake": stalled,
        "lateness_median_us": c1["lateness_median_ns"] / 1000.0,
        "lateness_p99_us": c1["lateness_p99_ns"] / 1000.0,
        "lateness_max_us": c1["lateness_max_ns"] / 1000.0,
        "tick_work_median_us": c1["tick_work_median_ns"] / 1000.0,
        "tick_work_p99_us": c1["tick_work_p99_ns"] / 1000.0,
        "deadline_to_publish_median_us": c1.get("deadline_to_publish_median_ns", 0) / 1000.0,
        "deadline_to_publish_p99_us": c1.get("deadline_to_publish_p99_ns", 0) / 1000.0,
        "solve_median_us": c1.get("solve_median_ns", 0) / 1000.0,
        "solve_p99_us": c1.get("solve_p99_ns", 0) / 1000.0,
        "arrival_to_publish_median_us": c1["arrival_to_publish_median_ns"] / 1000.0,
        "arrival_to_publish_p99_us": c1["arrival_to_publish_p99_ns"] / 1000.0,
        "arrival_to_publish_max_us": c1["arrival_to_publish_max_ns"] / 1000.0,
        "send_to_publish_median_us": c1["send_to_publish_median_ns"] / 1000.0,
        "send_to_publish_p99_us": c1["send_to_publish_p99_ns"] / 1000.0,
        "tick_to_client_median_us": float(np.median(lat)) if lat.size else math.nan,
        "tick_to_client_p99_us": float(np.percentile(lat, 99)) if lat.size else math.nan,
        "commands_received": int(lat.size),
        "commands_running": running,
        "cpu_fraction": (cpu1 - cpu0) / (wall1 - wall0),
        "thread_cpu_fraction": {role: (threads1[role] - threads0.get(role, 0.0)) / (wall1 - wall0)
                                for role in threads1},
        "bench_cpu_fraction": (ours1 - ours0) / (wall1 - wall0),
        # the tick thread's busy wait before its deadlines (counters spin_ns), a share of one core
        "spin_cpu_fraction": (c1.get("spin_ns", 0) - c0.get("spin_ns", 0)) / 1e9 / (wall1 - wall0),
        "load_average_before": load0,
        "load_average_after": load1,
        "speculation_used_fraction": (c1.get("speculation_used", 0) - c0.get("speculation_used", 0)) / ticks
        if ticks else math.nan,
        "rejected_total": c1.get("rejected_total", 0),
        "flood": flood,
        "flood_sent": flood_sent,
        "flood_refused": c1.get("rejected_not_leased", 0) - c0.get("rejected_not_leased", 0),
        "superseded": c1.get("superseded", 0) - c0.get("superseded", 0),
        "rt_priority": rt_priority,
        "realtime": realtime,
        "cpu_wake_latency_us": wake_latency,
    }
    result["targets"] = {
        "lateness_p99_us": TARGET_LATENESS_P99_US.get(rate_hz),
        "overrun_fraction": TARGET_OVERRUN_FRACTION,
        "cpu_fraction": TARGET_CPU_FRACTION.get(rate_hz),
        "arrival_to_publish_p99_us": period_us + ARRIVAL_TARGET_EXTRA_US,
    }
    if floor is not None:
        result["floor"] = floor
        above = result["overrun_fraction"] - floor["overrun_fraction"]
        result["overrun_points_above_floor"] = 100.0 * above
        result["targets"]["overrun_points_above_floor"] = TARGET_POINTS_ABOVE_FLOOR
    bad = [e.strip().splitlines()[-1] for e in errors if "Traceback" in e]
    if bad:
        result["process_errors"] = bad
    return result


def _verdict(value: float, target: float | None, percent: bool = False) -> str:
    """[met] or [MISSED: target ...]; percent: value and target are fractions printed as percent."""
    if target is None:
        return ""
    shown = f"{100.0 * target:g} %" if percent else f"{target:g}"
    return "  [met]" if value <= target else f"  [MISSED: target {shown}]"


def format_result(r: dict[str, Any]) -> str:
    t = r["targets"]
    sched = "real-time (SCHED_FIFO)" if r["realtime"] else "normal: real-time scheduling was NOT active"
    if r["rt_priority"] is not None:
        sched += f" (--rt-priority {r['rt_priority']})"
    lines = [
        f"service at {r['rate_hz']:g} Hz ({r['seconds']:g} s measured, {r['ticks']} ticks; arm reach7, "
        f"driver and twist source in their own processes)",
        f"  scheduling        {sched}",
        f"  tick lateness     median {r['lateness_median_us']:7.1f} us  p99 {r['lateness_p99_us']:7.1f} us  "
        f"max {r['lateness_max_us']:8.1f} us{_verdict(r['lateness_p99_us'], t['lateness_p99_us'])}",
        f"  overruns          {r['overruns']} of {r['ticks']} ticks ({100 * r['overrun_fraction']:.3f} %)"
        f"{_verdict(r['overrun_fraction'], t['overrun_fraction'], percent=True)}; "
        f"{r.get('overruns_after_stalled_wake', 0)} after a stalled wake-up (the machine's), "
        f"{r['overruns'] - r.get('overruns_after_stalled_wake', 0)} after long work",
        f"  tick work         median {r['tick_work_median_us']:7.1f} us  p99 {r['tick_work_p99_us']:7.1f} us "
        f"(resolve median {r['solve_median_us']:.1f}, p99 {r['solve_p99_us']:.1f} us)",
        f"  deadline -> publish median {r['deadline_to_publish_median_us']:7.1f} us  p99 "
        f"{r['deadline_to_publish_p99_us']:7.1f} us",
        f"  arrival -> publish median {r['arrival_to_publish_median_us']:7.1f} us  p99 "
        f"{r['arrival_to_publish_p99_us']:7.1f} us  max {r['arrival_to_publish_max_us']:8.1f} us "
        f"(upper bound, service clock)"
        f"{_verdict(r['arrival_to_publish_p99_us'], t['arrival_to_publish_p99_us'])}",
        f"  send -> publish   median {r['send_to_publish_median_us']:7.1f} us  p99 "
        f"{r['send_to_publish_p99_us']:7.1f} us (end to end: sender's stamp, with transport)",
        f"  tick -> client    median {r['tick_to_client_median_us']:7.1f} us  p99 "
        f"{r['tick_to_client_p99_us']:7.1f} us ({r['commands_received']} commands, "
        f"{r['commands_running']} running)",
        f"  service CPU       {100 * r['cpu_fraction']:.1f} % of one core (all its threads)"
        f"{_verdict(r['cpu_fraction'], t['cpu_fraction'], percent=True)}; "
        f"tick lateness p99 {r['lateness_p99_us']:.1f} us beside it",
        "  CPU per thread    " + ", ".join(f"{THREAD_LABELS[k]} {100 * v:.1f} %"
                                          for k, v in r["thread_cpu_fraction"].items())
        + f" (of the tick's: spinning before the deadlines {100 * r.get('spin_cpu_fraction', 0.0):.1f} %)",
        f"  context           all bench processes {100 * r['bench_cpu_fraction']:.0f} % of one core; load "
        f"average {r['load_average_before']:.2f} -> {r['load_average_after']:.2f}; solved ahead of the "
        f"deadline {100 * r['speculation_used_fraction']:.0f} % of ticks",
    ]
    wake = r.get("cpu_wake_latency_us")
    lines[-1] += ("; CPU wake-up latency request: unknown" if wake is None else
                  "; CPU wake-up latency request: none" if wake >= NO_WAKE_LATENCY_REQUEST_US else
                  f"; CPU wake-up latency request: {wake} us")
    floor = r.get("floor")
    if floor is not None:
        lines.insert(5, f"  floor (bare loop) lateness median {floor['lateness_median_us']:5.1f} us  p99 "
                        f"{floor['lateness_p99_us']:7.1f} us  max {floor['lateness_max_us']:8.1f} us; "
                        f"overruns "
                        f"{floor['overruns']} of {floor['ticks']} ({100 * floor['overrun_fraction']:.3f} %); "
                        f"ours {r['overrun_points_above_floor']:+.3f} points"
                        f"{_verdict(r['overrun_points_above_floor'], TARGET_POINTS_ABOVE_FLOOR)}")
    if r.get("flood"):
        lines.insert(1, f"  intake flood      {r['flood_sent']} twists sent under a lease nobody holds; the "
                        f"service took {r['flood_refused']} (refused not_leased) and superseded "
                        f"{r['superseded']} unread")
    if r.get("process_errors"):
        lines.append(f"  process errors: {r['process_errors']}")
    return "\n".join(lines)


def run(argv: list[str] | None = None) -> int:
    """`twistrate bench service [--json FILE] [--seconds S] [--rates HZ,HZ] [--rt-priority N] [--flood]`."""
    parser = argparse.ArgumentParser(prog="twistrate bench service", description=first_paragraph(__doc__))
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS, help="measured time per rate, s")
    parser.add_argument("--rates", default=",".join(f"{r:g}" for r in DEFAULT_RATES),
                        help="tick rates to run, Hz, comma-separated (default 500,1000)")
    parser.add_argument("--rt-priority", type=int, default=None, metavar="N",
                        help="pass --rt-priority N to the service (default: the service's own default, "
                             "SCHED_FIFO when permitted; 0: normal scheduling)")
    parser.add_argument("--flood", action="store_true",
                        help="run each rate twice: without, then with an intake flood (a local process "
                             "sending refused twists as fast as it can)")
    add_dashboard_option(parser)
    parser.add_argument("--source", nargs=4, metavar=("INTAKE", "OUTPUT", "CONTROL", "SECONDS"),
                        help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.source:
        intake, output, control, secs = args.source
        return _source(Endpoints(intake, output, control), float(secs))
    try:
        rates = [float(x) for x in args.rates.split(",") if x.strip()]
    except ValueError:
        print(f"twistrate bench service: --rates: got {args.rates!r}; accepted: numbers like 500,1000",
              file=sys.stderr)
        return 2
    if not 1.0 <= args.seconds <= 3600.0:
        print(f"twistrate bench service: --seconds: got {args.seconds:g}; accepted: 1 to 3600",
              file=sys.stderr)
        return 2
    if args.with_dashboard:
        return run_pairs(rates, args.seconds, args.rt_priority, args.json, args.dashboard_nice,
                         args.dashboard_detached)
    results = []
    for rate in rates:
        for flood in (False, True) if args.flood else (False,):
            r = bench_rate(rate, args.seconds, args.rt_priority, flood)
            print(format_result(r), flush=True)
            results.append(r)
    if args.json:
        doc = {"benchmark": "service", "machine": {"cpus": os.cpu_count(), "python": sys.version.split()[0]},
               "rates": {f"{r['rate_hz']:g}": r for r in results if not r["flood"]}}
        if args.flood:
            doc["flood"] = {f"{r['rate_hz']:g}": r for r in results if r["flood"]}
        Path(args.json).write_text(json.dumps(doc, indent=2, default=float))
    return 0


def main(argv: list[str] | None = None) -> int:
    return run(argv)


if __name__ == "__main__":
    raise SystemExit(run(sys.argv[1:]))
