"""The tool's pose from the service's `state` output (docs/protocol.md 7.6: at the health rate; its
`tool` field is {position: [3] m, rotation: [9] row-major} of T_base_tool, base frame).

A camera in the cell needs the tool origin for its twists (servo.wire_twist). `ToolPose` keeps the
newest, from a decoded message (`update_message`) or a plain map of the message's shape (`update`);
`origin()` is what `Runner(tool_origin=...)` takes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from twistrate.solver.errors import InputError, field_error

#: A rotation whose R R^T differs from I by more than this is refused (rounding of 9 float64s is ~1e-15).
ROTATION_TOL = 1e-6


def tool_pose_from_state(state: Mapping[str, Any]) -> np.ndarray:
    """(4, 4) T_base_tool of a `state` message's `tool` field. Raises InputError naming the field."""
    tool = state.get("tool") if isinstance(state, Mapping) else None
    if not isinstance(tool, Mapping):
        raise field_error(InputError, "state.tool", tool, "a map {position: [3] m, rotation: [9] row-major}")
    position, rotation = tool.get("position"), tool.get("rotation")
    ok = (isinstance(position, (list, tuple)) and len(position) == 3 and isinstance(rotation, (list, tuple))
          and len(rotation) == 9 and all(isinstance(x, (int, float)) and not isinstance(x, bool)
                                         and math.isfinite(x) for x in (*position, *rotation)))
    if not ok:
        raise field_error(InputError, "state.tool", tool,
                          "position: 3 finite numbers, rotation: 9 finite numbers")
    R = np.array(rotation, dtype=float).reshape(3, 3)
    if np.abs(R @ R.T - np.eye(3)).max() > ROTATION_TOL or np.linalg.det(R) < 0.0:
        raise field_error(InputError, "state.tool.rotation", list(rotation),
                          f"a rotation, row-major (orthonormal within {ROTATION_TOL:g}, det +1)")
    T = np.eye(4)
    T[:3, :3] = R
    T[:3, 3] = position
    return T


class ToolPose:
    """The newest tool pose from `state` messages; None until one arrived. Bad ones are counted."""

    def __init__(self) -> None:
        self.T_base_tool: np.ndarray | None = None
        self.refused = 0

    def update_message(self, message: Any) -> None:
        """Take a decoded state message (twistrate.service.wire.StateMessage: tool_position (3,) m,
        tool_rotation (3, 3), base frame)."""
        T = np.eye(4)
        T[:3, :3], T[:3, 3] = message.tool_rotation, message.tool_position
        self.T_base_tool = T

    def update(self, state: Mapping[str, Any]) -> None:
        try:
            self.T_base_tool = tool_pose_from_state(state)
        except InputError:
            self.refused += 1

    def origin(self) -> np.ndarray | None:
        """(3,) tool origin, base frame, m, or None."""
        return None if self.T_base_tool is None else self.T_base_tool[:3, 3].copy()
