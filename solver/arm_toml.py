"""Parse twistrate's own TOML arm description (text in, validated `Arm` out); see docs/arm-format.md.

Pure: takes the file's text, does no I/O (solver/load.py reads files). Structure and types are
checked by pydantic models (strict: no string-to-number coercion, unknown keys rejected); the
cross-key rules (one unit variant per quantity, units matching the joint kind, DH or frame per
file) are checked after. Every error is a ModelError naming the joint (index and name), the key,
the value and what is accepted.

Frames follow `twistrate.solver.arm`: a joint's `frame` is T_prev_joint (previous joint frame after
its motion, or the mount's root link for the first joint, <- this joint's frame at q = 0) and its
`axis` is a unit vector in its own frame. Roll-pitch-yaw is fixed-axis: R = Rz(yaw) Ry(pitch) Rx(roll).
"""

from __future__ import annotations

import math
import tomllib
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from twistrate.solver.arm import AXIS_NORM_TOLERANCE, PRISMATIC, REVOLUTE, Arm, Joint, check_transform
from twistrate.solver.dh import DHRow, dh_chain
from twistrate.solver.errors import ModelError, field_error
from twistrate.solver.geometry import ROOT, ArmGeometry, Capsule, body_index, body_names, transform_capsule
from twistrate.solver.validation import describe

#: The only version of the TOML arm format this parser reads.
FORMAT_VERSION = 1

Vec3 = Annotated[list[float], Field(min_length=3, max_length=3)]
Pair = Annotated[list[float], Field(min_length=2, max_length=2)]
Rows3 = Annotated[list[Vec3], Field(min_length=3, max_length=3)]
Positive = Annotated[float, Field(gt=0)]


class _Table(BaseModel):
    """Strict base: numbers must be numbers, finite; unknown keys are errors."""

    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False)


class FrameSpec(_Table):
    """A fixed rigid transform: translation in m, rotation by at most one of the three keys."""

    xyz_m: Vec3 = Field(default_factory=lambda: [0.0, 0.0, 0.0])
    rpy_deg: Vec3 | None = None
    rpy_rad: Vec3 | None = None
    rotation_rows: Rows3 | None = None


class DHSpec(_Table):
    """One Denavit-Hartenberg row; theta (revolute) or d (prismatic) is the offset at q = 0."""

    a_m: float
    d_m: float
    alpha_deg: float | None = None
    alpha_rad: float | None = None
    theta_deg: float | None = None
    theta_rad: float | None = None


class JointSpec(_Table):
    """One actuated joint as written in the file (units still as the key names say)."""

    name: Annotated[str, Field(min_length=1)]
    kind: Literal["revolute", "prismatic"]
    dh: DHSpec | None = None
    frame: FrameSpec | None = None
    axis: Vec3 | None = None
    unlimited: bool = False
    range_deg: Pair | None = None
    range_rad: Pair | None = None
    range_m: Pair | None = None
    speed_deg_s: Positive | None = None
    speed_rad_s: Positive | None = None
    speed_m_s: Positive | None = None
    accel_deg_s2: Positive | None = None
    accel_rad_s2: Positive | None = None
    accel_m_s2: Positive | None = None
    home_deg: float | None = None
    home_rad: float | None = None
    home_m: float | None = None


class CapsuleSpec(_Table):
    """One capsule: segment a-b (m, in the named link's frame) and its radius (m)."""

    link: Annotated[str, Field(min_length=1)]
    name: str | None = None
    a_m: Vec3
    b_m: Vec3
    radius_m: Annotated[float, Field(ge=0)]


class ArmSpec(_Table):
    """The whole file."""

    format: Literal[1] = FORMAT_VERSION
    name: Annotated[str, Field(min_length=1)]
    description: str = ""
    dh_convention: Literal["standard", "modified"] | None = None
    mount: FrameSpec = Field(default_factory=FrameSpec)
    tool: FrameSpec = Field(default_factory=FrameSpec)
    joint: Annotated[list[JointSpec], Field(min_length=1)]
    capsule: list[CapsuleSpec] = Field(default_factory=list)
    touching: list[Annotated[list[str], Field(min_length=2, max_length=2)]] = Field(default_factory=list)



# Per quantity and joint kind, the key variants accepted and their factor to SI.
_UNITS: dict[str, dict[str, dict[str, float]]] = {
    "range": {REVOLUTE: {"range_deg": math.pi / 180, "range_rad": 1.0}, PRISMATIC: {"range_m": 1.0}},
    "speed": {REVOLUTE: {"speed_deg_s": math.pi / 180, "speed_rad_s": 1.0},
              PRISMATIC: {"speed_m_s": 1.0}},
    "accel": {REVOLUTE: {"accel_deg_s2": math.pi / 180, "accel_rad_s2": 1.0},
              PRISMATIC: {"accel_m_s2": 1.0}},
    "home": {REVOLUTE: {"home_deg": math.pi / 180, "home_rad": 1.0}, PRISMATIC: {"home_m": 1.0}},
}


