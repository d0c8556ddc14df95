"""Import the serial chain between two links of a URDF document (text in, validated `Arm` out).

Pure: takes the document's text, does no I/O (solver/load.py reads files). Uses only
xml.etree.ElementTree. Rules (docs/arm-format.md, "URDF import"):

* The chain runs from `base_link` (default: the tree's single root link) to `tool_link` (default:
  the single leaf link below the base; with several leaves the caller must name one).
* Fixed joints on the chain are folded into the next actuated joint's frame, or into the tool
  transform after the last actuated joint. Links and joints off the chain are ignored.
* `revolute` and `prismatic` need <limit lower upper velocity>; `continuous` is an unlimited
  revolute joint and needs <limit velocity>. URDF carries no acceleration limits: they come from
  the `acceleration` argument or default to velocity / DEFAULT_ACCEL_RAMP_S.
* On the chain, `floating`, `planar`, unknown joint types, <mimic>, missing or bad limits, a link
  not reachable from the base, or a link with two parents are ModelErrors naming the joint.
* <origin xyz rpy>: metres and fixed-axis roll-pitch-yaw, R = Rz(yaw) Ry(pitch) Rx(roll); the
  joint frame at q = 0 is the parent link frame composed with the origin; <axis xyz> (default
  1 0 0) is in the joint frame. This is exactly `twistrate.solver.arm`'s chain convention, with
  the base link as the arm's root (mount = identity).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from collections.abc import Mapping

import numpy as np

from twistrate.solver.arm import PRISMATIC, REVOLUTE, Arm, Joint
from twistrate.solver.arm_toml import xyz_rpy_transform
from twistrate.solver.errors import ModelError, field_error
from twistrate.solver.geometry import ArmGeometry
from twistrate.solver.urdf_geometry import fixed_descendants, link_capsules

#: Without a given acceleration limit a joint gets velocity_max / DEFAULT_ACCEL_RAMP_S: it can reach
#: its velocity limit from rest in this time (s). URDF has no acceleration limits.
DEFAULT_ACCEL_RAMP_S = 0.25

#: URDF joint types accepted on the chain, and the arm joint kind each becomes (None: folded).
_KINDS: dict[str, str | None] = {"fixed": None, "revolute": REVOLUTE, "continuous": REVOLUTE,
                                 "prismatic": PRISMATIC}


def parse_urdf(
    text: str | bytes,
    base_link: str | None = None,
    tool_link: str | None = None,
    acceleration: float | Mapping[str, float] | None = None,
    source: str = "<urdf>",
) -> Arm:
    """Build the Arm of the chain base_link -> tool_link of a URDF document.

    acceleration : None (each joint gets velocity_max / DEFAULT_ACCEL_RAMP_S), one value for every
        joint, or {joint name: value}; rad/s^2 (revolute) or m/s^2 (prismatic). Joints missing
        from a mapping get the default; names not on the chain are an error.
    source : a label (file name) prefixed to every error message.
    Raises ModelError for malformed XML or anything unsupported on the chain.
    """
    try:
        return _parse(text, base_link, tool_link, acceleration)
    except ModelError as exc:
        raise ModelError(f"{source}: {exc}") from None


def _parse(text: str | bytes, base_link: str | None, tool_link: str | None,
           acceleration: float | Mapping[str, float] | None) -> Arm:
    try:
        root = ET.fromstring(text)
    except ET.ParseError as exc:
        raise ModelError(f"not well-formed XML: {exc}") from None
    if root.tag != "robot":
        raise field_error(ModelError, "root element", root.tag, "<robot>")
    links = [el.get("name") for el in root.findall("link")]
    joints = root.findall("joint")
    by_child: dict[str, ET.Element] = {}
    children: dict[str, list[str]] = {}
    joints_below: dict[str, list[ET.Element]] = {}
    for el in joints:
        name = el.get("name") or ""
        parent, child = _link_of(el, "parent"), _link_of(el, "child")
        if child in by_child:
            raise field_error(ModelError, f"joint {name!r}.child", child,
                              f"a link with one parent joint (joint {by_child[child].get('name')!r} "
                              "also has it as child: not a tree)")
        by_child[child] = el
        children.setdefault(parent, []).append(child)
        joints_below.setdefault(parent, []).append(el)
    known = set(filter(None, links)) | set(by_child) | set(children)

    if base_link is None:
        roots = sorted(link for link in known if link not in by_child)
        if len(roots) != 1:
            raise field_error(ModelError, "base_link", None, f"one of the root links {roots}; name one")
        base_link = roots[0]
    elif base_link not in known:
        raise field_error(ModelError, "base_link", base_link, f"a link of the document: {sorted(known)}")
    if tool_link is None:
        leaves = sorted(_leaves(base_link, children))
        if len(leaves) != 1:
            raise field_error(ModelError, "tool_link", None,
                              f"a named tool link: the tree below {base_link!r} has leaves {leaves}, "
                              "so the chain's end must be named (any link works)")
        tool_link = leaves[0]
    elif tool_link not in known:
        raise field_error(ModelError, "tool_link", tool_link, f"a link of the document: {sorted(known)}")

    chain: list[ET.Element] = []
    link = tool_link
    while link != base_link:
        el = by_child.get(link)
        if el is None or len(chain) > len(joints):
            raise field_error(ModelError, "tool_link", tool_link,
                              f"a link below base link {base_link!r} (walking up from the tool, the chain "
                              f"ends at link {link!r}, which is not below the base)")
        chain.append(el)
        link = _link_of(el, "parent")
    chain.reverse()

    arm_joints: list[Joint] = []
    pending = np.eye(4)  # fixed transforms accumulated since the last actuated joint
    chain_links = [(base_link, 0, np.eye(4))]  # (link, body, T_body_link)
    for el in chain:
        name = el.get("name") or ""
        jtype = el.get("type")
        where = f"joint {name!r}"
        if jtype not in _KINDS:
            raise field_error(ModelError, f"{where}.type", jtype,
                              f"on the chain: {', '.join(_KINDS)} (floating, planar and others are not "
                              "serial-arm joints)")
        if el.find("mimic") is not None:
            raise field_error(ModelError, f"{where}.mimic", el.find("mimic").attrib,  # type: ignore[union-attr]
                              "no <mimic> on the chain (coupled joints are not supported)")
        pending = pending @ _origin(el, where)
        kind = _KINDS[jtype]
        if kind is None:
            chain_links.append((_link_of(el, "child"), len(arm_joints), pending))
            continue
        axis = _floats(el.find("axis"), "xyz", "1 0 0", 3, f"{where}.axis.xyz")
        lo, hi, velocity = _limits(el, where, jtype)
        arm_joints.append(Joint(name, kind, pending, axis, lo, hi, velocity, math.nan))  # type: ignore[arg-type]
        pending = np.eye(4)
        chain_links.append((_link_of(el, "child"), len(arm_joints), pending))
    if not arm_joints:
        raise field_error(ModelError, "chain", f"{base_link} -> {tool_link}",
                          "a chain with at least one revolute, continuous or prismatic joint")
    arm_joints = _with_acceleration(arm_joints, acceleration)
    geometry = _geometry(root, chain_links, joints_below)
    return Arm.build(root.get("name") or "urdf", arm_joints, np.eye(4), pending, None, geometry)


def _geometry(root: ET.Element, chain_links: list[tuple[str, int, np.ndarray]],
              joints_below: dict[str, list[ET.Element]]) -> ArmGeometry:
    """Capsules fitted to the <collision> shapes of the chain's links and of the links fixed to
    them off the chain (`twistrate.solver.urdf_geometry`)."""
    elements = {el.get("name"): el for el in root.findall("link")}
    on_chain = {name for name, _, _ in chain_links}
    capsules, unfitted = [], []
    for name, body, T_body_link in chain_links:
        found = [(name, T_body_link)] + [(d, T_body_link @ T) for d, T in
                                         fixed_descendants(name, on_chain, joints_below)]
        for link, T in found:
            if link in elements:
                caps, skipped = link_capsules(elements[link], body, T)
                capsules += caps
                unfitted += skipped
    return ArmGeometry(tuple(capsules), frozenset(), tuple(unfitted))


def _link_of(el: ET.Element, tag: str) -> str:
    """The `link` attribute of the joint's <parent> or <child>, or a ModelError naming the joint."""
    sub = el.find(tag)
    link = sub.get("link") if sub is not None else None
    if not link:
        raise ModelError(f"joint {el.get('name')!r}.{tag}: missing; accepted: <{tag} link=\"...\"/>")
    return link


