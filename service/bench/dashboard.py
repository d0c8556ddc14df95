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
import threading
import time
from typing import Any

import numpy as np

from twistrate.service.commands.help_text import first_paragraph

DEFAULT_ARMS = 8
DEFAULT_HEALTH_HZ = 50.0
DEFAULT_PAGES = 10
DEFAULT_SECONDS = 20.0
WARMUP_S = 3.0
#: longest wait for the dashboard process to serve, s (a busy machine starts Python slowly)
DASHBOARD_START_S = 60.0
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


def _nice(pid: int) -> int | None:
    """The niceness of a process's main thread (/proc/PID/stat field 19), None when gone."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            return int(f.read().rsplit(")", 1)[1].split()[16])
    except (OSError, ValueError, IndexError):
        return None


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


class DashboardLoad:
    """The dashboard's load on the machine, as a context: fake arms publishing, the dashboard process
    subscribed to them (and to `services`, real ones given as (name, output, control)), and pages.

    measure_start() / measure_stop() bracket the measured window; figures() gives the results.
    """

    def __init__(
        self,
        arms: int = DEFAULT_ARMS,
        health_hz: float = DEFAULT_HEALTH_HZ,
        pages: int = DEFAULT_PAGES,
        services: tuple[tuple[str, str, str], ...] = (),
        nice: int | None = None,
    ) -> None:
        self.arms, self.health_hz, self.pages, self.services = arms, health_hz, pages, services
        self.nice = nice  # the dashboard's --nice (None: its default)
        self.fakes: list[Any] = []
        self.proc: subprocess.Popen | None = None
        self.out: dict[str, Any] = {"measuring": False}
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop: asyncio.Event | None = None
        self._t: list[tuple[float, float, float]] = []

    def __enter__(self) -> DashboardLoad:
        from twistrate.clients.watch.fake_wire import FakeService

        n_fake = max(0, self.arms - len(self.services))
        ports = _free_ports(2 * n_fake + 1)
        connect = []
        for name, out, ctl in self.services:
            connect += ["--connect", f"{name}={out},{ctl}"]
        for i in range(n_fake):
            out, ctl = f"tcp://127.0.0.1:{ports[2 * i]}", f"tcp://127.0.0.1:{ports[2 * i + 1]}"
            self.fakes.append(FakeService(f"arm{i + 1}", out, ctl, self.health_hz, phase=1.3 * i).start())
            connect += ["--connect", f"arm{i + 1}={out},{ctl}"]
        port = ports[-1]
        nice = [] if self.nice is None else ["--nice", str(self.nice)]
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "twistrate.clients.watch.dashboard", *connect, "--port", str(port), *nice],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        try:
            end = time.monotonic() + DASHBOARD_START_S
            while True:
                try:
                    socket.create_connection(("127.0.0.1", port), 0.2).close()
                    break
                except OSError:
                    if self.proc.poll() is not None or time.monotonic() > end:
                        err = self.proc.stderr.read().decode()[-2000:] if self.proc.poll() is not None else ""
                        raise RuntimeError(f"the dashboard did not serve within {DASHBOARD_START_S:g} s: "
                                           f"{err}") from None
                    time.sleep(0.1)
            ready = threading.Event()
            self._thread = threading.Thread(
                target=self._pages,
                args=(f"http://127.0.0.1:{port}/ws", ready),
                name="bench-pages",
                daemon=True,
            )
            self._thread.start()
            ready.wait(10.0)
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def _pages(self, url: str, ready: threading.Event) -> None:
        import uvloop

        async def main() -> None:
            self._loop = asyncio.get_running_loop()
            self._stop = asyncio.Event()
            tasks = [asyncio.create_task(_page(url, self._stop, self.out)) for _ in range(self.pages)]
            ready.set()
            await asyncio.gather(*tasks, return_exceptions=True)

        uvloop.run(main())

    def measure_start(self) -> None:
        assert self.proc is not None
        self.out["measuring"] = True
        self._t.append((_cpu_s(self.proc.pid), time.process_time(), time.monotonic()))

    def measure_stop(self) -> None:
        assert self.proc is not None
        self._t.append((_cpu_s(self.proc.pid), time.process_time(), time.monotonic()))
        self.out["measuring"] = False
        self.out["dashboard_nice"] = _nice(self.proc.pid)

    def __exit__(self, *exc: object) -> None:
        if self._loop is not None and self._stop is not None:
            self._loop.call_soon_threadsafe(self._stop.set)
        if self._thread is not None:
            self._thread.join(10.0)
        if self.proc is not None:
            self.proc.terminate()
            try:
                self.proc.wait(10.0)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5.0)
        for f in self.fakes:
            f.stop()

    def figures(self) -> dict[str, Any]:
        """The measured window's figures (after exit)."""
        (c0, own0, t0), (c1, own1, t1) = self._t[0], self._t[-1]
        window = t1 - t0
        pages = self.out.get("pages", [])
        sizes = np.concatenate([p["sizes"] for p in pages] + [np.zeros(0)])
        ages = np.concatenate([p["ages"] for p in pages] + [np.zeros(0)])
        rows = [v / window for p in pages[:1] for v in p["rows"].values()]
        return {
            "arms": self.arms,
            "health_hz": self.health_hz,
            "pages": self.pages,
            "window_s": round(window, 2),
            "dashboard_cpu_fraction": round((c1 - c0) / window, 4),
            "frames_per_s_per_page": [round(p["frames"] / window, 2) for p in pages],
            "frame_bytes_median": float(np.median(sizes)) if sizes.size else None,
            "data_age_ms_median": float(np.median(ages)) if ages.size else None,
            "data_age_ms_p99": float(np.percentile(ages, 99)) if ages.size else None,
            "health_per_s_per_arm": [round(r, 1) for r in rows],
            "published_health_per_s_per_arm": [
                round(f.published_health / f.elapsed(), 1) for f in self.fakes
            ],
            "bench_process_cpu_fraction": round((own1 - own0) / window, 4),
        "dashboard_nice": self.out.get("dashboard_nice"),
            "load_average": list(os.getloadavg()),
        }


