"""What the solver reports about keep-out: the nearest pair at q (`KeepOut.nearest`, exact, against
coal and the half-space closed form), the link names of each pair, the damper rows active at the
rates (`Resolution.rows_active`), and the constraint that limited the scale (`solver/limiting.py`)
against the linear program solved by scipy (its dual values tell which constraint binds)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twistrate.solver.geometry import ROOT
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward
from twistrate.solver.limiting import LIMIT_JOINT, LIMIT_KEEPOUT, LIMIT_NONE, limiting
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.zones import parse_keepout

coal = pytest.importorskip("coal")

SEED = 7734
#: two half-spaces and self-collision: every pair has a closed form or a coal query
SCENE = {"influence_m": 0.12, "security_m": 0.03, "gain_m_s": 0.3, "self_collision": True,
         "zone": [{"name": "bench", "kind": "half_space", "point_m": [0.0, 0.0, 0.05],
                   "normal": [0.0, 0.0, 1.0]},
                  {"name": "side", "kind": "half_space", "point_m": [0.0, -0.5, 0.0],
                   "normal": [0.1, 1.0, 0.0]}]}


def capsule_base(arm, frames, c):
    T = arm.T_base_root if c.body == 0 else frames.T_base_joint[c.body - 1]
    return T[:3, :3] @ c.a + T[:3, 3], T[:3, :3] @ c.b + T[:3, 3]


def coal_capsule_distance(a0, a1, ra, b0, b1, rb) -> float:
    """Signed capsule-capsule distance from coal (coal's capsules lie on their local z, centred)."""
    def placed(a, b, r):
        axis = b - a
        length = float(np.linalg.norm(axis))
        z = axis / length if length > 0 else np.array([0.0, 0.0, 1.0])
        x = np.cross(z, [1.0, 0.0, 0.0] if abs(z[0]) < 0.9 else [0.0, 1.0, 0.0])
        x /= np.linalg.norm(x)
        T = coal.Transform3s(np.column_stack([x, np.cross(z, x), z]), 0.5 * (a + b))
        return coal.Capsule(r, length), T
    (g1, T1), (g2, T2) = placed(a0, a1, ra), placed(b0, b1, rb)
    req, res = coal.DistanceRequest(), coal.DistanceResult()
    return float(coal.distance(g1, T1, g2, T2, req, res))


def oracle_distances(arm, ko, q):
    """{(link, other): distance} from outside the pass: half-spaces by the closed form
    min over the end points of n^T p - c, minus the radius (the signed distance of a capsule to a plane,
    affine along the segment: common practice); capsule pairs by coal."""
    fr = forward(arm, q)
    caps = {c.name: c for c in arm.geometry.capsules}
    zones = {z["name"]: z for z in SCENE["zone"]}
    out = {}
    for (name_a, name_b), links in zip(ko.pair_names, ko.pair_links, strict=True):
        a0, a1 = capsule_base(arm, fr, caps[name_a])
        if name_b in zones:
            n = np.array(zones[name_b]["normal"]) / np.linalg.norm(zones[name_b]["normal"])
            c = n @ np.array(zones[name_b]["point_m"])
            d = min(n @ a0, n @ a1) - c - caps[name_a].radius
        else:
            b0, b1 = capsule_base(arm, fr, caps[name_b])
            d = coal_capsule_distance(a0, a1, caps[name_a].radius, b0, b1, caps[name_b].radius)
        out[(name_a, name_b)] = (d, links)
    return out


@pytest.mark.parametrize("name", ["reach7", "bench6"])
def test_nearest_is_the_exact_minimum_over_all_pairs(name):
    """Along a random walk with jumps, nearest() gives the smallest oracle distance (1e-9 m) and its pair."""
    arm = load_arm(name)
    ko = KeepOut(arm, parse_keepout(SCENE))
    rng = np.random.default_rng(SEED)
    q = arm.q_home.copy()
    for step in range(60):
        q = rng.uniform(np.maximum(arm.q_min, -3), np.minimum(arm.q_max, 3)) if step % 10 == 0 else \
            np.clip(q + rng.normal(size=arm.n) * 0.02, arm.q_min, arm.q_max)
        if step % 3 == 0:
            ko.contacts(forward(arm, q), q)  # the per-tick pass, so the early-out state is recent
        d, p = ko.nearest(forward(arm, q), q)
        ref = oracle_distances(arm, ko, q)
        best = min(v[0] for v in ref.values())
        assert d == pytest.approx(best, abs=1e-9)
        assert ref[ko.pair_names[p]][0] == pytest.approx(best, abs=1e-9)


def test_pair_links_name_the_links_and_zones():
    arm = load_arm("reach7")
    ko = KeepOut(arm, parse_keepout(SCENE))
    caps = {c.name: c for c in arm.geometry.capsules}
    names = arm.body_names
    for (cap_a, other), (link_a, link_b, zone) in zip(ko.pair_names, ko.pair_links, strict=True):
        assert link_a == names[caps[cap_a].body] and link_a != ROOT
        if zone:
            assert link_b == other and other in ("bench", "side")
        else:
            assert link_b == names[caps[other].body]
    assert any(not z for _, _, z in ko.pair_links)  # self pairs are there


def test_nearest_without_pairs_is_none():
    arm = load_arm("reach7")
    ko = KeepOut(arm, parse_keepout({"self_collision": False}))
    assert ko.nearest(forward(arm, arm.q_home), arm.q_home) is None


# -- which constraint limits the scale ------------------------------------------------------------------

def _lp_binding(arm, res, q, qd_prev, period, R, r):
    """The scaling LP solved by scipy (HiGHS), maximise s subject to J qd = s x_d, the per-tick rate
    bounds and R qd >= r; returns (s*, duals of the damper rows, duals of the joint bounds). A
    positive dual value is a constraint whose relaxation raises the optimum (LP duality: Dantzig 1963,
    'Linear programming and extensions', common practice)."""
    from scipy.optimize import linprog

    from twistrate.solver.limits import plan_bounds, rate_bounds
    b = rate_bounds(plan_bounds(arm, period), q, qd_prev)
    n = arm.n
    x = res.twist_desired
    c = np.zeros(n + 1)
    c[-1] = -1.0
    A_eq = np.hstack((res.J, -x[:, None]))
    A_ub = np.hstack((-R, np.zeros((len(r), 1))))
    out = linprog(c, A_ub=A_ub, b_ub=-r, A_eq=A_eq, b_eq=np.zeros(6),
                  bounds=[*zip(b.lo, b.hi, strict=True), (0.0, 1.0)], method="highs")
    assert out.status == 0
    return -out.fun, -out.ineqlin.marginals, out.lower.marginals[:n] - out.upper.marginals[:n]


def test_keepout_limits_the_scale_when_a_damper_binds():
    """reach7 driven down onto a bench just below the tool: the scale equals the LP's, and the
    constraint named is a keep-out pair whose damper row has a positive dual value in the LP."""
    arm = load_arm("reach7")
    # the table of tests/test_e2e_keepout.py: its top 0.35 m above the base, the tool at home about
    # 0.13 m above it
    scene = {"influence_m": 0.12, "security_m": 0.03, "gain_m_s": 0.3, "self_collision": False,
             "zone": [{"name": "bench", "kind": "box", "center_m": [0.6, 0.0, 0.2],
                       "size_m": [0.4, 0.8, 0.3]}]}
    q = arm.q_home.copy()
    ko = KeepOut(arm, parse_keepout(scene))
    opts = SolverOptions(enforce_limits=True)
    period = 0.002
    qd_prev = np.zeros(arm.n)
    twist = DesiredTwist(np.array([0.0, 0.0, -0.3]), np.zeros(3))
    limited = 0
    for _ in range(2000):  # down to the bench, then 100 ticks against its damper
        res = resolve(arm, q, qd_prev, twist, period, opts, ko)
        limited += res.scale < 1.0
        if limited == 100:
            break
        qd_prev = res.qd
        q = q + res.qd * period
    lim = limiting(res)
    assert res.damping == 0.0  # the LP below scales the asked twist itself
    assert res.scale < 1.0 and lim.by == LIMIT_KEEPOUT
    assert ko.pair_links[lim.pair][1] == "bench"
    R, r, _ = ko.rows(forward(arm, q), q, res.J)
    s_lp, row_duals, _ = _lp_binding(arm, res, q, qd_prev, period, R, r)
    assert res.scale == pytest.approx(s_lp, abs=1e-7)
    assert row_duals.max() > 1e-9  # some damper row binds in the LP too
    assert res.rows_active[np.argmax(row_duals)]


def test_joint_limit_limits_the_scale_without_keepout_rows():
    """A fast twist with no zone near: the scale falls below 1 and the constraint named is a joint bound
    with a non-zero dual value in the LP; at scale 1 nothing limits."""
    arm = load_arm("reach7")
    ko = KeepOut(arm, parse_keepout({"self_collision": False, "zone": [
        {"name": "far", "kind": "half_space", "point_m": [0.0, 0.0, -5.0], "normal": [0.0, 0.0, 1.0]}]}))
    opts = SolverOptions(enforce_limits=True)
    q = arm.q_home.copy()
    period = 0.002
    slow = resolve(arm, q, np.zeros(arm.n), DesiredTwist(np.array([1e-4, 0.0, 0.0]), np.zeros(3)),
                   period, opts, ko)
    assert slow.scale == 1.0 and limiting(slow).by == LIMIT_NONE
    qd_prev = np.zeros(arm.n)
    twist = DesiredTwist(np.array([2.0, 0.0, 0.0]), np.zeros(3))
    for _ in range(200):
        res = resolve(arm, q, qd_prev, twist, period, opts, ko)
        qd_prev, q = res.qd, q + res.qd * period
    lim = limiting(res)
    assert res.scale < 1.0 and lim.by == LIMIT_JOINT and lim.bound in ("position", "velocity", "acceleration")
    s_lp, _, joint_duals = _lp_binding(arm, res, q, qd_prev, period, np.zeros((0, arm.n)), np.zeros(0))
    assert res.scale == pytest.approx(s_lp, abs=1e-7)
    assert np.abs(joint_duals).max() > 1e-9  # a joint bound binds in the LP
    assert res.limits_active[lim.joint] != 0  # and the joint named rests on one


def test_the_documented_health_example_keepout_pair_is_the_nearest_by_coal():
    """docs/protocol.md 7.4's example (reach7 at home, the demo's [keepout]): the pair it names is the nearest
    of every pair by the oracle distances (coal, half-space closed form), to the four digits shown."""
    import json
    from pathlib import Path

    from twistrate.service.config import load_config
    text = (Path(__file__).resolve().parents[1] / "docs" / "protocol.md").read_text()
    doc = json.loads(text.split("### 7.4")[1].split("### 7.5")[0].split("```")[1])["keepout"]
    config = load_config()
    arm = config.load_arm()
    ko = config.keepout_pass(arm)
    q = arm.q_home
    fr = forward(arm, q)
    caps = {c.name: c for c in arm.geometry.capsules}
    hs = config.keepout_config().zones
    best = (math.inf, None)
    for (cap_a, other), links in zip(ko.pair_names, ko.pair_links, strict=True):
        a0, a1 = capsule_base(arm, fr, caps[cap_a])
        if other in caps:
            b0, b1 = capsule_base(arm, fr, caps[other])
            d = coal_capsule_distance(a0, a1, caps[cap_a].radius, b0, b1, caps[other].radius)
        else:  # the demo's zones are half-spaces: n^T p - c at the nearer end, minus the radius
            z = hs.half_space_names.index(other)
            n, c = hs.half_space_normal[z], hs.half_space_offset[z]
            d = min(n @ a0, n @ a1) - c - caps[cap_a].radius
        best = min(best, (d, links), key=lambda t: t[0])
    assert doc["other_kind"] == "link"
    assert (doc["link"], doc["other"]) == best[1][:2]
    assert doc["nearest_m"] == pytest.approx(best[0], abs=5e-5)
    d, _ = ko.nearest(fr, q)
    assert d == pytest.approx(best[0], abs=1e-9)