def _leaves(base: str, children: dict[str, list[str]]) -> list[str]:
    """Links with no child joint in the subtree below `base` (iterative, cycle-safe)."""
    leaves, stack, seen = [], [base], set()
    while stack:
        link = stack.pop()
        if link in seen:
            continue
        seen.add(link)
        below = children.get(link, [])
        if not below and link != base:
            leaves.append(link)
        stack.extend(below)
    return leaves


def _floats(el: ET.Element | None, attr: str, default: str, count: int, field: str) -> np.ndarray:
    """(count,) finite floats from a space-separated attribute (absent element/attribute: default)."""
    raw = default if el is None else el.get(attr, default)
    try:
        values = np.array([float(v) for v in raw.split()])
    except ValueError:
        values = np.array([])
    if values.shape != (count,) or not np.all(np.isfinite(values)):
        raise field_error(ModelError, field, raw, f"{count} finite numbers separated by spaces")
    return values


def _origin(el: ET.Element, where: str) -> np.ndarray:
    """(4, 4) transform of the joint's <origin xyz rpy> (identity when absent)."""
    origin = el.find("origin")
    xyz = _floats(origin, "xyz", "0 0 0", 3, f"{where}.origin.xyz")
    rpy = _floats(origin, "rpy", "0 0 0", 3, f"{where}.origin.rpy")
    return xyz_rpy_transform(xyz, rpy)


