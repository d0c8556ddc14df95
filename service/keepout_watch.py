"""Keep-out in the service's reports: what limited each tick's scale (twistrate.solver.limiting), the
nearest keep-out pair for the health message, and the keep-out events with their hold rule.

Events (docs/protocol.md section 10): `keepout_limiting` on the first tick a keep-out damper limits the
scale (none in force), `keepout_released` once no damper has limited it for RELEASE_HOLD_S in a row
(ticks counted, no clock). A grazing contact that limits the scale on and off within the hold gives one
pair of events, not one per tick: at most two events per RELEASE_HOLD_S.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

from twistrate.service import wire
from twistrate.solver.limiting import LIMIT_JOINT, LIMIT_KEEPOUT, NOT_LIMITED, Limiting, limiting

if TYPE_CHECKING:
    from twistrate.service.pipeline import Pipeline
    from twistrate.solver.resolve import Resolution

#: How long no keep-out damper may limit the scale before `keepout_released`, s.
RELEASE_HOLD_S = 0.25


class KeepoutWatch:
    """The limiting constraint of each tick and the keep-out events of one pipeline (tick thread)."""

    def __init__(self, pipeline: Pipeline) -> None:
        self.p = pipeline
        ko = pipeline.keepout
        #: (link, other, other is a zone) per pair of the pass, or () without keep-out
        self.links = () if ko is None else ko.pair_links
        self.hold_ticks = max(1, math.ceil(RELEASE_HOLD_S * pipeline.rate_hz))
        #: the constraint that limited the last solved tick's scale
        self.current: Limiting = NOT_LIMITED
        #: a keep-out damper limited the scale within the hold (between the two events)
        self.engaged = False
        self._clear_ticks = 0
        #: how many times a damper started to limit the scale (keepout_limiting events)
        self.engagements = 0
        #: the nearest pair any health report found: (distance m, link, other), or None
        self.closest: tuple[float, str, str] | None = None
        #: the newest health report's nearest pair (wire.KeepoutNearest), or None (no keep-out, no report
        #: yet); the `status` op replies with it
        self.nearest: wire.KeepoutNearest | None = None

    def step(self, res: Resolution | None) -> None:
        """Book one tick: res its resolution, or None when it did not solve (not running)."""
        lim = NOT_LIMITED if res is None else limiting(res)
        self.current = lim
        if not self.links:
            return
        if lim.by == LIMIT_KEEPOUT:
            self._clear_ticks = 0
            if not self.engaged:
                self.engaged = True
                self.engagements += 1
                link, other, _ = self.links[lim.pair]
                self.p.emit_event("keepout_limiting", f"{link} - {other} at {lim.distance:.4f} m limits the "
                                                      f"scale to {res.scale:.3f}")
        elif self.engaged:
            self._clear_ticks += 1
            if self._clear_ticks >= self.hold_ticks:
                self.engaged = False
                self._clear_ticks = 0
                self.p.emit_event("keepout_released", f"no keep-out damper limited the scale for "
                                                      f"{self.hold_ticks} ticks; now {lim.by}")

    def limiting(self) -> wire.Limiting:
        """The constraint that limited the last solved tick's scale, as the wire names it."""
        lim = self.current
        if lim.by == LIMIT_JOINT:
            return wire.Limiting(lim.by, lim.joint, lim.bound)
        if lim.by == LIMIT_KEEPOUT:
            link, other, _ = self.links[lim.pair]
            return wire.Limiting(lim.by, link=link, other=other)
        return wire.Limiting(lim.by)

    def status(self) -> dict[str, Any]:
        """The `status` op's `keepout` (the newest health report's nearest pair) and `limiting` (the last
        solved tick's) fields."""
        return {"keepout": self.nearest, "limiting": self.limiting()}

    def health(self, q: np.ndarray) -> dict[str, Any]:
        """encode_health's `keepout` and `limiting` arguments at the tick's joint state q (n,)."""
        wire_lim = self.limiting()
        ko = self.p.keepout
        found = None if ko is None else ko.nearest(self.p.kinematics(q)[0], q)
        if found is None:
            self.nearest = None
            return {"keepout": None, "limiting": wire_lim}
        d, pair = found
        link, other, zone = self.links[pair]
        if self.closest is None or d < self.closest[0]:
            self.closest = (d, link, other)
        bound = wire.MAX_KEEPOUT_DISTANCE_M
        self.nearest = wire.KeepoutNearest(min(bound, max(-bound, d)), link, other,
                                           "zone" if zone else "link")
        return {"keepout": self.nearest, "limiting": wire_lim}
