"""The per-tick keep-out pass: which pairs are within the influence distance d_i, and their exact
distances, closest points and normals (`Contacts`), with an early-out that costs a few numpy calls
when none is near.

Pairs: every moving capsule against every zone (half-spaces, boxes, spheres, capsule zones), and
capsule pairs on links allowed to collide (`ArmGeometry.self_pairs`; root-link capsules are fixed,
so only against moving links). Pairs that no joint can change (root link against a zone) are left
out.

Early-out: a bound on how far each pair's distance can have changed since it was last computed
exactly, from the configuration change alone (so it holds for any q, jumps included; no clock).
A rigid motion moves every point of a segment by at most the larger displacement of its two end
points, so a segment distance changes by at most the sum of both members' end point displacements.
Joint j moves a point p on a link it carries by at most rho_j |dq_j|, with rho_j >= |p - o_j| (o_j a
point on the revolute axis j; rho_j = 1 for a prismatic joint). With rho_j bounded along the chain
by the triangle inequality (link offsets, prismatic travel, the end point in its link), and joints
changed one at a time from the stored configuration q0 to q:

    |d(q) - d(q0)| <= sum_j (rho_a,j + rho_b,j) |q_j - q0_j|     (lever rows, per pair).

A pair is recomputed exactly when that bound reaches its slack d(q0) - d_i; otherwise it cannot be
within d_i. The state (q0 and d(q0) per pair) only decides what to recompute: results equal those
of a fresh exact pass over all pairs, whatever the order of the calls (tests/test_keepout.py).
One `KeepOut` serves one tick loop (the state is not shared between threads).
"""

from __future__ import annotations

import math

import numpy as np

from twistrate.solver.arm import PRISMATIC, Arm
from twistrate.solver.damper import Contacts, damper_rows
from twistrate.solver.distance import capsule_box, capsule_box_one, capsule_capsule, capsule_capsule_one
from twistrate.solver.errors import ConfigError, ModelError
from twistrate.solver.geometry import body_index
from twistrate.solver.kinematics import Frames
from twistrate.solver.zones import KeepOutConfig

#: Margin (m) kept below every slack so that rounding in the bound never skips a pair near d_i.
EARLY_OUT_MARGIN_M = 1e-9
#: Up to this many capsule or half-space pairs in one pass are computed in plain floats
#: (`capsule_capsule_one`), beyond it with the vectorised kernels (numpy's per-call cost dominates
#: for a few pairs: measured about 20 times cheaper for one pair).
SCALAR_PAIRS_MAX = 6


def _empty_contacts() -> Contacts:
    """No contacts (read-only empty arrays of the documented shapes)."""
    z3 = np.zeros((0, 3))
    zi = np.zeros(0, dtype=int)
    z = np.zeros(0)
    for arr in (z3, zi, z):
        arr.setflags(write=False)
    return Contacts(zi, z, z3, z3, z3, zi, zi)


_EMPTY = _empty_contacts()


