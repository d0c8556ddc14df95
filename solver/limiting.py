"""Which constraint limited the task scale of one tick: none, a joint bound (which joint, which kind of
bound) or a keep-out velocity damper (which pair), read from a Resolution.

The scaling problem (`twistrate.solver.scaling`) keeps the twist's direction and finds the largest
scale the per-tick bounds and the damper rows allow. When the scale is below 1, or no scale existed
(tracking), some of those constraints are active at the returned rates; this module names one of
them by a fixed priority (docs/keepout.md, "Health and events"):

1. scale 1 and not tracking: nothing limits the scale (`LIMIT_NONE`), whatever rests on a bound;
2. a damper row active at the rates (`Resolution.rows_active`): keep-out (`LIMIT_KEEPOUT`), the
   active row whose contact is nearest (the first on ties);
3. a joint on a bound (`Resolution.limits_active`): joint limit (`LIMIT_JOINT`), the kind by the
   priority position, velocity, acceleration (a joint on its position limit cannot be relieved by
   waiting, a velocity or acceleration bound can), the lowest joint index on ties;
4. otherwise (a scale below 1 with no constraint found active: rounding at a vertex) `LIMIT_NONE`.

Keep-out comes before joint bounds when both are active: the damper is the one an operator can act
on by steering away, and the one the keep-out events report.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.limits import LIMIT_ACCELERATION, LIMIT_POSITION, LIMIT_VELOCITY
from twistrate.solver.resolve import Resolution

LIMIT_NONE = "none"
LIMIT_JOINT = "joint"
LIMIT_KEEPOUT = "keepout"
#: what may limit the scale (the wire's `limiting.by` enumeration must equal it)
LIMITERS: tuple[str, ...] = (LIMIT_NONE, LIMIT_JOINT, LIMIT_KEEPOUT)
#: kinds of joint bound, in priority order (the wire's `limiting.bound` enumeration must equal it)
BOUND_KINDS: tuple[str, ...] = ("position", "velocity", "acceleration")
_BITS = (LIMIT_POSITION, LIMIT_VELOCITY, LIMIT_ACCELERATION)


@dataclass(frozen=True)
class Limiting:
    """The constraint that limited one tick's scale.

    by : one of LIMITERS.
    joint : 0-based joint index when by is "joint", else None.
    bound : one of BOUND_KINDS when by is "joint", else None.
    pair : index into `KeepOut.pair_names` when by is "keepout", else None.
    distance : signed distance of that pair's active contact, m, when by is "keepout", else None.
    """

    by: str
    joint: int | None = None
    bound: str | None = None
    pair: int | None = None
    distance: float | None = None


NOT_LIMITED = Limiting(LIMIT_NONE)


def limiting(res: Resolution) -> Limiting:
    """The constraint that limited res's scale, by the priority of the module docstring."""
    if res.scale >= 1.0 and not res.tracking:
        return NOT_LIMITED
    active = res.rows_active
    if active is not None and active.any() and res.contacts is not None:
        idx = np.flatnonzero(active)
        k = int(idx[int(np.argmin(res.contacts.distance[idx]))])
        return Limiting(LIMIT_KEEPOUT, pair=int(res.contacts.pair[k]),
                        distance=float(res.contacts.distance[k]))
    bits = res.limits_active
    for kind, bit in zip(BOUND_KINDS, _BITS, strict=True):
        on = np.flatnonzero(bits & bit)
        if len(on):
            return Limiting(LIMIT_JOINT, joint=int(on[0]), bound=kind)
    return NOT_LIMITED
