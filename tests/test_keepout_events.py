"""The keep-out events' hold rule (service/keepout_watch.py, docs/protocol.md section 10): one
`keepout_limiting` when a damper starts to limit the scale, one `keepout_released` after RELEASE_HOLD_S
without one, and a grazing contact (limiting on and off every few ticks) gives one pair, not a flood."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np

from twistrate.service.keepout_watch import RELEASE_HOLD_S, KeepoutWatch
from twistrate.solver.damper import Contacts

RATE_HZ = 500.0
N = 7


class FakePipeline:
    def __init__(self):
        self.rate_hz = RATE_HZ
        self.keepout = SimpleNamespace(pair_links=(("wrist_pitch", "bench", True), ("elbow", "root", False)))
        self.events: list[tuple[str, str]] = []

    def emit_event(self, name, detail):
        self.events.append((name, detail))


def _contacts(pair, d):
    z3 = np.zeros((1, 3))
    return Contacts(np.array([pair]), np.array([d]), z3, z3, z3, np.array([5]), np.array([0]))


def res_keepout(pair=0, d=0.05, scale=0.4):
    return SimpleNamespace(scale=scale, tracking=False, rows_active=np.array([True]),
                           contacts=_contacts(pair, d), limits_active=np.zeros(N, np.uint8))


def res_free():
    return SimpleNamespace(scale=1.0, tracking=False, rows_active=None, contacts=None,
                           limits_active=np.zeros(N, np.uint8))


def res_joint():
    bits = np.zeros(N, np.uint8)
    bits[2] = 2  # LIMIT_VELOCITY
    return SimpleNamespace(scale=0.7, tracking=False, rows_active=np.array([False]),
                           contacts=_contacts(0, 0.11), limits_active=bits)


def names(p):
    return [e[0] for e in p.events]


def test_engage_then_release_after_the_hold():
    p = FakePipeline()
    w = KeepoutWatch(p)
    hold = math.ceil(RELEASE_HOLD_S * RATE_HZ)
    assert w.hold_ticks == hold
    for _ in range(10):
        w.step(res_free())
    assert names(p) == []
    w.step(res_keepout())
    assert names(p) == ["keepout_limiting"] and "wrist_pitch - bench" in p.events[0][1]
    for _ in range(hold - 1):
        w.step(res_joint())
    assert names(p) == ["keepout_limiting"] and w.current.by == "joint"
    w.step(None)  # not running counts as not limiting
    assert names(p) == ["keepout_limiting", "keepout_released"]


def test_grazing_contact_gives_one_pair_of_events():
    p = FakePipeline()
    w = KeepoutWatch(p)
    for tick in range(int(2 * RATE_HZ)):  # 2 s: limiting on one tick in three
        w.step(res_keepout(d=0.031) if tick % 3 == 0 else res_free())
    assert names(p) == ["keepout_limiting"]
    for _ in range(w.hold_ticks):
        w.step(res_free())
    assert names(p) == ["keepout_limiting", "keepout_released"]


def test_without_keepout_no_event_but_the_limit_is_still_known():
    p = FakePipeline()
    p.keepout = None
    w = KeepoutWatch(p)
    w.step(res_joint())
    assert w.current.by == "joint" and w.current.joint == 2 and w.current.bound == "velocity"
    assert p.events == []
