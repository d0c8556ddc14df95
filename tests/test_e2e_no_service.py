"""End to end: `twistrate sim` with no service, or against a service that simulates its arm itself, and
`twistrate record --out` with no service say so within a few seconds and exit non-zero; the recorder
leaves no file. `twistrate record --summary X | head` ends without a traceback."""

from __future__ import annotations

import os
import subprocess
import sys
import time

import numpy as np
import pytest
from service_harness import make_config, running_service, twistrate

from twistrate.service.recorder import Recorder
from twistrate.service.wire.discovery import write_endpoints
from twistrate.solver.load import load_arm

pytestmark = pytest.mark.timeout(120)

#: Nothing listens here: a loopback port in the range the kernel hands out only on request (port 1 is
#: reserved; a connect to it is refused at once, a ZeroMQ request simply gets no reply).
NOBODY = {"intake": "tcp://127.0.0.1:1", "output": "tcp://127.0.0.1:1", "control": "tcp://127.0.0.1:1"}


def _timed(*args, cwd=None):
    t0 = time.monotonic()
    proc = twistrate(*args, cwd=cwd)
    out, err = proc.communicate(timeout=60)
    return proc.returncode, out, err, time.monotonic() - t0


def test_sim_with_no_service_says_so_and_exits_non_zero(tmp_path):
    write_endpoints(tmp_path / "ep.json", NOBODY)
    rc, _, err, _ = _timed("sim", "--endpoints-file", str(tmp_path / "ep.json"), "--seconds", "60")
    assert rc != 0 and "no service answers" in err, err


def test_sim_against_a_simulating_service_says_so(tmp_path):
    with running_service(make_config()) as run:
        write_endpoints(tmp_path / "ep.json", run.service.endpoints)
        rc, _, err, _ = _timed("sim", "--endpoints-file", str(tmp_path / "ep.json"), "--seconds", "60")
    assert rc != 0 and "simulates its arm itself" in err, err


def test_record_with_no_service_leaves_no_file(tmp_path):
    write_endpoints(tmp_path / "ep.json", NOBODY)
    rc, _, err, _ = _timed("record", "--endpoints-file", str(tmp_path / "ep.json"), "--out", "run.trec",
                           cwd=tmp_path)
    assert rc != 0 and "no service answers" in err, err
    assert not (tmp_path / "run.trec").exists()


def _recording(path):
    arm = load_arm("reach7")
    rec = Recorder(path, arm, 500.0)
    z = np.zeros(arm.n)
    for k in range(50):
        rec.push(2_000_000 * k, 0, k, "running", "clear", np.zeros(arm.n, np.uint8), arm.q_home, z,
                 np.zeros(6), np.zeros(6), 1.0, 1.0, 0.0, 0.1, 0.01)
    rec.close()


def test_summary_into_a_closed_pipe_ends_without_a_traceback(tmp_path):
    _recording(tmp_path / "r.trec")
    # `| head`: the reader has gone before the summary is written (closed here before the start)
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        proc = subprocess.Popen([sys.executable, "-m", "twistrate.service.commands.cli", "record",
                                 "--summary", str(tmp_path / "r.trec")], stdout=write_end,
                                stderr=subprocess.PIPE, text=True)
    finally:
        os.close(write_end)
    _, err = proc.communicate(timeout=60)
    assert "Traceback" not in err and "BrokenPipeError" not in err, err
    assert proc.returncode != 0  # like other programs whose output went nowhere (SIGPIPE convention)
