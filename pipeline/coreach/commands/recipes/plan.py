"""Plan parsing for `coreach recipes`: the options checked into a Plan before anything runs."""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from omegaconf import DictConfig, ListConfig

from coreach.errors import ConfigError
from coreach.vetting.stage import BASELINES_DIR
from coreach.vetting.suite import MIN_SEED

RECIPE_COMMANDS = ("train", "aggregate")  # stages that end in one trained decoder with an MLflow run id
RECIPE_KEYS = ("command", "overrides")


@dataclass(frozen=True)
class Recipe:
    label: str
    command: str
    overrides: tuple[str, ...]


@dataclass(frozen=True)
class Plan:
    """The checked options of one `coreach recipes` run."""

    recipes: tuple[Recipe, ...]
    seeds: tuple[int, ...]
    suites: tuple[str, ...]  # shipped suite names or YAML paths, as given
    episodes: int | None
    baselines: tuple[str, ...]
    train_overrides: tuple[str, ...]
    vet_overrides: tuple[str, ...]
    out: Path


def _strings(value, where: str, what: str) -> tuple[str, ...]:
    if value is None:
        return ()
    if not isinstance(value, (list, tuple, ListConfig)) or any(isinstance(v, (dict, list, DictConfig, ListConfig))
                                                               for v in value):  # fmt: skip
        raise ConfigError(where, f"expected a list of {what}, got {value!r}")
    return tuple(str(v) for v in value)


def _distinct(items: tuple, where: str) -> None:
    seen = [x for i, x in enumerate(items) if x in items[:i]]
    if seen:
        raise ConfigError(where, f"{seen[0]!r} appears twice; expected distinct entries")


def _recipe(label: str, node) -> Recipe:
    where = f"option recipes.{label}"
    if not isinstance(node, (dict, DictConfig)):
        raise ConfigError(where, f"expected a mapping {{command: train|aggregate, overrides: [...]}}, got {node!r}")
    unknown = sorted(set(node) - set(RECIPE_KEYS))
    if unknown:
        raise ConfigError(f"{where}.{unknown[0]}", f"unknown key; expected {' and '.join(RECIPE_KEYS)}")
    command = str(node.get("command") or "train")
    if command not in RECIPE_COMMANDS:
        expected = ", ".join(RECIPE_COMMANDS)
        raise ConfigError(f"{where}.command", f"unknown command {command!r}; expected one of {expected}")
    return Recipe(label, command, _strings(node.get("overrides"), f"{where}.overrides", "Hydra overrides"))


def _seeds(value) -> tuple[int, ...]:
    if not isinstance(value, (list, tuple, ListConfig)) or len(value) == 0:
        raise ConfigError("option seeds", "expected a non-empty list of training seeds")
    seeds = []
    for s in value:
        if isinstance(s, bool) or not isinstance(s, int) or not 0 <= s < MIN_SEED:
            raise ConfigError("option seeds", f"expected integers in [0, {MIN_SEED}) (vetting seeds start at "
                                              f"{MIN_SEED}), got {s!r}")  # fmt: skip
        seeds.append(int(s))
    _distinct(tuple(seeds), "option seeds")
    return tuple(seeds)


def plan_from(cfg: DictConfig) -> Plan:
    """Check every option before anything runs; ConfigError names the first one at fault."""
    node = cfg.get("recipes")
    if not isinstance(node, DictConfig) or len(node) == 0:
        raise ConfigError("option recipes", "expected a mapping label -> {command: train|aggregate, overrides: [...]}")
    known = {str(k): _recipe(str(k), v) for k, v in node.items()}
    select = _strings(cfg.get("select"), "option select", "recipe labels") or tuple(known)
    _distinct(select, "option select")
    for label in select:
        if label not in known:
            raise ConfigError("option select", f"unknown recipe {label!r}; known recipes: {', '.join(known)}")
    suites = _strings(cfg.get("vet_suites"), "option vet_suites", "suite names or YAML paths")
    if not suites:
        raise ConfigError("option vet_suites", "expected a non-empty list of suites (names or YAML paths)")
    _distinct(suites, "option vet_suites")
    episodes = cfg.get("episodes")
    if episodes is not None and (isinstance(episodes, bool) or not isinstance(episodes, int) or episodes < 1):
        raise ConfigError("option episodes",
                          f"expected null (each suite's own count) or a positive integer, got {episodes!r}")
    baselines = _strings(cfg.get("baselines"), "option baselines", "baseline interface names")
    _distinct(baselines, "option baselines")
    shipped = _shipped_baselines()
    for b in baselines:
        if b not in shipped:
            raise ConfigError("option baselines", f"unknown baseline {b!r}; expected some of {', '.join(shipped)}")
    return Plan(
        recipes=tuple(known[s] for s in select), seeds=_seeds(cfg.get("seeds")), suites=suites,
        episodes=episodes, baselines=baselines,
        train_overrides=_strings(cfg.get("train_overrides"), "option train_overrides", "Hydra overrides"),
        vet_overrides=_strings(cfg.get("vet_overrides"), "option vet_overrides", "Hydra overrides"),
        out=Path(str(cfg.out)),
    )  # fmt: skip


def _shipped_baselines() -> list[str]:
    folder = resources.files("coreach_conf") / BASELINES_DIR
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".yaml") and p.name != "decoder.yaml")
