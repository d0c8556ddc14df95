"""An arm as a model of the compiled kinematics library pinocchio: the reference of `bench solver` and the
tests' oracle. pinocchio is a test-only dependency (the `test` extra), imported only when a model is built;
without it, pinocchio_model raises ImportError with the command that installs it."""

from __future__ import annotations

from typing import Any

import numpy as np

from twistrate.solver.arm import REVOLUTE, Arm


def pinocchio_model(arm: Arm) -> tuple[Any, int]:
    """(model, tool_frame_id): the pinocchio Model of `arm` (Carpentier et al. 2019, "The Pinocchio C++
    library"), built independently of our kernels from the arm's public description: joint i is a
    JointModelRevoluteUnaligned / JointModelPrismaticUnaligned about/along `joints[i].axis`, placed at
    `joints[i].T_prev_joint` in its parent joint (the mount folded into the first), and the tool is an
    operational frame at `T_last_tool` on the last joint. Joint i of the arm is pinocchio joint i + 1.

    Raises ImportError when pinocchio is not importable (a test-only dependency).
    """
    try:
        import pinocchio as pin
    except ImportError as exc:
        raise ImportError(f"the compiled kinematics reference needs pinocchio ({exc}); install the test "
                          "extra: .venv/bin/pip install -e '.[test]'") from None

    model = pin.Model()
    parent = 0
    for i, j in enumerate(arm.joints):
        placement = (arm.T_base_root @ j.T_prev_joint) if i == 0 else j.T_prev_joint
        axis = np.asarray(j.axis, dtype=float)
        kind = pin.JointModelRevoluteUnaligned if j.kind == REVOLUTE else pin.JointModelPrismaticUnaligned
        parent = model.addJoint(parent, kind(axis), _se3(pin, placement), j.name)
    frame = pin.Frame("tool", parent, _se3(pin, arm.T_last_tool), pin.FrameType.OP_FRAME)
    return model, model.addFrame(frame)


def _se3(pin: Any, T: np.ndarray) -> Any:
    """pinocchio SE3 of a (4, 4) transform."""
    return pin.SE3(np.array(T[:3, :3]), np.array(T[:3, 3]))
