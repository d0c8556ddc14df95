"""The per-tick keep-out pass (solver/keepout.py) and the damper rows (solver/damper.py): the
early-out changes nothing, its bound holds, the point Jacobians and distance rates match finite
differences, and the rows match a hand computation."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twistrate.solver.arm import REVOLUTE, Arm, Joint
from twistrate.solver.damper import carrier_masks, damper_rows, distance_rate_rows, point_jacobian
from twistrate.solver.geometry import ArmGeometry, Capsule
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import load_arm
from twistrate.solver.zones import parse_keepout

SEED = 4412
#: Central-difference step (rad or m) and the agreement asked of it: the error of a central
#: difference is O(h^2) times the third derivative (common practice).
FD_STEP = 1e-6
FD_TOL = 1e-7

SCENE = {
    "influence_m": 0.15, "security_m": 0.03, "gain_m_s": 0.4,
    "zone": [
        {"name": "table", "kind": "half_space", "point_m": [0.0, 0.0, -0.05], "normal": [0.0, 0.0, 1.0]},
        {"name": "wall", "kind": "half_space", "point_m": [0.55, 0.0, 0.0], "normal": [-1.0, 0.2, 0.0]},
        {"name": "post", "kind": "box", "center_m": [0.2, 0.45, 0.3], "size_m": [0.1, 0.2, 0.6],
         "rpy_deg": [0.0, 10.0, 30.0]},
        {"name": "lamp", "kind": "sphere", "center_m": [0.3, -0.3, 0.6], "radius_m": 0.08},
        {"name": "cable", "kind": "capsule", "a_m": [-0.4, -0.4, 0.2], "b_m": [0.4, -0.5, 0.3],
         "radius_m": 0.02},
    ],
}


def example(name: str) -> Arm:
    return load_arm(name, tool_link="flange") if name == "desk4" else load_arm(name)


def random_q(arm: Arm, rng: np.random.Generator) -> np.ndarray:
    lo = np.maximum(arm.q_min, -math.pi)
    hi = np.minimum(arm.q_max, math.pi)
    return rng.uniform(lo, hi)


ARMS = ["reach7", "bench6", "rail4", "planar3", "desk4"]


@pytest.mark.parametrize("name", ARMS)
def test_early_out_changes_nothing(name):
    """Along a random walk with jumps, `contacts` returns exactly the pairs an exact pass over all
    pairs finds within d_i, with the same distances (the early-out only skips work)."""
    arm = example(name)
    cfg = parse_keepout(SCENE)
    ko, oracle = KeepOut(arm, cfg), KeepOut(arm, cfg)
    rng = np.random.default_rng(SEED)
    q = random_q(arm, rng)
    seen_rows = 0
    for step in range(300):
        q = random_q(arm, rng) if step % 50 == 0 else np.clip(q + rng.normal(size=arm.n) * 0.01,
                                                              arm.q_min, arm.q_max)
        fr = forward(arm, q)
        got = ko.contacts(fr, q)
        ref = oracle.all_contacts(fr)
        near = ref.distance < cfg.influence_m
        # Per pair the smallest row distance (half-space pairs may give a row per end point).
        best: dict[int, float] = {}
        for p, d in zip(got.pair.tolist(), got.distance.tolist(), strict=True):
            best[p] = min(best.get(p, math.inf), d)
        assert set(best) == set(ref.pair[near].tolist())
        for p, d in zip(ref.pair[near].tolist(), ref.distance[near].tolist(), strict=True):
            assert best[p] == pytest.approx(d, abs=1e-12)
        seen_rows += len(got.pair)
    assert seen_rows > 0  # the scene does bring pairs within d_i


@pytest.mark.parametrize("name", ARMS)
def test_lower_bound_holds(name):
    """The configuration-space bound: after an exact pass at q0, lower_bounds(q) <= d(q) for every
    pair and any q, near or far (the triangle-inequality lever bound of the module docstring)."""
    arm = example(name)
    cfg = parse_keepout(SCENE)
    rng = np.random.default_rng(SEED + 1)
    for _ in range(40):
        ko = KeepOut(arm, cfg)
        q0 = random_q(arm, rng)
        ko.contacts(forward(arm, q0), q0)  # first call: every pair exact at q0
        for scale in (1e-3, 1e-2, 0.1, 1.0):
            q = np.clip(q0 + rng.normal(size=arm.n) * scale, arm.q_min, arm.q_max)
            d = ko.all_contacts(forward(arm, q)).distance
            assert np.all(ko.lower_bounds(q) <= d + 1e-12)


@pytest.mark.parametrize("name", ARMS)
def test_point_jacobian_matches_finite_differences(name):
    """J_p = [[I, -[r]x], [0, I]] J on the joints carrying the link, against central differences
    of the base-frame position of a point fixed to that link."""
    arm = example(name)
    rng = np.random.default_rng(SEED + 2)
    for _ in range(10):
        q = random_q(arm, rng)
        fr = forward(arm, q)
        J = geometric_jacobian(arm, fr)
        for body in range(arm.n + 1):
            p_body = rng.normal(size=3) * 0.2

            def where(qq, body=body, p_body=p_body):
                T = arm.T_base_root if body == 0 else forward(arm, qq).T_base_joint[body - 1]
                return T[:3, :3] @ p_body + T[:3, 3]

            Jp = point_jacobian(J, fr.T_base_tool, where(q), body)
            for j in range(arm.n):
                dq = np.zeros(arm.n)
                dq[j] = FD_STEP
                fd = (where(q + dq) - where(q - dq)) / (2 * FD_STEP)
                np.testing.assert_allclose(Jp[:3, j], fd, atol=FD_TOL)
            np.testing.assert_array_equal(Jp[3:, body:], 0.0)


@pytest.mark.parametrize("name", ARMS)
def test_distance_rate_rows_match_finite_differences(name):
    """n^T (J_pa - J_pb) q_dot is the rate of the distance (the closest points slide on the
    surfaces, first order only the motion along n counts), against central differences of the
    exact distance along random q_dot; pairs whose distance is not smooth there (one-sided
    differences disagree: a switch of closest features) are left out."""
    arm = example(name)
    cfg = parse_keepout(SCENE)
    ko = KeepOut(arm, cfg)
    rng = np.random.default_rng(SEED + 3)
    checked = 0
    mask = carrier_masks(arm.n)
    for _ in range(20):
        q = random_q(arm, rng)
        qd = rng.normal(size=arm.n)
        fr = forward(arm, q)
        c = ko.all_contacts(fr)
        rate = distance_rate_rows(c, geometric_jacobian(arm, fr), fr.T_base_tool, mask) @ qd
        up = ko.all_contacts(forward(arm, q + FD_STEP * qd)).distance
        down = ko.all_contacts(forward(arm, q - FD_STEP * qd)).distance
        fd = (up - down) / (2 * FD_STEP)
        smooth = np.abs((up - c.distance) - (c.distance - down)) < 1e-9
        smooth &= c.distance > 1e-6  # separated: the normal is defined
        np.testing.assert_allclose(rate[smooth], fd[smooth], atol=1e-6)
        checked += int(smooth.sum())
    assert checked > 100


def one_link_arm() -> Arm:
    """A revolute joint about base z at the origin carrying one capsule from 0.2 m to 0.5 m along
    its x axis, radius 0.05 m (invented for this hand computation)."""
    joint = Joint("swing", REVOLUTE, np.eye(4), np.array([0.0, 0.0, 1.0]), -3.0, 3.0, 2.0, 10.0)
    link = Capsule("bar", 1, np.array([0.2, 0.0, 0.0]), np.array([0.5, 0.0, 0.0]), 0.05)
    return Arm.build("one_link", [joint], geometry=ArmGeometry((link,)))


def test_damper_row_by_hand():
    """Wall x <= 0.62 free (normal -x through (0.62, 0, 0)), bar end at 0.5 (cos q, sin q, 0):
    d(q) = 0.62 - 0.5 cos q - 0.05, so d' = 0.5 sin q * q_dot (closed form), and the damper's
    right side -xi (d - d_s) / (d_i - d_s) (Kanoun, Lamiraux & Wieber 2011, velocity damper)."""
    arm = one_link_arm()
    cfg = parse_keepout({"influence_m": 0.12, "security_m": 0.02, "gain_m_s": 0.3, "zone": [
        {"name": "wall", "kind": "half_space", "point_m": [0.62, 0.0, 0.0], "normal": [-1.0, 0.0, 0.0]}]})
    ko = KeepOut(arm, cfg)
    q = np.array([0.3])
    fr = forward(arm, q)
    c = ko.contacts(fr, q)
    assert len(c.pair) == 1 and ko.pair_names[c.pair[0]] == ("bar", "wall")  # the inner end is far
    d = 0.62 - 0.5 * math.cos(0.3) - 0.05
    assert c.distance[0] == pytest.approx(d, abs=1e-15)
    A, b, pair = damper_rows(c, geometric_jacobian(arm, fr), fr.T_base_tool, cfg)
    assert pair.tolist() == c.pair.tolist()
    assert A.shape == (1, 1) and A[0, 0] == pytest.approx(0.5 * math.sin(0.3), abs=1e-15)
    assert b[0] == pytest.approx(-0.3 * (d - 0.02) / (0.12 - 0.02), abs=1e-15)
    assert b[0] < 0  # beyond d_s the row allows an approach at up to |b| m/s
    # Turning toward the wall (q_dot < 0) at more than |b| / A rad/s breaks the row; away is free.
    assert A[0] @ [b[0] / A[0, 0] - 0.1] < b[0] <= A[0] @ [1.0]
    # Inside the security distance the right side turns positive: an escape speed is asked.
    q = np.array([0.0])
    fr = forward(arm, q)
    c = ko.contacts(fr, q)
    _, b, _ = damper_rows(c, geometric_jacobian(arm, fr), fr.T_base_tool, cfg)
    assert c.distance[0] == pytest.approx(0.07) and b[0] == pytest.approx(-0.3 * 0.5)


def test_self_pair_row_uses_both_links():
    """A self pair's row is n^T (J_pa - J_pb): the same point motion on both links cancels. A planar
    three-link arm folded onto itself: the first and third links are checked (the second sits
    between them); moving joint 1 alone turns both together and leaves their distance unchanged,
    so that row entry is 0; joints 2 and 3 change it."""
    j1 = Joint("one", REVOLUTE, np.eye(4), np.array([0.0, 0, 1]), -3, 3, 2, 10)
    T = np.eye(4)
    T[0, 3] = 0.5
    j2 = Joint("two", REVOLUTE, T, np.array([0.0, 0, 1]), -3, 3, 2, 10)
    j3 = Joint("three", REVOLUTE, T, np.array([0.0, 0, 1]), -3, 3, 2, 10)
    caps = (Capsule("first", 1, np.array([0.05, 0, 0]), np.array([0.45, 0, 0]), 0.03),
            Capsule("second", 2, np.array([0.05, 0, 0]), np.array([0.45, 0, 0]), 0.03),
            Capsule("third", 3, np.array([0.05, 0, 0]), np.array([0.45, 0, 0]), 0.03))
    arm = Arm.build("fold", [j1, j2, j3], geometry=ArmGeometry(caps))
    ko = KeepOut(arm, parse_keepout({"influence_m": 0.3, "security_m": 0.02}))
    q = np.array([0.2, 2.0, 1.8])
    fr = forward(arm, q)
    c = ko.contacts(fr, q)
    assert [ko.pair_names[p] for p in c.pair] == [("first", "third")]
    A, _, _ = damper_rows(c, geometric_jacobian(arm, fr), fr.T_base_tool, ko.config)
    assert abs(A[0, 0]) < 1e-12 and abs(A[0, 1]) > 1e-3 and abs(A[0, 2]) > 1e-3


@pytest.mark.parametrize("name", ARMS)
def test_example_arms_touching_lists_are_complete(name):
    """In the example arms no checked self pair keeps a constant distance below the default
    influence distance (such a pair would give a row no motion can change; it belongs on the
    touching list), and no checked pair overlaps at home."""
    arm = example(name)
    ko = KeepOut(arm, parse_keepout({}))
    rng = np.random.default_rng(SEED + 4)
    samples = np.array([ko.all_contacts(forward(arm, random_q(arm, rng))).distance for _ in range(200)])
    constant = samples.max(axis=0) - samples.min(axis=0) < 1e-9
    assert not np.any(constant & (samples[0] < ko.config.influence_m)), [
        ko.pair_names[p] for p in np.flatnonzero(constant & (samples[0] < ko.config.influence_m))]
    assert np.all(ko.all_contacts(forward(arm, arm.q_home)).distance > 0)


@pytest.mark.parametrize("name, influence", [("reach7", 0.15), ("rail4", 0.15), ("reach7", 0.03)])
def test_fused_rows_equal_damper_rows_of_the_contacts(name, influence):
    """`KeepOut.rows` (plain floats for a few pairs) gives the rows `damper_rows` builds from
    `KeepOut.contacts` (numpy), along the same walk; with a small influence distance most ticks
    recompute pairs that then turn out not near (no rows)."""
    arm = example(name)
    cfg = parse_keepout({**SCENE, "influence_m": influence, "security_m": 0.01})
    fused, plain = KeepOut(arm, cfg), KeepOut(arm, cfg)
    rng = np.random.default_rng(SEED + 5)
    q = random_q(arm, rng)
    total = empty = 0
    for step in range(200):
        q = random_q(arm, rng) if step % 40 == 0 else np.clip(q + rng.normal(size=arm.n) * 0.01,
                                                              arm.q_min, arm.q_max)
        fr = forward(arm, q)
        J = geometric_jacobian(arm, fr)
        A, b, c = fused.rows(fr, q, J)
        A2, b2, pair = damper_rows(plain.contacts(fr, q), J, fr.T_base_tool, cfg)
        assert A.shape == (len(b), arm.n) and c.pair.tolist() == pair.tolist()
        np.testing.assert_allclose(A, A2, atol=1e-12)
        np.testing.assert_allclose(b, b2, atol=1e-12)
        total += len(b)
        empty += len(b) == 0
    assert total > 0 and (empty > 0 or influence > 0.1)


def test_arm_without_capsules_has_no_pairs():
    """An arm file without geometry: the pass runs and finds nothing (zones alone move nothing)."""
    joint = Joint("swing", REVOLUTE, np.eye(4), np.array([0.0, 0.0, 1.0]), -3.0, 3.0, 2.0, 10.0)
    arm = Arm.build("bare", [joint])
    ko = KeepOut(arm, parse_keepout(SCENE))
    q = np.zeros(1)
    fr = forward(arm, q)
    A, b, c = ko.rows(fr, q, geometric_jacobian(arm, fr))
    assert ko.pair_count == 0 and A.shape == (0, 1) and b.shape == (0,) and len(c.pair) == 0
    assert len(ko.all_contacts(fr).pair) == 0 and ko.lower_bounds(q).shape == (0,)
