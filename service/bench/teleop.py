"""`twistrate bench teleop`: device event to command published, through the teleop path, over a
synthetic hand-controller stream.

A service with its built-in simulated arm runs as its own process (`twistrate serve`); this process
runs the teleop driver as `twistrate teleop` does (device stage, axis pipeline, session, asyncio
client) on a synthetic relative six-axis stream: reports 4 to 12 ms apart (seeded, so their phase
against the publish tick varies), a push along X that swells and eases but never returns to rest.
For each report: its time (when the device delivered it) to the receipt, by this process, of the first
command answering a twist that includes it (the first twist sent at or after the report). Receipt
is a little later than publish (loopback transport), so the figure is an upper bound.

The reference, measured in the same run and interleaved: the same report times with the twist sent
at once on each report (no publish tick, no pipeline): what the service and the transport cost alone.
Target (issue 8): p99 <= one teleop period + one service tick + 1 ms.
"""

from __future__ import annotations

import argparse
import asyncio
import bisect
import contextlib
import json
import math
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

from twistrate.clients.alink import AsyncLink
from twistrate.clients.linkbase import Endpoints
from twistrate.clients.teleop.core import TeleopCore
from twistrate.clients.teleop.device import DeviceInfo
from twistrate.clients.teleop.events import EV_KEY, RawEvent, ReplaySource, axis_frame
from twistrate.clients.teleop.profile import profile_from_dict
from twistrate.clients.teleop.run import TeleopRun
from twistrate.service.bench.service import CONFIG_TEXT, SERVE_START_S, _spawn, _stop, load_average
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import TwistrateError

DEFAULT_SECONDS = 10.0
DEFAULT_TICK_HZ = 500.0
ROUNDS = 2
#: Report spacing of the synthetic device, s (uniform in this range).
REPORT_GAP_S = (0.004, 0.012)
SEED = 8
BUTTON = 0x100
DEVICE = DeviceInfo("synthetic", "synthetic six-axis stream", "relative", (BUTTON,))
#: Hands-off time at the start of each teleop round (rest offset), then the operator's Enter, s.
SETTLE_S = 0.05
ENABLE_AT_S = 0.1
LEAD_S = 0.3
#: Lease of both rounds, ms: long, so a stall of this process on a loaded machine does not lose it.
BENCH_LEASE_MS = 3_000


def report_times(seconds: float, rng: np.random.Generator) -> np.ndarray:
    """(m,) report times from 0, s."""
    gaps = rng.uniform(*REPORT_GAP_S, size=int(seconds / REPORT_GAP_S[0]) + 1)
    times = np.cumsum(gaps)
    return times[times < seconds]


def stream(t0: float, times: np.ndarray) -> list:
    """The synthetic device's events: hold button down, then a push on X between 0.5 and 1 of full
    scale (350 counts), one report per time."""
    items: list = [RawEvent(t0, EV_KEY, BUTTON, 1)]
    for t in times:
        counts = int(175 + 175 * (0.5 + 0.5 * math.sin(2 * math.pi * 0.3 * t)))
        items += axis_frame(t0 + LEAD_S + float(t), [counts, 0, 0, 0, 0, 0])
    return items


def match(event_t: np.ndarray, sends: list[tuple[float, int, bool]],
          commands: list[tuple[float, int]]) -> np.ndarray:
    """(k,) latencies, s: each event time to the receipt of the first command answering the first
    (moving) twist sent at or after it. Events without such a twist or command are left out, and so
    are events before the first moving twist (they waited for the operator's enable, not the path)."""
    send_t = [s[0] for s in sends]
    first = next((s[0] for s in sends if s[2]), math.inf)
    out = []
    j = 0
    for t in event_t:
        if t < first:
            continue
        i = bisect.bisect_left(send_t, t)
        if i >= len(sends) or not sends[i][2]:
            continue
        seq = sends[i][1]
        while j < len(commands) and (commands[j][1] < seq or commands[j][0] < sends[i][0]):
            j += 1
        if j >= len(commands):
            break
        out.append(commands[j][0] - t)
    return np.array(out)


