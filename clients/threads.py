"""The threads of this process as Linux lists them (procfs): their ids, optionally only those whose name
starts with a prefix. Used where a client sets or reads something per thread (niceness, scheduling,
run-queue waits)."""

from __future__ import annotations

import os


def thread_ids(name_prefix: str | None = None, proc: str = "/proc") -> list[int] | None:
    """Ids of this process's threads (`proc`/self/task), only those whose name (comm) starts with
    `name_prefix` when given; None when procfs cannot be read. A thread that ends meanwhile is skipped."""
    try:
        tids = [int(t) for t in os.listdir(f"{proc}/self/task")]
    except (OSError, ValueError):
        return None
    if name_prefix is None:
        return tids
    out = []
    for tid in tids:
        try:
            with open(f"{proc}/self/task/{tid}/comm") as f:
                if f.read().startswith(name_prefix):
                    out.append(tid)
        except OSError:
            continue
    return out
