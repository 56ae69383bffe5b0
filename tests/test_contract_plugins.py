"""coreach.host.contracts on every built-in plugin config, on the example outside package, and on broken plugins
(each check must be able to fail)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from omegaconf import OmegaConf

from coreach.host.contracts import ContractError, check_plugin, plugin_checks
from coreach.host.protocols import optional_members
from coreach.control.belief_model import BoltzmannGoalBelief
from coreach_plugins.robot.planar3 import Planar3

CONF = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf"
KINDS = ["robot", "belief", "interface", "operator", "labeller", "dataset"]  # model/loss: test_contract_*.py


def _configs():
    for kind in KINDS:
        for path in sorted((CONF / kind).glob("*.yaml")):
            cfg = OmegaConf.load(path)
            if OmegaConf.missing_keys(cfg):  # needs a run, a bundle or a file: nothing to build on its own
                continue
            yield pytest.param(kind, OmegaConf.to_container(cfg), id=f"{kind}/{path.stem}")


@pytest.mark.parametrize("kind,cfg", list(_configs()))
def test_builtin_plugins_pass_their_contract(kind, cfg):
    check_plugin(kind, cfg)


def test_every_kind_with_optional_members_declares_them():
    assert optional_members("robot") == ["fk_and_jacobian", "link_model", "urdf_text"]
    assert "switch_cost_steps" in optional_members("interface")
    assert {"mode_switch_margin", "reset"} <= set(optional_members("operator"))
    assert {"to_manifest", "from_manifest"} <= set(optional_members("belief"))


def test_outside_package_passes_the_loss_contract(monkeypatch):
    # the example package of test_plugin_package.py, importable from its source folder without installing it
    monkeypatch.syspath_prepend(str(Path(__file__).parent / "plugin_example"))
    check_plugin("loss", {"_target_": "coreach_effort.Effort", "weight": 0.05})
    assert "coreach_effort" in sys.modules


class _BentJacobian(Planar3):
    """Planar3 whose Jacobian is scaled by 1.01: fk differences must catch it."""

    def jacobian(self, q):
        return 1.01 * super().jacobian(q)


class _LeakyBelief(BoltzmannGoalBelief):
    """Posterior rows that do not sum to 1."""

    def update(self, belief, ee_before, ee_after, goal_targets):
        return 0.9 * super().update(belief, ee_before, ee_after, goal_targets)


class _NoChoose:
    name = "broken"

    def reset(self, n_episodes, generator):
        pass

    def perturb(self, stick, step, generator):
        return stick


@pytest.mark.parametrize("kind,plugin,check", [
    ("robot", _BentJacobian(), "robot_jacobian"),
    ("belief", _LeakyBelief(), "belief_distribution"),
    ("operator", _NoChoose(), "protocol"),
])  # fmt: skip
def test_a_broken_plugin_fails_the_named_check(kind, plugin, check):
    with pytest.raises(ContractError, match=f"check {check} failed"):
        check_plugin(kind, plugin)
    names = [name for name, _ in plugin_checks(kind, plugin)]
    assert check in names


def test_a_manifest_that_does_not_round_trip_fails():
    class Forgetful(BoltzmannGoalBelief):
        def to_manifest(self):
            return {"model": "boltzmann", "beta": 1.0}  # not this model's beta

    with pytest.raises(ContractError, match="check belief_manifest failed"):
        check_plugin("belief", Forgetful(beta=7.0))


def test_numpy_and_torch_must_agree():
    class TorchDrift(BoltzmannGoalBelief):
        def update(self, belief, ee_before, ee_after, goal_targets):
            out = super().update(belief, ee_before, ee_after, goal_targets)
            return out if isinstance(out, np.ndarray) else torch.roll(out, 1, dims=-1)

    with pytest.raises(ContractError, match="check belief_numpy_torch failed"):
        check_plugin("belief", TorchDrift())


def test_unknown_kind_is_one_line():
    with pytest.raises(ContractError, match="unknown plugin kind 'robots'"):
        check_plugin("robots", Planar3())
