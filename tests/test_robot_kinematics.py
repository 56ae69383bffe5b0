"""Kinematics of the robot plugins checked against pinocchio, finite differences and textbook formulas."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
import torch

from coreach.errors import ConfigError
from coreach_plugins.robot.planar3 import Planar3
from coreach.world.urdf_arm import UrdfArm, shipped_urdf
from coreach.host.protocols import Robot

pin = pytest.importorskip("pinocchio")

# A small arm of our own with a non-trivial rpy on every joint, a y-axis joint and a tool offset,
# so origins and axes are exercised beyond the shipped arm (whose origins are pure z offsets).
FOREIGN_URDF = """<?xml version="1.0"?>
<robot name="tiny2">
  <link name="world"/>
  <link name="upper"/>
  <link name="lower"/>
  <link name="grip"/>
  <joint name="shoulder" type="revolute">
    <parent link="world"/><child link="upper"/>
    <origin xyz="0.05 -0.02 0.3" rpy="0.1 -0.2 0.3"/>
    <axis xyz="0 0 1"/>
    <limit lower="-1.5" upper="2.5" velocity="0.8" effort="10"/>
  </joint>
  <joint name="elbow" type="revolute">
    <parent link="upper"/><child link="lower"/>
    <origin xyz="0.4 0 0" rpy="0 0.25 -0.4"/>
    <axis xyz="0 1 0"/>
    <limit lower="-2.0" upper="1.0" velocity="1.1" effort="5"/>
  </joint>
  <joint name="grip_mount" type="fixed">
    <parent link="lower"/><child link="grip"/>
    <origin xyz="0.3 0.01 -0.02" rpy="0.5 0 0.2"/>
  </joint>
