"""Shared end-to-end harness: a real service (tick thread + control plane) on random loopback ports, links
to it, and the limits check every end-to-end test gets.

Import from a test file: `from service_harness import running_service, ...` (pytest puts the tests
folder on sys.path). `running_service` is the shared fixture body: on exit it asserts that the
simulated arm never left its position limits on any tick (DESIGN.md: the built-in simulated arm
integrates commands "with realistic limits"; a joint must never pass one).
"""

from __future__ import annotations

import contextlib
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from twistrate.clients.link import Endpoints, Link
from twistrate.service.config import ServiceConfig, config_from_dict
from twistrate.service.control import ControlThread
from twistrate.service.runtime import Service
from twistrate.service.simarm import SimArm
from twistrate.service.wire.discovery import read_endpoints

#: Every end-to-end loop is bounded by this many seconds.
LOOP_LIMIT_S = 10.0


#: Loopback with a port the operating system picks at bind time (no race for a "free" port).
ANY_PORT = "tcp://127.0.0.1:*"
#: How long a test waits for a started `twistrate serve` to write its endpoints file, s.
SERVE_START_S = 20.0


#: A service file config for a driver process (no built-in simulated arm), reach7 at 500 Hz on loopback
#: ports picked at bind time; tests append sections of their own.
DRIVER_CONFIG_TEXT = """[arm]
file = "reach7"
[tick]
rate_hz = 500
[endpoints]
intake = "tcp://127.0.0.1:*"
output = "tcp://127.0.0.1:*"
control = "tcp://127.0.0.1:*"
[simulation]
enabled = false
lag_s = 0.0
[logging]
level = "warning"
"""


def config_dict(**sections: dict[str, Any]) -> dict[str, Any]:
    """A config document on loopback ports picked at bind time; `sections` override/extend sections."""
    doc: dict[str, Any] = {
        "endpoints": {"intake": ANY_PORT, "output": ANY_PORT, "control": ANY_PORT},
        "logging": {"level": "warning"},
    }
    for name, values in sections.items():
        doc[name] = {**doc.get(name, {}), **values}
    return doc


def make_config(base_dir: str = ".", **sections: dict[str, Any]) -> ServiceConfig:
    return config_from_dict(config_dict(**sections), base_dir)


def endpoints_of(service: Service) -> Endpoints:
    """Where a started service (and its control plane) is bound."""
    ep = service.endpoints
    return Endpoints(ep["intake"], ep["output"], ep["control"])


def twistrate(*args: str, **kw: Any) -> subprocess.Popen:
    """`twistrate ARGS` in a subprocess with text pipes."""
    kw.setdefault("stdout", subprocess.PIPE)
    kw.setdefault("stderr", subprocess.PIPE)
    return subprocess.Popen([sys.executable, "-m", "twistrate.service.commands.cli", *args], text=True, **kw)


def serve_process(config_path: str | Path, endpoints_file: str | Path, *extra: str,
                  prefix: tuple[str, ...] = (), **kw: Any) -> tuple[subprocess.Popen, Endpoints]:
    """Start `twistrate serve --config PATH --endpoints-file FILE` (after `prefix`, e.g. a user switch) and
    return it with the endpoints it bound, read from the file it writes."""
    command = [*prefix, sys.executable, "-m", "twistrate.service.commands.cli", "serve", "--config",
               str(config_path), "--endpoints-file", str(endpoints_file), *extra]
    kw.setdefault("stdout", subprocess.PIPE)
    kw.setdefault("stderr", subprocess.PIPE)
    proc = subprocess.Popen(command, text=True, **kw)
    try:
        ep = read_endpoints(endpoints_file, SERVE_START_S)
    except BaseException:
        reap(proc)
        raise
    return proc, Endpoints(ep["intake"], ep["output"], ep["control"])


def record_steps(sim: SimArm) -> list[np.ndarray]:
    """Wrap sim.step so that the simulated arm's position after every step (n,) is appended to the list
    returned (read it once the service has stopped)."""
    stepped: list[np.ndarray] = []
    original = sim.step

    def recorded(dt: float) -> None:
        original(dt)
        stepped.append(sim.q.copy())

    sim.step = recorded  # type: ignore[method-assign]
    return stepped


