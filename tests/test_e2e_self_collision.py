"""End to end through a real service: self-collision. reach7 asked to fold on itself (the tool driven back
and down toward its own base) comes to rest with the smallest distance between its non-adjacent links
never below d_s on any command or any step of the simulated arm, and moves freely (scale 1) when asked to
unfold. On the way the health message reports the nearest pair and keep-out as the constraint limiting the
scale, and the keep-out events come once each.

The behaviour is that of the velocity damper (Faverjon & Tournassoud 1987, ICRA; the form of Kanoun,
Lamiraux & Wieber 2011, IEEE T-RO 27(4)). Distances are measured outside the service's pass: from each
command's target (docs/protocol.md 7.3) and each simulated step with forward kinematics and the exact
kernels over every link pair (`KeepOut.all_contacts`; the kernels are checked against coal in
tests/test_distance.py).
"""

from __future__ import annotations

import contextlib
import itertools
import time

import numpy as np
import pytest
from service_harness import make_config, record_steps, running_service

from twistrate.service import wire
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward
from twistrate.solver.zones import parse_keepout

pytestmark = pytest.mark.timeout(180)

#: self-collision only (no zone): the arm against itself
KEEPOUT = {"influence_m": 0.10, "security_m": 0.02, "gain_m_s": 0.3, "self_collision": True}
#: the fold of tests/test_keepout_lp.py: the tool back toward the base and down, m/s
FOLD = [-0.25, 0.0, -0.15]
#: first-order slack of the rows over one tick (as in tests/test_e2e_keepout.py), m
FIRST_ORDER_SLACK_M = 2e-4
AT_REST_SCALE = 0.02
AT_REST_COMMANDS = 40
LIMIT_S = 40.0


def stream(link, linear, until, limit_s=LIMIT_S, period_s=0.01):
    """Send the twist every period_s; collect commands, health, states and events (a map of lists by kind)
    until until(that map)."""
    got: dict[str, list] = {"command": [], "health": [], "state": [], "event": []}
    kinds = {wire.CommandMessage: "command", wire.HealthMessage: "health", wire.StateMessage: "state",
             wire.EventMessage: "event"}
    end = time.monotonic() + limit_s
    next_send = 0.0
    while time.monotonic() < end:
        if time.monotonic() >= next_send:
            link.send_twist(linear, [0.0, 0.0, 0.0])
            next_send = time.monotonic() + period_s
        with contextlib.suppress(TimeoutError):
            m = link.receive(timeout_s=period_s)
            got[kinds[type(m)]].append(m)
        if until(got):
            return got
    raise AssertionError(f"not met within {limit_s} s; last command {got['command'][-1:]}")


def answered(cs):
    return [c for c in cs if c.answers >= 0 and c.mode == "running"]


def test_folding_on_itself_it_stops_at_d_s_and_unfolds_freely():
    cfg = make_config(simulation={"lag_s": 0.0}, keepout=KEEPOUT)
    with running_service(cfg) as run:
        arm = run.service.arm
        watch = KeepOut(arm, parse_keepout(KEEPOUT))
        assert watch.pair_count > 0 and not any(zone for _, _, zone in watch.pair_links)
        d_s = KEEPOUT["security_m"]

        def self_distance(q):
            return float(watch.all_contacts(forward(arm, np.asarray(q))).distance.min())

        sim = run.service.pipeline.sim
        stepped = record_steps(sim)
        link = run.link()
        link.claim("test", lease_ms=60000)
        link.enable()

        def at_rest(got):
            a = answered(got["command"])
            return len(a) > AT_REST_COMMANDS and all(c.scale < AT_REST_SCALE for c in a[-AT_REST_COMMANDS:])

        fold = stream(link, FOLD, at_rest)
        link.drain()

        def unfolded(got):  # followed in full, and the release event (0.25 s after the last limiting tick)
            a = answered(got["command"])
            return len(a) > 60 and all(c.scale == 1.0 for c in a[-30:]) and any(
                e.event == "keepout_released" for e in got["event"])

        unfold = stream(link, [-v for v in FOLD], unfolded)
    down, up = answered(fold["command"]), answered(unfold["command"])
    dist = np.array([self_distance(c.target) for c in down])
    assert dist[0] > KEEPOUT["influence_m"]  # started clear of itself
    assert dist.min() >= d_s - FIRST_ORDER_SLACK_M, dist.min()
    assert dist[-1] < d_s + 0.005  # at rest at d_s, not short of it
    assert max(c.scale for c in down) == pytest.approx(1.0)
    every = np.array([self_distance(q) for q in stepped])
    assert len(every) > len(down) and every.min() >= d_s - FIRST_ORDER_SLACK_M, every.min()
    rising = [self_distance(c.target) for c in up[-30:]]
    assert all(b > a for a, b in itertools.pairwise(rising))  # unfolding
    # health: the nearest self pair (exact, against the oracle at the state message of the same tick)
    states = {s.tick: s for s in fold["state"] + unfold["state"]}
    checked = 0
    for h in fold["health"] + unfold["health"]:
        assert h.keepout is not None and h.keepout.other_kind == "link"
        if h.tick in states:
            assert h.keepout.nearest_m == pytest.approx(self_distance(states[h.tick].position), abs=1e-9)
            checked += 1
    assert checked > 10
    resting = [h for h in fold["health"][-5:]]
    assert resting and all(h.limiting.by == "keepout" and h.limiting.link and h.limiting.other
                           for h in resting), resting[-1].limiting
    # the health's limiting agrees with its scale on every report: nothing limits a full twist
    for h in fold["health"] + unfold["health"]:
        assert (h.limiting.by == "none") == (h.scale >= 1.0 and not h.tracking), (h.scale, h.limiting)
    assert any(h.limiting.by == "none" for h in unfold["health"])
    events = [e.event for e in fold["event"] + unfold["event"]]
    assert events.count("keepout_limiting") == 1, events
    assert events.count("keepout_released") == 1, events
    assert events.index("keepout_limiting") < events.index("keepout_released")
