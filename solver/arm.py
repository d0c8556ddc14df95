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
from twistrate.solver.geometry import ArmGeometry, body_names

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


# Rz(q) = _RZ_CONST + sin q _RZ_SIN + cos q _RZ_COS; Tz(q) = I + q _TZ_LINEAR (4x4 homogeneous).
_RZ_CONST = np.diag([0.0, 0.0, 1.0, 1.0])
_RZ_SIN = np.array([[0.0, -1, 0, 0], [1, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]])
_RZ_COS = np.diag([1.0, 1.0, 0.0, 0.0])
_TZ_LINEAR = np.array([[0.0, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 1], [0, 0, 0, 0]])


def _turn_z_to(axis: np.ndarray) -> np.ndarray:
    """(4, 4) rotation T_joint_axis whose +z column is the unit `axis` (3,); the identity when the
    axis is exactly +z. The x column is the unit vector along whichever of x, y is less parallel
    to the axis, made orthogonal to it (Gram-Schmidt), so the construction is exact for any axis."""
    T = np.eye(4)
    if np.array_equal(axis, (0.0, 0.0, 1.0)):
        return T
    seed = np.eye(3)[0] if abs(axis[0]) < abs(axis[1]) else np.eye(3)[1]
    x = seed - axis * (seed @ axis)
    x /= np.linalg.norm(x)
    T[:3, 0] = x
    T[:3, 1] = _skew(axis) @ x  # axis x x
    T[:3, 2] = axis
    return T