def until_stdin_closes(seconds: float) -> None:
    """Wait until this process's standard input reaches its end (the parent closed it), at most
    `seconds`."""
    reader = threading.Thread(target=sys.stdin.read, name="bench-stdin", daemon=True)
    reader.start()
    reader.join(seconds)


def measure(arms: int, health_hz: float, pages: int, seconds: float,
            services: tuple[tuple[str, str, str], ...] = (), until: Any = time.sleep,
            nice: int | None = None) -> dict[str, Any]:
    """Start the publishers, the dashboard and the pages, measure `seconds` after WARMUP_S ("measuring"
    is printed when the window opens: bench service --with-dashboard waits for it); the figures.
    until(seconds) : how the window is waited out (time.sleep, or until_stdin_closes)."""
    with DashboardLoad(arms, health_hz, pages, services, nice) as load:
        time.sleep(WARMUP_S)
        load.measure_start()
        print("measuring", flush=True)
        until(seconds)
        load.measure_stop()
    return load.figures()


def format_figures(res: dict[str, Any]) -> str:
    """The figures as text (n/a for what the window did not see)."""

    def num(v: Any, spec: str) -> str:
        return "n/a" if v is None else format(v, spec)

    def span(values: list[float]) -> str:
        return f"{min(values):.1f} to {max(values):.1f}" if values else "n/a"

    return "\n".join([
        f"dashboard with {res['arms']} arms at {res['health_hz']:g} health/s and {res['pages']} pages, "
        f"{res['window_s']} s:",
        f"  dashboard CPU {100 * res['dashboard_cpu_fraction']:.1f} % of one core (niceness "
        f"{res.get('dashboard_nice', 'n/a')})",
        f"  frames per page {span(res['frames_per_s_per_page'])} /s, {num(res['frame_bytes_median'], '.0f')} "
        "bytes (median)",
        f"  data age on arrival: median {num(res['data_age_ms_median'], '.1f')} ms, "
        f"p99 {num(res['data_age_ms_p99'], '.1f')} ms",
        f"  health reaching the dashboard per arm: {span(res['health_per_s_per_arm'])} /s",
        f"  context: this process (publishers, pages) {100 * res['bench_process_cpu_fraction']:.1f} % of one "
        f"core; load average {res['load_average'][0]:.2f}",
    ])


def run(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate bench dashboard", description=first_paragraph(__doc__))
    parser.add_argument("--arms", type=int, default=DEFAULT_ARMS)
    parser.add_argument("--health-hz", type=float, default=DEFAULT_HEALTH_HZ)
    parser.add_argument("--pages", type=int, default=DEFAULT_PAGES)
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS)
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE")
    parser.add_argument("--attach", action="append", default=[], metavar="NAME=OUTPUT,CONTROL",
                        help="a running service the dashboard also watches (counts among --arms)")
    parser.add_argument("--until-stdin-closes", action="store_true",
                        help="end the window when standard input closes (at most --seconds; used by "
                             "`twistrate bench service --with-dashboard`)")
    parser.add_argument("--dashboard-nice", type=int, default=None, metavar="N",
                        help="the dashboard's --nice N (default: the dashboard's own default)")
    args = parser.parse_args(argv)
    services = []
    for text in args.attach:
        name, _, rest = text.partition("=")
        out, _, ctl = rest.partition(",")
        services.append((name, out, ctl))
    res = measure(args.arms, args.health_hz, args.pages, args.seconds, tuple(services),
                  until_stdin_closes if args.until_stdin_closes else time.sleep, args.dashboard_nice)
    if args.json:  # first: a reader waiting for the figures gets them even if printing fails
        with open(args.json, "w") as f:
            json.dump(res, f, indent=2)
    print(format_figures(res))
    return 0


if __name__ == "__main__":
    raise SystemExit(run())
