"""Typed checks of plugin options at compose time: unknown keys and wrong types fail before anything runs.

A plugin's schema is the dataclass next to its class whose `_target_` default names that class (or the class
itself when it is a dataclass). Plugins without one are checked against their constructor's parameters.
"""

from __future__ import annotations

import dataclasses
import importlib
import inspect

from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from coreach.config.option_specs import check_ranges
from coreach.config.schemas import SCHEMAS, ToleranceConfig
from coreach.errors import ConfigError
from coreach.training.options import TRAINING_OPTIONS
from coreach.world.reach_check import ReachOptions
from coreach.world.scenario import scenario_from_config

PLUGIN_NODES = ("robot", "dataset", "belief", "model", "interface", "operator", "labeller")
# passed by the trainer at build time, never written in a config
INJECTED = {"action_dim", "context_dim"}


def _split(target: str):
    module, _, name = target.rpartition(".")
    return importlib.import_module(module), name


def find_schema(target: str):
    """The dataclass describing `target`'s options, or None."""
    module, name = _split(target)
    for obj in vars(module).values():
        if dataclasses.is_dataclass(obj) and isinstance(obj, type):
            fields = {f.name: f for f in dataclasses.fields(obj)}
            if "_target_" in fields and fields["_target_"].default == target:
                return obj
    cls = getattr(module, name, None)
    if isinstance(cls, type) and dataclasses.is_dataclass(cls):
        return cls
    return None


def check_node(node: DictConfig, where: str) -> None:
    """Raise ConfigError naming `where.<key>` if the node does not fit its plugin's schema."""
    target = node.get("_target_")
    if not target:
        raise ConfigError(where, "has no _target_: expected a plugin option (see `coreach plugins`)")
    try:
        module, name = _split(str(target))
        cls = getattr(module, name)
    except (ImportError, AttributeError, ValueError) as exc:
        raise ConfigError(f"{where}._target_", f"{target!r} cannot be imported ({exc})") from None
    missing = sorted(OmegaConf.missing_keys(node))
    if missing:
        key = missing[0] if missing[0].startswith(f"{where}.") else f"{where}.{missing[0]}"
        raise ConfigError(key, f"is required and has no default; set it, e.g. {key}=...")
    schema = find_schema(str(target))
    values = {k: v for k, v in OmegaConf.to_container(node, resolve=True).items() if k != "_target_"}
    if schema is not None:
        allowed = {f.name for f in dataclasses.fields(schema)} - {"_target_"}
        _unknown(values, allowed, where)
        check_ranges(schema, values, where)  # first: its message names the expected range, not only the type
        base = OmegaConf.structured(schema)
        try:
            OmegaConf.merge(base, {k: v for k, v in values.items() if not str(k).startswith("_")})
        except OmegaConfBaseException as exc:
            key = getattr(exc, "full_key", None) or "?"
            raise ConfigError(f"{where}.{key}", str(exc).splitlines()[0]) from None
        return
    params = inspect.signature(cls).parameters
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values()):
        return
    _unknown(values, set(params) - INJECTED, where)


def _unknown(values: dict, allowed: set, where: str) -> None:
    extra = sorted(k for k in values if k not in allowed and not str(k).startswith("_"))
    if extra:
        raise ConfigError(f"{where}.{extra[0]}", f"unknown option; expected one of {sorted(allowed)}")


def check_plugins(cfg: DictConfig) -> None:
    """Check every plugin node present in a composed config (and each selected loss term)."""
    for key in PLUGIN_NODES:
        node = cfg.get(key)
        if isinstance(node, DictConfig) and "_target_" in node:
            check_node(node, key)
    losses = cfg.get("loss")
    if isinstance(losses, DictConfig):
        for name, node in losses.items():
            check_node(node, f"loss.{name}")


def check_command_options(cfg: DictConfig) -> None:
    """Types and ranges of the commands' own options (seed, data split, trainer) where a config has them."""
    for path, spec in (*TRAINING_OPTIONS, ("reach", ReachOptions)):
        node = cfg if not path else cfg.get(path)
        if not isinstance(node, DictConfig) or (not path and "trainer" not in node):
            continue
        names = {f.name for f in dataclasses.fields(spec)}
        if path:  # a block is the spec's whole: a misspelt key is an error, not ignored
            _unknown(dict(node), names, path)
        values = {k: node.get(k) for k in names if k in node}
        check_ranges(spec, values, path)


def check_groups(cfg: DictConfig) -> None:
    """Ranges of the user-written groups present in a composed config (their types and keys were checked
    by their ConfigStore schemas while composing): `suite.episodes=-1` fails here, in one line."""
    for group, (_, schema) in SCHEMAS.items():
        node = cfg.get(group)
        if isinstance(node, DictConfig):
            check_ranges(schema, dict(node), group)
            if group == "suite" and isinstance(node.get("tolerances"), DictConfig):
                check_ranges(ToleranceConfig, dict(node.tolerances), "suite.tolerances")
    if isinstance(cfg.get("scenario"), DictConfig):  # the scene's own rules (sizes, goals clear of bodies)
        scenario_from_config(cfg.scenario, f"scenario {cfg.scenario.get('name', '')}".strip())