def rpy_matrix(roll: float, pitch: float, yaw: float) -> np.ndarray:
    """(3, 3) rotation of fixed-axis roll-pitch-yaw (rad): R = Rz(yaw) @ Ry(pitch) @ Rx(roll)."""
    cr, sr = math.cos(roll), math.sin(roll)
    cp, sp = math.cos(pitch), math.sin(pitch)
    cy, sy = math.cos(yaw), math.sin(yaw)
    return np.array([
        [cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr],
        [sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr],
        [-sp, cp * sr, cp * cr],
    ])


def xyz_rpy_transform(xyz: np.ndarray | list[float], rpy: np.ndarray | list[float]) -> np.ndarray:
    """(4, 4) transform from a translation xyz (3,) m and fixed-axis roll-pitch-yaw rpy (3,) rad."""
    T = np.eye(4)
    T[:3, :3] = rpy_matrix(*(float(a) for a in rpy))
    T[:3, 3] = np.asarray(xyz, dtype=float)
    return T


def parse_arm_spec(text: str | bytes, source: str = "<arm toml>") -> ArmSpec:
    """Parse and validate a TOML arm description into its spec (units as written, DH rows kept).

    Raises ModelError for a TOML syntax error, a wrong or unknown key or a bad value; the message
    names the joint (index and name), the key, the value and what is accepted.
    """
    if isinstance(text, bytes):
        try:
            text = text.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise ModelError(f"{source}: not UTF-8 text ({exc})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ModelError(f"{source}: TOML syntax error: {exc}") from None
    try:
        return ArmSpec.model_validate(data)
    except ValidationError as exc:
        lines = [_describe(err, data) for err in exc.errors()]
        raise ModelError(f"{source}: " + "\n  ".join(lines)) from None


def parse_arm_toml(text: str | bytes, source: str = "<arm toml>") -> Arm:
    """Parse and validate a TOML arm description; `source` (a file name) prefixes every error.

    Raises ModelError for a TOML syntax error, a wrong or unknown key, a bad value or an arm the
    model rejects; the message names the joint (index and name), the key, the value and what is
    accepted.
    """
    spec = parse_arm_spec(text, source)
    try:
        return arm_from_spec(spec)
    except ModelError as exc:
        raise ModelError(f"{source}: {exc}") from None


def arm_from_spec(spec: ArmSpec) -> Arm:
    """Convert a validated ArmSpec to an Arm: units to SI, DH rows or frames to the chain form."""
    styles = {("dh" if j.dh is not None else "frame") for j in spec.joint}
    if len(styles) > 1:
        i, j = next((i, j) for i, j in enumerate(spec.joint) if j.dh is None)
        raise _missing(f"{_where(i, j.name)}.dh",
                       "`dh` in every joint, or `frame` + `axis` in every joint (one style per file)")
    use_dh = styles == {"dh"}
    if use_dh and spec.dh_convention is None:
        raise _missing("dh_convention", "'standard' or 'modified' (required when joints use `dh`)")
    if not use_dh and spec.dh_convention is not None:
        raise field_error(ModelError, "dh_convention", spec.dh_convention,
                          "only in files whose joints use `dh`; remove it")
    seen: dict[str, int] = {}
    for i, j in enumerate(spec.joint):
        if j.name in seen:
            raise field_error(ModelError, f"{_where(i, j.name)}.name", j.name,
                              f"a name not used before (joint[{seen[j.name]}] has it)")
        seen[j.name] = i

    joints: list[Joint] = []
    homes: list[float | None] = []
    dh_rows: list[DHRow] = []
    for i, j in enumerate(spec.joint):
        where = _where(i, j.name)
        lo, hi = _limits(where, j)
        velocity = _scalar(where, j, "speed", required=True)
        acceleration = _scalar(where, j, "accel", required=True)
        home = _scalar(where, j, "home", required=False)
        if home is not None and not lo <= home <= hi:
            key = _pick(where, j, "home")
            assert key is not None
            factor = _UNITS["home"][j.kind][key]
            raise field_error(ModelError, f"{where}.{key}", getattr(j, key),
                              f"within the joint range [{lo / factor:g}, {hi / factor:g}]")
        if use_dh:
            for key in ("frame", "axis"):
                if getattr(j, key) is not None:
                    raise field_error(ModelError, f"{where}.{key}", getattr(j, key),
                                      "nothing: a `dh` joint moves about / along its own z axis")
            dh = j.dh
            assert dh is not None
            alpha = _angle(f"{where}.dh", dh, "alpha", required=True)
            theta = _angle(f"{where}.dh", dh, "theta", required=False)
            dh_rows.append(DHRow(dh.a_m, alpha, dh.d_m, theta, prismatic=j.kind == PRISMATIC))
            T_prev, axis = np.eye(4), np.array([0.0, 0.0, 1.0])  # replaced from dh_chain below
        else:
            if j.frame is None:
                raise _missing(f"{where}.frame",
                               "a table {xyz_m = [..], rpy_deg = [..]} (or `dh` in every joint)")
            if j.axis is None:
                raise _missing(f"{where}.axis",
                               "a non-zero 3-vector in the joint's own frame, e.g. [0, 0, 1]")
            T_prev, axis = _frame(f"{where}.frame", j.frame), np.array(j.axis, dtype=float)
            if np.linalg.norm(axis) < AXIS_NORM_TOLERANCE:
                raise field_error(ModelError, f"{where}.axis", j.axis, "a non-zero 3-vector")
        joints.append(Joint(j.name, j.kind, T_prev, axis, lo, hi, velocity, acceleration))
        homes.append(home)

    T_last_tool = _frame("tool", spec.tool)
    # Each link's frame in its joint's frame: identity, except a standard DH link i, whose DH
    # frame {i} sits at the end of A_i(0) (the joint moves at the start of A_i).
    T_joint_link = [np.eye(4)] * len(joints)
    if use_dh:
        assert spec.dh_convention is not None
        T_prev_list, T_last_extra = dh_chain(dh_rows, spec.dh_convention)
        joints = [Joint(j.name, j.kind, T, j.axis, j.position_min, j.position_max, j.velocity_max,
                        j.acceleration_max) for j, T in zip(joints, T_prev_list, strict=True)]
        T_last_tool = T_last_extra @ T_last_tool
        if spec.dh_convention == "standard":
            T_joint_link = [*T_prev_list[1:], T_last_extra]
    T_base_root = _frame("mount", spec.mount)
    geometry = _geometry(spec, tuple(j.name for j in joints), T_joint_link, T_last_tool)
    arm = Arm.build(spec.name, joints, T_base_root, T_last_tool, None, geometry)
    if any(h is not None for h in homes):
        q_home = [arm.q_home[i] if h is None else h for i, h in enumerate(homes)]
        arm = Arm.build(spec.name, joints, T_base_root, T_last_tool, q_home, geometry)
    return arm


#: The link name for capsules given in the tool frame (carried by the last joint's link).
TOOL_LINK = "tool"


def _geometry(spec: ArmSpec, joint_names: tuple[str, ...], T_joint_link: list[np.ndarray],
              T_last_tool: np.ndarray) -> ArmGeometry:
    """Capsules and touching pairs of the file, end points converted to the bodies' joint frames."""
    names = body_names(joint_names)
    capsules = []
    for k, c in enumerate(spec.capsule):
        where = f"capsule[{k}]"
        label = c.name if c.name is not None else f"{c.link}.{k}"
        raw = Capsule(label, 0, np.array(c.a_m), np.array(c.b_m), c.radius_m)
        if c.link == TOOL_LINK:
            capsules.append(transform_capsule(raw, T_last_tool, len(joint_names)))
        elif c.link in names:
            body = names.index(c.link)
            T = np.eye(4) if c.link == ROOT else T_joint_link[body - 1]
            capsules.append(transform_capsule(raw, T, body))
        else:
            raise field_error(ModelError, f"{where}.link", c.link,
                              f"{ROOT!r}, {TOOL_LINK!r} or a joint name ({', '.join(joint_names)})")
    touching = set()
    for k, (x, y) in enumerate(spec.touching):
        i = body_index(x, names, f"touching[{k}][0]")
        j = body_index(y, names, f"touching[{k}][1]")
        if i == j:
            raise field_error(ModelError, f"touching[{k}]", [x, y], "two different links")
        touching.add((min(i, j), max(i, j)))
    return ArmGeometry(tuple(capsules), frozenset(touching))


def _missing(field: str, accepted: str) -> ModelError:
    """The house-style error for a required key that is absent."""
    return ModelError(f"{field}: missing; accepted: {accepted}")


def _where(i: int, name: object) -> str:
    return f"joint[{i}] ({name!r})"


def _pick(where: str, j: JointSpec, quantity: str) -> str | None:
    """The one key variant of `quantity` the joint gives (None if absent); the unit must fit the kind."""
    allowed = _UNITS[quantity][j.kind]
    other_kind = PRISMATIC if j.kind == REVOLUTE else REVOLUTE
    for key in _UNITS[quantity][other_kind]:
        if getattr(j, key) is not None:
            raise field_error(ModelError, f"{where}.{key}", getattr(j, key),
                              f"for a {j.kind} joint: {' or '.join(allowed)}")
    given = [k for k in allowed if getattr(j, k) is not None]
    if len(given) > 1:
        raise field_error(ModelError, f"{where}.{given[1]}", getattr(j, given[1]),
                          f"only one of {', '.join(allowed)} (also got {given[0]})")
    return given[0] if given else None


def _scalar(where: str, j: JointSpec, quantity: str, required: bool) -> float | None:
    """The SI value of a scalar `quantity` (speed, accel, home) from its key variant."""
    key = _pick(where, j, quantity)
    if key is None:
        if required:
            accepted = " or ".join(_UNITS[quantity][j.kind])
            raise _missing(f"{where}.{quantity}", f"{accepted} (required)")
        return None
    return float(getattr(j, key)) * _UNITS[quantity][j.kind][key]


def _limits(where: str, j: JointSpec) -> tuple[float, float]:
    """Position limits (rad or m) from range_* or `unlimited`."""
    key = _pick(where, j, "range")
    if j.unlimited:
        if j.kind != REVOLUTE:
            raise field_error(ModelError, f"{where}.unlimited", True,
                              "only on a revolute joint; a prismatic joint needs range_m")
        if key is not None:
            raise field_error(ModelError, f"{where}.{key}", getattr(j, key),
                              "no range on a joint marked unlimited = true (remove one of them)")
        return -math.inf, math.inf
    if key is None:
        accepted = " or ".join(_UNITS["range"][j.kind])
        extra = ", or unlimited = true" if j.kind == REVOLUTE else ""
        raise _missing(f"{where}.range", f"{accepted} = [min, max]{extra} (required)")
    factor = _UNITS["range"][j.kind][key]
    lo, hi = (float(v) * factor for v in getattr(j, key))
    if not lo < hi:
        raise field_error(ModelError, f"{where}.{key}", getattr(j, key), "[min, max] with min < max")
    return lo, hi


def _angle(where: str, table: BaseModel, stem: str, required: bool) -> float:
    """An angle in rad from `<stem>_deg` or `<stem>_rad` (exactly one; 0 if optional and absent)."""
    deg, rad = getattr(table, f"{stem}_deg"), getattr(table, f"{stem}_rad")
    if deg is not None and rad is not None:
        raise field_error(ModelError, f"{where}.{stem}_rad", rad, f"only one of {stem}_deg, {stem}_rad")
    if deg is not None:
        return math.radians(deg)
    if rad is not None:
        return float(rad)
    if required:
        raise _missing(f"{where}.{stem}", f"{stem}_deg or {stem}_rad (required)")
    return 0.0


def _frame(where: str, f: FrameSpec) -> np.ndarray:
    """(4, 4) transform of a frame table (metres)."""
    given = [k for k in ("rpy_deg", "rpy_rad", "rotation_rows") if getattr(f, k) is not None]
    if len(given) > 1:
        raise field_error(ModelError, f"{where}.{given[1]}", getattr(f, given[1]),
                          f"only one of rpy_deg, rpy_rad, rotation_rows (also got {given[0]})")
    T = np.eye(4)
    T[:3, 3] = f.xyz_m
    if f.rpy_deg is not None:
        T[:3, :3] = rpy_matrix(*np.radians(f.rpy_deg))
    elif f.rpy_rad is not None:
        T[:3, :3] = rpy_matrix(*f.rpy_rad)
    elif f.rotation_rows is not None:
        T[:3, :3] = np.array(f.rotation_rows, dtype=float)
        check_transform(T, f"{where}.rotation_rows")
    return T


#: This format's own wording where the shared translator's would say less.
_ACCEPTED_BY_TYPE = {
    "finite_number": "a finite number (an unlimited revolute joint says unlimited = true)",
}


def _accepted_at(loc: tuple[Any, ...], kind: str) -> str | None:
    if loc == ("joint",) and kind in ("missing", "too_short"):
        return "at least one [[joint]] table"
    return None


def _describe(err: Any, data: dict) -> str:
    """One pydantic error as 'location: got value; accepted: ...' with joints named by index and name."""

    def joint_label(before: tuple[Any, ...], index: int) -> str | None:
        if before != ("joint",):
            return None
        joints = data.get("joint")
        entry = joints[index] if isinstance(joints, list) and index < len(joints) else None
        return _where(index, entry.get("name") if isinstance(entry, dict) else None)

    return describe(err, ArmSpec, item_label=joint_label, accepted_by_type=_ACCEPTED_BY_TYPE,
                    accepted_at=_accepted_at, whole="(file)")
