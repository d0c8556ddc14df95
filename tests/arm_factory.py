"""Seeded random serial arms for tests (2 to 9 joints, DH standard / DH modified / origin+axis, revolute and
prismatic mixed, random mount and tool), and the equivalent pinocchio model for cross-checks
(`pinocchio_model`, from twistrate.service.bench.compiled, shared with `twistrate bench solver`).

Import from any test file: `from arm_factory import random_arm, pinocchio_model, ...` (pytest puts the
tests folder on sys.path). Every generator takes a numpy Generator so results are reproducible.
Lengths in metres, angles in radians; the arms are invented test data.
"""

from __future__ import annotations

from typing import Literal

import numpy as np

from twistrate.service.bench.compiled import pinocchio_model  # noqa: F401 (re-exported for the tests)
from twistrate.solver.arm import PRISMATIC, REVOLUTE, Arm, Joint
from twistrate.solver.dh import DHRow, dh_chain

Style = Literal["dh_standard", "dh_modified", "origin_axis"]
STYLES: tuple[Style, ...] = ("dh_standard", "dh_modified", "origin_axis")
#: Probability that a generated joint is prismatic.
PRISMATIC_SHARE = 0.25


def random_rotation(rng: np.random.Generator) -> np.ndarray:
    """(3, 3) rotation, uniform on SO(3) (QR of a Gaussian matrix with the sign fix)."""
    Q, R = np.linalg.qr(rng.normal(size=(3, 3)))
    Q = Q * np.sign(np.diag(R))
    if np.linalg.det(Q) < 0:
        Q[:, 0] = -Q[:, 0]
    return Q


def random_transform(rng: np.random.Generator, reach: float = 0.3) -> np.ndarray:
    """(4, 4) rigid transform: uniform rotation, Gaussian translation with std `reach` m."""
    T = np.eye(4)
    T[:3, :3] = random_rotation(rng)
    T[:3, 3] = rng.normal(scale=reach, size=3)
    return T


def random_unit(rng: np.random.Generator) -> np.ndarray:
    """(3,) unit vector, uniform on the sphere."""
    v = rng.normal(size=3)
    return v / np.linalg.norm(v)


def _kinds(rng: np.random.Generator, n: int, prismatic: bool) -> list[bool]:
    return [bool(prismatic and rng.random() < PRISMATIC_SHARE) for _ in range(n)]


def _joint(i: int, is_prismatic: bool, T: np.ndarray, axis: np.ndarray) -> Joint:
    lim = 0.5 if is_prismatic else 3.0
    return Joint(f"j{i}", PRISMATIC if is_prismatic else REVOLUTE, T, axis, -lim, lim, 1.0, 5.0)


def random_arm(
    rng: np.random.Generator, n: int | None = None, style: Style | None = None, prismatic: bool = True
) -> Arm:
    """A random arm with n joints (random in 2..9 when None) in the given description style
    (random when None), random mount (T_base_root) and tool (T_last_tool); prismatic joints mixed in
    with probability PRISMATIC_SHARE unless `prismatic` is False."""
    n = int(rng.integers(2, 10)) if n is None else n
    style = STYLES[int(rng.integers(len(STYLES)))] if style is None else style
    kinds = _kinds(rng, n, prismatic)
    mount, tool = random_transform(rng), random_transform(rng, 0.1)
    if style == "origin_axis":
        joints = [_joint(i, kinds[i], random_transform(rng), random_unit(rng)) for i in range(n)]
        return Arm.build(f"random-{style}-{n}", joints, mount, tool)
    rows = [
        DHRow(
            a=float(rng.normal(scale=0.3)), alpha=float(rng.uniform(-np.pi, np.pi)),
            d=float(rng.normal(scale=0.3)), theta=float(rng.uniform(-np.pi, np.pi)), prismatic=kinds[i],
        )
        for i in range(n)
    ]
    convention = "standard" if style == "dh_standard" else "modified"
    return dh_arm(rows, convention, mount, tool, f"random-{style}-{n}")


def arm_cases(count: int, seed: int = 0, prismatic: bool = True):
    """Yield `count` (arm, rng) pairs, deterministic in `seed`: case k has 2 + k % 8 joints and style
    STYLES[k % 3], so 24 consecutive cases meet every style with every joint count 2..9; `rng` is the
    case's own generator, for configurations."""
    for k in range(count):
        rng = np.random.default_rng([seed, k])
        yield random_arm(rng, n=2 + k % 8, style=STYLES[k % 3], prismatic=prismatic), rng


def dh_arm(
    rows: list[DHRow], convention: Literal["standard", "modified"],
    T_base_root: np.ndarray | None = None, T_flange_tool: np.ndarray | None = None, name: str = "dh",
) -> Arm:
    """Arm from a DH table via solver/dh.py; T_flange_tool (4, 4) is the tool in the last DH frame."""
    Ts, extra = dh_chain(rows, convention)
    z = np.array([0.0, 0.0, 1.0])
    joints = [_joint(i, row.prismatic, T, z) for i, (row, T) in enumerate(zip(rows, Ts, strict=True))]
    tool = extra if T_flange_tool is None else extra @ T_flange_tool
    return Arm.build(name, joints, T_base_root, tool)


def random_q(rng: np.random.Generator, arm: Arm) -> np.ndarray:
    """(n,) configuration uniform within the arm's position limits."""
    return rng.uniform(arm.q_min, arm.q_max)
