"""End to end with real processes: `twistrate serve` shuts down cleanly on SIGTERM with a final zero command;
`twistrate sim` drives a service as an external driver; `twistrate demo` runs end to end."""

from __future__ import annotations

import itertools
import math
import signal
import subprocess
import sys

import numpy as np
import pytest
from service_harness import collect_commands, config_dict, endpoints_of, stream_until

from twistrate.clients.link import Link
from twistrate.service.config import load_config
from twistrate.solver.load import load_arm

pytestmark = pytest.mark.timeout(120)

FAST = ([0.2, 0.05, -0.1], [0.0, 0.2, 0.3])


def _toml(doc: dict) -> str:
    lines = []
    for section, values in doc.items():
        lines.append(f"[{section}]")
        for k, v in values.items():
            lines.append(f"{k} = {v!r}".replace("'", '"').replace("True", "true").replace("False", "false"))
    return "\n".join(lines) + "\n"


def _write_config(tmp_path, **sections) -> str:
    path = tmp_path / "service.toml"
    path.write_text(_toml(config_dict(**sections)))
    return str(path)


def _twistrate(*args: str, **kw) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "twistrate.service.cli", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kw)


def test_serve_sigterm_ramps_down_and_publishes_a_final_zero_command(tmp_path):
    path = _write_config(tmp_path, logging={"level": "info"})
    cfg = load_config(path)
    proc = _twistrate("serve", "--config", path)
    try:
        with Link(endpoints_of(cfg), timeout_s=2.0) as link:
            link.wait_ready(timeout_s=20.0)
            link.arm()
            link.claim("test")
            link.enable()
            stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 50 and
                         np.abs(cs[-1].rate).max() > 0.05)
            link.send_twist(*FAST)
            proc.send_signal(signal.SIGTERM)
            cs = collect_commands(link, lambda cs: bool(cs) and cs[-1].mode == "shutdown"
                                  and not cs[-1].rate.any())
            with pytest.raises(TimeoutError):  # nothing after the final command
                while True:
                    cs.append(link.receive_command(timeout_s=1.0))
        _, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    final = cs[-1]
    assert final.mode == "shutdown" and not final.rate.any()
    ramp = cs[next(i for i, c in enumerate(cs) if c.mode == "shutdown") - 1:]
    arm = load_arm("reach7")
    period = 1.0 / cfg.tick.rate_hz
    assert all(b.tick == a.tick + 1 for a, b in itertools.pairwise(ramp))
    for a, b in itertools.pairwise(ramp):  # every step within a_max * T
        assert np.all(np.abs(b.rate - a.rate) <= arm.a_max * period * (1 + 1e-9))
    bound = math.ceil(float(np.max(np.abs(ramp[0].rate) / arm.a_max)) / period) + 1
    assert len(ramp) - 1 <= bound
    assert "signal SIGTERM" in err


def test_sim_process_drives_a_service_in_driver_mode(tmp_path):
    path = _write_config(tmp_path, simulation={"enabled": False})
    cfg = load_config(path)
    serve = _twistrate("serve", "--config", path)
    sim = _twistrate("sim", "--config", path)
    try:
        with Link(endpoints_of(cfg), timeout_s=2.0) as link:
            link.wait_ready(timeout_s=20.0, topics=(b"twist", b"joints"))
            link.arm()
            link.claim("test")
            link.enable()
            cs = stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 100)
            status = link.status()
            assert status["simulated"] is False and status["joints_age_ms"] < 50
            moved = cs[-1].target - cs[0].target
            assert np.abs(moved).max() > 1e-3
        sim.send_signal(signal.SIGTERM)
        sim.communicate(timeout=20)
        serve.send_signal(signal.SIGTERM)
        serve.communicate(timeout=20)
    finally:
        for p in (sim, serve):
            if p.poll() is None:
                p.kill()
                p.communicate()
    assert sim.returncode == 0 and serve.returncode == 0