class KeepOut:
    """Keep-out pass for one arm and one `[keepout]` config: built once, called every tick.

    pair_names : (name_a, name_b) per pair, a an arm capsule, b a capsule or zone; pairs are ordered
        segment pairs (capsule-capsule, capsule-sphere), then capsule x half-space, then capsule x box.
    Internally the segments are the moving capsules first, then the constant ones (root capsules,
    capsule zones, spheres), each stored as [a, b] end points.
    """

    def __init__(self, arm: Arm, config: KeepOutConfig) -> None:
        self.arm, self.config = arm, config
        zones = config.zones
        caps = arm.geometry.capsules
        moving = [k for k, c in enumerate(caps) if c.body > 0]
        fixed = [k for k, c in enumerate(caps) if c.body == 0]
        km = self.moving_count = len(moving)
        # Homogeneous [a, b] of each moving capsule in its joint's axis frame: (km, 4, 2).
        H = np.ones((km, 4, 2))
        for row, k in enumerate(moving):
            c = caps[k]
            pts = np.array([c.a, c.b]).T
            if arm.T_axis_joint is not None:
                A = arm.T_axis_joint[c.body - 1]
                pts = A[:3, :3] @ pts + A[:3, 3:]
            H[row, :3] = pts
        self._H = H
        self._axis_index = np.array([caps[k].body - 1 for k in moving], dtype=int)
        R0, t0 = arm.T_base_root[:3, :3], arm.T_base_root[:3, 3]
        const = [(R0 @ caps[k].a + t0, R0 @ caps[k].b + t0) for k in fixed]
        const += list(zip(zones.segment_a, zones.segment_b, strict=True))
        self._segments = np.zeros((km + len(const), 2, 3))  # [segment, (a, b), xyz], base frame
        for s, (a, b) in enumerate(const):
            self._segments[km + s] = (a, b)
        order = moving + fixed
        self._radius = np.array([caps[k].radius for k in order] + list(zones.segment_radius), float)
        self._body = np.array([caps[k].body for k in order] + [0] * len(zones.segment_radius), dtype=int)
        levers = np.zeros((len(self._segments), arm.n))
        for row, k in enumerate(moving):
            levers[row] = _levers(arm, caps[k].body, caps[k].a, caps[k].b)
        seg_names = [caps[k].name for k in order] + list(zones.segment_names)
        where = {k: s for s, k in enumerate(order)}
        pairs: list[tuple[int, int]] = []
        if config.self_collision:
            for k, m in arm.geometry.self_pairs(frozenset(_touching(arm, config.touching))):
                i, j = where[k], where[m]
                if i < km or j < km:
                    pairs.append((i, j) if i < km else (j, i))
        pairs += [(i, j) for i in range(km) for j in range(km + len(fixed), len(self._segments))]
        self._seg_end = len(pairs)
        names = [(seg_names[i], seg_names[j]) for i, j in pairs]
        nh, nb = len(zones.half_space_offset), len(zones.box_half)
        pairs += [(i, z) for i in range(km) for z in range(nh)]
        names += [(seg_names[i], zones.half_space_names[z]) for i in range(km) for z in range(nh)]
        self._hs_end = len(pairs)
        pairs += [(i, z) for i in range(km) for z in range(nb)]
        names += [(seg_names[i], zones.box_names[z]) for i in range(km) for z in range(nb)]
        self.pair_names: tuple[tuple[str, str], ...] = tuple(names)
        # (link of a, link or zone of b, whether b is a zone) per pair, for reports
        body_names = arm.body_names
        seg_link = [body_names[caps[k].body] for k in order] + list(zones.segment_names)
        zone_from = km + len(fixed)
        links = [(seg_link[i], seg_link[j], j >= zone_from) for i, j in pairs[: self._seg_end]]
        links += [(seg_link[i], zones.half_space_names[z], True) for i in range(km) for z in range(nh)]
        links += [(seg_link[i], zones.box_names[z], True) for i in range(km) for z in range(nb)]
        #: (link name of side a, link name or zone name of side b, b is a zone) per pair
        self.pair_links: tuple[tuple[str, str, bool], ...] = tuple(links)
        self._ia = np.array([p[0] for p in pairs], dtype=int)
        self._ib = np.array([p[1] for p in pairs], dtype=int)
        lever = levers[self._ia]
        lever[: self._seg_end] += levers[self._ib[: self._seg_end]]
        self._lever = lever  # (P, n) m per rad (or per m)
        #: (n + 1, n) which joints move each body (for `damper.damper_rows(..., mask=...)`).
        self.masks = (np.arange(arm.n)[None, :] < np.arange(arm.n + 1)[:, None]).astype(float)
        self.masks.setflags(write=False)
        # Plain-float copies for the few-pairs path.
        self._ia_list, self._ib_list = self._ia.tolist(), self._ib.tolist()
        self._radius_list, self._body_list = self._radius.tolist(), self._body.tolist()
        self._hs_normal_list = zones.half_space_normal.tolist()
        self._hs_offset_list = zones.half_space_offset.tolist()
        self._box_lists = list(zip(zones.box_center.tolist(), zones.box_rotation.tolist(),
                                   zones.box_half.tolist(), strict=True))
        self._no_rows, self._no_bounds = np.zeros((0, arm.n)), np.zeros(0)
        self._no_rows.setflags(write=False)
        self._no_bounds.setflags(write=False)
        # Cache: configuration of each pair's last exact distance, and its slack d - d_i there.
        self._q0 = np.zeros((len(pairs), arm.n))
        self._slack = np.full(len(pairs), -np.inf)

    @property
    def pair_count(self) -> int:
        return len(self.pair_names)

    def place(self, frames: Frames) -> np.ndarray:
        """(ns, 2, 3) every segment's end points [a, b] in the base frame at the frames'
        configuration, m (an internal buffer, overwritten by the next call)."""
        S = self._segments
        km = self.moving_count
        if km:
            P = np.matmul(frames.T_base_axis[self._axis_index], self._H)  # (km, 4, 2)
            S[:km] = P[:, :3].transpose(0, 2, 1)
        return S

    def contacts(self, frames: Frames, q: np.ndarray) -> Contacts:
        """Contacts of every pair closer than d_i at q; half-space pairs give one per end point
        within d_i. frames : forward kinematics at q (n,) (`twistrate.solver.kinematics.forward`)."""
        found = self._update(frames, q)
        return found if isinstance(found, Contacts) else _contacts_of(found)

    def rows(self, frames: Frames, q: np.ndarray, J: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray, Contacts]:
        """This tick's velocity-damper rows: (A (r, n), b (r,), contacts) with A q_dot >= b, the
        same as `damper.damper_rows(self.contacts(frames, q), J, frames.T_base_tool, self.config)`
        (tests/test_keepout.py), built from plain floats when few pairs are near.

        J : (6, n) geometric Jacobian of the tool point at q, base frame, rows (v, w).
        """
        found = self._update(frames, q)
        if isinstance(found, Contacts):
            if not len(found.pair):
                return self._no_rows, self._no_bounds, found
            A, b, _ = damper_rows(found, J, frames.T_base_tool, self.config, self.masks)
            return A, b, found
        if not found:
            return self._no_rows, self._no_bounds, _EMPTY
        cfg = self.config
        tx, ty, tz = frames.T_base_tool[:3, 3].tolist()
        W, bodies, b = [], [], []
        both = any(row[6] for row in found)
        for _, d, pa, pb, (nx, ny, nz), body_a, body_b in found:
            for point in ((pa, pb) if both else (pa,)):
                rx, ry, rz = point[0] - tx, point[1] - ty, point[2] - tz
                W.append((nx, ny, nz, ry * nz - rz * ny, rz * nx - rx * nz, rx * ny - ry * nx))
            bodies.append(body_a)
            if both:
                bodies.append(body_b)
            b.append(-cfg.gain_m_s * (d - cfg.security_m) / (cfg.influence_m - cfg.security_m))
        G = np.array(W) @ J
        G *= self.masks[bodies]
        A = G[0::2] - G[1::2] if both else G
        return A, np.array(b), _LazyContacts(found)

    def _update(self, frames: Frames, q: np.ndarray) -> Contacts | list[tuple]:
        """The early-out, the exact pass over the stale pairs and the cache update; returns the
        contacts within d_i as Contacts, or (few pairs) as plain rows (pair, distance, point_a,
        point_b, normal, body_a, body_b)."""
        grow = np.einsum("pn,pn->p", np.abs(q - self._q0), self._lever)
        stale = np.nonzero(grow >= self._slack)[0]
        if not len(stale):
            return _EMPTY
        d_i = self.config.influence_m
        if len(stale) <= SCALAR_PAIRS_MAX:
            d_pair, rows = self._exact_few(self.place(frames), stale)
            self._q0[stale] = q
            self._slack[stale] = np.array(d_pair) - (d_i + EARLY_OUT_MARGIN_M)  # the same float64 ops
            return [row for row in rows if row[1] < d_i]
        d_arr, out = self._exact(self.place(frames), stale, nearest_end=False)
        self._q0[stale] = q
        self._slack[stale] = d_arr - d_i - EARLY_OUT_MARGIN_M
        keep = out.distance < d_i
        if keep.all():
            return out
        return Contacts(*(getattr(out, f)[keep] for f in Contacts.__dataclass_fields__))

    def all_contacts(self, frames: Frames) -> Contacts:
        """Exact contacts of every pair, whatever its distance (one per pair: a half-space pair at
        its nearer end point); for reports and tests. Leaves the early-out state alone."""
        idx = np.arange(self.pair_count)
        return self._exact(self.place(frames), idx, nearest_end=True)[1]

    def nearest(self, frames: Frames, q: np.ndarray) -> tuple[float, int] | None:
        """(d, pair) of the nearest pair at q: its exact signed distance d (m; a half-space pair at its
        nearer end point) and its index into `pair_names`; None when the pass has no pair.

        frames : forward kinematics at q (n,). Exact, not a bound: the pairs are computed exactly in
        the order of their lower bounds (`lower_bounds`) until no pair left can be nearer than the
        nearest found, a few pairs when the early-out state is recent. Those exact distances update the
        early-out state (as `contacts` would: results never depend on it).
        """
        count = self.pair_count
        if not count:
            return None
        lb = self.lower_bounds(q)
        left = np.ones(count, dtype=bool)
        best, best_pair = math.inf, -1
        S = self.place(frames)
        d_i = self.config.influence_m
        while True:
            cand = np.flatnonzero(left & (lb < best))
            if not len(cand):
                return best, best_pair
            cand = np.sort(cand[np.argsort(lb[cand], kind="stable")[:SCALAR_PAIRS_MAX]])
            d_pair, _ = self._exact_few(S, cand)
            left[cand] = False
            self._q0[cand] = q
            self._slack[cand] = d_pair
            self._slack[cand] -= d_i + EARLY_OUT_MARGIN_M
            k = int(np.argmin(d_pair))
            if d_pair[k] < best:
                best, best_pair = float(d_pair[k]), int(cand[k])

    def lower_bounds(self, q: np.ndarray) -> np.ndarray:
        """(P,) a lower bound of every pair's distance at q from the cached exact ones, m (exact for
        the pairs the last `contacts` call recomputed at this q)."""
        grow = np.einsum("pn,pn->p", np.abs(q - self._q0), self._lever)
        return self._slack + self.config.influence_m - grow

    def _exact_few(self, S: np.ndarray, idx: np.ndarray) -> tuple[list[float], list[tuple]]:
        """`_exact` (nearest_end=False) for a few pairs in plain floats (boxes the segment touches or
        enters go to the vectorised kernel): (pair distances, rows as in `_update`)."""
        d_i = self.config.influence_m
        ia, ib, radius, body = self._ia_list, self._ib_list, self._radius_list, self._body_list
        ends = S.tolist()
        d_pair: list[float] = []
        rows: list[tuple] = []
        for p in idx.tolist():
            i, j = ia[p], ib[p]
            a0, a1 = ends[i]
            if p < self._seg_end:
                b0, b1 = ends[j]
                d, pa, pb, nrm = capsule_capsule_one(a0, a1, radius[i], b0, b1, radius[j])
                d_pair.append(d)
                rows.append((p, d, pa, pb, nrm, body[i], body[j]))
            elif p < self._hs_end:
                nx, ny, nz = nrm = self._hs_normal_list[j]
                c, r = self._hs_offset_list[j], radius[i]
                best = math.inf
                for x, y, z in (a0, a1):
                    s = nx * x + ny * y + nz * z - c
                    best = min(best, s - r)
                    if s - r < d_i:
                        rows.append((p, s - r, [x - nx * r, y - ny * r, z - nz * r],
                                     [x - nx * s, y - ny * s, z - nz * s], nrm, body[i], 0))
                d_pair.append(best)
            else:
                center, rotation, half = self._box_lists[j]
                one = capsule_box_one(a0, a1, radius[i], center, rotation, half)
                if one is None:  # touching or inside: the vectorised kernel covers that
                    d_box, c = self._exact(S, np.array([p]), nearest_end=False)
                    d_pair.append(float(d_box[0]))
                    rows += zip(c.pair.tolist(), c.distance.tolist(), c.point_a.tolist(),
                                c.point_b.tolist(), c.normal.tolist(), c.body_a.tolist(),
                                c.body_b.tolist(), strict=True)
                else:
                    d_pair.append(one[0])
                    rows.append((p, *one, body[i], 0))
        return d_pair, rows

    def _exact(self, S: np.ndarray, idx: np.ndarray, nearest_end: bool) -> tuple[np.ndarray, Contacts]:
        """Exact distances of pairs idx (sorted): ((len(idx),) pair distances, their contacts)."""
        zones = self.config.zones
        parts = []
        d_pair = np.empty(len(idx))
        cut = np.searchsorted(idx, [self._seg_end, self._hs_end])
        seg, hs, box = idx[: cut[0]], idx[cut[0]: cut[1]], idx[cut[1]:]
        if len(seg):
            i, j = self._ia[seg], self._ib[seg]
            c = capsule_capsule(S[i, 0], S[i, 1], self._radius[i], S[j, 0], S[j, 1], self._radius[j])
            dist, pa, pb, nrm = c.distance, c.point_a, c.point_b, c.normal
            d_pair[: cut[0]] = dist
            parts.append((seg, dist, pa, pb, nrm, self._body[i], self._body[j]))
        if len(hs):
            cap, z = self._ia[hs], self._ib[hs]
            nrm, r = zones.half_space_normal[z], self._radius[cap]
            ends = S[cap]  # (m, 2, 3)
            s = np.einsum("mei,mi->me", ends, nrm) - zones.half_space_offset[z][:, None]  # (m, 2)
            d_pair[cut[0]: cut[1]] = s.min(axis=1) - r
            if nearest_end:
                row, end = np.arange(len(hs)), np.argmin(s, axis=1)
            else:
                row, end = np.nonzero(s - r[:, None] < self.config.influence_m)
            p, sr, nr, rr = ends[row, end], s[row, end], nrm[row], r[row]
            parts.append((hs[row], sr - rr, p - nr * rr[:, None], p - nr * sr[:, None], nr,
                          self._body[cap[row]], np.zeros(len(row), int)))
        if len(box):
            cap, z = self._ia[box], self._ib[box]
            c = capsule_box(S[cap, 0], S[cap, 1], self._radius[cap], zones.box_center[z],
                            zones.box_rotation[z], zones.box_half[z])
            d_pair[cut[1]:] = c.distance
            parts.append((box, c.distance, c.point_a, c.point_b, c.normal, self._body[cap],
                          np.zeros(len(box), int)))
        if not parts:
            return d_pair, _EMPTY
        if len(parts) == 1:
            return d_pair, Contacts(*parts[0])
        return d_pair, Contacts(*(np.concatenate(x) for x in zip(*parts, strict=True)))


