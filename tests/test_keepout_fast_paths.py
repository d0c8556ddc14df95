"""Guards of the keep-out tick's cheaper forms: each must give exactly (bit for bit) what the form it
replaced gave. The unrolled plain-float capsule-box kernel against its loop form (kept here as the
reference; the kernel itself is checked against coal in tests/test_distance.py), the contacts the pass
builds on first access against the eager ones, and the damper rows' active flags, set only on the
ticks the scaling problem ran."""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
from scipy.spatial.transform import Rotation

from twistrate.solver.damper import Contacts
from twistrate.solver.distance import DEGENERATE_SQ_M2, TOUCH_M, capsule_box_one
from twistrate.solver.keepout import KeepOut, _contacts_of
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.zones import parse_keepout

SEED = 9120


def capsule_box_loops(a0, a1, ra, center, R_base_box, half):
    """The loop form of `capsule_box_one` (the same algorithm and float operations, with loops over the
    axes and the pieces): the reference the unrolled kernel must equal exactly."""
    (r00, r01, r02), (r10, r11, r12), (r20, r21, r22) = R_base_box
    px, py, pz = a0[0] - center[0], a0[1] - center[1], a0[2] - center[2]
    vx, vy, vz = a1[0] - a0[0], a1[1] - a0[1], a1[2] - a0[2]
    a = (r00 * px + r10 * py + r20 * pz, r01 * px + r11 * py + r21 * pz, r02 * px + r12 * py + r22 * pz)
    u = (r00 * vx + r10 * vy + r20 * vz, r01 * vx + r11 * vy + r21 * vz, r02 * vx + r12 * vy + r22 * vz)
    ax, ay, az = a
    ux, uy, uz = u
    hx, hy, hz = half
    ts = [0.0, 1.0]
    for ai, ui, hi in ((ax, ux, hx), (ay, uy, hy), (az, uz, hz)):
        if ui != 0.0:
            for t in ((hi - ai) / ui, (-hi - ai) / ui):
                if 0.0 < t < 1.0:
                    ts.append(t)
    ts.sort()
    best_f, best_t = math.inf, 0.0
    for lo, hi in itertools.pairwise(ts):
        mid = 0.5 * (lo + hi)
        num = den = 0.0
        for ai, ui, hh in ((ax, ux, hx), (ay, uy, hy), (az, uz, hz)):
            x = ai + ui * mid
            if x > hh:
                num += ui * (ai - hh)
                den += ui * ui
            elif x < -hh:
                num += ui * (ai + hh)
                den += ui * ui
        t = min(max(-num / den, lo), hi) if den > DEGENERATE_SQ_M2 else lo
        e = [ai + ui * t for ai, ui in ((ax, ux), (ay, uy), (az, uz))]
        e = [ei - hh if ei > hh else (ei + hh if ei < -hh else 0.0) for ei, hh in zip(e, half, strict=True)]
        f = e[0] * e[0] + e[1] * e[1] + e[2] * e[2]
        if f < best_f:
            best_f, best_t = f, t
    if best_f < TOUCH_M * TOUCH_M:
        return None
    x = [a[i] + u[i] * best_t for i in range(3)]
    y = [min(max(x[i], -half[i]), half[i]) for i in range(3)]
    length = math.sqrt(best_f)
    n = [(x[i] - y[i]) / length for i in range(3)]
    rows = R_base_box
    normal = [rows[k][0] * n[0] + rows[k][1] * n[1] + rows[k][2] * n[2] for k in range(3)]
    point_b = [center[k] + rows[k][0] * y[0] + rows[k][1] * y[1] + rows[k][2] * y[2] for k in range(3)]
    on_segment = [a0[k] + (a1[k] - a0[k]) * best_t for k in range(3)]
    point_a = [on_segment[k] - normal[k] * ra for k in range(3)]
    return length - ra, point_a, point_b, normal


def test_unrolled_capsule_box_equals_the_loop_form_exactly():
    rng = np.random.default_rng(SEED)
    inside = 0
    for k in range(5000):
        R = Rotation.random(random_state=int(rng.integers(1 << 30))).as_matrix()
        a0 = rng.normal(size=3) * 0.8
        a1 = a0 + rng.normal(size=3) * rng.choice([0.0, 1e-9, 0.3, 1.0])
        if k % 5 == 0:  # axis-aligned cases: zero components of the direction, no face crossing on an axis
            R = np.eye(3)
            a1 = a0.copy()
            a1[k % 3] += 0.5
        args = (a0.tolist(), a1.tolist(), float(rng.uniform(0.0, 0.1)), rng.normal(size=3).tolist(),
                R.tolist(), rng.uniform(0.01, 0.5, 3).tolist())
        ref = capsule_box_loops(*args)
        assert capsule_box_one(*args) == ref  # tuples of floats: equal bit for bit (or both None)
        inside += ref is None
    assert 0 < inside < 5000  # both branches seen


SCENE = {"influence_m": 0.15, "security_m": 0.03, "gain_m_s": 0.4,
         "zone": [{"name": "table", "kind": "half_space", "point_m": [0.0, 0.0, 0.25],
                   "normal": [0.0, 0.0, 1.0]},
                  {"name": "post", "kind": "box", "center_m": [0.45, 0.1, 0.4], "size_m": [0.1, 0.2, 0.3]}]}


def test_contacts_built_on_first_access_equal_the_eager_ones():
    arm = load_arm("reach7")
    ko, twin = KeepOut(arm, parse_keepout(SCENE)), KeepOut(arm, parse_keepout(SCENE))  # in lockstep
    rng = np.random.default_rng(SEED + 1)
    q = arm.q_home.copy()
    seen = 0
    for _ in range(300):
        q = np.clip(q + rng.normal(size=arm.n) * 0.03, arm.q_min, arm.q_max)
        fr = forward(arm, q)
        _, _, c = ko.rows(fr, q, geometric_jacobian(arm, fr))
        found = twin._update(fr, q)  # the plain rows the same state gives, made into contacts eagerly
        if isinstance(found, Contacts) or not found:
            continue
        ref = _contacts_of(found)
        assert isinstance(c, Contacts)
        for f in dataclasses.fields(Contacts):
            np.testing.assert_array_equal(getattr(c, f.name), getattr(ref, f.name))
        seen += 1
    assert seen > 10


def test_rows_active_only_when_the_scaling_problem_ran():
    arm = load_arm("reach7")
    ko = KeepOut(arm, parse_keepout(SCENE))
    opts = SolverOptions(enforce_limits=True)
    rng = np.random.default_rng(SEED + 2)
    q = arm.q_home.copy()
    both = set()
    for _ in range(300):
        q = np.clip(q + rng.normal(size=arm.n) * 0.03, arm.q_min, arm.q_max)
        res = resolve(arm, q, np.zeros(arm.n), DesiredTwist(rng.normal(size=3) * 0.2, np.zeros(3)), 0.002,
                      opts, ko)
        R, r, _ = ko.rows(forward(arm, q), q, res.J)
        free = res.scale == 1.0 and not res.tracking
        if free or not len(r):
            assert res.rows_active is None
            continue
        expected = R.dot(res.qd) - r <= 1e-9 * (1.0 + np.abs(r))
        np.testing.assert_array_equal(res.rows_active, expected)
        both.add(bool(expected.any()))
    assert True in both  # some tick had a damper row active at its limited rates
