"""The tool pose from a `state` message of the planned shape (RULES: `tool` = {position, rotation
row-major} of T_base_tool), against pinocchio's SE3 as the independent representation."""

from __future__ import annotations

import numpy as np
import pinocchio as pin
import pytest

from twistrate.clients.vservo.toolpose import ToolPose, tool_pose_from_state
from twistrate.solver.errors import InputError


def _state(M: pin.SE3) -> dict:
    return {"kind": "state", "tick": 5, "tool": {"position": M.translation.tolist(),
                                                  "rotation": M.rotation.reshape(-1).tolist()}}


def test_row_major_rotation_and_position() -> None:
    M = pin.SE3(pin.exp3(np.array([0.3, -0.2, 1.1])), np.array([0.5, 0.1, 0.4]))
    np.testing.assert_allclose(tool_pose_from_state(_state(M)), M.homogeneous, atol=1e-15)
    poses = ToolPose()
    assert poses.origin() is None
    poses.update(_state(M))
    np.testing.assert_allclose(poses.origin(), [0.5, 0.1, 0.4])


@pytest.mark.parametrize("tool", [
    None,
    {"position": [0, 0], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, 1]},
    {"position": [0, 0, float("nan")], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, 1]},
    {"position": [0, 0, True], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, 1]},
    {"position": [0, 0, 0], "rotation": [1, 0, 0, 0, 1, 0, 0, 0, -1]},  # a reflection
    {"position": [0, 0, 0], "rotation": [2, 0, 0, 0, 1, 0, 0, 0, 1]},
])
def test_bad_tool_fields_are_refused_and_counted(tool) -> None:
    with pytest.raises(InputError, match=r"state\.tool"):
        tool_pose_from_state({"tool": tool})
    poses = ToolPose()
    poses.update({"tool": tool})
    assert poses.refused == 1 and poses.origin() is None
