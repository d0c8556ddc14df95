"""End to end with real processes: `twistrate serve` shuts down cleanly on SIGTERM with a final zero command;
`twistrate sim` drives a service as an external driver; `twistrate demo` runs end to end."""

from __future__ import annotations

import itertools
import math
import signal
import subprocess
import threading

import numpy as np
import pytest
from service_harness import (
    collect_commands,
    config_dict,
    reap,
    running_service,
    serve_process,
    stream_until,
    twistrate,
)

from twistrate.clients.link import Link
from twistrate.service.commands.demo import CAUTIONS
from twistrate.service.commands.record import record_stream
from twistrate.service.config import load_config
from twistrate.service.recorder import Recorder, read_recording
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
    return twistrate(*args, **kw)


def test_serve_sigterm_ramps_down_and_publishes_a_final_zero_command(tmp_path):
    path = _write_config(tmp_path, logging={"level": "info"})
    cfg = load_config(path)
    proc, endpoints = serve_process(path, tmp_path / "endpoints.json")
    try:
        with Link(endpoints, timeout_s=2.0) as link:
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
        reap(proc)
    assert proc.returncode == 0, err
    final = cs[-1]
    assert final.mode == "shutdown" and not final.rate.any()
    ramp = cs[next(i for i, c in enumerate(cs) if c.mode == "shutdown") - 1:]
    arm = load_arm("reach7")
    period = 1.0 / cfg.tick.rate_hz
    assert all(b.tick == a.tick + 1 for a, b in itertools.pairwise(ramp))
    for a, b in itertools.pairwise(ramp):  # every step within a_max * the time between the commands
        dt = (b.stamp_ns - a.stamp_ns) / 1e9  # the ramp follows the clock (service/motion.py)
        assert np.all(np.abs(b.rate - a.rate) <= arm.a_max * (dt + 1e-4))  # stamps read 1e-4 s apart at most
    bound = math.ceil(float(np.max(np.abs(ramp[0].rate) / arm.a_max)) / period) + 1
    assert len(ramp) - 1 <= bound
    assert "signal SIGTERM" in err


def test_sim_process_drives_a_service_in_driver_mode(tmp_path):
    path = _write_config(tmp_path, simulation={"enabled": False})
    serve, endpoints = serve_process(path, tmp_path / "endpoints.json")
    sim = _twistrate("sim", "--config", path, "--endpoints-file", str(tmp_path / "endpoints.json"))
    try:
        with Link(endpoints, timeout_s=2.0) as link:
            link.wait_ready(timeout_s=20.0, topics=(b"twist", b"joints"))
            link.arm()
            link.claim("test", lease_ms=5000)  # a loaded machine may stall this process past a short lease
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
        reap(sim, serve)
    assert sim.returncode == 0 and serve.returncode == 0


def test_demo_runs_end_to_end_and_prints_the_cautions_first(tmp_path):
    path = _write_config(tmp_path)
    recording = tmp_path / "demo.trec"
    proc = _twistrate("demo", "--seconds", "3", "--config", path, "--record", str(recording))
    out, err = proc.communicate(timeout=90)
    assert proc.returncode == 0, err
    lines = out.splitlines()
    assert lines[:len(CAUTIONS)] == list(CAUTIONS)
    text = out.lower()
    phrases = ("not a safety-rated function", "hardware emergency stop and an enabling device are required",
               "risk assessment per the applicable standards (e.g. iso 10218-1/-2, iso 12100)",
               "try in simulation and at reduced speed first", "defer to local codes and licensed practice")
    for phrase in phrases:
        assert phrase in text
    live = [line for line in lines if line.startswith("t ") and " s " in line]
    assert len(live) >= 4 and any(" running " in line for line in live)
    assert all(len(line) <= 80 for line in live)  # plain short lines when not a terminal
    report = out[out.index("REPORT"):]
    for key in ("ticks", "overruns", "p99", "min manipulability", "min scale", "limit events", "rejected",
                str(recording)):
        assert key in report
    # the simulated arm stayed inside its limits on every recorded tick
    header, rec = read_recording(recording)
    arm = load_arm("reach7")
    assert len(rec) > 1000 and header["arm"] == "reach7"
    assert np.all(rec["q"] >= arm.q_min) and np.all(rec["q"] <= arm.q_max)
    assert "running" in {header["modes"][m] for m in rec["mode"]}
    # one limit-event figure: the report's is the recording summary's
    from twistrate.service.recorder import summarize

    assert f"limit events {summarize(header, rec)['limit_events']} " in report


def test_record_from_the_wire_agrees_with_the_services_own_recording(tmp_path):
    path = _write_config(tmp_path)
    cfg = load_config(path)
    own = tmp_path / "own.trec"
    wire = tmp_path / "wire.trec"
    arm = load_arm("reach7")
    with running_service(cfg, recorder=Recorder(own, arm, cfg.tick.rate_hz)) as run:
        stop = [False]
        thread = threading.Thread(target=record_stream, daemon=True,
                                  args=(path, str(wire), 30.0, stop, run.service.endpoints))
        thread.start()
        link = run.link()
        link.claim("test")
        link.enable()
        stream_until(link, *FAST, lambda cs: sum(c.answers >= 0 for c in cs) > 200)
        stop[0] = True
        thread.join(10.0)
    _, r_own = read_recording(own)
    h_wire, r_wire = read_recording(wire)
    assert h_wire["source"] == "output" and "twist_desired" in h_wire["unavailable"]
    common, i_own, i_wire = np.intersect1d(r_own["tick"], r_wire["tick"], return_indices=True)
    assert len(common) > 100
    np.testing.assert_allclose(r_wire["q"][i_wire], r_own["q"][i_own], atol=1e-12)
    np.testing.assert_array_equal(r_wire["qd"][i_wire], r_own["qd"][i_own])
    np.testing.assert_array_equal(r_wire["mode"][i_wire], r_own["mode"][i_own])
    # and the summary command reads it, with a plot
    proc = _twistrate("record", "--summary", str(own), "--svg", str(tmp_path / "own.svg"))
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err
    assert "time in mode" in out and (tmp_path / "own.svg").exists()
