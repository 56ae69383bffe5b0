"""An arm placed in the scene (base pose in the world frame, tool-centre-point offset), checked with pinocchio:
the placed URDF's tool pose must equal T_world_base @ T_base_tool(q) @ T_tool_tcp for any q."""

from __future__ import annotations

import numpy as np
import pinocchio as pin
import pytest
from scipy.spatial.transform import Rotation

from coreach.errors import ConfigError
from coreach.urdf_placement import TCP_LINK, place_arm
from coreach_plugins.robot.urdf_arm import shipped_urdf

TEXT = open(shipped_urdf()).read()


def _pose(urdf: str, frame: str, q: np.ndarray) -> pin.SE3:
    """Frame pose from pinocchio (the reference), forward kinematics from the URDF text."""
    model = pin.buildModelFromXML(urdf)
    data = model.createData()
    pin.framesForwardKinematics(model, data, q)
    return data.oMf[model.getFrameId(frame)]


def _se3(xyz, rpy) -> pin.SE3:
    # URDF rpy is extrinsic X-Y-Z: R = Rz(yaw) Ry(pitch) Rx(roll) (scipy's "xyz", lower case = extrinsic)
    return pin.SE3(Rotation.from_euler("xyz", rpy).as_matrix(), np.asarray(xyz, dtype=float))


def test_identity_placement_keeps_the_urdf():
    assert place_arm(TEXT, "tool") == (TEXT, "tool")


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_placed_tool_pose_matches_the_composed_transform(seed):
    rng = np.random.default_rng(seed)
    base = (rng.uniform(-0.5, 0.5, 3), rng.uniform(-np.pi, np.pi, 3))  # e.g. an arm at a wheelchair's side
    tool = (rng.uniform(-0.1, 0.1, 3), rng.uniform(-np.pi, np.pi, 3))
    placed, tool_link = place_arm(TEXT, "tool", *base, *tool)
    assert tool_link == TCP_LINK
    q = rng.uniform(-1.0, 1.0, 7)
    expected = _se3(*base) * _pose(TEXT, "tool", q) * _se3(*tool)
    got = _pose(placed, TCP_LINK, q)
    np.testing.assert_allclose(got.translation, expected.translation, atol=1e-12)
    np.testing.assert_allclose(got.rotation, expected.rotation, atol=1e-12)


def test_placement_refusals():
    with pytest.raises(ConfigError, match="tool link 'gripper' is not a link"):
        place_arm(TEXT, "gripper", base_xyz=(0.1, 0, 0))
    with pytest.raises(ConfigError, match="expected 3 numbers"):
        place_arm(TEXT, "tool", base_xyz=(0.1, 0))
    twice, _ = place_arm(TEXT, "tool", tool_xyz=(0, 0, 0.01))
    with pytest.raises(ConfigError, match="reserved"):
        place_arm(twice, "tool", tool_xyz=(0, 0, 0.01))