@dataclass(frozen=True)
class Arm:
    """A serial arm: ordered joints, mount, tool, home posture, plus stacked kernel arrays.

    Build it with :meth:`Arm.build`, which validates every field. The stacked arrays below are
    derived once (the kernels read the chain arrays further down every tick; F_base, motion_const
    and motion_basis describe the local transforms in the joint frames themselves):

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

    Arrays of the fast forward-kinematics pass (`twistrate.solver.kinematics.forward`). The kernels
    run the chain in *axis frames*: joint i's frame turned about its origin by T_joint_axis[i] so
    that its +z is the joint axis (then every joint motion is Rz(q) or Tz(q), and the base-frame
    axis is a column of the chain product). The tool is appended as chain element n.

    all_revolute : True when every joint is revolute (skips the prismatic corrections).
    T_axis_joint : (n, 4, 4) joint frame in its axis frame (inverse of the turn), or None when
        every axis already is +z (the axis frames are the joint frames).
    chain_coef_template : (n + 1, 1, 4) per chain element (joints, then the tool) its coefficient
        row [sin q, cos q, q, 1] with the q-dependent entries zeroed (the tool's row is constant).
    chain_basis : (n + 1, 4, 16) element e's local transform, linear in its coefficient row:
        A_e (4x4, row-major flattened) = c_e @ chain_basis[e]; A_e = T_axis(e-1)_axis(e)(q_e), the
        axis frame of joint e in that of joint e - 1 (the base frame for e = 0), A_n the tool in
        the last axis frame.
    jacobian_column_mask : (6, n) 1.0 where a revolute column has its cross-product / axis entries,
        0.0 for prismatic columns; prismatic_float : (n,) 1.0 for prismatic joints.

    geometry : the links' capsules and the link pairs allowed to touch (`twistrate.solver.geometry`;
        body 0 the root link, body i + 1 the link joint i moves); empty when the file gives none.
    """

    name: str
    joints: tuple[Joint, ...]
    T_base_root: np.ndarray
    T_last_tool: np.ndarray
    q_home: np.ndarray
    geometry: ArmGeometry = field(default_factory=ArmGeometry)
    F_base: np.ndarray = field(init=False, repr=False)
    motion_const: np.ndarray = field(init=False, repr=False)
    motion_basis: np.ndarray = field(init=False, repr=False)
    axes: np.ndarray = field(init=False, repr=False)
    revolute: np.ndarray = field(init=False, repr=False)
    q_min: np.ndarray = field(init=False, repr=False)
    q_max: np.ndarray = field(init=False, repr=False)
    v_max: np.ndarray = field(init=False, repr=False)
    a_max: np.ndarray = field(init=False, repr=False)
    all_revolute: bool = field(init=False, repr=False)
    T_axis_joint: np.ndarray | None = field(init=False, repr=False)
    chain_coef_template: np.ndarray = field(init=False, repr=False)
    chain_basis: np.ndarray = field(init=False, repr=False)
    jacobian_column_mask: np.ndarray = field(init=False, repr=False)
    prismatic_float: np.ndarray = field(init=False, repr=False)

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
        self._derive_chain(F, axes, revolute)
        for name in ("F_base", "motion_const", "motion_basis", "axes", "revolute",
                     "q_min", "q_max", "v_max", "a_max", "chain_coef_template", "chain_basis",
                     "jacobian_column_mask", "prismatic_float"):
            getattr(self, name).setflags(write=False)
        if self.T_axis_joint is not None:
            self.T_axis_joint.setflags(write=False)

    def _derive_chain(self, F: np.ndarray, axes: np.ndarray, revolute: np.ndarray) -> None:
        """Derive the axis-frame chain arrays of the fast FK pass (see the class docstring)."""
        n = len(axes)
        turn = np.array([_turn_z_to(a) for a in axes])  # (n, 4, 4) T_joint_axis
        # Local element i in axis frames: T_axis(i-1)_axis(i)(q) = turn[i-1]^T F_i turn[i] @ Mz(q_i).
        prev_inv = np.concatenate([np.eye(4)[None], np.transpose(turn[:-1], (0, 2, 1))])
        G = prev_inv @ F @ turn
        # L[e, k]: element e's 4x4 coefficient of c_k, c = [sin q, cos q, q, 1]; e = n is the tool.
        L = np.zeros((n + 1, 4, 4, 4))
        for i in range(n):
            if revolute[i]:
                L[i, 0] = G[i] @ _RZ_SIN
                L[i, 1] = G[i] @ _RZ_COS
                L[i, 3] = G[i] @ _RZ_CONST
            else:
                L[i, 2] = G[i] @ _TZ_LINEAR
                L[i, 3] = G[i]
        L[n, 3] = turn[-1].T @ self.T_last_tool
        template = np.zeros((n + 1, 1, 4))
        template[:, 0, 3] = 1.0
        column_mask = np.zeros((6, n))
        column_mask[:, revolute] = 1.0
        put = object.__setattr__
        put(self, "all_revolute", bool(np.all(revolute)))
        identity = all(np.array_equal(t, np.eye(4)) for t in turn)
        put(self, "T_axis_joint", None if identity else np.ascontiguousarray(np.transpose(turn, (0, 2, 1))))
        put(self, "chain_coef_template", template)
        put(self, "chain_basis", L.reshape(n + 1, 4, 16))
        put(self, "jacobian_column_mask", column_mask)
        put(self, "prismatic_float", (~revolute).astype(float))

    @property
    def n(self) -> int:
        """Number of actuated joints."""
        return len(self.joints)

    @property
    def joint_names(self) -> tuple[str, ...]:
        return tuple(j.name for j in self.joints)

    @property
    def body_names(self) -> tuple[str, ...]:
        """("root", joint names...): the name of each body (link) by index, n + 1 of them."""
        return body_names(self.joint_names)

    @classmethod
    def build(
        cls,
        name: str,
        joints: list[Joint] | tuple[Joint, ...],
        T_base_root: np.ndarray | None = None,
        T_last_tool: np.ndarray | None = None,
        q_home: np.ndarray | list[float] | None = None,
        geometry: ArmGeometry | None = None,
    ) -> Arm:
        """Validate every field and return the arm. Raises ModelError naming joint and key.

        geometry : capsules on the bodies 0..n (see `twistrate.solver.geometry`), or None for none.
        """
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
        names = body_names(tuple(j.name for j in checked))
        shapes = (geometry or ArmGeometry()).check(n + 1, names)
        return cls(name, tuple(checked), T_root, T_tool, home, shapes)