class _LazyContacts(Contacts):
    """`_contacts_of(rows)`, its arrays built on first access: the tick reads its contacts only when a
    damper row limits the scale (`twistrate.solver.limiting`), so most ticks never pay for them."""

    def __init__(self, rows: list[tuple]) -> None:  # (no dataclass __init__: the fields come later)
        object.__setattr__(self, "_rows", rows)

    def __getattr__(self, name: str) -> np.ndarray:  # only for attributes not set yet
        if name not in Contacts.__dataclass_fields__:
            raise AttributeError(name)
        built = _contacts_of(self.__dict__["_rows"])
        for field_name in Contacts.__dataclass_fields__:
            object.__setattr__(self, field_name, getattr(built, field_name))
        return getattr(built, name)


def _contacts_of(rows: list[tuple]) -> Contacts:
    """Contacts from plain rows (pair, distance, point_a, point_b, normal, body_a, body_b)."""
    if not rows:
        return _EMPTY
    ints = np.array([(p, ba, bb) for p, _, _, _, _, ba, bb in rows])
    floats = np.array([(d, *pa, *pb, *n) for _, d, pa, pb, n, _, _ in rows])
    return Contacts(ints[:, 0], floats[:, 0], floats[:, 1:4], floats[:, 4:7], floats[:, 7:10],
                    ints[:, 1], ints[:, 2])


