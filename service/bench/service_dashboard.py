"""`twistrate bench service --with-dashboard`: the service's tick timing without and with the dashboard
attached, run by run, side by side.

Per tick rate, two runs of the service benchmark (service/bench/service.py, each with its floor): first
as usual, then with the dashboard's load beside it. That load is one process of its own
(`python -m twistrate.service.bench.dashboard`, service/bench/dashboard.py): the dashboard process
(clients/watch) watching the service under test plus ARMS - 1 invented publisher arms at HEALTH_HZ
health messages a second each, and PAGES WebSocket pages that take and parse every frame. It is
started once the service is bound, before the driver, the source and the warm-up, and it signals when
its own warm-up is over ("measuring"); the service's warm-up and measured window follow, and the load
ends (its standard input is closed) when the service's run ends. So the dashboard's measured window
covers the service's one: the dashboard CPU is over that longer window, a rate all the same.

With --dashboard-detached a third run comes between the two: the same load, but the dashboard watches
the invented arms and an endpoint nobody serves instead of the service under test, so the service has
no extra subscriber and no control requests from it: what the machine's load alone does. The dashboard
runs at its default niceness unless --dashboard-nice says otherwise.

Printed side by side: lateness p99, overruns, arrival -> publish p99, service CPU and per thread (tick,
ZeroMQ I/O, main: the control plane), the tick's work, the floor's overruns, and the dashboard's own
figures (its CPU and niceness, frames per page, data age); `--json` writes every run whole.
The two runs are minutes apart on a shared machine: read the difference against the floor of each.
"""

from __future__ import annotations

import argparse
import json
import os
import select
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from twistrate.clients.link import Endpoints
from twistrate.service.bench.dashboard import DASHBOARD_START_S, WARMUP_S, format_figures

#: the load of issue 10: 8 arms (the service under test and 7 invented ones), 50 health/s, 10 pages
ARMS = 8
HEALTH_HZ = 50.0
PAGES = 10
#: the load process is given this long at most (it ends earlier, when its standard input closes), s
LOAD_LIMIT_S = 3600.0