</robot>
"""


def _pin_reference(urdf_path: str, tool: str, q: np.ndarray, joint_names: list[str]):
    """Tool position, rotation and LOCAL_WORLD_ALIGNED Jacobian from pinocchio, in our joint order."""
    model = pin.buildModelFromUrdf(urdf_path)
    data = model.createData()
    frame = model.getFrameId(tool)
    # pinocchio orders q by its own joint tree; map by name so the comparison never relies on order
    idx_q = [model.idx_qs[model.getJointId(n)] for n in joint_names]
    idx_v = [model.idx_vs[model.getJointId(n)] for n in joint_names]
    pos, rot, jac = [], [], []
    for qi in q:
        qp = np.zeros(model.nq)
        qp[idx_q] = qi
        pin.forwardKinematics(model, data, qp)
        pin.updateFramePlacements(model, data)
        full = pin.computeFrameJacobian(model, data, qp, frame, pin.LOCAL_WORLD_ALIGNED)
        pos.append(data.oMf[frame].translation.copy())
        rot.append(data.oMf[frame].rotation.copy())
        jac.append(full[:, idx_v])
    return np.array(pos), np.array(rot), np.array(jac)


def _random_q(robot, n: int, seed: int) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    lo, hi = robot.q_lower.double(), robot.q_upper.double()
    return lo + (hi - lo) * torch.rand(n, robot.dof, generator=g, dtype=torch.float64)


def _fd_jacobian(robot, q: torch.Tensor, h: float = 1e-6) -> torch.Tensor:
    """Central differences of FK: linear rows from position, angular rows from dR/dq R^T (skew part)."""
    cols = []
    for i in range(q.shape[1]):
        dq = torch.zeros_like(q)
        dq[:, i] = h
        (p1, r1), (p0, r0) = robot.fk(q + dq), robot.fk(q - dq)
        _, r = robot.fk(q)
        w_hat = (r1 - r0) / (2 * h) @ r.transpose(1, 2)  # [B, 3, 3] skew matrix of angular velocity
        w = torch.stack([w_hat[:, 2, 1], w_hat[:, 0, 2], w_hat[:, 1, 0]], dim=1)
        cols.append(torch.cat([(p1 - p0) / (2 * h), w], dim=1))
    return torch.stack(cols, dim=2)  # [B, 6, n]


# ---------------------------------------------------------------- (a) shipped URDF vs pinocchio


def test_seven_joint_arm_matches_pinocchio():
    # pinocchio as reference: an independent URDF reader and kinematics library
    arm = UrdfArm()
    q = _random_q(arm, 50, seed=0)
    pos, rot = arm.fk(q)
    jac = arm.jacobian(q)
    ref_pos, ref_rot, ref_jac = _pin_reference(shipped_urdf(), "tool", q.numpy(), arm.joint_names)
    assert pos.dtype == rot.dtype == jac.dtype == torch.float64
    np.testing.assert_allclose(pos.numpy(), ref_pos, atol=1e-8, rtol=0)
    np.testing.assert_allclose(rot.numpy(), ref_rot, atol=1e-8, rtol=0)
    np.testing.assert_allclose(jac.numpy(), ref_jac, atol=1e-8, rtol=0)


def test_seven_joint_arm_float32_follows_q_and_agrees_with_float64():
    arm = UrdfArm()
    q = _random_q(arm, 20, seed=1)
    pos64, rot64 = arm.fk(q)
    pos32, rot32 = arm.fk(q.float())
    jac32 = arm.jacobian(q.float())
    assert pos32.dtype == rot32.dtype == jac32.dtype == torch.float32
    # float32 round-off over 8 chained transforms; 1e-5 m is common practice for float32 kinematics
    torch.testing.assert_close(pos32.double(), pos64, atol=1e-5, rtol=0)
    torch.testing.assert_close(rot32.double(), rot64, atol=1e-5, rtol=0)
    torch.testing.assert_close(jac32.double(), arm.jacobian(q), atol=1e-5, rtol=0)


def test_seven_joint_arm_satisfies_protocol_and_home_is_regular():
    arm = UrdfArm()
    assert isinstance(arm, Robot)
    assert arm.dof == 7 and len(arm.joint_names) == 7
    home = arm.q_home.double()
    assert torch.all(home > arm.q_lower.double()) and torch.all(home < arm.q_upper.double())
    # a 7-joint arm away from singularities has a rank-6 Jacobian
    jac = arm.jacobian(home[None])
    assert torch.linalg.matrix_rank(jac[0], atol=1e-3).item() == 6


# ---------------------------------------------------------------- (b) Planar3


def test_planar3_jacobian_matches_finite_differences():
    robot = Planar3()
    q = _random_q(robot, 40, seed=2)
    torch.testing.assert_close(robot.jacobian(q), _fd_jacobian(robot, q), atol=1e-8, rtol=0)


def test_planar3_matches_textbook_two_link_arm():
    # Textbook closed form of the planar 2-link arm (from memory):
    #   x = l1 cos q1 + l2 cos(q1+q2),  y = l1 sin q1 + l2 sin(q1+q2)
    #   J = [[-l1 sin q1 - l2 sin(q1+q2), -l2 sin(q1+q2)], [l1 cos q1 + l2 cos(q1+q2), l2 cos(q1+q2)]]
    # The 3-link arm's wrist point (tool minus the last link) must follow it for any q3.
    l1, l2, l3 = 0.35, 0.30, 0.15
    robot = Planar3(links=[l1, l2, l3])
    q = _random_q(robot, 30, seed=3)
    q1, q2, q3 = q.unbind(1)
    pos, rot = robot.fk(q)
    phi = q1 + q2 + q3
    wrist = pos[:, :2] - l3 * torch.stack([torch.cos(phi), torch.sin(phi)], dim=1)
    expected = torch.stack([l1 * torch.cos(q1) + l2 * torch.cos(q1 + q2),
                            l1 * torch.sin(q1) + l2 * torch.sin(q1 + q2)], dim=1)
    torch.testing.assert_close(wrist, expected, atol=1e-12, rtol=0)
    assert torch.all(pos[:, 2] == 0)
    # the tool frame is the base frame turned about z by the sum of the joint angles
    torch.testing.assert_close(rot[:, :2, 0], torch.stack([torch.cos(phi), torch.sin(phi)], 1), atol=1e-12, rtol=0)
    torch.testing.assert_close(rot[:, 2, 2], torch.ones_like(phi), atol=0, rtol=0)

    # With a zero-length last link the tool is the 2-link tip and the first two columns are the textbook J.
    two = Planar3(links=[l1, l2, 0.0])
    jac = two.jacobian(q)
    textbook = torch.stack([
        torch.stack([-l1 * torch.sin(q1) - l2 * torch.sin(q1 + q2), -l2 * torch.sin(q1 + q2)], 1),
        torch.stack([l1 * torch.cos(q1) + l2 * torch.cos(q1 + q2), l2 * torch.cos(q1 + q2)], 1),
    ], dim=1)  # [B, 2, 2]
    torch.testing.assert_close(jac[:, :2, :2], textbook, atol=1e-12, rtol=0)
    torch.testing.assert_close(jac[:, :2, 2], torch.zeros_like(q[:, :2]), atol=1e-12, rtol=0)
    # every joint turns about the base z-axis
    torch.testing.assert_close(jac[:, 3:, :], torch.tensor([0.0, 0.0, 1.0], dtype=q.dtype)[None, :, None].expand(30, 3, 3))


def test_planar3_float32_and_protocol():
    robot = Planar3()
    assert isinstance(robot, Robot)
    pos, rot = robot.fk(robot.q_home[None])
    assert pos.dtype == rot.dtype == robot.jacobian(robot.q_home[None]).dtype == torch.float32
    assert robot.q_home.abs().max() < robot.q_upper.max()


# ---------------------------------------------------------------- (c) UrdfArm Jacobian vs its own FK


def test_seven_joint_arm_jacobian_matches_finite_differences_of_fk():
    arm = UrdfArm()
    q = _random_q(arm, 20, seed=4)
    # central differences with h = 1e-6 in float64: truncation ~h^2, round-off ~1e-16/h (common practice)
    torch.testing.assert_close(arm.jacobian(q), _fd_jacobian(arm, q), atol=1e-8, rtol=0)


# ---------------------------------------------------------------- (d) limits as written in the URDF


def test_seven_joint_arm_limits_equal_the_urdf_text():
    root = ET.parse(shipped_urdf()).getroot()
    movable = [j for j in root.findall("joint") if j.get("type") != "fixed"]
    names = [j.get("name") for j in movable]
    lim = [j.find("limit") for j in movable]
    arm = UrdfArm()
    assert arm.joint_names == names
    for attr, values in (("q_lower", [float(x.get("lower")) for x in lim]),
                         ("q_upper", [float(x.get("upper")) for x in lim]),
                         ("qd_max", [float(x.get("velocity")) for x in lim])):
        expected = torch.tensor(values, dtype=torch.get_default_dtype())
        assert torch.equal(getattr(arm, attr), expected), attr


# ---------------------------------------------------------------- (e) bad input -> ConfigError


def _write(tmp_path: Path, text: str, name: str = "arm.urdf") -> str:
    path = tmp_path / name
    path.write_text(text)
    return str(path)


BAD_CASES = ["missing file", "not XML", "not a robot", "tool link absent", "no velocity limit"]


@pytest.mark.parametrize("case", BAD_CASES)
def test_bad_urdf_raises_config_error_naming_the_path(tmp_path, case):
    tool = "grip"
    if case == "missing file":
        path = str(tmp_path / "nowhere.urdf")
    elif case == "not XML":
        path = _write(tmp_path, "<robot name='x'><link name='a'>")
    elif case == "not a robot":
        path = _write(tmp_path, "<sdf version='1.6'/>")
    elif case == "tool link absent":
        path, tool = _write(tmp_path, FOREIGN_URDF), "hand"
    else:
        path = _write(tmp_path, FOREIGN_URDF.replace('velocity="1.1" ', ""))
    with pytest.raises(ConfigError) as info:
        UrdfArm(urdf=path, tool_link=tool)
    message = str(info.value)
    assert path in info.value.where and path in message
    assert "\n" not in message


def test_bad_home_raises_config_error(tmp_path):
    with pytest.raises(ConfigError, match="robot.home"):
        UrdfArm(home=[0.0] * 6)
    with pytest.raises(ConfigError, match="robot.home"):
        UrdfArm(home=[0.0, 0.0, 0.0, 10.0, 0.0, 0.0, 0.0])
    with pytest.raises(ConfigError, match="robot.links"):
        Planar3(links=[0.3, 0.2])


# ---------------------------------------------------------------- (f) a foreign URDF by path


def test_foreign_urdf_by_path(tmp_path):
    path = _write(tmp_path, FOREIGN_URDF, "tiny2.urdf")
    arm = UrdfArm(urdf=path, tool_link="grip", name="tiny2")
    assert arm.joint_names == ["shoulder", "elbow"]
    torch.testing.assert_close(arm.q_lower, torch.tensor([-1.5, -2.0]))
    torch.testing.assert_close(arm.q_upper, torch.tensor([2.5, 1.0]))
    torch.testing.assert_close(arm.qd_max, torch.tensor([0.8, 1.1]))
    # default home of a foreign arm: the middle of each joint range
    torch.testing.assert_close(arm.q_home, torch.tensor([0.5, -0.5]))
    q = _random_q(arm, 25, seed=5)
    pos, rot = arm.fk(q)
    # pinocchio as reference (covers rpy origins, a y-axis joint and a fixed tool offset)
    ref_pos, ref_rot, ref_jac = _pin_reference(path, "grip", q.numpy(), arm.joint_names)
    np.testing.assert_allclose(pos.numpy(), ref_pos, atol=1e-8, rtol=0)
    np.testing.assert_allclose(rot.numpy(), ref_rot, atol=1e-8, rtol=0)
    np.testing.assert_allclose(arm.jacobian(q).numpy(), ref_jac, atol=1e-8, rtol=0)


def test_foreign_urdf_tool_on_intermediate_link(tmp_path):
    # a tool link halfway down the chain gives a 1-joint arm
    path = _write(tmp_path, FOREIGN_URDF, "tiny2.urdf")
    arm = UrdfArm(urdf=path, tool_link="upper")
    assert arm.joint_names == ["shoulder"]
    q = _random_q(arm, 10, seed=6)
    pos, _ = arm.fk(q)
    jac = arm.jacobian(q)
    ref_pos, _, ref_jac = _pin_reference(path, "upper", q.numpy(), arm.joint_names)
    np.testing.assert_allclose(pos.numpy(), ref_pos, atol=1e-8, rtol=0)
    np.testing.assert_allclose(jac.numpy(), ref_jac, atol=1e-8, rtol=0)


# ---------------------------------------------------------------- (g) large batch


def test_batched_fk_of_ten_thousand_configurations_is_finite():
    arm = UrdfArm()
    q = _random_q(arm, 10_000, seed=7).float()
    pos, rot = arm.fk(q)
    jac = arm.jacobian(q)
    assert pos.shape == (10_000, 3) and rot.shape == (10_000, 3, 3) and jac.shape == (10_000, 6, 7)
    assert torch.isfinite(pos).all() and torch.isfinite(rot).all() and torch.isfinite(jac).all()
    # triangle inequality: the tool stays within the summed segment lengths beyond joint_2 (read from the URDF)
    origins = [[float(v) for v in j.find("origin").get("xyz").split()]
               for j in ET.parse(shipped_urdf()).getroot().findall("joint")]
    shoulder = torch.tensor(origins[0]) + torch.tensor(origins[1])
    reach = sum(math.dist(o, (0, 0, 0)) for o in origins[2:])
    assert (pos - shoulder).norm(dim=1).max() <= reach + 1e-5
    assert math.isclose(float(torch.linalg.det(rot.double()).mean()), 1.0, abs_tol=1e-5)


def test_fk_and_jacobian_in_one_pass_matches_separate_calls():
    from coreach.world.urdf_arm import UrdfArm

    arm = UrdfArm()
    q = torch.rand(20, arm.dof, dtype=torch.float64) - 0.5
    pos, rot, jac = arm.fk_and_jacobian(q)
    p2, r2 = arm.fk(q)
    torch.testing.assert_close(pos, p2)
    torch.testing.assert_close(rot, r2)
    torch.testing.assert_close(jac, arm.jacobian(q))
