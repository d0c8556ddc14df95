"""The damper rows in a scaling problem solved by a linear program (scipy linprog, HiGHS; Huangfu &
Hall 2018, "Parallelizing the dual revised simplex method", Math. Prog. Comp.) standing in for the
saturated solve: maximise s subject to J q_dot = s x_dot, |q_dot| <= v_max and A q_dot >= b. Driven
into a bench top or into itself, reach7 comes to rest at the security distance and never closer
(every tick, measured with the exact distances); driven away, it follows at scale 1 (the behaviour
the velocity damper is for: Faverjon & Tournassoud 1987; Kanoun, Lamiraux & Wieber 2011)."""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.zones import parse_keepout

linprog = pytest.importorskip("scipy.optimize").linprog

PERIOD_S = 0.002
#: How far below d_s the exact distance may dip between ticks: the rows are first order in the
#: motion of one tick (curvature of the surfaces and of the joint motion), m.
FIRST_ORDER_SLACK_M = 2e-4
#: The run ends once the scale has stayed below AT_REST_SCALE for AT_REST_TICKS ticks.
AT_REST_SCALE = 0.02
AT_REST_TICKS = 100


def scaled_step(arm, ko, q, x_dot):
    """(q_dot, s) of the LP at q; asserts it is feasible."""
    fr = forward(arm, q)
    J = geometric_jacobian(arm, fr)
    A, b, _ = ko.rows(fr, q, J)
    n = arm.n
    cost = np.zeros(n + 1)
    cost[-1] = -1.0
    rows = {"A_ub": np.hstack([-A, np.zeros((len(b), 1))]), "b_ub": -b} if len(b) else {}
    res = linprog(cost, A_eq=np.hstack([J, -x_dot[:, None]]), b_eq=np.zeros(6),
                  bounds=[(-v, v) for v in arm.v_max] + [(0.0, 1.0)], method="highs", **rows)
    assert res.status == 0, res.message
    return res.x[:n], res.x[-1]


@pytest.mark.parametrize("scene, x_dot, ticks", [
    ({"zone": [{"name": "bench", "kind": "box", "center_m": [0.55, 0.0, 0.2], "size_m": [0.4, 0.8, 0.1]}],
      "self_collision": False}, [0.0, 0.0, -0.2, 0.0, 0.0, 0.0], 1500),
    ({"zone": [{"name": "wall", "kind": "half_space", "point_m": [0.75, 0.0, 0.0],
                "normal": [-1.0, 0.0, 0.0]}], "self_collision": False},
     [0.2, 0.0, -0.05, 0.0, 0.0, 0.0], 1500),
    ({"self_collision": True}, [-0.25, 0.0, -0.15, 0.0, 0.0, 0.0], 2500),
])
def test_driven_in_it_stops_at_the_security_distance_and_leaves_freely(scene, x_dot, ticks):
    arm = load_arm("reach7")
    cfg = parse_keepout({"influence_m": 0.10, "security_m": 0.02, "gain_m_s": 0.3, **scene})
    ko, watch = KeepOut(arm, cfg), KeepOut(arm, cfg)
    q = np.array(arm.q_home, dtype=float)
    x_dot = np.array(x_dot)
    closest, scales = [], []
    for _ in range(ticks):
        q_dot, s = scaled_step(arm, ko, q, x_dot)
        q = q + q_dot * PERIOD_S
        # Exact distances of every pair within d_i (the others are farther: tests/test_keepout.py).
        near = watch.contacts(forward(arm, q), q).distance
        closest.append(near.min() if len(near) else cfg.influence_m)
        scales.append(s)
        if len(scales) > AT_REST_TICKS and max(scales[-AT_REST_TICKS:]) < AT_REST_SCALE:
            break
    assert min(closest) >= cfg.security_m - FIRST_ORDER_SLACK_M
    assert closest[-1] < cfg.security_m + 0.01 and scales[-1] < AT_REST_SCALE  # at rest near d_s
    assert scales[0] == pytest.approx(1.0)  # far from everything: the full twist
    _, s_away = scaled_step(arm, ko, q, -x_dot)
    assert s_away == pytest.approx(1.0)
