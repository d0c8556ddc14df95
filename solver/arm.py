"""The in-memory serial arm model every loader produces, with the stacked arrays the kernels use.

Chain convention (one form for DH tables, origin+axis descriptions and URDF alike):

    T_base_tool(q) = T_base_root @ prod_i( T_prev_joint[i] @ M_i(q_i) ) @ T_last_tool

* `T_base_root` (4, 4): the arm's root link in the base frame (the mount). Twists and Jacobians
  are expressed in the base frame.
* `T_prev_joint[i]` (4, 4): fixed transform from the previous joint's frame *after* its motion
  (the root link for the first joint) to joint i's frame at q_i = 0. Metres.
* `M_i(q_i)`: the joint motion, a rotation by q_i (rad) about `axis[i]` (revolute) or a
  translation by q_i (m) along it (prismatic). The axis is a unit vector in joint i's own frame,
  so it is unchanged by the joint's own motion.
* `T_last_tool` (4, 4): the tool frame in the last joint's frame after its motion.

Units: metres, radians, seconds. Limits are per joint: position [min, max] (rad or m; +-inf for an
unlimited joint), velocity max (rad/s or m/s, > 0) and acceleration max (rad/s^2 or m/s^2, > 0).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from twistrate.solver.errors import ModelError, field_error

REVOLUTE: Literal["revolute"] = "revolute"
PRISMATIC: Literal["prismatic"] = "prismatic"
JointKind = Literal["revolute", "prismatic"]

#: A joint axis must be a unit vector within this tolerance before it is renormalised.
AXIS_NORM_TOLERANCE = 1e-6
#: A rotation block must be orthonormal within this tolerance (max abs entry of R^T R - I).
ROTATION_TOLERANCE = 1e-6


@dataclass(frozen=True)
class Joint:
    """One actuated joint.

    T_prev_joint : (4, 4) fixed transform, previous joint frame (after its motion) <- this joint
        frame at q = 0; for the first joint the previous frame is the root link. Metres.
    axis : (3,) unit motion axis in this joint's own frame.
    """

    name: str
    kind: JointKind
    T_prev_joint: np.ndarray
    axis: np.ndarray
    position_min: float
    position_max: float
    velocity_max: float
    acceleration_max: float

    @property
    def limited(self) -> bool:
        """True when both position limits are finite."""
        return bool(np.isfinite(self.position_min) and np.isfinite(self.position_max))


def check_transform(T: np.ndarray, field_name: str) -> np.ndarray:
    """Return `T` as a float (4, 4) homogeneous transform, or raise ModelError naming `field_name`."""
    T = np.asarray(T, dtype=float)
    if T.shape != (4, 4):
        raise field_error(ModelError, field_name, T.shape, "a 4x4 homogeneous transform")
    if not np.all(np.isfinite(T)):
        raise field_error(ModelError, field_name, T.tolist(), "finite numbers only")
    R = T[:3, :3]
    if np.max(np.abs(R.T @ R - np.eye(3))) > ROTATION_TOLERANCE or np.linalg.det(R) < 0:
        raise field_error(ModelError, field_name, R.tolist(), "a proper rotation (orthonormal, det +1)")
    if np.max(np.abs(T[3] - [0, 0, 0, 1])) > 0:
        raise field_error(ModelError, field_name, T[3].tolist(), "bottom row [0, 0, 0, 1]")
    return T


def _skew(a: np.ndarray) -> np.ndarray:
    """(3, 3) cross-product matrix of a (3,) vector: skew(a) @ b == cross(a, b)."""
    return np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


@dataclass(frozen=True)
class Arm:
    """A serial arm: ordered joints, mount, tool, home posture, plus stacked kernel arrays.

    Build it with :meth:`Arm.build`, which validates every field. The stacked arrays below are
    derived once and read by the kernels every tick:

    F_base : (n, 4, 4) T_prev_joint per joint, with T_base_root folded into the first.
    motion_const : (n, 16) the q-independent part of F_i @ M_i(q), flattened row-major:
        F_i @ (I + K_i^2) for a revolute joint (Rodrigues, K_i = skew(axis_i)), F_i for prismatic.
    motion_basis : (n, 3, 16) F_i @ B_k flattened, with B_0 = K_i (sin q term), B_1 = -K_i^2
        (cos q term), B_2 = translation along the axis (q term, prismatic only), each embedded in
        4x4 and zero where the joint type does not use it; so
        F_i @ M_i(q) = motion_const_i + [sin q, cos q, q] @ motion_basis_i.
    axes : (n, 3) unit axes in each joint's own frame.
    revolute : (n,) bool mask; prismatic is its negation.
    q_min, q_max, v_max, a_max : (n,) limits, SI.
    """

    name: str
    joints: tuple[Joint, ...]
    T_base_root: np.ndarray
    T_last_tool: np.ndarray
    q_home: np.ndarray
    F_base: np.ndarray = field(init=False, repr=False)
    motion_const: np.ndarray = field(init=False, repr=False)
    motion_basis: np.ndarray = field(init=False, repr=False)
    axes: np.ndarray = field(init=False, repr=False)
    revolute: np.ndarray = field(init=False, repr=False)
    q_min: np.ndarray = field(init=False, repr=False)
    q_max: np.ndarray = field(init=False, repr=False)
    v_max: np.ndarray = field(init=False, repr=False)
    a_max: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        n = len(self.joints)
        F = np.array([j.T_prev_joint for j in self.joints], dtype=float).reshape(n, 4, 4)
        F[0] = self.T_base_root @ F[0]
        axes = np.array([j.axis for j in self.joints], dtype=float).reshape(n, 3)
        revolute = np.array([j.kind == REVOLUTE for j in self.joints], dtype=bool)
        basis = np.zeros((n, 3, 4, 4))
        const = np.tile(np.eye(4), (n, 1, 1))
        for i in range(n):
            K = _skew(axes[i])
            if revolute[i]:
                basis[i, 0, :3, :3] = K
                basis[i, 1, :3, :3] = -(K @ K)
                const[i, :3, :3] += K @ K
            else:
                basis[i, 2, :3, 3] = axes[i]
        motion_basis = np.einsum("nab,nkbc->nkac", F, basis).reshape(n, 3, 16)
        motion_const = np.matmul(F, const).reshape(n, 16)
        put = object.__setattr__
        put(self, "F_base", F)
        put(self, "motion_const", motion_const)
        put(self, "motion_basis", motion_basis)
        put(self, "axes", axes)
        put(self, "revolute", revolute)
        put(self, "q_min", np.array([j.position_min for j in self.joints], dtype=float))
        put(self, "q_max", np.array([j.position_max for j in self.joints], dtype=float))
        put(self, "v_max", np.array([j.velocity_max for j in self.joints], dtype=float))
        put(self, "a_max", np.array([j.acceleration_max for j in self.joints], dtype=float))
        for name in ("F_base", "motion_const", "motion_basis", "axes", "revolute",
                     "q_min", "q_max", "v_max", "a_max"):
            getattr(self, name).setflags(write=False)

    @property
    def n(self) -> int:
        """Number of actuated joints."""
        return len(self.joints)

    @property
    def joint_names(self) -> tuple[str, ...]:
        return tuple(j.name for j in self.joints)

    @classmethod
    def build(
        cls,
        name: str,
        joints: list[Joint] | tuple[Joint, ...],
        T_base_root: np.ndarray | None = None,
        T_last_tool: np.ndarray | None = None,
        q_home: np.ndarray | list[float] | None = None,
    ) -> Arm:
        """Validate every field and return the arm. Raises ModelError naming joint and key."""
        if not joints:
            raise field_error(ModelError, "joints", [], "at least one actuated joint")
        seen: set[str] = set()
        checked: list[Joint] = []
        for i, j in enumerate(joints):
            where = f"joints[{i}] ({j.name!r})"
            if not j.name or j.name in seen:
                raise field_error(ModelError, f"{where}.name", j.name, "a non-empty unique name")
            seen.add(j.name)
            if j.kind not in (REVOLUTE, PRISMATIC):
                raise field_error(ModelError, f"{where}.kind", j.kind, "'revolute' or 'prismatic'")
            T = check_transform(j.T_prev_joint, f"{where}.origin")
            axis = np.asarray(j.axis, dtype=float).reshape(-1)
            norm = float(np.linalg.norm(axis)) if axis.shape == (3,) else 0.0
            if axis.shape != (3,) or not np.isfinite(norm) or norm < AXIS_NORM_TOLERANCE:
                raise field_error(ModelError, f"{where}.axis", axis.tolist(), "a non-zero 3-vector")
            lo, hi = float(j.position_min), float(j.position_max)
            if np.isnan(lo) or np.isnan(hi) or not lo < hi:
                raise field_error(
                    ModelError, f"{where}.position limits", (lo, hi), "min < max (inf for unlimited)"
                )
            for key, val in (("velocity_max", j.velocity_max), ("acceleration_max", j.acceleration_max)):
                if not (np.isfinite(val) and val > 0):
                    raise field_error(ModelError, f"{where}.{key}", val, "a finite number > 0")
            checked.append(
                Joint(j.name, j.kind, T, axis / norm, lo, hi,
                      float(j.velocity_max), float(j.acceleration_max))
            )
        T_root = check_transform(np.eye(4) if T_base_root is None else T_base_root, "mount")
        T_tool = check_transform(np.eye(4) if T_last_tool is None else T_last_tool, "tool")
        n = len(checked)
        if q_home is None:
            home = np.array([0.0 if (j.position_min <= 0.0 <= j.position_max) else
                             0.5 * (j.position_min + j.position_max) for j in checked])
        else:
            home = np.asarray(q_home, dtype=float).reshape(-1)
        if home.shape != (n,) or not np.all(np.isfinite(home)):
            raise field_error(ModelError, "home", home.tolist(), f"{n} finite joint positions")
        for i, j in enumerate(checked):
            if not j.position_min <= home[i] <= j.position_max:
                raise field_error(
                    ModelError, f"home[{i}] ({j.name!r})", float(home[i]),
                    f"within [{j.position_min}, {j.position_max}]",
                )
        home.setflags(write=False)
        return cls(name, tuple(checked), T_root, T_tool, home)
