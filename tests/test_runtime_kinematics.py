"""The runtime's numpy kinematics checked against pinocchio (an independent URDF reader and kinematics library)."""

from __future__ import annotations

import numpy as np
import pytest

from coreach.errors import ConfigError
from coreach.world.urdf_arm import shipped_urdf
from coreach.world.geometry import rpy_to_matrix
from coreach.runtime.kinematics import Chain, quat_to_matrix

pin = pytest.importorskip("pinocchio")

# Our own test arm covering what seven_joint_arm does not: rpy on the origins, an unaligned revolute axis, the URDF
# default axis (x, no <axis>), a prismatic and a continuous joint, a fixed joint between movable ones, a
# fixed tool offset at the end, and a side branch that is not on the root-to-tool path.
MIXED_URDF = """<?xml version="1.0"?>
<robot name="mixed5">
  <link name="root"/><link name="a"/><link name="b"/><link name="b2"/><link name="c"/>
  <link name="d"/><link name="e"/><link name="grip"/><link name="camera"/>
  <joint name="yaw" type="revolute">
    <parent link="root"/><child link="a"/>
    <origin xyz="0.02 -0.01 0.15" rpy="0.1 -0.05 0.3"/>
    <axis xyz="0 0 1"/>
    <limit lower="-2.5" upper="2.5" velocity="1.0" effort="10"/>
  </joint>
  <joint name="slide" type="prismatic">
    <parent link="a"/><child link="b"/>
    <origin xyz="0 0.05 0.1" rpy="0 0.3 0"/>
    <axis xyz="0 0.6 0.8"/>
    <limit lower="-0.1" upper="0.3" velocity="0.2" effort="10"/>
  </joint>
  <joint name="spacer" type="fixed">
    <parent link="b"/><child link="b2"/>
    <origin xyz="0.1 0 0.02" rpy="0.2 0 -0.1"/>
  </joint>
  <joint name="tilt" type="revolute">
    <parent link="b2"/><child link="c"/>
    <origin xyz="0.3 0 0" rpy="0 0.25 -0.4"/>
    <limit lower="-2.0" upper="1.0" velocity="1.1" effort="5"/>
  </joint>
  <joint name="spin" type="continuous">
    <parent link="c"/><child link="d"/>
    <origin xyz="0.25 0.01 -0.02" rpy="-0.3 0.1 0.2"/>
    <axis xyz="0.48 0.6 0.64"/>
    <limit velocity="2.0" effort="5"/>
  </joint>
  <joint name="wrist" type="revolute">
    <parent link="d"/><child link="e"/>
    <origin xyz="0 0 0.08" rpy="0 0 0"/>
    <axis xyz="0 1 0"/>
    <limit lower="-1.5" upper="1.5" velocity="1.5" effort="5"/>
  </joint>
  <joint name="grip_mount" type="fixed">
    <parent link="e"/><child link="grip"/>
    <origin xyz="0.05 0.01 0.12" rpy="0.5 0 0.2"/>
  </joint>
  <joint name="camera_mount" type="fixed">
    <parent link="a"/><child link="camera"/>
    <origin xyz="0 0.2 0" rpy="0 0 0"/>
  </joint>
</robot>
"""


def _pin_reference(urdf_path: str, tool: str, q: np.ndarray, joint_names: list[str]):
    """Tool position, rotation and LOCAL_WORLD_ALIGNED frame Jacobian (= geometric Jacobian in the base
    frame at the tool point) from pinocchio, columns in our joint order."""
    model = pin.buildModelFromUrdf(urdf_path)
    data = model.createData()
    frame = model.getFrameId(tool)
    ids = [model.getJointId(n) for n in joint_names]
    pos, rot, jac = [], [], []
    for qi in q:
        qp = pin.neutral(model)
        for jid, v in zip(ids, qi):
            i = model.idx_qs[jid]
            if model.nqs[jid] == 2:  # pinocchio stores a continuous joint as (cos, sin)
                qp[i], qp[i + 1] = np.cos(v), np.sin(v)
            else:
                qp[i] = v
        pin.forwardKinematics(model, data, qp)
        pin.updateFramePlacements(model, data)
        full = pin.computeFrameJacobian(model, data, qp, frame, pin.LOCAL_WORLD_ALIGNED)
        pos.append(data.oMf[frame].translation.copy())
        rot.append(data.oMf[frame].rotation.copy())
        jac.append(full[:, [model.idx_vs[j] for j in ids]])
    return np.array(pos), np.array(rot), np.array(jac)


