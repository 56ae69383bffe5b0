"""Finding and building plugins: built-ins under conf/<kind>/, outside packages through an entry-point group.

A plugin is a Hydra option (`conf/<kind>/<name>.yaml` with a `_target_`). An outside package adds options by
declaring, in the entry-point group `coreach.plugins`, a config package laid out the same way; its folder is
added to Hydra's search path, so its options are selected exactly like built-in ones.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources

import hydra
from omegaconf import DictConfig, OmegaConf

from coreach.errors import ConfigError
from coreach.config.compose import external_config_packages
from coreach.host.protocols import KINDS

BUILTIN_CONF = "coreach_conf"


@dataclass(frozen=True)
class PluginInfo:
    kind: str
    name: str
    target: str
    origin: str  # "built-in" or "<distribution> (entry point <name>)"


def _options(package: str, origin: str) -> list[PluginInfo]:
    try:
        root = resources.files(package)
    except ModuleNotFoundError as exc:
        raise ConfigError(f"entry point {origin}", f"config package {package!r} cannot be imported ({exc})")
    out = []
    for kind in KINDS:
        folder = root / kind
        if not folder.is_dir():
            continue
        for item in sorted(folder.iterdir(), key=lambda p: p.name):
            if item.name.endswith(".yaml"):
                cfg = OmegaConf.create(item.read_text())
                out.append(PluginInfo(kind, item.name[:-5], str(cfg.get("_target_", "?")), origin))
    return out


def discover() -> list[PluginInfo]:
    """Every plugin option, built-in first, then those of outside packages."""
    found = _options(BUILTIN_CONF, "built-in")
    for pkg, origin in external_config_packages():
        found += _options(pkg, origin)
    return found


def check_protocol(obj, kind: str, where: str):
    """Refuse an object that does not implement its kind's protocol, naming what is missing."""
    proto = KINDS[kind]
    if isinstance(obj, proto):
        return obj
    wanted = [m for m in dir(proto) if not m.startswith("_")]
    missing = [m for m in wanted if not hasattr(obj, m)]
    raise ConfigError(where, f"{type(obj).__name__} does not implement the {kind} protocol (missing: {missing})")


def build_plugin(cfg: DictConfig, kind: str, **kwargs):
    """Instantiate a plugin from its config node and check it against its kind's protocol."""
    target = cfg.get("_target_", "?")
    missing = sorted(set(OmegaConf.missing_keys(cfg)) - set(kwargs)) if isinstance(cfg, DictConfig) else []
    if missing:
        names = ", ".join(f"{kind}.{k}" for k in missing)
        raise ConfigError(f"option {kind} ({target})", f"missing value for {names}")
    try:
        obj = hydra.utils.instantiate(cfg, **kwargs)
    except Exception as exc:  # hydra wraps the plugin's own error; show its last line only
        cause = exc.__cause__ or exc
        msg = str(cause).strip().splitlines()[-1] if str(cause).strip() else type(cause).__name__
        if isinstance(cause, ConfigError):
            raise cause from None
        raise ConfigError(f"option {kind} ({target})", msg) from None
    return check_protocol(obj, kind, f"option {kind} ({target})")


def builtin_option(kind: str, name: str) -> DictConfig:
    """The config node of built-in option `name` of `kind` (conf/<kind>/<name>.yaml): the benches' pinned model,
    the aggregation rounds' Parquet dataset."""
    item = resources.files(BUILTIN_CONF) / kind / f"{name}.yaml"
    if not item.is_file():
        raise ConfigError(f"option {kind}", f"no built-in option {name!r}")
    return OmegaConf.create(item.read_text())


def build_terms(loss_cfg: DictConfig) -> list:
    """Loss terms from the multi-selected `loss` group: one entry per option, each with its own weight."""
    if not loss_cfg:
        raise ConfigError("option loss", "no loss terms selected; expected e.g. loss=[reconstruction,kl]")
    terms = []
    for name, node in loss_cfg.items():
        term = build_plugin(node, "loss")
        if not getattr(term, "name", None):
            term.name = str(name)
        terms.append(term)
    return terms
