"""An arm placed in the scene (base pose in the world frame, tool-centre-point offset), checked with pinocchio:
the placed URDF's tool pose must equal T_world_base @ T_base_tool(q) @ T_tool_tcp for any q."""

from __future__ import annotations

import numpy as np
import pinocchio as pin
import pytest
from scipy.spatial.transform import Rotation

from coreach.errors import ConfigError
from coreach.world.urdf_placement import TCP_LINK, place_arm
from coreach.world.urdf_arm import shipped_urdf

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


def test_robot_config_places_the_arm_for_every_stage():
    """The robot plugin's base pose and tool offset (config options) give the pose pinocchio computes for the
    composed transform, for the torch chain that trains and vets and the numpy chain that runs on the robot
    (both read the placed URDF, which is also what a bundle ships)."""
    import torch

    from coreach.runtime.kinematics import Chain
    from coreach.world.urdf_arm import UrdfArm

    base_xyz, base_rpy_deg, tool_xyz, tool_rpy_deg = [0.2, -0.4, 0.7], [0.0, 0.0, 90.0], [0.0, 0.0, 0.05], [0, 30, 0]
    arm = UrdfArm(base_xyz=base_xyz, base_rpy_deg=base_rpy_deg, tool_xyz=tool_xyz, tool_rpy_deg=tool_rpy_deg)
    assert arm.tool_link == TCP_LINK and arm.dof == 7
    q = np.random.default_rng(3).uniform(arm.q_lower.numpy(), arm.q_upper.numpy(), size=(5, 7))
    want = [_se3(base_xyz, np.radians(base_rpy_deg)) * _pose(TEXT, "tool", qi) * _se3(tool_xyz, np.radians(tool_rpy_deg))
            for qi in q]
    pos, rot = arm.fk(torch.tensor(q))
    chain = Chain.from_string(arm.urdf_text(), arm.tool_link)
    n_pos, n_rot, n_jac = chain.fk_jacobian(q)
    # Jacobians in the world frame agree between the two chains (the numpy one is checked against pinocchio in
    # tests/test_runtime_kinematics.py)
    np.testing.assert_allclose(arm.fk_and_jacobian(torch.tensor(q))[2].numpy(), n_jac, atol=1e-10)
    for i, w in enumerate(want):
        np.testing.assert_allclose(pos[i].numpy(), w.translation, atol=1e-12)
        np.testing.assert_allclose(rot[i].numpy(), w.rotation, atol=1e-12)
        np.testing.assert_allclose(n_pos[i], w.translation, atol=1e-12)
        np.testing.assert_allclose(n_rot[i], w.rotation, atol=1e-12)


def test_robot_config_refuses_a_placement_that_is_not_three_numbers():
    from coreach.world.urdf_arm import UrdfArm

    with pytest.raises(ConfigError, match=r"option robot.base_xyz: expected three finite numbers"):
        UrdfArm(base_xyz=[0.1, 0.2])


def test_a_decoder_is_used_only_on_the_arm_and_placement_it_was_trained_on():
    from coreach.world.robot_identity import check_same_robot, robot_tags
    from coreach_plugins.robot.planar3 import Planar3
    from coreach.world.urdf_arm import UrdfArm

    trained = robot_tags(UrdfArm())
    check_same_robot(trained, UrdfArm(), "candidate x")  # the same arm passes
    with pytest.raises(ConfigError, match=r"candidate x: trained on another URDF of this arm .*base placement"):
        check_same_robot(trained, UrdfArm(base_xyz=[0.0, 0.1, 0.0]), "candidate x")
    with pytest.raises(ConfigError, match=r"trained on an arm with joints \[joint_1,.*give the same robot options"):
        check_same_robot(trained, Planar3(), "candidate x")
    check_same_robot({}, Planar3(), "candidate x")  # runs from before the tags: not checked


def test_demonstrations_of_a_moved_arm_are_not_taken_from_the_unmoved_arms_cache(tmp_path):
    """Same name, joints and limits, another base: the cached demonstrations must not be reused."""
    from coreach_plugins.dataset.scripted_shelf import ScriptedShelf
    from coreach.world.urdf_arm import UrdfArm

    data = ScriptedShelf(cache_dir=str(tmp_path))
    assert data.cache_path(UrdfArm()) == data.cache_path(UrdfArm())
    assert data.cache_path(UrdfArm()) != data.cache_path(UrdfArm(base_xyz=[0.0, 0.0, 0.1]))