class DashboardBeside:
    """A context manager for bench_rate(beside=...): called with the service's endpoints, it starts the
    dashboard load watching that service and returns once the load's warm-up is over; on exit it ends
    the load and keeps its figures in `figures` (None when the load failed; `error` says why)."""

    def __init__(self, arms: int = ARMS, health_hz: float = HEALTH_HZ, pages: int = PAGES,
                 nice: int | None = None, attach: bool = True) -> None:
        """nice : the dashboard's --nice (None: its default). attach : the dashboard watches the service
        under test (False: the same load, but the dashboard watches only the invented arms and one
        endpoint nobody serves, so the service has no extra subscriber: the machine's load alone)."""
        self.arms, self.health_hz, self.pages = arms, health_hz, pages
        self.nice, self.attach = nice, attach
        self.figures: dict[str, Any] | None = None
        self.error: str | None = None
        self._proc: subprocess.Popen | None = None
        self._tmp: tempfile.TemporaryDirectory | None = None

    def __call__(self, ep: Endpoints) -> DashboardBeside:
        self._ep = ep
        return self

    def _target(self) -> str:
        if self.attach:
            return f"under-test={self._ep.output},{self._ep.control}"
        from twistrate.service.bench.dashboard import _free_ports

        out, ctl = _free_ports(2)
        return f"nobody=tcp://127.0.0.1:{out},tcp://127.0.0.1:{ctl}"

    def __enter__(self) -> DashboardBeside:
        self._tmp = tempfile.TemporaryDirectory(prefix="twr-dash-bench-")
        self._json = Path(self._tmp.name) / "dashboard.json"
        self._proc = subprocess.Popen(
            [sys.executable, "-m", "twistrate.service.bench.dashboard", "--arms", str(self.arms),
             "--health-hz", f"{self.health_hz:g}", "--pages", str(self.pages), "--seconds",
             f"{LOAD_LIMIT_S:g}", "--until-stdin-closes", "--json", str(self._json),
             "--attach", self._target(),
             *([] if self.nice is None else ["--dashboard-nice", str(self.nice)])],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        give_up = time.monotonic() + DASHBOARD_START_S + WARMUP_S + 30.0
        assert self._proc.stdout is not None
        line = ""
        while (left := give_up - time.monotonic()) > 0:  # "measuring": the load's warm-up is over
            if not select.select([self._proc.stdout], [], [], left)[0]:
                break
            line = self._proc.stdout.readline()
            if not line or line.strip() == "measuring":
                break
        if line.strip() != "measuring":
            self.__exit__(None, None, None)
            raise RuntimeError(f"bench service --with-dashboard: the dashboard load did not start: "
                               f"{self.error or 'no measuring line'}")
        return self

    def __exit__(self, *exc: object) -> None:
        proc, tmp = self._proc, self._tmp
        if proc is None or tmp is None:
            return
        self._proc = self._tmp = None
        try:
            _, err = proc.communicate(input="", timeout=60.0)  # stdin closes: the window ends
        except subprocess.TimeoutExpired:
            proc.kill()
            _, err = proc.communicate()
        with tmp:
            if self._json.exists():
                self.figures = json.loads(self._json.read_text())
            else:
                self.error = (err or "").strip()[-1000:] or f"exit status {proc.returncode}"


#: (label, key in a bench_rate result, format) of the side-by-side table
ROWS = (
    ("tick lateness p99", "lateness_p99_us", "{:.1f} us"),
    ("tick lateness max", "lateness_max_us", "{:.0f} us"),
    ("overruns", "overrun_fraction", "{:.3%}"),
    ("arrival -> publish p99", "arrival_to_publish_p99_us", "{:.0f} us"),
    ("service CPU", "cpu_fraction", "{:.1%}"),
    ("  tick thread", "thread_tick", "{:.1%}"),
    ("  ZeroMQ I/O thread", "thread_zmq_io", "{:.1%}"),
    ("  main (control) thread", "thread_main", "{:.1%}"),
    ("tick work median", "tick_work_median_us", "{:.0f} us"),
    ("floor overruns", "floor_overrun_fraction", "{:.3%}"),
    ("load average (after)", "load_average_after", "{:.2f}"),
)


def _value(r: dict[str, Any], key: str) -> Any:
    if key == "floor_overrun_fraction":
        return (r.get("floor") or {}).get("overrun_fraction")
    if key.startswith("thread_"):
        return (r.get("thread_cpu_fraction") or {}).get(key.removeprefix("thread_"))
    return r.get(key)


def format_pair(pair: dict[str, Any]) -> str:
    """The runs of one rate side by side (without, detached when run, with), then the dashboard's own
    figures."""
    without, with_ = pair["without"], pair["with"]
    runs = [("without", without)] + ([("detached", pair["detached"])] if "detached" in pair else [])
    runs.append(("with", with_))
    lines = [f"service at {pair['rate_hz']:g} Hz, {without['seconds']:g} s measured, without / with the "
             f"dashboard attached ({ARMS} arms incl. this service, {HEALTH_HZ:g} health/s each, {PAGES} "
             "pages)" + ("; detached: the same load, the dashboard not watching this service"
                         if "detached" in pair else ""),
             f"  {'':24}" + "".join(f" {name:>12}" for name, _ in runs)]
    for label, key, spec in ROWS:
        cells = []
        for _, r in runs:
            v = _value(r, key)
            cells.append("n/a" if v is None else spec.format(v))
        lines.append(f"  {label:24}" + "".join(f" {c:>12}" for c in cells))
    dash = with_.get("dashboard")
    if dash is None:
        lines.append(f"  dashboard: no figures ({with_.get('dashboard_error')})")
    else:
        lines += ["  " + line for line in format_figures(dash).splitlines()]
        rates = dash.get("published_health_per_s_per_arm") or []
        if rates:  # the stand-ins share this machine: say whether they kept up
            lines.append(f"    invented arms published {min(rates):.1f} to {max(rates):.1f} health/s each "
                         f"(asked {dash['health_hz']:g})")
    return "\n".join(lines)


def run_pairs(rates: list[float], seconds: float, rt_priority: int | None, json_file: str | None,
              dashboard_nice: int | None = None, detached: bool = False) -> int:
    """Each rate without, then with the dashboard; print each pair; write JSON when asked.
    dashboard_nice : the dashboard's --nice (None: its default). detached : between the two, a run
    with the same load but the dashboard not watching the service (no extra subscriber, no control
    requests: what the machine's load alone does)."""
    from twistrate.service.bench.service import bench_rate  # the one service benchmark, called twice

    pairs = []
    for rate in rates:
        without = bench_rate(rate, seconds, rt_priority)
        pair: dict[str, Any] = {"rate_hz": rate, "without": without}
        if detached:
            apart = DashboardBeside(nice=dashboard_nice, attach=False)
            pair["detached"] = bench_rate(rate, seconds, rt_priority, beside=apart)
            pair["detached"]["dashboard"] = apart.figures
        beside = DashboardBeside(nice=dashboard_nice)
        with_ = bench_rate(rate, seconds, rt_priority, beside=beside)
        with_["dashboard"] = beside.figures
        if beside.figures is None:
            with_["dashboard_error"] = beside.error
        pair["with"] = with_
        print(format_pair(pair), flush=True)
        pairs.append(pair)
    if json_file:
        doc = {"benchmark": "service", "with_dashboard": True,
               "machine": {"cpus": os.cpu_count(), "python": sys.version.split()[0]},
               "load": {"arms": ARMS, "health_hz": HEALTH_HZ, "pages": PAGES},
               "rates": {f"{p['rate_hz']:g}": p for p in pairs}}
        Path(json_file).write_text(json.dumps(doc, indent=2, default=float))
    return 0


def add_option(parser: argparse.ArgumentParser) -> None:
    """The --with-dashboard option of `twistrate bench service`."""
    parser.add_argument("--with-dashboard", action="store_true",
                        help=f"run each rate twice: without, then with the dashboard attached ({ARMS} arms "
                             f"incl. the service under test at {HEALTH_HZ:g} health/s, {PAGES} pages)")
    parser.add_argument("--dashboard-nice", type=int, default=None, metavar="N",
                        help="with --with-dashboard: the dashboard's --nice N (default: the dashboard's "
                             "own default; 0: its priority unchanged)")
    parser.add_argument("--dashboard-detached", action="store_true",
                        help="with --with-dashboard: a third run per rate, between the two, with the same "
                             "load but the dashboard not watching the service under test")