class _Recorder:
    """Wraps a link's send_twist and listens to its commands, on this process's monotonic clock."""

    def __init__(self, link: AsyncLink) -> None:
        self.sends: list[tuple[float, int, bool]] = []
        self.commands: list[tuple[float, int]] = []
        self._send = link.send_twist
        link.send_twist = self.send_twist  # type: ignore[method-assign]
        self.link = link

    def send_twist(self, linear, angular, frame="base", point=None) -> int:
        seq = self._send(linear, angular, frame, point)
        self.sends.append((time.monotonic(), seq, bool(any(linear) or any(angular))))
        return seq

    async def listen(self) -> None:
        async for command in self.link.commands():
            self.commands.append((time.monotonic(), command.answers))


class _Keys:
    """The operator: presses Enter once the lease is there (again, should an enable be refused)."""

    def __init__(self, session: Any) -> None:
        self.session = session
        self.t0 = time.monotonic()

    def read(self) -> str:
        s = self.session
        ready = s.lease and not s.armed and not s._enabling and time.monotonic() - self.t0 >= ENABLE_AT_S
        return "\r" if ready else ""


async def _teleop_round(link: AsyncLink, rec: _Recorder, times: np.ndarray, rate_hz: float) -> np.ndarray:
    profile = profile_from_dict({"device": {"settle_ms": SETTLE_S * 1e3}, "motion": {"rate_hz": rate_hz},
                                 "buttons": {"frame": None}})
    t0 = time.monotonic()
    core = TeleopCore(profile, ReplaySource(stream(t0, times)), DEVICE, client="bench-teleop")
    start = len(rec.sends), len(rec.commands)
    driver = TeleopRun(core, link, keys=_Keys(core.session), lease_ms=BENCH_LEASE_MS)
    await driver.run(LEAD_S + float(times[-1]) + 0.5)
    if link.lease is not None:  # a claim whose reply came after the quit: give it back
        with contextlib.suppress(TwistrateError):
            await link.release()
    await asyncio.sleep(0.1)
    return match(t0 + LEAD_S + times, rec.sends[start[0]:], rec.commands[start[1]:])


async def _direct_round(link: AsyncLink, rec: _Recorder, times: np.ndarray) -> np.ndarray:
    deadline = time.monotonic() + BENCH_LEASE_MS * 1e-3 + 5.0
    while True:  # the teleop round's release may not have gone through on a loaded machine: wait it out
        try:
            await link.claim("bench-direct", lease_ms=BENCH_LEASE_MS)
            break
        except TwistrateError:
            if time.monotonic() > deadline:
                raise
            await asyncio.sleep(0.2)
    await link.enable()
    t0 = time.monotonic() + LEAD_S
    start = len(rec.sends), len(rec.commands)
    for t in times:
        await asyncio.sleep(max(0.0, t0 + t - time.monotonic()))
        rec.send_twist([0.01 + 0.01 * math.sin(t), 0.0, 0.0], [0.0, 0.0, 0.0])
        if time.monotonic() - rec.link.renewed_at > BENCH_LEASE_MS * 1e-3 / 4:
            await rec.link.renew()
    await asyncio.sleep(0.1)
    await link.disable()
    await link.release()
    sends = rec.sends[start[0]:]
    event_t = np.array([s[0] for s in sends])  # sent at once: the event time is the send time
    return match(event_t, sends, rec.commands[start[1]:])


async def _measure(ep: Any, seconds: float, rate_hz: float) -> dict[str, Any]:
    rng = np.random.default_rng(SEED)
    teleop, direct = [], []
    load0 = load_average()
    realtime = False
    for _ in range(ROUNDS):
        times = report_times(seconds / ROUNDS, rng)
        for kind in ("direct", "teleop"):
            # a link of its own per round: nothing late of one round can act under the next one's lease
            async with AsyncLink(ep, client=f"bench-{kind}", renew=False, timeout_s=2.0) as link:
                await link.wait_ready(20.0)
                await link.arm()
                realtime = bool((await link.status())["realtime"])
                rec = _Recorder(link)
                listener = asyncio.get_running_loop().create_task(rec.listen())
                if kind == "direct":
                    direct.append(await _direct_round(link, rec, times))
                else:
                    teleop.append(await _teleop_round(link, rec, times, rate_hz))
                listener.cancel()
    return {"teleop": np.concatenate(teleop), "direct": np.concatenate(direct), "realtime": realtime,
            "load": (load0 + load_average()) / 2}


