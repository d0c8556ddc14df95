"""`twistrate bench service`'s CPU figures: the per-thread split of /proc/PID/task finds the tick thread by
its operating-system name and never exceeds the process's own figure (/proc/PID/stat: all its threads,
those that have ended included, which is why the benchmark takes differences over its window).

Linux procfs: /proc/PID/stat fields 14 and 15 (utime, stime) are the whole process's, the same fields of
/proc/PID/task/TID/stat one thread's (proc(5), common practice)."""

from __future__ import annotations

import os
import threading
import time

import pytest

from twistrate.service.bench.service import cpu_seconds, thread_cpu_seconds
from twistrate.service.tick import TICK_THREAD_OS_NAME, name_thread

pytestmark = pytest.mark.skipif(not os.path.isdir("/proc/self/task"), reason="Linux /proc needed")

#: The busy thread runs until it has used this much CPU, s (CPU time, not wall time: no timing bound).
BUSY_CPU_S = 0.3
#: /proc counts in clock ticks (usually 10 ms); the per-thread sum and the process figure are two reads.
TICK_S = 0.05


def test_per_thread_cpu_adds_up_to_the_process_and_names_the_tick_thread():
    busy_done, release = threading.Event(), threading.Event()

    def busy() -> None:
        assert name_thread(TICK_THREAD_OS_NAME)
        t0 = time.thread_time()
        while time.thread_time() - t0 < BUSY_CPU_S:
            pass
        busy_done.set()
        release.wait(30.0)

    thread = threading.Thread(target=busy)
    thread.start()
    try:
        assert busy_done.wait(120.0)
        pid = os.getpid()
        roles = thread_cpu_seconds(pid)
        total = cpu_seconds(pid)
        assert set(roles) == {"tick", "zmq_io", "main", "other"}
        assert roles["tick"] >= BUSY_CPU_S - TICK_S
        assert roles["main"] > 0.0  # this test's own thread, at least the imports
        assert sum(roles.values()) <= total + TICK_S
    finally:
        release.set()
        thread.join()