def _limits(el: ET.Element, where: str, jtype: str) -> tuple[float, float, float]:
    """(position_min, position_max, velocity_max) from <limit>; continuous joints are unlimited."""
    limit = el.find("limit")
    needed = ("velocity",) if jtype == "continuous" else ("lower", "upper", "velocity")
    if limit is None:
        raise ModelError(f"{where}.limit: missing; accepted: a <limit> with {', '.join(needed)} "
                         f"on a {jtype} joint")
    got: dict[str, float] = {}
    for attr in needed:
        raw = limit.get(attr)
        try:
            value = float(raw) if raw is not None else math.nan
        except ValueError:
            value = math.nan
        if not math.isfinite(value):
            raise field_error(ModelError, f"{where}.limit.{attr}", raw,
                              f"a finite number (required on a {jtype} joint)")
        got[attr] = value
    if jtype == "continuous":
        return -math.inf, math.inf, got["velocity"]
    return got["lower"], got["upper"], got["velocity"]


def _with_acceleration(joints: list[Joint], acceleration: float | Mapping[str, float] | None) -> list[Joint]:
    """Fill each joint's acceleration_max from the argument or the documented default."""
    names = {j.name for j in joints}
    if isinstance(acceleration, Mapping):
        unknown = sorted(set(acceleration) - names)
        if unknown:
            raise field_error(ModelError, "acceleration", unknown, f"names of chain joints: {sorted(names)}")
    out = []
    for j in joints:
        if acceleration is None or (isinstance(acceleration, Mapping) and j.name not in acceleration):
            a = j.velocity_max / DEFAULT_ACCEL_RAMP_S
        elif isinstance(acceleration, Mapping):
            a = float(acceleration[j.name])
        else:
            a = float(acceleration)
        out.append(Joint(j.name, j.kind, j.T_prev_joint, j.axis, j.position_min, j.position_max,
                         j.velocity_max, a))
    return out
