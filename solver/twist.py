"""The desired tool twist of a tick converted to the base frame at the tool point."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from twistrate.solver.errors import InputError, field_error

if TYPE_CHECKING:
    from twistrate.solver.resolve import DesiredTwist


def twist_base(twist: DesiredTwist, T_base_tool: np.ndarray) -> np.ndarray:
    """(6,) desired twist in the base frame at the tool point, rows (v, w), m/s and rad/s."""
    x = np.empty(6)
    frame = twist.frame
    point = twist.point
    if frame == "base":
        x[:3] = twist.linear
        x[3:] = twist.angular
    elif frame == "tool":
        R = T_base_tool[:3, :3]
        x[:3] = R @ twist.linear
        x[3:] = R @ twist.angular
        point = R @ point
    else:
        raise field_error(InputError, "twist.frame", frame, "'base' or 'tool'")
    if point[0] or point[1] or point[2]:  # nan is truthy, so a nan point propagates into x
        # v_tool = v_ref + w x (p_tool - p_ref) = v_ref + r x w, r = p_ref - p_tool = point.
        r0, r1, r2 = point.tolist()
        w0, w1, w2 = x[3:].tolist()
        x[0] += r1 * w2 - r2 * w1
        x[1] += r2 * w0 - r0 * w2
        x[2] += r0 * w1 - r1 * w0
    return x