def _random_q(chain: Chain, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lo = np.where(np.isfinite(chain.q_lower), chain.q_lower, -np.pi)
    hi = np.where(np.isfinite(chain.q_upper), chain.q_upper, np.pi)
    return rng.uniform(lo, hi, size=(n, chain.dof))


def test_seven_joint_arm_matches_pinocchio_on_random_configurations():
    chain = Chain.from_urdf(shipped_urdf())
    q = _random_q(chain, 60, seed=0)
    pos, rot, jac = chain.fk_jacobian(q)
    ref_pos, ref_rot, ref_jac = _pin_reference(shipped_urdf(), "tool", q, chain.joint_names)
    np.testing.assert_allclose(pos, ref_pos, atol=1e-12, rtol=0)
    np.testing.assert_allclose(rot, ref_rot, atol=1e-12, rtol=0)
    np.testing.assert_allclose(jac, ref_jac, atol=1e-12, rtol=0)


def test_mixed_joint_types_match_pinocchio(tmp_path):
    path = tmp_path / "mixed5.urdf"
    path.write_text(MIXED_URDF)
    chain = Chain.from_urdf(path, tool_link="grip")
    assert chain.joint_names == ["yaw", "slide", "tilt", "spin", "wrist"]
    assert chain.kinds == ["revolute", "prismatic", "revolute", "continuous", "revolute"]
    assert np.isinf(chain.q_lower[3]) and np.isinf(chain.q_upper[3])
    q = _random_q(chain, 60, seed=1)
    q[:5, 3] = [-7.0, 7.0, 12.0, -20.0, 0.0]  # continuous joints take any angle
    pos, rot, jac = chain.fk_jacobian(q)
    ref_pos, ref_rot, ref_jac = _pin_reference(str(path), "grip", q, chain.joint_names)
    np.testing.assert_allclose(pos, ref_pos, atol=1e-12, rtol=0)
    np.testing.assert_allclose(rot, ref_rot, atol=1e-12, rtol=0)
    np.testing.assert_allclose(jac, ref_jac, atol=1e-12, rtol=0)


def test_single_and_batched_shapes_agree():
    # the control loop calls with q [n] (a separate np.dot path); batches use matmul
    chain = Chain.from_urdf(shipped_urdf())
    q = _random_q(chain, 12, seed=2).reshape(3, 4, 7)
    pos, rot, jac = chain.fk_jacobian(q)
    assert pos.shape == (3, 4, 3) and rot.shape == (3, 4, 3, 3) and jac.shape == (3, 4, 6, 7)
    for i in range(3):
        for j in range(4):
            p1, r1, j1 = chain.fk_jacobian(q[i, j])
            np.testing.assert_allclose(p1, pos[i, j], atol=1e-14, rtol=0)
            np.testing.assert_allclose(r1, rot[i, j], atol=1e-14, rtol=0)
            np.testing.assert_allclose(j1, jac[i, j], atol=1e-14, rtol=0)
    fk_pos, fk_rot = chain.fk(q)
    np.testing.assert_array_equal(fk_pos, pos)
    np.testing.assert_array_equal(fk_rot, rot)


def test_limits_are_the_urdf_values():
    chain = Chain.from_urdf(shipped_urdf())
    # the values written in plugins/robot/assets/seven_joint_arm.urdf
    np.testing.assert_array_equal(chain.q_upper, [2.9671, 2.0944, 2.9671, 2.4000, 2.9671, 2.0944, 3.0543])
    np.testing.assert_array_equal(chain.q_lower, -chain.q_upper)
    np.testing.assert_array_equal(chain.qd_max, [1.2, 1.2, 1.3, 1.3, 1.5, 1.5, 1.5])


def test_rotation_helpers_match_pinocchio():
    rng = np.random.default_rng(3)
    for rpy in rng.uniform(-3, 3, size=(20, 3)):
        # pinocchio.rpy.rpyToMatrix uses the same URDF convention R = Rz(y) Ry(p) Rx(r)
        np.testing.assert_allclose(rpy_to_matrix(rpy), pin.rpy.rpyToMatrix(*rpy), atol=1e-14, rtol=0)
    quats = rng.standard_normal((20, 4))
    for wxyz, mat in zip(quats, quat_to_matrix(quats)):
        ref = pin.Quaternion(*wxyz).normalized().toRotationMatrix()  # pinocchio's constructor takes w, x, y, z
        np.testing.assert_allclose(mat, ref, atol=1e-14, rtol=0)


@pytest.mark.parametrize(
    "edit, where, problem",
    [
        (lambda t: t.replace('type="prismatic"', 'type="floating"'), "joint 'slide'", "unsupported"),
        (lambda t: t.replace('<limit velocity="2.0" effort="5"/>', ""), "joint 'spin'", "velocity limit"),
        (lambda t: t.replace('xyz="0 1 0"', 'xyz="0 0 0"'), "joint 'wrist'", "non-zero"),
        (lambda t: t.replace('lower="-1.5" upper="1.5"', 'lower="1.5" upper="-1.5"'), "joint 'wrist'", "lower < upper"),
        (lambda t: t.replace('rpy="0.1 -0.05 0.3"', 'rpy="0.1 nan 0.3"'), "joint 'yaw'", "finite"),
        (lambda t: t.replace("<robot", "<rob", 1), "mixed5.urdf", "XML"),
    ],
)
def test_bad_urdf_is_one_clear_error(tmp_path, edit, where, problem):
    path = tmp_path / "mixed5.urdf"
    path.write_text(edit(MIXED_URDF))
    with pytest.raises(ConfigError) as err:
        Chain.from_urdf(path, tool_link="grip")
    assert where in err.value.where and problem in err.value.problem


def test_unknown_tool_link_names_the_links():
    with pytest.raises(ConfigError, match="tool link 'hand' not found"):
        Chain.from_string(MIXED_URDF, tool_link="hand")


def test_single_q_with_prismatic_and_continuous_joints_matches_pinocchio(tmp_path):
    # the single-q path of Chain is separate from the batched one; pinocchio is the reference
    path = tmp_path / "mixed5.urdf"
    path.write_text(MIXED_URDF)
    chain = Chain.from_urdf(path, tool_link="grip")
    q = np.array([0.4, 0.07, -0.6, 9.0, 1.1])
    pos, rot, jac = chain.fk_jacobian(q)
    ref_pos, ref_rot, ref_jac = _pin_reference(str(path), "grip", q[None], chain.joint_names)
    np.testing.assert_allclose(pos, ref_pos[0], atol=1e-12, rtol=0)
    np.testing.assert_allclose(rot, ref_rot[0], atol=1e-12, rtol=0)
    np.testing.assert_allclose(jac, ref_jac[0], atol=1e-12, rtol=0)
