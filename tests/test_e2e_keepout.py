"""End to end through a real service: keep-out. A twist that drives the tool into a table brings it to
rest at the security distance and never closer on any tick; a twist away is followed at scale 1.

The behaviour is that of the velocity damper (Faverjon & Tournassoud 1987, ICRA; the form of Kanoun,
Lamiraux & Wieber 2011, IEEE T-RO 27(4)): d' >= -xi (d - d_s) / (d_i - d_s). The distances are
measured independently of the service's own pass: from each command's target (the joint position
the command aims at, docs/protocol.md 7.3) with forward kinematics and the exact distance kernels
(`KeepOut.all_contacts`, themselves checked against coal in tests/test_distance.py).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from service_harness import make_config, record_steps, running_service, stream_until

from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward
from twistrate.solver.zones import parse_keepout

pytestmark = pytest.mark.timeout(120)

#: The invented test cell: a table in front of reach7, its top 0.35 m above the base (the tool at
#: home is about 0.13 m above it, just beyond d_i).
KEEPOUT = {"influence_m": 0.12, "security_m": 0.03, "gain_m_s": 0.3, "self_collision": False,
           "zone": [{"name": "table", "kind": "box", "center_m": [0.6, 0.0, 0.2],
                     "size_m": [0.4, 0.8, 0.3]}]}
#: How far below d_s the exact distance may dip between ticks: the rows are first order in the
#: motion of one tick (curvature of the joint motion), m (as in tests/test_keepout_lp.py).
FIRST_ORDER_SLACK_M = 2e-4
#: At rest: this many answered commands in a row with a scale below AT_REST_SCALE.
AT_REST_SCALE = 0.02
AT_REST_COMMANDS = 40


def _answered(cs):
    return [c for c in cs if c.answers >= 0 and c.mode == "running"]


def test_driven_into_the_table_it_stops_at_the_security_distance_and_leaves_at_scale_one():
    cfg = make_config(simulation={"lag_s": 0.0}, keepout=KEEPOUT)
    with running_service(cfg) as run:
        arm = run.service.arm
        watch = KeepOut(arm, parse_keepout(KEEPOUT))
        d_s = KEEPOUT["security_m"]

        def distance(q):
            return float(watch.all_contacts(forward(arm, q)).distance.min())

        sim = run.service.pipeline.sim
        stepped = record_steps(sim)  # the simulated arm's position after every step (every tick)
        link = run.link()
        link.claim("test", lease_ms=60000)
        link.enable()

        def at_rest(cs):
            a = _answered(cs)
            return len(a) > AT_REST_COMMANDS and all(c.scale < AT_REST_SCALE for c in a[-AT_REST_COMMANDS:])

        down = _answered(stream_until(link, [0.0, 0.0, -0.1], [0.0, 0.0, 0.0], at_rest, limit_s=30.0))
        link.drain()

        def away_followed(cs):
            a = _answered(cs)
            return len(a) > 60 and all(c.scale == 1.0 for c in a[-30:])

        up = _answered(stream_until(link, [0.0, 0.0, 0.1], [0.0, 0.0, 0.0], away_followed))
    # measured after the run (the lease and the stream do not wait for the oracle)
    dist = np.array([distance(c.target) for c in down])
    ticks = np.array([c.tick for c in down])
    assert dist[0] > KEEPOUT["influence_m"]  # started clear of the table
    assert dist.min() >= d_s - FIRST_ORDER_SLACK_M, dist.min()
    assert dist[-1] < d_s + 0.005  # at rest near d_s, not short of it
    assert max(c.scale for c in down) == pytest.approx(1.0)  # far away: the full twist
    assert ticks[-1] - ticks[0] + 1 < 2 * len(ticks)  # most ticks' commands arrived
    # every tick: the simulated arm's positions (lag 0: each is the target of that tick's command)
    every = np.array([distance(q) for q in stepped])
    assert len(every) > len(ticks) and every.min() >= d_s - FIRST_ORDER_SLACK_M, every.min()
    rising = [distance(c.target) for c in up[-30:]]
    assert all(b > a for a, b in itertools.pairwise(rising))  # leaving the table
