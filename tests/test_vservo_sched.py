"""Opt-in real-time scheduling of the camera loop (clients/vservo/sched.py), against the kernel's own
account of each thread's policy (os.sched_getscheduler / sched_getparam, Linux sched(7))."""

from __future__ import annotations

import os
import threading
import time

import pytest
import zmq

from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo.sched import _zmq_io_threads, realtime
from twistrate.solver.errors import ConfigError

pytestmark = pytest.mark.skipif(not hasattr(os, "sched_setscheduler"), reason="Linux scheduling calls")


def _policy(tid: int) -> tuple[int, int]:
    return (os.sched_getscheduler(tid) & ~getattr(os, "SCHED_RESET_ON_FORK", 0),
            os.sched_getparam(tid).sched_priority)


def test_off_changes_nothing() -> None:
    before = _policy(0)
    rt = realtime(0)
    assert not rt.on and "not requested" in rt.text and _policy(0) == before
    rt.restore()
    assert _policy(0) == before


def test_the_loop_and_zeromqs_io_threads_and_back() -> None:
    # In a thread of its own (the test process's own threads keep their scheduling): SCHED_FIFO at the
    # priority asked for this thread and every ZeroMQ I/O thread, then each as it was; or, where the
    # system refuses (no root, CAP_SYS_NICE or RLIMIT_RTPRIO), a refusal that changed nothing.
    ctx = zmq.Context()
    sock = ctx.socket(zmq.SUB)  # libzmq starts its I/O thread with the first socket
    try:
        deadline = time.monotonic() + 5.0
        while not (io := _zmq_io_threads()) and time.monotonic() < deadline:
            time.sleep(0.01)  # the I/O thread names itself once it runs
        assert io, "a ZeroMQ I/O thread named ZMQbg/IO/..."
        before = {tid: _policy(tid) for tid in io}
        seen: dict[str, object] = {}

        def body() -> None:
            own = _policy(0)
            rt = realtime(3)
            seen["rt"] = rt
            seen["during"] = (_policy(0), {tid: _policy(tid) for tid in io})
            rt.restore()
            seen["after"] = (_policy(0), {tid: _policy(tid) for tid in io}, own)

        t = threading.Thread(target=body)
        t.start()
        t.join()
        rt = seen["rt"]
        during_own, during_io = seen["during"]
        after_own, after_io, own = seen["after"]
        if rt.on:
            assert during_own == (os.SCHED_FIFO, 3)
            assert all(during_io[tid] == (os.SCHED_FIFO, 3) for tid in io)
            assert "SCHED_FIFO priority 3" in rt.text and len(rt.threads) == 1 + len(io)
        else:
            assert "refused" in rt.text and during_own == own and during_io == before
        assert after_own == own and after_io == before
    finally:
        sock.close(0)
        ctx.term()


def test_the_config_takes_a_priority_from_0_to_99() -> None:
    from test_vservo_config import _doc

    doc = _doc()
    assert vc.config_from_dict(doc).run.realtime_priority == 0  # off unless asked
    doc["run"]["realtime_priority"] = 5
    assert vc.config_from_dict(doc).run.realtime_priority == 5
    for bad in (-1, 100, 2.5):
        doc["run"]["realtime_priority"] = bad
        with pytest.raises(ConfigError, match=r"run\.realtime_priority"):
            vc.config_from_dict(doc)
