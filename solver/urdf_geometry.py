"""Capsules fitted to the `<collision>` elements of a URDF chain's links (used by solver/urdf.py).

Which links: every link on the chain (base to tool), plus the links hanging off a chain link by
fixed joints only (a camera bolted to a turret moves with it); links below a moving joint off the
chain (a gripper finger) are not part of the arm and get no capsules.

The fit is conservative: each capsule contains its shape (every point of the shape lies within the
capsule), in the shape's `<origin xyz rpy>` frame inside the link:
* `<sphere radius="r">`: the sphere itself (segment of zero length at its centre, radius r); exact.
* `<cylinder radius="r" length="L">` (axis along the shape's z): segment (0, 0, -L/2)-(0, 0, L/2),
  radius r. Exact radially; the hemispherical ends add r beyond each flat face.
* `<box size="x y z">`: segment along the longest edge through the centre, of that edge's length,
  radius the half-diagonal of the other two edges (sqrt(u^2 + v^2), u, v the half edges): every
  corner lies on the capsule's surface. A flat plate is fitted loosely (its radius is half its
  width); describe such links with several boxes or use the TOML format.
* `<mesh>` and anything else: not fitted; its name is listed in `ArmGeometry.unfitted` so a report
  can say so.
Capsules are named "<link>/<collision name or index>".
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import numpy as np

from twistrate.solver.arm_toml import xyz_rpy_transform
from twistrate.solver.errors import ModelError, field_error
from twistrate.solver.geometry import Capsule


def _numbers(el: ET.Element, attr: str, count: int, field: str) -> list[float]:
    raw = el.get(attr)
    try:
        values = [float(v) for v in (raw or "").split()]
    except ValueError:
        values = []
    if len(values) != count or not all(math.isfinite(v) and v > 0 for v in values):
        raise field_error(ModelError, field, raw, f"{count} finite positive number(s) separated by spaces")
    return values


def _origin(el: ET.Element, field: str) -> np.ndarray:
    """(4, 4) transform of an element's <origin xyz rpy> (identity when absent)."""
    origin = el.find("origin")
    if origin is None:
        return np.eye(4)
    vals = []
    for attr in ("xyz", "rpy"):
        raw = origin.get(attr, "0 0 0")
        try:
            v = [float(x) for x in raw.split()]
        except ValueError:
            v = []
        if len(v) != 3 or not all(math.isfinite(x) for x in v):
            raise field_error(ModelError, f"{field}.origin.{attr}", raw,
                              "3 finite numbers separated by spaces")
        vals.append(v)
    return xyz_rpy_transform(vals[0], vals[1])


def fit_shape(shape: ET.Element, field: str) -> tuple[np.ndarray, np.ndarray, float] | None:
    """(a (3,), b (3,), radius) of the capsule containing one <geometry> child, in the shape's own
    frame (m), or None for a shape that is not fitted (mesh, unknown)."""
    if shape.tag == "sphere":
        (r,) = _numbers(shape, "radius", 1, f"{field}.sphere.radius")
        return np.zeros(3), np.zeros(3), r
    if shape.tag == "cylinder":
        (r,) = _numbers(shape, "radius", 1, f"{field}.cylinder.radius")
        (length,) = _numbers(shape, "length", 1, f"{field}.cylinder.length")
        return np.array([0.0, 0.0, -length / 2]), np.array([0.0, 0.0, length / 2]), r
    if shape.tag == "box":
        size = np.array(_numbers(shape, "size", 3, f"{field}.box.size"))
        axis = int(np.argmax(size))
        others = np.delete(size, axis) / 2
        b = np.zeros(3)
        b[axis] = size[axis] / 2
        return -b, b, float(np.hypot(*others))
    return None


def link_capsules(link: ET.Element, body: int, T_body_link: np.ndarray
                  ) -> tuple[list[Capsule], list[str]]:
    """Capsules of one link's <collision> elements on body `body`, end points in the body's frame
    (T_body_link (4, 4): the link frame in the body frame, m); and the names not fitted."""
    name = link.get("name") or ""
    capsules, unfitted = [], []
    for k, col in enumerate(link.findall("collision")):
        label = f"{name}/{col.get('name') or k}"
        field = f"link {name!r}.collision[{k}]"
        geometry = col.find("geometry")
        shape = geometry[0] if geometry is not None and len(geometry) else None
        if shape is None:
            raise ModelError(f"{field}.geometry: missing; accepted: a <geometry> with a sphere, cylinder "
                             "or box")
        fit = fit_shape(shape, f"{field}.geometry")
        if fit is None:
            unfitted.append(f"{label} ({shape.tag})")
            continue
        T = T_body_link @ _origin(col, field)
        a, b, r = fit
        capsules.append(Capsule(label, body, T[:3, :3] @ a + T[:3, 3], T[:3, :3] @ b + T[:3, 3], r))
    return capsules, unfitted


def fixed_descendants(start: str, on_chain: set[str], children: dict[str, list[ET.Element]]
                      ) -> list[tuple[str, np.ndarray]]:
    """Links below `start` reached through fixed joints only, off the chain: (name, T_start_link)."""
    out, stack = [], [(start, np.eye(4))]
    seen = {start}
    while stack:
        link, T = stack.pop()
        for joint in children.get(link, []):
            child = joint.find("child")
            name = child.get("link") if child is not None else None
            if joint.get("type") != "fixed" or not name or name in on_chain or name in seen:
                continue
            seen.add(name)
            T_child = T @ _origin(joint, f"joint {joint.get('name')!r}")
            out.append((name, T_child))
            stack.append((name, T_child))
    return out
