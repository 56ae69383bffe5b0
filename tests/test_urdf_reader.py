"""One URDF reader behind both kinematics: the runtime's numpy Chain and the UrdfArm plugin (pytorch_kinematics)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from coreach.errors import ConfigError
from coreach.runtime.kinematics import Chain
from coreach.urdf import parse_path, robot_name
from coreach_plugins.robot.urdf_arm import UrdfArm, shipped_urdf


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
    assert robot_name(text) == "reach7"

