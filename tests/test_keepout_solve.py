"""The keep-out velocity-damper rows inside the saturated solve, against a linear program.

The damper rows (Faverjon & Tournassoud 1987, ICRA, "A local based approach for path planning of
manipulators with a high number of degrees of freedom"; the form of Kanoun, Lamiraux & Wieber 2011,
IEEE T-RO 27(4), "Kinematic control of redundant manipulators: generalizing the task-priority
framework to inequality tasks") join the rate bounds of the task-scaling problem: maximise s subject
to J q_dot = s x_d, lo <= q_dot <= hi, A q_dot >= b (Flacco, De Luca & Khatib 2015, IEEE T-RO 31(3),
the task scaling problem). The oracle is scipy's linprog (HiGHS; Huangfu & Hall 2018, Math. Prog.
Comp.), and for the no-scale branch scipy's SLSQP on the same convex QP (Kraft 1988, DFVLR-FB 88-28).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linprog, minimize

from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.limits import plan_bounds, rate_bounds
from twistrate.solver.load import load_arm
from twistrate.solver.options import SolverOptions
from twistrate.solver.resolve import DesiredTwist, resolve
from twistrate.solver.scaling import bounded_damped_rates_rows, max_scale
from twistrate.solver.zones import parse_keepout

T = 0.002
PLAIN = SolverOptions(damping="none", limit_gain=0.0)
FREE = SolverOptions(damping="none", limit_gain=0.0, enforce_limits=False)
L = PLAIN.characteristic_length
W = np.array([1, 1, 1, L, L, L])
#: Tolerance on the scale against the LP, and on a row (m/s) / a bound (rad/s): rounding only.
SCALE_TOL = 1e-7
ROW_TOL = 1e-9


def _lp(A, x, lo, hi, R, r):
    """max s s.t. A y = s x, lo <= y <= hi, R y >= r, 0 <= s <= 1 (HiGHS); None if infeasible."""
    m, n = A.shape
    res = linprog(np.r_[np.zeros(n), -1.0], A_eq=np.hstack([A, -x[:, None]]), b_eq=np.zeros(m),
                  A_ub=np.hstack([-R, np.zeros((len(r), 1))]), b_ub=-r,
                  bounds=[*zip(lo, hi, strict=True), (0.0, 1.0)], method="highs")
    return float(res.x[-1]) if res.status == 0 else None


@pytest.mark.parametrize("k", [0, 1, 2, 3])
def test_max_scale_with_rows_equals_the_lp_optimum(k: int) -> None:
    # Random scaling problems with random extra rows, every null-space dimension (k = 0 ratio test,
    # k = 1 elimination, k >= 2 active set), against HiGHS on the same LP.
    rng = np.random.default_rng(40 + k)
    counts = {"scaled": 0, "infeasible": 0, "rows_bind": 0}
    for _ in range(250):
        m = int(rng.integers(2, 7))
        n = m + k
        A = rng.normal(size=(m, n))
        _, _, Vh = np.linalg.svd(A)
        a = Vh[:m].T @ rng.normal(scale=2.0, size=m)
        N = Vh[m:].T
        lo = -rng.uniform(0.2, 2.0, n)
        hi = rng.uniform(0.2, 2.0, n)
        if rng.random() < 0.3:  # bounds not containing 0 (acceleration-limited ticks)
            shift = rng.normal(scale=0.5, size=n)
            lo, hi = lo + shift, hi + shift
        p = int(rng.integers(1, 5))
        R = rng.normal(size=(p, n))
        r = R @ rng.uniform(lo, hi) - rng.uniform(-0.3, 1.0, p)
        z_pref = rng.normal(size=k) if k else None
        found = max_scale(a, N, lo, hi, z_pref, (R, r))
        s_lp = _lp(A, A @ a, lo, hi, R, r)
        if s_lp is None:
            assert found is None
            counts["infeasible"] += 1
            continue
        assert found is not None
        s, y = found
        assert s == pytest.approx(s_lp, abs=SCALE_TOL)
        assert np.all(y >= lo - ROW_TOL) and np.all(y <= hi + ROW_TOL)
        assert np.all(R @ y >= r - ROW_TOL)
        np.testing.assert_allclose(A @ y, s * (A @ a), atol=1e-8 * (1 + np.abs(A @ a).max()))
        counts["scaled"] += s < 1.0
        free = _lp(A, A @ a, lo, hi, np.zeros((0, n)), np.zeros(0))
        counts["rows_bind"] += free is None or free > s + 1e-6
    assert counts["scaled"] > 30 and counts["infeasible"] > 5 and counts["rows_bind"] > 20, counts


def test_no_scale_with_rows_is_the_constrained_damped_least_squares() -> None:
    # min |A y - x|^2 + mu^2 |y - y_ref|^2 over the bounds and R y >= r (a convex QP): against SLSQP.
    rng = np.random.default_rng(7)
    for _ in range(60):
        n = int(rng.integers(3, 9))
        A = rng.normal(size=(6, n))
        x = rng.normal(scale=3.0, size=6)
        lo, hi = -rng.uniform(0.1, 1.0, n), rng.uniform(0.1, 1.0, n)
        R = rng.normal(size=(2, n))
        r = R @ rng.uniform(lo, hi) - rng.uniform(0.0, 0.3, 2)
        mu, y_ref = 0.05, rng.normal(scale=0.1, size=n)
        y = bounded_damped_rates_rows(A, x, lo, hi, mu, y_ref, (R, r))

        def cost(v, A=A, x=x, mu=mu, y_ref=y_ref):
            return float(np.sum((A @ v - x) ** 2) + mu * mu * np.sum((v - y_ref) ** 2))

        ref = minimize(cost, np.clip(np.zeros(n), lo, hi), method="SLSQP",
                       bounds=list(zip(lo, hi, strict=True)),
                       constraints=[{"type": "ineq", "fun": lambda v, R=R, r=r: R @ v - r,
                                     "jac": lambda v, R=R: R}],
                       options={"ftol": 1e-14, "maxiter": 500})
        assert np.all(R @ y >= r - ROW_TOL)
        assert np.all(y >= lo) and np.all(y <= hi)
        assert cost(y) <= cost(ref.x) + 1e-7 * (1 + cost(ref.x))


def _near_scene(arm, q, rng):
    """A keep-out config with a table and a wall placed at random distances d (some inside d_s)
    from the links at q (invented test scene): measured first with the zones far away."""
    far = {"influence_m": 0.10, "security_m": 0.02, "gain_m_s": 0.3, "self_collision": False}
    fr = forward(arm, q)
    zones = []
    for name, normal in (("table", [0.0, 0.0, 1.0]), ("wall", list(rng.normal(size=3) * [1, 1, 0]))):
        nv = np.array(normal) / np.linalg.norm(normal)
        point = -10.0 * nv
        cfg = parse_keepout({**far, "influence_m": 50.0, "zone": [
            {"name": name, "kind": "half_space", "point_m": point.tolist(), "normal": nv.tolist()}]})
        d0 = KeepOut(arm, cfg).all_contacts(fr).distance.min()
        gap = rng.uniform(-0.005, 0.1)
        zones.append({"name": name, "kind": "half_space",
                      "point_m": (point + (d0 - gap) * nv).tolist(), "normal": nv.tolist()})
    return parse_keepout({**far, "zone": zones})


@pytest.mark.parametrize("arm_name", ["bench6", "reach7"])
def test_resolve_with_keepout_equals_the_lp_with_the_damper_rows(arm_name: str) -> None:
    arm = load_arm(arm_name)
    rng = np.random.default_rng(90 + arm.n)
    kinds = {"free": 0, "scaled": 0, "tracking": 0, "rows": 0}
    for _ in range(80):
        q = arm.q_home + rng.uniform(-0.4, 0.4, arm.n)
        cfg = _near_scene(arm, q, rng)
        ko, oracle = KeepOut(arm, cfg), KeepOut(arm, cfg)
        qd_prev = rng.uniform(-1, 1, arm.n) * arm.a_max * T * rng.choice([0.5, 3.0])
        tw = DesiredTwist(rng.normal(scale=0.3, size=3), rng.normal(scale=0.6, size=3))
        res = resolve(arm, q, qd_prev, tw, T, PLAIN, keepout=ko)
        fr = forward(arm, q)
        R, r, _ = oracle.rows(fr, q, geometric_jacobian(arm, fr))
        kinds["rows"] += len(r) > 0
        b = rate_bounds(plan_bounds(arm, T), q, qd_prev)
        assert np.all(res.qd >= b.lo - 1e-12) and np.all(res.qd <= b.hi + 1e-12)
        x_d = resolve(arm, q, qd_prev, tw, T, FREE).twist_achieved * W
        s_lp = _lp(res.J * W[:, None], x_d, b.lo, b.hi, R, r)
        if s_lp is None:
            assert res.tracking and res.scale == 0.0
            if _lp(np.zeros((1, arm.n)), np.zeros(1), b.lo, b.hi, R, r) is not None:
                assert np.all(R @ res.qd >= r - ROW_TOL)  # the rows can be met: they are
            kinds["tracking"] += 1
            continue
        assert not res.tracking
        assert res.scale == pytest.approx(s_lp, abs=SCALE_TOL)
        assert np.all(R @ res.qd >= r - ROW_TOL)
        # scaled along its own direction, never bent
        np.testing.assert_allclose(res.twist_achieved * W, res.scale * x_d,
                                   atol=1e-8 * (1 + np.abs(x_d).max()))
        kinds["free" if res.scale == 1.0 else "scaled"] += 1
    assert kinds["rows"] > 40 and kinds["scaled"] > 10 and kinds["tracking"] > 5, kinds


def test_no_keepout_and_far_zones_change_nothing() -> None:
    arm = load_arm("reach7")
    far = parse_keepout({"zone": [{"name": "floor", "kind": "half_space", "point_m": [0, 0, -5.0],
                                   "normal": [0, 0, 1.0]}], "self_collision": False})
    ko = KeepOut(arm, far)
    rng = np.random.default_rng(3)
    for _ in range(40):
        q = arm.q_home + rng.uniform(-0.5, 0.5, arm.n)
        qd_prev = rng.uniform(-1, 1, arm.n) * arm.a_max * T * 3.0
        tw = DesiredTwist(rng.normal(scale=0.4, size=3), rng.normal(scale=0.8, size=3))
        plain = resolve(arm, q, qd_prev, tw, T, PLAIN)
        for other in (resolve(arm, q, qd_prev, tw, T, PLAIN, keepout=None),
                      resolve(arm, q, qd_prev, tw, T, PLAIN, keepout=ko)):
            np.testing.assert_array_equal(other.qd, plain.qd)
            assert other.scale == plain.scale and other.tracking == plain.tracking
