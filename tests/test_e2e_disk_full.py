"""The disk filling while the service records, end to end: `twistrate serve --record` onto a real small
file system (a 192 KiB tmpfs mounted for the test; skipped with the reason when mounting is refused),
where the kernel itself refuses the writes with ENOSPC once it is full.

What docs/operation.md ("Where recordings go") promises: a write error stops the recording, never the
tick; the event `recording_stopped` says so (docs/protocol.md 10) and the counter `recorder_stopped`
turns 1; the service goes on and stops cleanly on SIGTERM; the recording written so far stays readable
(service/recorder.py: whole records back to back, a trailing partial record ignored).
"""

from __future__ import annotations

import contextlib
import errno
import itertools
import os
import signal
import subprocess
import time

import numpy as np
import pytest
from service_harness import reap, serve_process

from twistrate.clients.link import Link
from twistrate.service.recorder import read_recording, summarize

pytestmark = pytest.mark.timeout(120)

#: The small file system: a header and about 900 records of the 7-joint arm (205 bytes each), under two
#: seconds of recording at 500 Hz.
TMPFS_SIZE = "192k"
CONFIG = """[arm]
file = "reach7"
[tick]
rate_hz = 500
[endpoints]
intake = "tcp://127.0.0.1:*"
output = "tcp://127.0.0.1:*"
control = "tcp://127.0.0.1:*"
[logging]
level = "warning"
"""


@contextlib.contextmanager
def small_disk(where):
    where.mkdir()
    try:
        done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={TMPFS_SIZE},mode=0700", "tmpfs",
                               str(where)], capture_output=True, text=True, timeout=30)
    except (OSError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"cannot mount a small tmpfs to fill ({exc})")
    if done.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs to fill: {done.stderr.strip() or done.returncode}")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], capture_output=True, timeout=30)


def test_a_full_disk_stops_the_recording_not_the_service_and_what_was_written_stays_readable(tmp_path):
    cfg = tmp_path / "service.toml"
    cfg.write_text(CONFIG)
    with small_disk(tmp_path / "disk") as disk:
        path = disk / "run.trec"
        proc, ep = serve_process(cfg, tmp_path / "endpoints.json", "--record", str(path))
        try:
            with Link(ep, timeout_s=5.0, topics=(b"command", b"event")) as link:
                link.wait_ready(timeout_s=10.0)
                link.arm()
                link.claim("test", lease_ms=60_000)
                link.enable()
                stopped = None
                end = time.monotonic() + 60.0
                next_send = 0.0
                while stopped is None and time.monotonic() < end:  # move the arm while the disk fills
                    if time.monotonic() >= next_send:
                        link.send_twist([0.03, 0.0, 0.0], [0.0, 0.0, 0.1])
                        next_send = time.monotonic() + 0.01
                    with contextlib.suppress(TimeoutError):
                        msg = link.receive(timeout_s=0.01)
                        if getattr(msg, "event", None) == "recording_stopped":
                            stopped = msg
                assert stopped is not None, "no recording_stopped event while the disk filled"
                assert "write failed" in stopped.detail and os.strerror(errno.ENOSPC) in stopped.detail
                c0 = link.counters()
                assert c0["recorder_stopped"] == 1 and c0["faults"] == 0
                link.drain()
                t0 = link.status()["tick"]
                commands = []  # the tick goes on: 200 consecutive commands after the recording stopped
                while len(commands) < 200:
                    link.send_twist([0.03, 0.0, 0.0], [0.0, 0.0, 0.1])
                    with contextlib.suppress(TimeoutError):
                        commands.append(link.receive_command(timeout_s=1.0))
                assert all(b.tick == a.tick + 1 for a, b in itertools.pairwise(commands))
                status = link.status()
                assert status["mode"] == "running" and status["tick"] > t0
            proc.send_signal(signal.SIGTERM)
            _, err = proc.communicate(timeout=30)
            assert proc.returncode == 0 and "Traceback" not in err, err[-2000:]
        finally:
            reap(proc)
        size = path.stat().st_size
        header, records = read_recording(path)
        print(f"recording stopped by the full disk after {len(records)} records ({size} bytes on a "
              f"{TMPFS_SIZE} tmpfs): {stopped.detail}")
        assert len(records) > 100 and size <= 192 * 1024
        assert f"stopped after {size} bytes" in stopped.detail  # what reached the disk, as stat() has it
        ticks = records["tick"].astype(np.int64)
        assert np.all(np.diff(ticks) == 1)  # every tick up to the stop, none torn or lost
        assert np.isfinite(records["q"]).all() and header["n"] == 7
        assert summarize(header, records)["records"] == len(records)  # the summary reads it too
