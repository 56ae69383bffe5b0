"""Contract checks for every loss-term config shipped under conf/loss/ (found by glob, not by list)."""

from __future__ import annotations

import dataclasses
import importlib
import math
import shutil
from pathlib import Path

import hydra
import pytest
from hydra import compose, initialize_config_dir
from omegaconf import OmegaConf

from coreach.host.contracts import plugin_checks
from coreach.errors import ConfigError
from coreach.host.protocols import LossTerm

LOSS_DIR = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf" / "loss"


def _term(path: Path):
    return hydra.utils.instantiate(OmegaConf.load(path))


def _contract(path: Path, name: str) -> None:
    """One check of coreach.host.contracts (the same checks an outside package runs on its own terms)."""
    checks = dict(plugin_checks("loss", OmegaConf.to_container(OmegaConf.load(path))))
    checks[name]()


def check_protocol(path: Path, composed) -> None:
    _contract(path, "protocol")
    assert isinstance(_term(path), LossTerm)


def check_scalar(path: Path, composed) -> None:
    _contract(path, "loss_scalar")


def check_differentiable(path: Path, composed) -> None:
    _contract(path, "loss_differentiable")


def check_weight(path: Path, composed) -> None:
    _contract(path, "loss_weight")
    cfg = OmegaConf.load(path)
    assert "weight" in cfg, "every loss config states its weight"
    term = _term(path)
    assert isinstance(term.weight, float) and math.isfinite(term.weight)
    assert term.weight == cfg.weight


def check_name(path: Path, composed) -> None:
    # The name is the logging key; it matches the config key loss.<file name> to keep the two aligned.
    assert _term(path).name == path.stem


def check_package(path: Path, composed) -> None:
    # Selected together with every other loss file, this one lands under loss.<file name> unchanged.
    assert OmegaConf.to_container(composed.loss[path.stem]) == OmegaConf.to_container(OmegaConf.load(path))


def check_config_class(path: Path, composed) -> None:
    """The module's dataclass config (same _target_) lists exactly the YAML's options."""
    cfg = OmegaConf.load(path)
    module = importlib.import_module(cfg._target_.rsplit(".", 1)[0])
    classes = [
        c for c in vars(module).values()
        if dataclasses.is_dataclass(c) and isinstance(c, type)
        and any(f.name == "_target_" and f.default == cfg._target_ for f in dataclasses.fields(c))
    ]
    assert len(classes) == 1, f"expected one dataclass config for {cfg._target_}, found {classes}"
    assert {f.name for f in dataclasses.fields(classes[0])} == set(cfg.keys())
    merged = OmegaConf.merge(OmegaConf.structured(classes[0]), cfg)  # types in the YAML fit the schema
    assert hydra.utils.instantiate(merged).weight == cfg.weight


def check_options_validated(path: Path, composed) -> None:
    """Every option refuses a value of the wrong kind with a ConfigError naming loss.<name>.<option>."""
    cfg = OmegaConf.to_container(OmegaConf.load(path))
    target = hydra.utils.get_class(cfg.pop("_target_"))
    for option in cfg:
        with pytest.raises(ConfigError) as err:
            target(**{**cfg, option: "not-a-number"})
        assert err.value.where == f"loss.{path.stem}.{option}"


CHECKS = {
    "protocol": check_protocol,
    "scalar": check_scalar,
    "differentiable": check_differentiable,
    "weight": check_weight,
    "name": check_name,
    "package": check_package,
    "config_class": check_config_class,
    "options_validated": check_options_validated,
}
PATHS = sorted(LOSS_DIR.glob("*.yaml"))
CASES = [pytest.param(path, check, id=f"loss/{path.stem}::{check}") for path in PATHS for check in CHECKS]


@pytest.fixture(scope="module")
def composed(tmp_path_factory):
    """All loss files selected at once from one group (Hydra multi-select), as a training config does."""
    root = tmp_path_factory.mktemp("conf")
    shutil.copytree(LOSS_DIR, root / "loss")
    names = ", ".join(p.stem for p in PATHS)
    (root / "main.yaml").write_text(f"defaults:\n  - loss: [{names}]\n  - _self_\n")
    with initialize_config_dir(config_dir=str(root), version_base="1.3"):
        return compose("main")


def test_loss_configs_found():
    assert CASES, f"no loss configs under {LOSS_DIR}"


@pytest.mark.parametrize("path,check", CASES)
def test_loss_contract(path: Path, check: str, composed) -> None:
    CHECKS[check](path, composed)