def _levers(arm: Arm, body: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(n,) rho_j of the module docstring for a capsule with end points a, b (3,) m in the frame of
    body `body` >= 1: 0 for joints that do not move it, 1 for a prismatic joint that does, else a
    bound of the end points' distance from joint j's origin (m)."""
    n = arm.n
    rho = np.zeros(n)
    reach = max(float(np.linalg.norm(a)), float(np.linalg.norm(b)))
    for j in range(body - 1, -1, -1):  # from the link's own joint toward the root
        joint = arm.joints[j]
        rho[j] = 1.0 if joint.kind == PRISMATIC else reach
        if j > 0:  # |o_j - o_(j-1)| <= |offset of joint j| + joint j's own travel if prismatic
            reach += float(np.linalg.norm(joint.T_prev_joint[:3, 3]))
            if joint.kind == PRISMATIC:
                reach += max(abs(joint.position_min), abs(joint.position_max))
    return rho


def _touching(arm: Arm, pairs: tuple[tuple[str, str], ...]) -> set[tuple[int, int]]:
    """Body index pairs (i < j) of the config's extra touching link names."""
    names = arm.body_names
    out = set()
    for k, (x, y) in enumerate(pairs):
        try:
            i = body_index(x, names, f"keepout.touching[{k}][0]")
            j = body_index(y, names, f"keepout.touching[{k}][1]")
        except ModelError as exc:
            raise ConfigError(str(exc)) from None
        out.add((min(i, j), max(i, j)))
    return out
