"""Faults injected end to end: the service killed with SIGKILL mid-motion, and the simulated driver (the
reference for what a driver does when commands stop) brings the arm to rest on its own within its
documented bound: COMMAND_TIMEOUT_S + max_i |qd_i| / a_max_i (constant deceleration, common practice)
+ one loop period, plus a scheduling allowance."""

from __future__ import annotations

import os
import signal
import threading
import time

import numpy as np
import pytest
from service_harness import LOOP_LIMIT_S, reap, serve_process, stream_until

from twistrate.clients.link import Link
from twistrate.service.config import load_config
from twistrate.service.sim_driver import COMMAND_TIMEOUT_S, SimDriver

pytestmark = pytest.mark.timeout(120)

#: Scheduling allowance for the driver's loop on a shared 2-core machine, s (several ms measured).
ALLOWANCE_S = 0.025
FAST = ([0.25, 0.0, -0.1], [0.0, 0.3, 0.2])
CONFIG = """[arm]
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


def test_sigkill_of_the_service_mid_motion_and_the_driver_stops_the_arm_itself(tmp_path):
    path = tmp_path / "service.toml"
    path.write_text(CONFIG)
    proc, ep = serve_process(path, tmp_path / "endpoints.json")
    driver = None
    thread = None
    try:
        config = load_config(path)
        driver = SimDriver(config, endpoints={"intake": ep.intake, "output": ep.output,
                                              "control": ep.control})
        thread = threading.Thread(target=driver.run, kwargs={"seconds": 60.0}, daemon=True)
        thread.start()
        with Link(ep, timeout_s=5.0) as link:
            link.wait_ready(timeout_s=10.0, topics=(b"twist", b"joints"))
            link.arm()
            link.claim("test", lease_ms=60_000)
            link.enable()
            stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 50 and
                         np.abs(cs[-1].rate).max() > 0.05)
            os.kill(proc.pid, signal.SIGKILL)
            t_kill = time.monotonic()
            qd0 = driver.sim.qd.copy()
            proc.wait(10)
        arm = driver.arm
        assert np.abs(qd0).max() > 0.05  # it was moving
        end = time.monotonic() + LOOP_LIMIT_S
        while driver.sim.qd.any() and time.monotonic() < end:
            time.sleep(0.001)
        t_rest = time.monotonic()
        assert not driver.sim.qd.any(), "the driver never stopped the arm"
        stop_s = float(np.max(np.abs(qd0) / arm.a_max))
        bound = COMMAND_TIMEOUT_S + stop_s + 1.0 / driver.rate_hz + ALLOWANCE_S
        print(f"at rest {(t_rest - t_kill) * 1e3:.1f} ms after SIGKILL, bound {bound * 1e3:.1f} ms")
        assert t_rest - t_kill <= bound
    finally:
        if driver is not None:
            driver.stop()
        if thread is not None:
            thread.join(5.0)
        if driver is not None:
            driver.close()
        reap(proc)
