"""Forward kinematics and the Jacobian family against a reference library.

Reference: pinocchio (Carpentier et al. 2019, "The Pinocchio C++ library: a fast and flexible
implementation of rigid body dynamics algorithms and their analytical derivatives", IEEE/SICE SII)
as reference library. The pinocchio model is built by tests/arm_factory.py from the arm's public
description (joint placements and axes), independently of our kernels' precomputed chain.
Conventions (pinocchio documentation of ReferenceFrame): LOCAL_WORLD_ALIGNED = velocity of the
frame origin and angular velocity, world axes (our geometric J); LOCAL = both in the frame's own
axes (our body J); WORLD = spatial velocity at the world origin, world axes (our spatial J).
"""

from __future__ import annotations

import contextlib
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from arm_factory import STYLES, pinocchio_model, random_arm, random_q

from twistrate.solver.arm import PRISMATIC
from twistrate.solver.errors import ModelError
from twistrate.solver.jacobians import body_jacobian, jacobian_dot, spatial_jacobian
from twistrate.solver.kinematics import forward, geometric_jacobian

pin = pytest.importorskip("pinocchio")

#: Agreement with the reference library: both are double-precision evaluations of the same chain.
ORACLE_TOL = 1e-11
N_ARMS = 72
CONFIGS_PER_ARM = 3
ARMS_DIR = Path(__file__).resolve().parent.parent / "configs" / "arms"


def seeded_arm(seed: int):
    """Arm number `seed`: style and joint count cycle so every style meets every n in 2..9."""
    rng = np.random.default_rng(1000 + seed)
    return random_arm(rng, n=2 + seed % 8, style=STYLES[seed % 3]), rng


def compare_with_pinocchio(arm, q: np.ndarray, qd: np.ndarray) -> None:
    """Every check of this module at one configuration q (n,) with joint rates qd (n,)."""
    model, tool = pinocchio_model(arm)
    data = model.createData()
    pin.forwardKinematics(model, data, q)
    pin.updateFramePlacements(model, data)
    pin.computeJointJacobians(model, data, q)
    frames = forward(arm, q)
    # Every joint frame after its motion: pinocchio's oMi of joint i + 1 (joint 0 is the universe).
    for i in range(arm.n):
        np.testing.assert_allclose(frames.T_base_joint[i], data.oMi[i + 1].homogeneous, atol=ORACLE_TOL)
        np.testing.assert_allclose(frames.p_base[i], data.oMi[i + 1].translation, atol=ORACLE_TOL)
        np.testing.assert_allclose(
            frames.z_base[i], data.oMi[i + 1].rotation @ arm.joints[i].axis, atol=ORACLE_TOL
        )
    np.testing.assert_allclose(frames.T_base_tool, data.oMf[tool].homogeneous, atol=ORACLE_TOL)
    J = geometric_jacobian(arm, frames)

    def reference(get, frame: object) -> np.ndarray:  # pinocchio returns (6,) for a 1-joint model
        return np.reshape(get(model, data, tool, frame), (6, arm.n))

    np.testing.assert_allclose(J, reference(pin.getFrameJacobian, pin.LOCAL_WORLD_ALIGNED), atol=ORACLE_TOL)
    np.testing.assert_allclose(body_jacobian(J, frames.T_base_tool),
                               reference(pin.getFrameJacobian, pin.LOCAL), atol=ORACLE_TOL)
    np.testing.assert_allclose(spatial_jacobian(J, frames.T_base_tool),
                               reference(pin.getFrameJacobian, pin.WORLD), atol=ORACLE_TOL)
    # J_dot: pinocchio's frame Jacobian time variation in LOCAL_WORLD_ALIGNED is d/dt of that
    # Jacobian along qd (its convention checked here against our finite-difference-verified J_dot,
    # and in tests/test_jacobians.py ours against finite differences of J).
    pin.computeJointJacobiansTimeVariation(model, data, q, qd)
    pin.updateFramePlacements(model, data)
    dJ_ref = reference(pin.getFrameJacobianTimeVariation, pin.LOCAL_WORLD_ALIGNED)
    np.testing.assert_allclose(jacobian_dot(J, qd), dJ_ref, atol=ORACLE_TOL * max(1.0, np.abs(qd).max()))


