"""The process's thread ids as procfs lists them (clients/threads.py), checked against the ids Python's
threading module reports (threading.get_native_id, the kernel's thread id; Python documentation)."""

from __future__ import annotations

import threading

from twistrate.clients.threads import thread_ids


def test_every_running_thread_is_listed_and_a_prefix_filters_by_name(tmp_path):
    started, stop = threading.Event(), threading.Event()
    ids: list[int] = []

    def work() -> None:
        ids.append(threading.get_native_id())
        started.set()
        stop.wait(10)

    t = threading.Thread(target=work)
    t.start()
    try:
        started.wait(10)
        listed = thread_ids()
        assert listed is not None and threading.get_native_id() in listed and ids[0] in listed
        with open(f"/proc/self/task/{ids[0]}/comm") as f:
            name = f.read().strip()
        assert ids[0] in (thread_ids(name) or [])
        assert thread_ids("no thread is named like this") == []
    finally:
        stop.set()
        t.join()
    assert thread_ids(proc=str(tmp_path / "no-procfs")) is None
