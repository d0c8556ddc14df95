"""End to end: real-time scheduling is the default where the operating system permits it, status says
whether it is in force, and a refusal falls back to normal scheduling with one logged notice (in
process with a refusing scheduler call, and as an unprivileged `twistrate serve` process).

sched(7) / sched_setscheduler(2): setting SCHED_FIFO needs root, CAP_SYS_NICE, or an RLIMIT_RTPRIO
allowance; otherwise the call fails with EPERM.
"""

from __future__ import annotations

import errno
import logging
import os
import shutil
import signal
import stat
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest
from service_harness import config_dict, make_config, reap, running_service, serve_process, stream_until

from twistrate.clients.link import Link
from twistrate.service.commands import serve
from twistrate.service.tick import probe_realtime

pytestmark = pytest.mark.timeout(90)

NOTICE = "real-time scheduling not available"
V, W = [0.02, 0.0, 0.0], [0.0, 0.0, 0.05]


def _notices(records):
    return [r for r in records if r.levelno == logging.WARNING and NOTICE in r.getMessage()]


def test_status_says_whether_the_tick_runs_real_time(caplog):
    caplog.set_level(logging.INFO, logger="twistrate")
    permitted = probe_realtime(make_config().tick.realtime_priority).realtime
    with running_service(make_config()) as run:
        link = run.link()
        assert link.status()["realtime"] is permitted
        assert run.service.scheduling.realtime is permitted
    assert len(_notices(caplog.records)) == (0 if permitted else 1)
    with running_service(make_config(tick={"realtime_priority": 0})) as run:
        assert run.link().status()["realtime"] is False
        assert "not requested" in run.service.scheduling.text


def test_refused_realtime_falls_back_to_normal_scheduling_with_one_notice(monkeypatch, caplog):
    def refuse(*args):
        raise PermissionError(errno.EPERM, "Operation not permitted")

    monkeypatch.setattr(os, "sched_setscheduler", refuse)
    caplog.set_level(logging.INFO, logger="twistrate")
    with running_service(make_config()) as run:
        link = run.link()
        link.claim("test")
        link.enable()
        cs = stream_until(link, V, W, lambda cs: sum(c.answers >= 0 for c in cs) > 20)
        assert cs[-1].mode == "running"
        assert link.status()["realtime"] is False
    notices = _notices(caplog.records)
    assert len(notices) == 1 and "not permitted" in notices[0].getMessage()


def test_serve_refuses_an_out_of_range_priority(capsys):
    assert serve.main(["--rt-priority", "100"]) == 2
    assert "--rt-priority: got 100; accepted: 0 (off) to 99" in capsys.readouterr().err


UNPRIVILEGED = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups"]


def _unprivileged_can_run_the_package() -> bool:
    """Root with setpriv, and uid 65534 can read this checkout and its interpreter."""
    if os.geteuid() != 0 or shutil.which("setpriv") is None:
        return False
    probe = subprocess.run([*UNPRIVILEGED, sys.executable, "-c", "import twistrate.service.commands.serve"],
                           capture_output=True, cwd="/", timeout=60)
    return probe.returncode == 0


@pytest.mark.skipif(not _unprivileged_can_run_the_package(),
                    reason="needs root, setpriv, and a checkout other users may read")
def test_unprivileged_serve_runs_with_normal_scheduling_and_one_notice():
    # An unprivileged process (uid 65534, RLIMIT_RTPRIO 0) may not use SCHED_FIFO. The service must run
    # on, scheduled normally: in particular it must not hand the real-time policy to the ZeroMQ I/O
    # thread, whose start libzmq aborts when the operating system refuses it.
    with tempfile.TemporaryDirectory() as tmp:
        os.chmod(tmp, stat.S_IRWXU | stat.S_IRGRP | stat.S_IXGRP | stat.S_IROTH | stat.S_IXOTH)
        path = Path(tmp) / "service.toml"
        doc = config_dict()
        path.write_text("\n".join([f"[{section}]\n" + "\n".join(f'{k} = "{v}"' for k, v in values.items())
                                   for section, values in doc.items()]) + "\n")
        path.chmod(0o644)
        out = Path(tmp) / "out"  # the unprivileged service writes its endpoints file here
        out.mkdir()
        out.chmod(0o777)
        proc, endpoints = serve_process(path, out / "endpoints.json", prefix=tuple(UNPRIVILEGED), cwd=tmp)
        try:
            with Link(endpoints, timeout_s=2.0) as link:
                link.wait_ready(timeout_s=20.0)
                link.arm()
                assert link.status()["realtime"] is False
                link.claim("test")
                link.enable()
                stream_until(link, V, W, lambda cs: sum(c.answers >= 0 for c in cs) > 20)
            proc.send_signal(signal.SIGTERM)
            _, err = proc.communicate(timeout=20)
        finally:
            reap(proc)
    assert proc.returncode == 0, err
    assert err.count(NOTICE) == 1 and "not permitted" in err