def _stats(lat: np.ndarray) -> dict[str, float]:
    if lat.size == 0:
        return {"n": 0, "p50_ms": math.nan, "p99_ms": math.nan, "max_ms": math.nan}
    return {"n": int(lat.size), "p50_ms": float(np.percentile(lat, 50) * 1e3),
            "p99_ms": float(np.percentile(lat, 99) * 1e3), "max_ms": float(lat.max() * 1e3)}


def bench(seconds: float, tick_hz: float, rate_hz: float) -> dict[str, Any]:
    text = CONFIG_TEXT.format(rate_hz=tick_hz).replace("[simulation]\nenabled = false",
                                                       "[simulation]\nenabled = true")
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.toml"
        path.write_text(text)
        ep_file = str(Path(tmp) / "endpoints.json")
        serve = _spawn(["twistrate.service.commands.cli", "serve", "--config", str(path), "--endpoints-file",
                        ep_file])
        try:
            ep = Endpoints(**read_endpoints(ep_file, SERVE_START_S))
            try:
                import uvloop

                measured = uvloop.run(_measure(ep, seconds, rate_hz))
            except ImportError:
                measured = asyncio.run(_measure(ep, seconds, rate_hz))
        finally:
            error = _stop(serve)
    teleop, direct = _stats(measured["teleop"]), _stats(measured["direct"])
    target_ms = 1e3 / rate_hz + 1e3 / tick_hz + 1.0
    return {"seconds": seconds, "tick_hz": tick_hz, "teleop_rate_hz": rate_hz,
            "realtime": measured["realtime"], "load_average": measured["load"], "teleop": teleop,
            "direct": direct, "target_p99_ms": target_ms,
            "p99_ratio_teleop_to_direct": teleop["p99_ms"] / direct["p99_ms"] if direct["n"] else math.nan,
            "service_stderr_tail": error.strip().splitlines()[-3:] if error.strip() else []}


def format_result(r: dict[str, Any]) -> str:
    t, d = r["teleop"], r["direct"]
    ok = "meets" if t["p99_ms"] <= r["target_p99_ms"] else "MISSES"
    return "\n".join([
        f"teleop {r['teleop_rate_hz']:g}/s into a {r['tick_hz']:g} Hz service "
        f"({'real-time' if r['realtime'] else 'normal scheduling'}), {r['seconds']:g} s, "
        f"load average {r['load_average']:.2f}",
        f"  device event -> command received: p50 {t['p50_ms']:.2f} ms, p99 {t['p99_ms']:.2f} ms, "
        f"max {t['max_ms']:.2f} ms over {t['n']} reports ({ok} the p99 target {r['target_p99_ms']:.1f} ms)",
        f"  reference, twist sent at once: p50 {d['p50_ms']:.2f} ms, p99 {d['p99_ms']:.2f} ms, "
        f"max {d['max_ms']:.2f} ms over {d['n']}",
        f"  p99 teleop / reference: {r['p99_ratio_teleop_to_direct']:.2f}",
    ])


def run(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate bench teleop", description=first_paragraph(__doc__))
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS,
                        help=f"measured stream length, s (default {DEFAULT_SECONDS:g})")
    parser.add_argument("--tick-hz", type=float, default=DEFAULT_TICK_HZ,
                        help=f"the service's tick rate (default {DEFAULT_TICK_HZ:g})")
    parser.add_argument("--rate-hz", type=float, default=125.0, help="teleop publish rate (default 125)")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE")
    args = parser.parse_args(argv)
    if not 1.0 <= args.seconds <= 600.0:
        print(f"twistrate bench teleop: --seconds: got {args.seconds:g}; accepted: 1 to 600", file=sys.stderr)
        return 2
    result = bench(args.seconds, args.tick_hz, args.rate_hz)
    print(format_result(result))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2))
    return 0