@dataclass
class LimitWatch:
    """Wraps a SimArm's step() to check its positions against its limits after every step."""

    sim: SimArm
    steps: int = 0
    violations: list[str] = field(default_factory=list)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def __post_init__(self) -> None:
        original = self.sim.step

        def checked(dt: float) -> None:
            original(dt)
            q = self.sim.q
            with self._lock:
                self.steps += 1
                bad = (q < self.sim.q_min) | (q > self.sim.q_max) | ~np.isfinite(q)
                if bad.any() and len(self.violations) < 10:
                    self.violations.append(f"step {self.steps}: q = {q.tolist()}")

        self.sim.step = checked  # type: ignore[method-assign]

    def check(self) -> None:
        assert self.steps > 0, "the simulated arm never stepped"
        assert not self.violations, f"simulated arm left its limits: {self.violations}"


@dataclass
class Running:
    service: Service
    control: ControlThread
    config: ServiceConfig
    endpoints: Endpoints
    watch: LimitWatch | None
    links: list[Link] = field(default_factory=list)

    def link(self, **kw: Any) -> Link:
        """A connected Link (closed at exit), subscribed to the output and ready to send twists."""
        kw.setdefault("timeout_s", 2.0)
        link = Link(self.endpoints, **kw)
        self.links.append(link)
        link.wait_ready(timeout_s=5.0)
        link.arm()
        return link


@contextlib.contextmanager
def running_service(config: ServiceConfig, **service_kw: Any) -> Iterator[Running]:
    """Start a service and its control plane; on exit stop both and assert the simulated arm's limits."""
    service = Service(config, **service_kw)
    sim = service.pipeline.sim
    watch = LimitWatch(sim) if sim is not None else None
    service.start()
    control = ControlThread(service)
    try:
        control.start()
    except BaseException:
        service.close()
        raise
    run = Running(service, control, config, endpoints_of(service), watch)
    try:
        yield run
    finally:
        for link in run.links:
            link.close()
        service.shutdown("test over")
        service.join(10.0)
        control.stop()
        service.close()
    if watch is not None:
        watch.check()


def stream_until(link: Link, linear: Any, angular: Any, until: Any, period_s: float = 0.01,
                 limit_s: float = LOOP_LIMIT_S, **twist_kw: Any) -> list[Any]:
    """Send the twist every period_s and collect commands until until(commands) is true; bounded."""
    commands: list[Any] = []
    end = time.monotonic() + limit_s
    next_send = 0.0
    while time.monotonic() < end:
        if time.monotonic() >= next_send:
            link.send_twist(linear, angular, **twist_kw)
            next_send = time.monotonic() + period_s
        with contextlib.suppress(TimeoutError):
            commands.append(link.receive_command(timeout_s=period_s))
        if until(commands):
            return commands
    raise AssertionError(f"condition not met within {limit_s} s; last command: "
                         f"{commands[-1] if commands else None}")


def collect_commands(link: Link, until: Any, limit_s: float = LOOP_LIMIT_S) -> list[Any]:
    """Collect commands (sending nothing) until until(commands); bounded."""
    commands: list[Any] = []
    end = time.monotonic() + limit_s
    while time.monotonic() < end:
        with contextlib.suppress(TimeoutError):
            commands.append(link.receive_command(timeout_s=0.05))
        if until(commands):
            return commands
    raise AssertionError(f"condition not met within {limit_s} s; last command: "
                         f"{commands[-1] if commands else None}")


def wait_for(predicate: Any, limit_s: float = LOOP_LIMIT_S, poll_s: float = 0.01) -> None:
    end = time.monotonic() + limit_s
    while time.monotonic() < end:
        if predicate():
            return
        time.sleep(poll_s)
    raise AssertionError(f"condition not met within {limit_s} s")


def reap(*procs: subprocess.Popen) -> None:
    """Test teardown: kill and collect any of `procs` still running (never leaves a stray service)."""
    for proc in procs:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
