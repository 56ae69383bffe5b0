"""One URDF reader behind both kinematics: the runtime's numpy Chain and the UrdfArm plugin (pytorch_kinematics)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from coreach.errors import ConfigError
from coreach.runtime.kinematics import Chain
from coreach.world.urdf import parse_path, robot_name
from coreach.world.urdf_arm import UrdfArm, shipped_urdf


def test_runtime_chain_and_plugin_agree_on_the_shipped_arm():
    chain, arm = Chain.from_urdf(shipped_urdf()), UrdfArm()
    assert chain.joint_names == arm.joint_names
    np.testing.assert_array_equal(chain.q_lower, arm._lower.numpy())
    np.testing.assert_array_equal(chain.q_upper, arm._upper.numpy())
    q = np.random.default_rng(5).uniform(chain.q_lower, chain.q_upper, size=(40, chain.dof))
    pos, rot, jac = chain.fk_jacobian(q)
    t_pos, t_rot, t_jac = arm.fk_and_jacobian(torch.tensor(q))
    # two kinematics codes (ours in numpy, pytorch_kinematics in torch) from the same parse
    np.testing.assert_allclose(pos, t_pos.numpy(), atol=1e-12, rtol=0)
    np.testing.assert_allclose(rot, t_rot.numpy(), atol=1e-12, rtol=0)
    np.testing.assert_allclose(jac, t_jac.numpy(), atol=1e-12, rtol=0)


@pytest.mark.parametrize(
    "edit",
    [
        lambda t: t.replace('type="revolute"', 'type="floating"', 1),
        lambda t: t.replace("<limit ", "<nolimit ", 1),
        lambda t: t.replace('<link name="tool"', '<link name="hand"'),
        lambda t: t.replace("<robot", "<rob", 1),
    ],
    ids=["joint-type", "no-limit", "no-tool-link", "not-xml"],
)
def test_both_refuse_a_bad_urdf_with_the_same_line(tmp_path, edit):
    text = open(shipped_urdf(), encoding="utf-8").read()
    bad = edit(text)
    assert bad != text
    path = tmp_path / "bad.urdf"
    path.write_text(bad)
    with pytest.raises(ConfigError) as from_chain:
        Chain.from_urdf(path, "tool")
    with pytest.raises(ConfigError) as from_arm:
        UrdfArm(urdf=str(path), tool_link="tool")
    assert str(from_chain.value) == str(from_arm.value)
    assert "\n" not in str(from_chain.value) and str(path) in str(from_chain.value)


def test_specs_carry_what_the_bundle_check_needs():
    text = open(shipped_urdf(), encoding="utf-8").read()
    specs = parse_path(text, "tool")
    movable = [s for s in specs if s.movable]
    assert [s.name for s in movable] == Chain.from_string(text).joint_names
    assert specs[-1].child == "tool"
    assert all(s.lower < s.upper and s.velocity > 0 for s in movable)
    assert robot_name(text) == "seven_joint_arm"



@pytest.mark.parametrize(
    ("edit", "expected"),
    [
        # URDF specification (wiki.ros.org/urdf/XML/joint): a joint's parent and child name links of the robot
        (lambda t: t.replace('<parent link="link_2"/>', '<parent link="link_two"/>', 1),
         "joint 'joint_3': parent link 'link_two' is not a <link>"),
        (lambda t: t.replace('<child link="link_1"/>', '<child link="link_one"/>', 1),
         "joint 'joint_1': child link 'link_one' is not a <link>"),
        # ... and names are unique (links among links, joints among joints)
        (lambda t: t.replace('<joint name="joint_2"', '<joint name="joint_1"', 1), "joint name 'joint_1' used twice"),
        (lambda t: t.replace('<link name="link_1">', '<link name="base_link">', 1), "link name 'base_link' used twice"),
        # a child with two parent joints is not a tree
        (lambda t: t.replace('<child link="link_2"/>', '<child link="link_1"/>', 1), "child of two joints"),
        (lambda t: t.replace('<parent link="base_link"/>', '<parent link="link_2"/>', 1), "loop"),
        (lambda t: t.replace('<parent link="link_1"/>', '<parent link="link_1"/><mimic joint="joint_1"/>', 1),
         "mimic joints"),
        # a second tree: the tool link would hang from a root that is not the arm's
        (lambda t: t.replace("</robot>", '<link name="stray"/></robot>'), "2 root links (base_link, stray)"),
    ],
    ids=["missing-parent", "missing-child", "duplicate-joint", "duplicate-link", "two-parents", "cycle", "mimic",
         "two-roots"],
)
def test_structural_faults_are_refused_with_one_line_naming_the_element(edit, expected):
    text = open(shipped_urdf(), encoding="utf-8").read()
    bad = edit(text)
    assert bad != text
    with pytest.raises(ConfigError) as err:
        parse_path(bad, "tool")
    assert expected in str(err.value) and "\n" not in str(err.value)
