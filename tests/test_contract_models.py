"""Contract checks for every decoder config shipped under conf/model/ (found by glob, not by list)."""

from __future__ import annotations

import dataclasses
import importlib
from pathlib import Path

import hydra
import pytest
import torch
from omegaconf import OmegaConf

from coreach.host.contracts import plugin_checks
from coreach.host.protocols import Decoder

MODEL_DIR = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf" / "model"
WIDTHS = {"state": 16, "belief": 4, "goal": 12}  # 7-joint arm, 4 goals
ACTION_DIM, BATCH = 7, 8


def _blocks(cfg) -> tuple[str, ...]:
    return tuple(hydra.utils.get_class(cfg._target_).context_blocks)


def _build(cfg, seed: int = 0):
    torch.manual_seed(seed)
    width = sum(WIDTHS[b] for b in _blocks(cfg))
    return hydra.utils.instantiate(cfg, action_dim=ACTION_DIM, context_dim=width)


def _inputs(cfg, seed: int = 1):
    g = torch.Generator().manual_seed(seed)
    width = sum(WIDTHS[b] for b in _blocks(cfg))
    return torch.randn(BATCH, ACTION_DIM, generator=g), torch.randn(BATCH, width, generator=g)


def _forward(model, action, context):
    post = model.encode(action, context)
    return post, model.decode(post.mean, context)


def _contract(path: Path, name: str) -> None:
    """One check of coreach.host.contracts (the same checks an outside package runs on its own decoders)."""
    checks = dict(plugin_checks("model", OmegaConf.to_container(OmegaConf.load(path))))
    checks[name]()


def check_protocol(path: Path, tmp_path: Path) -> None:
    _contract(path, "protocol")
    cfg = OmegaConf.load(path)
    model = _build(cfg)
    assert isinstance(model, Decoder) and isinstance(model, torch.nn.Module)
    assert set(model.context_blocks) <= set(WIDTHS), model.context_blocks
    assert model.latent_dim == cfg.get("latent_dim", model.latent_dim)


def check_shapes(path: Path, tmp_path: Path) -> None:
    _contract(path, "model_shapes")


def check_gradients(path: Path, tmp_path: Path) -> None:
    _contract(path, "model_gradients")


def check_determinism(path: Path, tmp_path: Path) -> None:
    cfg = OmegaConf.load(path)
    a, b = _build(cfg, seed=5), _build(cfg, seed=5)
    for (k, va), vb in zip(a.state_dict().items(), b.state_dict().values()):
        assert torch.equal(va, vb), k
    inputs = _inputs(cfg)
    assert torch.equal(_forward(a, *inputs)[1], _forward(b, *inputs)[1])
    c = _build(cfg, seed=6)  # a different seed must give a different network, or the seed does nothing
    assert not torch.equal(_forward(a, *inputs)[1], _forward(c, *inputs)[1])


def check_roundtrip(path: Path, tmp_path: Path) -> None:
    cfg = OmegaConf.load(path)
    copy = tmp_path / path.name
    copy.write_text(OmegaConf.to_yaml(cfg))
    again = OmegaConf.load(copy)
    a, b = _build(cfg, seed=3), _build(again, seed=3)
    count = lambda m: sum(p.numel() for p in m.parameters())  # noqa: E731
    assert count(a) == count(b)
    inputs = _inputs(cfg)
    assert torch.equal(_forward(a, *inputs)[1], _forward(b, *inputs)[1])


def check_config_class(path: Path, tmp_path: Path) -> None:
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
    assert "action_dim" not in cfg and "context_dim" not in cfg  # the trainer passes these
    merged = OmegaConf.merge(OmegaConf.structured(classes[0]), cfg)  # types in the YAML fit the schema
    assert _count_params(merged) == _count_params(cfg)


def _count_params(cfg) -> int:
    return sum(p.numel() for p in _build(cfg).parameters())


CHECKS = {
    "protocol": check_protocol,
    "shapes": check_shapes,
    "gradients": check_gradients,
    "determinism": check_determinism,
    "roundtrip": check_roundtrip,
    "config_class": check_config_class,
}
CASES = [
    pytest.param(path, check, id=f"model/{path.stem}::{check}")
    for path in sorted(MODEL_DIR.glob("*.yaml"))
    for check in CHECKS
]


def test_model_configs_found():
    assert CASES, f"no model configs under {MODEL_DIR}"


@pytest.mark.parametrize("path,check", CASES)
def test_model_contract(path: Path, check: str, tmp_path: Path) -> None:
    CHECKS[check](path, tmp_path)
