"""Real-time scheduling of a camera client's loop, opt-in (`[run] realtime_priority`, default 0: off).

On a loaded machine a frame's wake-up and path wait for a CPU (docs/vision.md, "Stalls under load"):
the frame is taken off the connection by ZeroMQ's I/O thread, which wakes the loop's thread, which
sends the twist through another I/O thread. `realtime` puts the calling thread and the process's
ZeroMQ I/O threads (Linux: the threads named "ZMQbg/IO/...") under SCHED_FIFO at `priority`, with
SCHED_RESET_ON_FORK (a process started from them is scheduled normally), and `Realtime.restore` puts
back what they had. The operating system must permit it (root, CAP_SYS_NICE or an RLIMIT_RTPRIO
allowance, `ulimit -r`); a refusal is not an error: the result says what happened and nothing
changes. The loop never busy-waits (it sleeps in its socket's poll, at least 1 ms when it waits at
all), so a real-time loop uses the CPU only for frames; keep the priority below the service's tick
thread's (`[tick] realtime_priority`, default 10) so the tick comes first.
"""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass, field

from twistrate.clients.threads import thread_ids

#: Prefix of the names libzmq gives its I/O threads.
ZMQ_IO_PREFIX = "ZMQbg/IO"


@dataclass
class Realtime:
    """What `realtime` did: on (SCHED_FIFO in force), threads (ids changed), text (for the report)."""

    on: bool
    text: str
    threads: list[int] = field(default_factory=list)
    _before: list[tuple[int, int, int]] = field(default_factory=list)  # (tid, policy, priority)

    def restore(self) -> None:
        """Back to each thread's policy and priority before `realtime` (threads gone are skipped)."""
        for tid, policy, priority in self._before:
            with contextlib.suppress(OSError):
                os.sched_setscheduler(tid, policy, os.sched_param(priority))
        self._before.clear()


def _zmq_io_threads(proc: str = "/proc") -> list[int]:
    return thread_ids(ZMQ_IO_PREFIX, proc) or []


def realtime(priority: int) -> Realtime:
    """SCHED_FIFO at `priority` (1..99, clamped to the platform's maximum) for the calling thread and the
    process's ZeroMQ I/O threads; priority <= 0: nothing. A refusal changes nothing."""
    if priority <= 0:
        return Realtime(False, "normal scheduling (real-time not requested)")
    if not hasattr(os, "sched_setscheduler"):
        return Realtime(False, "normal scheduling (no SCHED_FIFO on this platform)")
    prio = max(1, min(int(priority), os.sched_get_priority_max(os.SCHED_FIFO)))
    policy = os.SCHED_FIFO | getattr(os, "SCHED_RESET_ON_FORK", 0)
    done = Realtime(True, "")
    for tid in (0, *_zmq_io_threads()):
        try:
            before = (tid, os.sched_getscheduler(tid) & ~getattr(os, "SCHED_RESET_ON_FORK", 0),
                      os.sched_getparam(tid).sched_priority)
            os.sched_setscheduler(tid, policy, os.sched_param(prio))
        except OSError as exc:
            done.restore()
            return Realtime(False, f"normal scheduling (SCHED_FIFO refused: {exc.strerror or exc})")
        done._before.append(before)
        done.threads.append(tid)
    done.text = f"SCHED_FIFO priority {prio} (the loop and {len(done.threads) - 1} ZeroMQ I/O threads)"
    return done
