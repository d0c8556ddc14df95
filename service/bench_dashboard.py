"""`twistrate bench dashboard`: the dashboard's own cost with many arms and many pages.

In one run: ARMS invented arms publish on the wire like services (health, state and event at
HEALTH_HZ each; they answer `status` and `arm`), all in this process; the dashboard runs as its own
process (`python -m twistrate.clients.watch.dashboard --connect ...`) subscribed to all of them; PAGES
WebSocket clients in this process take its frames and parse them as a page would (no rendering: the
server's cost does not depend on it). Over the measured window it reports

* the dashboard process's CPU, as a fraction of one core (/proc/PID/stat utime + stime);
* per page: update frames per second, bytes per frame (median), and the data's age on arrival: the
  server's clock at the frame minus the newest history row's receive time (median, p99, ms);
* per arm: health messages per second that reached the dashboard (history rows appended);
* this process's CPU (the publishers and the pages) and the load average, for context.

Run it beside `twistrate bench service` to see the service's tick timing with the dashboard's load
on the machine (docs/dashboard.md).
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import socket
import subprocess
import sys
import time
from typing import Any

import numpy as np

DEFAULT_ARMS = 8
DEFAULT_HEALTH_HZ = 50.0
DEFAULT_PAGES = 10
DEFAULT_SECONDS = 20.0
WARMUP_S = 3.0
CLK_TCK = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100


def _free_ports(k: int) -> list[int]:
    socks = [socket.socket() for _ in range(k)]
    for s in socks:
        s.bind(("127.0.0.1", 0))
    ports = [s.getsockname()[1] for s in socks]
    for s in socks:
        s.close()
    return ports


def _cpu_s(pid: int) -> float:
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / CLK_TCK


async def _page(url: str, stop: asyncio.Event, out: dict[str, Any]) -> None:
    import aiohttp

    sizes: list[int] = []
    ages: list[float] = []
    frames = 0
    last_index: dict[str, int] = {}
    rows: dict[str, int] = {}
    async with aiohttp.ClientSession() as s, s.ws_connect(url, max_msg_size=0) as ws:
        while not stop.is_set():
            try:
                msg = await asyncio.wait_for(ws.receive(), 1.0)
            except TimeoutError:
                continue
            if msg.type != aiohttp.WSMsgType.TEXT:
                break
            f = json.loads(msg.data)
            if out.get("measuring") and f["type"] == "update":
                frames += 1
                sizes.append(len(msg.data))
                for a in f["arms"]:
                    if a["history"]:
                        ages.append((f["server_time"] - a["history"][-1][1]) * 1e3)
                        new = [r for r in a["history"] if r[0] > last_index.get(a["name"], -1)]
                        rows[a["name"]] = rows.get(a["name"], 0) + len(new)
            for a in f["arms"]:
                if a["history"]:
                    last_index[a["name"]] = max(last_index.get(a["name"], -1), a["history"][-1][0])
    out.setdefault("pages", []).append({"frames": frames, "sizes": sizes, "ages": ages, "rows": rows})


async def _measure(url: str, pages: int, seconds: float, pid: int) -> dict[str, Any]:
    stop = asyncio.Event()
    out: dict[str, Any] = {"measuring": False}
    tasks = [asyncio.create_task(_page(url, stop, out)) for _ in range(pages)]
    await asyncio.sleep(WARMUP_S)
    out["measuring"] = True
    c0, own0, t0 = _cpu_s(pid), time.process_time(), time.monotonic()
    await asyncio.sleep(seconds)
    c1, own1, t1 = _cpu_s(pid), time.process_time(), time.monotonic()
    out["measuring"] = False
    stop.set()
    await asyncio.gather(*tasks, return_exceptions=True)
    window = t1 - t0
    out.update(window_s=window, dashboard_cpu=(c1 - c0) / window, own_cpu=(own1 - own0) / window)
    return out


def run(arms: int, health_hz: float, pages: int, seconds: float) -> dict[str, Any]:
    """Start the publishers and the dashboard, measure, stop everything; the figures."""
    import uvloop

    from twistrate.clients.watch.fake_wire import FakeService

    ports = _free_ports(2 * arms + 1)
    services = []
    connect = []
    for i in range(arms):
        out, ctl = f"tcp://127.0.0.1:{ports[2 * i]}", f"tcp://127.0.0.1:{ports[2 * i + 1]}"
        services.append(FakeService(f"arm{i + 1}", out, ctl, health_hz, phase=1.3 * i).start())
        connect += ["--connect", f"arm{i + 1}={out},{ctl}"]
    port = ports[-1]
    proc = subprocess.Popen(
        [sys.executable, "-m", "twistrate.clients.watch.dashboard", *connect, "--port", str(port)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    try:
        end = time.monotonic() + 20.0
        while time.monotonic() < end:
            try:
                socket.create_connection(("127.0.0.1", port), 0.2).close()
                break
            except OSError:
                if proc.poll() is not None:
                    raise RuntimeError(f"dashboard exited: {proc.stderr.read().decode()[-2000:]}") from None
                time.sleep(0.1)
        res = uvloop.run(_measure(f"http://127.0.0.1:{port}/ws", pages, seconds, proc.pid))
    finally:
        proc.terminate()
        try:
            proc.wait(10.0)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5.0)
        for s in services:
            s.stop()
    window = res["window_s"]
    sizes = np.concatenate([p["sizes"] for p in res["pages"]] + [np.zeros(0)])
    ages = np.concatenate([p["ages"] for p in res["pages"]] + [np.zeros(0)])
    rows = [v / window for p in res["pages"][:1] for v in p["rows"].values()]
    return {
        "arms": arms,
        "health_hz": health_hz,
        "pages": pages,
        "window_s": round(window, 2),
        "dashboard_cpu_fraction": round(res["dashboard_cpu"], 4),
        "frames_per_s_per_page": [round(p["frames"] / window, 2) for p in res["pages"]],
        "frame_bytes_median": float(np.median(sizes)) if sizes.size else None,
        "data_age_ms_median": float(np.median(ages)) if ages.size else None,
        "data_age_ms_p99": float(np.percentile(ages, 99)) if ages.size else None,
        "health_per_s_per_arm": [round(r, 1) for r in rows],
        "published_health_per_s_per_arm": [round(s.published_health / s.elapsed(), 1) for s in services],
        "bench_process_cpu_fraction": round(res["own_cpu"], 4),
        "load_average": list(os.getloadavg()),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate bench dashboard", description=__doc__.splitlines()[0])
    parser.add_argument("--arms", type=int, default=DEFAULT_ARMS)
    parser.add_argument("--health-hz", type=float, default=DEFAULT_HEALTH_HZ)
    parser.add_argument("--pages", type=int, default=DEFAULT_PAGES)
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS)
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE")
    args = parser.parse_args(argv)
    res = run(args.arms, args.health_hz, args.pages, args.seconds)
    fps = res["frames_per_s_per_page"]
    print(
        f"dashboard with {res['arms']} arms at {res['health_hz']:g} health/s and {res['pages']} pages, "
        f"{res['window_s']} s:"
    )
    print(f"  dashboard CPU {100 * res['dashboard_cpu_fraction']:.1f} % of one core")
    print(
        f"  frames per page {min(fps):.1f} to {max(fps):.1f} /s, "
        f"{res['frame_bytes_median']:.0f} bytes (median)"
    )
    print(
        f"  data age on arrival: median {res['data_age_ms_median']:.1f} ms, "
        f"p99 {res['data_age_ms_p99']:.1f} ms"
    )
    print(
        f"  health reaching the dashboard per arm: {min(res['health_per_s_per_arm']):.1f} to "
        f"{max(res['health_per_s_per_arm']):.1f} /s"
    )
    print(
        f"  context: this process (publishers, pages) {100 * res['bench_process_cpu_fraction']:.1f} % of one "
        f"core; load average {res['load_average'][0]:.2f}"
    )
    if args.json:
        with open(args.json, "w") as f:
            json.dump(res, f, indent=2)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
