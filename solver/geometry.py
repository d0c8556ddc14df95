"""Link geometry of an arm: capsules fixed to its links, and which link pairs may touch.

Links ("bodies") are numbered along the chain: body 0 is the root link (the mount's frame), body
i + 1 is the link joint i moves, whose frame is joint i's frame after its motion (`T_base_joint[i]`
of `twistrate.solver.kinematics.Frames`). A body is named "root" or by the joint that moves it.

A capsule is the set of points within `radius` of the segment a-b; a and b are in its body's
frame, metres (a == b makes a sphere). Self-collision is checked between capsules on bodies that
are not allowed to touch: the same body, *adjacent* bodies and the pairs listed as touching are
skipped. Two bodies are adjacent when they carry capsules and every body between them along the
chain carries none (so a shoulder or wrist whose joints meet in one point, with bare bodies in
between, still counts as one joint between its neighbours).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import numpy as np

from twistrate.solver.errors import ModelError, field_error

#: The name of body 0 (the root link) in files and messages.
ROOT = "root"


@dataclass(frozen=True)
class Capsule:
    """One capsule on one body.

    name : unique within the arm (used in pair names and messages).
    body : 0 for the root link, i + 1 for the link joint i moves.
    a, b : (3,) segment end points in the body's frame, m.
    radius : m, >= 0.
    """

    name: str
    body: int
    a: np.ndarray
    b: np.ndarray
    radius: float


@dataclass(frozen=True)
class ArmGeometry:
    """The capsules of an arm and the body pairs allowed to touch besides adjacent ones.

    capsules : the capsules, any order.
    touching : (i, j) body index pairs, i < j, whose capsules are never checked against each other
        (in addition to adjacent bodies, which are always skipped).
    unfitted : names of source shapes that got no capsule (URDF meshes), for reports.
    """

    capsules: tuple[Capsule, ...] = ()
    touching: frozenset[tuple[int, int]] = field(default_factory=frozenset)
    unfitted: tuple[str, ...] = ()

    def check(self, body_count: int, body_names: tuple[str, ...]) -> ArmGeometry:
        """Validated copy for an arm with `body_count` bodies (n + 1); raises ModelError naming the
        capsule (index and name) and the key."""
        seen: dict[str, int] = {}
        out: list[Capsule] = []
        for k, c in enumerate(self.capsules):
            where = f"capsule[{k}] ({c.name!r})"
            if not c.name or c.name in seen:
                raise field_error(ModelError, f"{where}.name", c.name,
                                  "a non-empty name not used by another capsule")
            seen[c.name] = k
            if not 0 <= c.body < body_count:
                raise field_error(ModelError, f"{where}.link", c.body,
                                  f"a link of the arm: {', '.join(body_names)}")
            ends = []
            for key, p in (("a_m", c.a), ("b_m", c.b)):
                p = np.asarray(p, dtype=float).reshape(-1)
                if p.shape != (3,) or not np.all(np.isfinite(p)):
                    raise field_error(ModelError, f"{where}.{key}", p.tolist(), "3 finite numbers, m")
                p.setflags(write=False)
                ends.append(p)
            r = float(c.radius)
            if not (np.isfinite(r) and r >= 0.0):
                raise field_error(ModelError, f"{where}.radius_m", c.radius, "a finite number >= 0")
            out.append(Capsule(c.name, int(c.body), ends[0], ends[1], r))
        pairs = set()
        for i, j in self.touching:
            for v in (i, j):
                if not 0 <= v < body_count:
                    raise field_error(ModelError, "touching", (i, j),
                                      f"pairs of links of the arm: {', '.join(body_names)}")
            if i == j:
                raise field_error(ModelError, "touching", (body_names[i], body_names[j]),
                                  "two different links (a link never collides with itself)")
            pairs.add((min(i, j), max(i, j)))
        return ArmGeometry(tuple(out), frozenset(pairs), tuple(self.unfitted))

    def adjacent(self) -> frozenset[tuple[int, int]]:
        """Body pairs (i, j), i < j, adjacent in the sense of the module docstring."""
        bodies = sorted({c.body for c in self.capsules})
        return frozenset(itertools.pairwise(bodies))

    def self_pairs(self, extra_touching: frozenset[tuple[int, int]] = frozenset()) -> list[tuple[int, int]]:
        """Capsule index pairs (k, l), k < l, checked for self-collision: on different bodies, not
        adjacent, not in `touching` nor in `extra_touching` ((i, j) body pairs, i < j)."""
        skip = self.adjacent() | self.touching | extra_touching
        out = []
        for k, ck in enumerate(self.capsules):
            for m in range(k + 1, len(self.capsules)):
                cm = self.capsules[m]
                i, j = min(ck.body, cm.body), max(ck.body, cm.body)
                if i != j and (i, j) not in skip:
                    out.append((k, m))
        return out


def body_names(joint_names: tuple[str, ...]) -> tuple[str, ...]:
    """("root", joint 0, ..., joint n-1): the name of every body, by index."""
    return (ROOT, *joint_names)


def body_index(name: str, names: tuple[str, ...], field_name: str) -> int:
    """Index of the body called `name` (see `body_names`), or a ModelError naming `field_name`."""
    if name not in names:
        raise field_error(ModelError, field_name, name,
                          f"a link name: {ROOT!r} or a joint name ({', '.join(names[1:])})")
    return names.index(name)


def transform_capsule(c: Capsule, T_new_old: np.ndarray, body: int | None = None) -> Capsule:
    """The capsule with its end points mapped by T_new_old (4, 4) (old frame -> new frame, m),
    optionally moved to another body index."""
    R, p = T_new_old[:3, :3], T_new_old[:3, 3]
    return Capsule(c.name, c.body if body is None else body,
                   R @ np.asarray(c.a, float) + p, R @ np.asarray(c.b, float) + p, c.radius)
