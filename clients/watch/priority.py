"""The dashboard's own scheduling priority: it lowers it at start (os.nice) unless told otherwise.

No import of the web server here: `twistrate dashboard` builds its options before it checks that the
watch extra is installed.
"""

from __future__ import annotations

import argparse
import contextlib
import os

from twistrate.clients.threads import thread_ids

#: niceness the dashboard adds to its own at start (os.nice): on a machine it shares with a service,
#: the scheduler then favours the service's normally scheduled threads (its control plane, ZeroMQ's
#: I/O) and its tick thread's wake-ups over the dashboard's (docs/dashboard.md, "Its cost")
DEFAULT_NICE = 10


def lower_priority(increment: int) -> int:
    """Add `increment` (0 ... 19) to this process's niceness, for every thread it has; the niceness now.

    On Linux a niceness belongs to a thread (setpriority with a thread id), and a thread starts with
    its creator's. So every thread that exists now is set (threads started at import, such as a numeric
    library's worker pool, included), and every thread started afterwards (the feeds' receive and
    control threads, ZeroMQ's I/O threads, the event loop's executor) inherits it. Call it early. A
    refusal is not an error: the niceness stays as it was.
    """
    if increment <= 0:
        return os.getpriority(os.PRIO_PROCESS, 0)
    target = min(19, os.getpriority(os.PRIO_PROCESS, 0) + increment)
    threads = thread_ids() or [0]  # no /proc: this thread only
    for tid in threads:
        with contextlib.suppress(OSError):
            if os.getpriority(os.PRIO_PROCESS, tid) < target:
                os.setpriority(os.PRIO_PROCESS, tid, target)
    with contextlib.suppress(OSError):
        os.setpriority(os.PRIO_PROCESS, 0, target)
    return os.getpriority(os.PRIO_PROCESS, 0)


def add_nice_argument(parser: argparse.ArgumentParser) -> None:
    """The --nice option of both dashboard entry points."""

    def niceness(text: str) -> int:
        value = int(text)
        if not 0 <= value <= 19:
            raise ValueError(text)
        return value

    niceness.__name__ = "niceness 0 ... 19"
    parser.add_argument(
        "--nice",
        type=niceness,
        default=DEFAULT_NICE,
        metavar="N",
        help=f"add N (0 ... 19) to the dashboard's niceness at start, so that the scheduler favours the "
        f"services on the same machine (default {DEFAULT_NICE}; 0 keeps the priority it was started with)",
    )
