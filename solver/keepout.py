"""The per-tick keep-out pass: link capsules placed by forward kinematics, an influence-distance
early-out, exact distances of the pairs within it, and their velocity-damper rows A q_dot >= b.

Pairs checked: every moving capsule against every zone (half-spaces, boxes, spheres, capsule
zones), and capsule pairs on links allowed to collide (`ArmGeometry.self_pairs`; root-link
capsules count as fixed: against the moving links only). Constant pairs (root link against a zone)
are never checked: no joint can change them.

Early-out (per tick, about 20 small numpy calls, no Python loop over pairs): a pair can only be
within the influence distance d_i when a lower bound of its distance is below d_i. The bounds:
capsule pairs, the distance of their bounding spheres (centre the segment's mid-point, radius
half its length plus its radius); capsule to box, the distance of the capsule's mid-point to the
box minus that bounding radius; capsule to half-space, the exact signed distance of each end point.
Only the pairs that pass get the exact kernels of `twistrate.solver.distance`.

Velocity damper (Faverjon & Tournassoud 1987, ICRA; the form of Kanoun, Lamiraux & Wieber 2011,
IEEE T-RO 27(4)): for each pair with d < d_i, with n the unit normal from b to a and J_pa, J_pb the
point Jacobians of the closest points (base frame; J_p = [[I, -[r]x], [0, I]] J of the tool
Jacobian J with r = p - p_tool, restricted to the joints that move the point's link),

    n^T (J_pa - J_pb) q_dot >= -xi (d - d_s) / (d_i - d_s).

Its first-order integral over a tick of period T keeps d >= d_s when T xi <= d_i - d_s. A
half-space pair gives one row per capsule end point within d_i (the segment's distance to a plane
is the smaller of two affine functions, so both ends are constrained, with no switching between
them); every other pair gives one row.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.arm import Arm
from twistrate.solver.distance import capsule_box, capsule_capsule
from twistrate.solver.errors import ConfigError, ModelError
from twistrate.solver.geometry import body_index
from twistrate.solver.jacobians import offset_point_jacobian
from twistrate.solver.kinematics import Frames, cross_rows
from twistrate.solver.zones import KeepOutConfig

#: Margin (m) added to the early-out bounds so that rounding never drops a pair at d ~= d_i.
EARLY_OUT_MARGIN_M = 1e-9


@dataclass(frozen=True, eq=False)
class Contacts:
    """Rows of the keep-out pass (r >= 0 of them), one per damper row.

    pair : (r,) index into `KeepOut.pair_names`.
    distance : (r,) signed distance of the pair's surfaces, m.
    point_a, point_b : (r, 3) closest points, base frame, m (a on an arm capsule).
    normal : (r, 3) unit normal from b to a, base frame.
    body_a, body_b : (r,) bodies carrying the points (0: root link or a zone, which do not move).
    """

    pair: np.ndarray
    distance: np.ndarray
    point_a: np.ndarray
    point_b: np.ndarray
    normal: np.ndarray
    body_a: np.ndarray
    body_b: np.ndarray


def _empty_contacts() -> Contacts:
    z3 = np.zeros((0, 3))
    zi = np.zeros(0, dtype=int)
    return Contacts(zi, np.zeros(0), z3, z3, z3, zi, zi)


class KeepOut:
    """Keep-out plan for one arm and one `[keepout]` config: built once, evaluated every tick.

    pair_names : (name_a, name_b) per pair index, a an arm capsule, b a capsule or zone.
    Segments (internal): the moving capsules first (km of them), then the constant ones (root-link
    capsules, capsule zones, spheres); segment pairs index into that list.
    """

    def __init__(self, arm: Arm, config: KeepOutConfig) -> None:
        self.arm, self.config = arm, config
        zones = config.zones
        n = arm.n
        caps = arm.geometry.capsules
        moving = [k for k, c in enumerate(caps) if c.body > 0]
        fixed = [k for k, c in enumerate(caps) if c.body == 0]
        km = len(moving)
        self.moving_count = km
        # Homogeneous [a, b, mid] of each moving capsule in its joint's axis frame: (km, 4, 3).
        H = np.ones((km, 4, 3))
        for row, k in enumerate(moving):
            c = caps[k]
            pts = np.array([c.a, c.b, 0.5 * (c.a + c.b)]).T
            if arm.T_axis_joint is not None:
                A = arm.T_axis_joint[c.body - 1]
                pts = A[:3, :3] @ pts + A[:3, 3:]
            H[row, :3] = pts
        self._H = H
        self._axis_index = np.array([caps[k].body - 1 for k in moving], dtype=int)
        # Constant segments in the base frame: root capsules, then capsule zones and spheres.
        R0, t0 = arm.T_base_root[:3, :3], arm.T_base_root[:3, 3]
        const_a = [R0 @ caps[k].a + t0 for k in fixed] + list(zones.segment_a)
        const_b = [R0 @ caps[k].b + t0 for k in fixed] + list(zones.segment_b)
        ns = km + len(const_a)
        self._segments = np.zeros((ns, 3, 3))  # [segment, (a, b, mid), xyz]
        if const_a:
            ca, cb = np.array(const_a), np.array(const_b)
            self._segments[km:] = np.stack([ca, cb, 0.5 * (ca + cb)], axis=1)
        order = moving + fixed
        radius = np.array([caps[k].radius for k in order] + list(zones.segment_radius), float)
        self._radius = radius
        half_len = 0.5 * np.linalg.norm(np.array([caps[k].b - caps[k].a for k in order]
                                                 + list(zones.segment_b - zones.segment_a)).reshape(-1, 3),
                                        axis=1)
        bound = half_len + radius
        self._body = np.array([caps[k].body for k in order] + [0] * len(zones.segment_radius), dtype=int)
        seg_names = [caps[k].name for k in order] + list(zones.segment_names)
        # Segment pairs: self pairs (through the capsule order above), then moving capsule x zone.
        where = {k: s for s, k in enumerate(order)}
        pairs = []
        if config.self_collision:
            extra = frozenset(_touching(arm, config.touching))
            for k, m in arm.geometry.self_pairs(extra):
                i, j = where[k], where[m]
                if i < km or j < km:
                    pairs.append((i, j) if i < km else (j, i))
        first_zone = km + len(fixed)
        pairs += [(i, j) for i in range(km) for j in range(first_zone, ns)]
        self._pi = np.array([p[0] for p in pairs], dtype=int)
        self._pj = np.array([p[1] for p in pairs], dtype=int)
        d_i = config.influence_m + EARLY_OUT_MARGIN_M
        self._pair_reach2 = (bound[self._pi] + bound[self._pj] + d_i) ** 2
        names = [(seg_names[i], seg_names[j]) for i, j in pairs]
        # Half-spaces: moving capsule i x half-space h, pair index base + i * h_count + h.
        h = len(zones.half_space_offset)
        self._hs_base = len(names)
        self._hs_normal_T = zones.half_space_normal.T.copy()  # (3, h)
        self._hs_normal = zones.half_space_normal
        self._hs_offset = zones.half_space_offset
        # (km, 1, h): an end point is near when normal^T p < c + r + d_i.
        self._hs_reach = zones.half_space_offset[None, None, :] + radius[:km, None, None] + d_i
        names += [(seg_names[i], zones.half_space_names[z]) for i in range(km) for z in range(h)]
        # Boxes: moving capsule i x box z, pair index base + i * nb + z.
        nb = len(zones.box_half)
        self._box_base = len(names)
        self._box_reach2 = (bound[:km, None] + d_i) ** 2  # (km, 1)
        names += [(seg_names[i], zones.box_names[z]) for i in range(km) for z in range(nb)]
        self.pair_names: tuple[tuple[str, str], ...] = tuple(names)
        # Column masks: joint j moves body b iff j < b. (n + 1, n).
        self._mask = (np.arange(n)[None, :] < np.arange(n + 1)[:, None]).astype(float)

    def place(self, frames: Frames) -> np.ndarray:
        """(ns, 3, 3) every segment's [a, b, mid] in the base frame at the frames' configuration, m."""
        S = self._segments
        km = self.moving_count
        if km:
            P = np.matmul(frames.T_base_axis[self._axis_index], self._H)  # (km, 4, 3)
            S[:km] = P[:, :3].transpose(0, 2, 1)
        return S

    def contacts(self, frames: Frames, everything: bool = False) -> Contacts:
        """Contacts of the pairs within the influence distance (all pairs when `everything`).

        frames : forward kinematics at q (`twistrate.solver.kinematics.forward`).
        With everything=True no early-out is applied and each half-space pair reports only its
        nearer end point (for reports and tests; per tick use the default).
        """
        S = self.place(frames)
        km = self.moving_count
        zones = self.config.zones
        mids = S[:, 2]
        # Segment pairs: bounding-sphere early-out.
        if len(self._pi):
            gap = mids[self._pi] - mids[self._pj]
            seg_near = np.flatnonzero(np.einsum("ki,ki->k", gap, gap) < self._pair_reach2)
            if everything:
                seg_near = np.arange(len(self._pi))
        else:
            seg_near = self._pi
        # Half-spaces: exact end-point distances.
        if len(self._hs_offset) and km:
            side = S[:km, :2] @ self._hs_normal_T  # (km, 2, h) normal^T p
            if everything:
                end = np.argmin(side, axis=1)  # (km, h)
                cap, hs = np.divmod(np.arange(km * len(self._hs_offset)), len(self._hs_offset))
                hs_hits = (cap, end.ravel(), hs)
            else:
                hs_hits = np.nonzero(side < self._hs_reach)
        else:
            side, hs_hits = None, (np.zeros(0, int),) * 3
        # Boxes: capsule mid-point to box distance minus the bounding radius.
        nb = len(zones.box_half)
        if nb and km:
            rel = np.einsum("kzi,zij->kzj", mids[:km, None, :] - zones.box_center[None], zones.box_rotation)
            excess = np.maximum(np.abs(rel) - zones.box_half[None], 0.0)
            box_near = np.nonzero(np.einsum("kzi,kzi->kz", excess, excess) < self._box_reach2)
            if everything:
                box_near = np.divmod(np.arange(km * nb), nb)
        else:
            box_near = (np.zeros(0, int),) * 2
        if not (len(seg_near) or len(hs_hits[0]) or len(box_near[0])):
            return _empty_contacts()
        parts = []
        if len(seg_near):
            i, j = self._pi[seg_near], self._pj[seg_near]
            c = capsule_capsule(S[i, 0], S[i, 1], self._radius[i], S[j, 0], S[j, 1], self._radius[j])
            parts.append((seg_near, c.distance, c.point_a, c.point_b, c.normal, self._body[i], self._body[j]))
        if len(hs_hits[0]):
            cap, end, hs = hs_hits
            p = S[cap, end]
            s = side[cap, end, hs] - self._hs_offset[hs]
            nrm = self._hs_normal[hs]
            r = self._radius[cap]
            parts.append((self._hs_base + cap * len(self._hs_offset) + hs, s - r, p - nrm * r[:, None],
                          p - nrm * s[:, None], nrm, self._body[cap], np.zeros(len(cap), int)))
        if len(box_near[0]):
            cap, z = box_near
            c = capsule_box(S[cap, 0], S[cap, 1], self._radius[cap], zones.box_center[z],
                            zones.box_rotation[z], zones.box_half[z])
            parts.append((self._box_base + cap * nb + z, c.distance, c.point_a, c.point_b, c.normal,
                          self._body[cap], np.zeros(len(cap), int)))
        cols = [np.concatenate(x) for x in zip(*parts, strict=True)]
        out = Contacts(*cols)
        if everything:
            return out
        keep = out.distance < self.config.influence_m
        return out if keep.all() else Contacts(*(x[keep] for x in cols))

    def damper_rows(self, contacts: Contacts, J: np.ndarray, T_base_tool: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        """Velocity-damper rows (A, b) of the contacts: A q_dot >= b, one row per contact.

        J : (6, n) geometric Jacobian of the tool point, base frame, rows (v, w), at the contacts'
            configuration; T_base_tool : (4, 4) the tool pose there.
        Returns A : (r, n), m/s per unit joint rate: n^T (J_pa - J_pb), the rate of change of the
        distance; b : (r,) m/s, -xi (d - d_s) / (d_i - d_s) (negative beyond d_s: an allowed
        approach speed; positive inside d_s: a required escape speed).
        """
        cfg = self.config
        b = -cfg.gain_m_s * (contacts.distance - cfg.security_m) / (cfg.influence_m - cfg.security_m)
        return distance_rate_rows(contacts, J, T_base_tool, self._mask), b

    def rows(self, frames: Frames, J: np.ndarray) -> tuple[np.ndarray, np.ndarray, Contacts]:
        """(A, b, contacts) of this tick: `contacts(frames)` then `damper_rows`; A (r, n), b (r,)."""
        contacts = self.contacts(frames)
        if not len(contacts.pair):
            return np.zeros((0, self.arm.n)), np.zeros(0), contacts
        A, b = self.damper_rows(contacts, J, frames.T_base_tool)
        return A, b, contacts


def distance_rate_rows(contacts: Contacts, J: np.ndarray, T_base_tool: np.ndarray,
                       mask: np.ndarray) -> np.ndarray:
    """(r, n) rows n^T (J_pa - J_pb): d_dot = row @ q_dot, m/s per unit joint rate.

    n^T J_p q_dot = n^T v_tool + n^T (w x r) = n^T v_tool + (r x n)^T w with r = p - p_tool (the
    linear rows of the offset-point Jacobian), restricted by mask : (n + 1, n) (mask[b, j] = 1 when
    joint j moves body b) to the joints that move each point.
    """
    p_tool = T_base_tool[:3, 3]
    nrm = contacts.normal

    def side(point: np.ndarray, body: np.ndarray) -> np.ndarray:
        G = np.concatenate([nrm, cross_rows(point - p_tool, nrm)], axis=1) @ J  # (r, n)
        return G * mask[body]

    return side(contacts.point_a, contacts.body_a) - side(contacts.point_b, contacts.body_b)


def point_jacobian(J: np.ndarray, T_base_tool: np.ndarray, p_base: np.ndarray, body: int) -> np.ndarray:
    """Jacobian of a point fixed to body `body`, at p_base (3,) m, base frame.

    J : (6, n) geometric Jacobian of the tool point, base frame, rows (v, w); T_base_tool (4, 4).
    Returns (6, n), base frame, rows (v, w): [[I, -[r]x], [0, I]] J with r = p - p_tool, its
    columns of joints j >= body zeroed (they do not move that link); body 0 gives zeros.
    """
    Jp = offset_point_jacobian(J, p_base - T_base_tool[:3, 3])
    Jp[:, body:] = 0.0
    return Jp


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