@pytest.mark.parametrize("seed", range(N_ARMS))
def test_random_arm_matches_pinocchio(seed: int) -> None:
    arm, rng = seeded_arm(seed)
    for _ in range(CONFIGS_PER_ARM):
        compare_with_pinocchio(arm, random_q(rng, arm), rng.normal(size=arm.n))


def test_random_arms_cover_styles_and_joint_kinds() -> None:
    """The oracle sweep above really sees every description style, 2..9 joints, prismatic joints
    (first, middle and last in the chain) and non-z joint axes; guards the factory."""
    arms = [seeded_arm(seed)[0] for seed in range(N_ARMS)]
    assert {a.name.split("-")[1] for a in arms} == set(STYLES)
    assert {a.n for a in arms} == set(range(2, 10))
    positions = {(i == 0, i == a.n - 1) for a in arms for i, j in enumerate(a.joints) if j.kind == PRISMATIC}
    assert positions >= {(True, False), (False, False), (False, True)}
    assert any(a.T_axis_joint is not None for a in arms)
    assert any(a.all_revolute for a in arms) and not all(a.all_revolute for a in arms)


def test_fixture_arms_match_pinocchio(random_arms: list) -> None:
    """The shared `random_arms` fixture (tests/conftest.py) is what other tests build on."""
    rng = np.random.default_rng(2)
    for arm in random_arms:
        compare_with_pinocchio(arm, random_q(rng, arm), rng.normal(size=arm.n))


def test_zero_and_large_joint_values_match_pinocchio(rng: np.random.Generator) -> None:
    """q = 0 (the description itself) and revolute angles beyond +-2 pi."""
    for style in STYLES:
        arm = random_arm(rng, n=7, style=style)
        compare_with_pinocchio(arm, np.zeros(arm.n), np.ones(arm.n))
        q = np.where([j.kind == PRISMATIC for j in arm.joints], 0.3, rng.uniform(-20.0, 20.0, arm.n))
        compare_with_pinocchio(arm, q, rng.normal(size=arm.n))


def _example_arm_cases() -> list[tuple[str, str | None]]:
    """(file name, tool link or None) for every example arm file; a URDF once per non-root link."""
    cases: list[tuple[str, str | None]] = []
    for path in sorted(ARMS_DIR.glob("*.toml")):
        cases.append((path.name, None))
    for path in sorted(ARMS_DIR.glob("*.urdf")):
        root = ET.parse(path).getroot()
        cases += [(path.name, j.find("child").get("link")) for j in root.iter("joint")]
    return cases


#: Chains of the example URDF the loader must refuse (a <mimic> joint on the chain; no moving joint).
REFUSED_CHAINS = {("desk4.urdf", "finger"): "mimic", ("desk4.urdf", "pedestal"): "at least one"}


@pytest.mark.parametrize(("file_name", "tool_link"), _example_arm_cases())
def test_example_arm_matches_pinocchio(file_name: str, tool_link: str | None) -> None:
    from twistrate.solver import load

    path = ARMS_DIR / file_name
    if (file_name, tool_link) in REFUSED_CHAINS:
        with pytest.raises(ModelError, match=REFUSED_CHAINS[file_name, tool_link]):
            load.load_arm(path, tool_link=tool_link)
        return
    arm = load.load_arm(path) if tool_link is None else load.load_arm(path, tool_link=tool_link)
    rng = np.random.default_rng(7)
    compare_with_pinocchio(arm, arm.q_home, rng.normal(size=arm.n))
    lo = np.where(np.isfinite(arm.q_min), arm.q_min, -np.pi)
    hi = np.where(np.isfinite(arm.q_max), arm.q_max, np.pi)
    for _ in range(5):
        compare_with_pinocchio(arm, rng.uniform(lo, hi), rng.normal(size=arm.n))


def test_every_example_urdf_has_a_loadable_chain() -> None:
    load = pytest.importorskip("twistrate.solver.load", reason="arm loader module not present yet")
    for path in sorted(ARMS_DIR.glob("*.urdf")):
        loaded = []
        for name, link in _example_arm_cases():
            if name == path.name:
                with contextlib.suppress(ModelError):
                    loaded.append(load.load_arm(path, tool_link=link))
        assert loaded, f"{path.name}: no link gives a chain the loader accepts"
