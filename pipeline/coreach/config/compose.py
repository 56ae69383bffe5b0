"""Composing config groups from code: a suite with its scene and operator, or one scene, by name or file.

Stages that need several suites (the release gate, the recipes, the aggregation rounds) compose each through
Hydra like the `vet` command does, inside a running Hydra job or outside one (tests, the robot tools), so a
suite reads the same whichever command runs it. A path to a lab's own YAML file is merged onto the same typed
schema (coreach.config.schemas) and checked the same way.
"""

from __future__ import annotations

import os
import re
import tempfile
from importlib import metadata
from importlib.resources import files
from pathlib import Path
from typing import Any

import yaml
from hydra import compose, initialize_config_module
from hydra.core.global_hydra import GlobalHydra
from hydra.errors import HydraException
from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from coreach.config.schemas import register
from coreach.errors import ConfigError

ENTRY_POINT_GROUP = "coreach.plugins"  # outside packages declare their config packages here
# the primary config that holds only a suite, its scene and its operator (conf/vet_suite.yaml)
SUITE_CONFIG = "vet_suite"


def one_line(exc: Exception) -> str:
    """Hydra's or OmegaConf's message in one line, without its advice to set HYDRA_FULL_ERROR."""
    text = str(exc).strip()
    text = re.sub(r"\s*Set the environment variable HYDRA_FULL_ERROR=1.*", "", text, flags=re.S)
    text = re.sub(r"\s*Config search path:.*", "", text, flags=re.S)
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    if not lines:
        return type(exc).__name__
    for i, line in enumerate(lines):
        if line.endswith(":") and i + 1 < len(lines):  # Hydra lists alternatives one per line
            return " ".join(lines[: i + 1]) + " " + ", ".join(lines[i + 1 :])
    return " ".join(lines[:2])


def external_config_packages() -> list[tuple[str, str]]:
    """(config package, origin) for every installed package that declares coreach plugins."""
    found = []
    for ep in metadata.entry_points(group=ENTRY_POINT_GROUP):
        dist = ep.dist.name if ep.dist else "unknown distribution"
        found.append((ep.value, f"{dist} (entry point {ep.name})"))
    return found


def search_path_overrides(extra: list[str] = ()) -> list[str]:
    """Hydra overrides that add outside plugin packages (and `extra` search-path entries, e.g. a lab's own
    config files) to the config search path."""
    entries = [f"pkg://{pkg}" for pkg, _ in external_config_packages()] + list(extra)
    if not entries:
        return []
    return ["hydra.searchpath=[" + ",".join(entries) + "]"]


def compose_here(config_name: str, overrides: list[str], where: str) -> DictConfig:
    """Compose `config_name` with `overrides`: through the running Hydra job's search path when there is one
    (a stage), else from the shipped configs. ConfigError (one line, naming `where`) on failure."""
    register()
    try:
        if GlobalHydra.instance().is_initialized():
            return compose(config_name=config_name, overrides=overrides)
        with initialize_config_module("coreach_conf", version_base="1.3"):
            return compose(config_name=config_name, overrides=overrides)
    except (HydraException, OmegaConfBaseException, ValueError) as exc:
        raise ConfigError(where, one_line(exc)) from None


def is_file_reference(name: str | Path) -> bool:
    """A path to a lab's own YAML file rather than the name of a shipped option."""
    text = str(name)
    return isinstance(name, Path) or text.endswith((".yaml", ".yml")) or "/" in text


def read_yaml_file(path: str | Path, what: str) -> dict:
    """A lab's own YAML file as plain data; ConfigError naming the file when it is missing or not YAML."""
    p = Path(path).expanduser()
    if not p.is_file():
        raise ConfigError(f"{what} {path}", f"file not found; expected a YAML {what} file")
    try:
        data = yaml.safe_load(p.read_text(encoding="utf-8"))
    except yaml.YAMLError as e:
        raise ConfigError(str(p), f"not valid YAML ({str(e).splitlines()[0]})") from None
    if not isinstance(data, dict):
        raise ConfigError(str(p), f"expected a mapping, got {type(data).__name__}")
    defaults = data.pop("defaults", None) or []  # a copy of a shipped file: its schema is the one merged later
    if what == "suite" and isinstance(data.get("suite"), dict):  # a copy of a shipped suite file: flatten it
        flat = dict(data["suite"])
        for entry in defaults:
            if isinstance(entry, dict):
                for key, value in entry.items():
                    group = str(key).removeprefix("override ").strip().lstrip("/")
                    if group in ("scenario", "operator"):
                        flat[group] = value
        return flat
    return data


def on_schema(schema: type, data: Any, where: str) -> dict:
    """`data` merged onto `schema` (types and keys checked as at compose time), as plain data."""
    try:
        merged = OmegaConf.merge(OmegaConf.structured(schema), data)
        return OmegaConf.to_container(merged, resolve=True, throw_on_missing=True)
    except OmegaConfBaseException as exc:
        key = getattr(exc, "full_key", None)
        raise ConfigError(f"{where}, option {key}" if key else where, str(exc).splitlines()[0]) from None


def options(group: str) -> list[str]:
    """The shipped options of a config group (conf/<group>/*.yaml)."""
    folder = files("coreach_conf") / group
    return sorted(p.name[: -len(".yaml")] for p in folder.iterdir() if p.name.endswith(".yaml"))


# Groups a user may name by a file path on the command line (`coreach vet suite=./my-suite.yaml`).
FILE_GROUPS = ("suite", "scenario", "falsify")


def lab_file_overrides(overrides: list[str], root: Path | None = None) -> tuple[list[str], list[str]]:
    """(overrides, search-path entries): each `suite=<file>` or `scenario=<file>` becomes an option of its
    group, written as a config-group file under `root` (./.coreach/lab-conf) whose folder joins Hydra's search
    path, so a lab's own file composes, and is checked by the schema, exactly like a shipped option. A flat
    suite file (its options plus `scenario:` and `operator:`) gets the group file's header written for it."""
    root = (root or Path(".coreach") / "lab-conf").resolve()
    out, used = [], False
    for raw in overrides:
        key, sep, value = raw.partition("=")
        if not sep or key not in FILE_GROUPS or not is_file_reference(value):
            out.append(raw)
            continue
        data = read_yaml_file(value, key)
        stem = Path(value).stem
        if key == "suite":
            scene = data.pop("scenario", "bedside_shelf")
            if is_file_reference(str(scene)):  # the suite's own scene file becomes a scenario option too
                scene_stem = Path(str(scene)).stem
                _write_option(root, "scenario", scene_stem, ["base_scenario", "_self_"], None,
                              read_yaml_file(scene, "scenario"))  # fmt: skip
                scene = scene_stem
            operator = data.pop("operator", "expert")
            data.setdefault("name", stem)
            # an operator option by name, or the file's own operator mapping in place of the group's choice
            chosen = operator if isinstance(operator, str) else None
            _write_option(root, "suite", stem, ["base_suite@suite", {"override /scenario": scene},
                                                {"override /operator": chosen}, "_self_"], "suite", data,
                          None if chosen else {"operator": operator})  # fmt: skip
        else:  # a scene or a falsify space: the file's options on the group's schema
            _write_option(root, key, stem, [f"base_{key}", "_self_"], None, data)
        out.append(f"{key}={stem}")
        used = True
    return out, ([f"file://{root}"] if used else [])


def _write_option(root: Path, group: str, name: str, defaults: list, under: str | None, data: dict,
                  beside: dict | None = None) -> None:
    """Write conf option `group/name.yaml` (temp file, then rename: a killed command leaves no half file)."""
    folder = root / group
    folder.mkdir(parents=True, exist_ok=True)
    header = ("# @package _global_\n" if under else "") + "# written by coreach from a lab's own file\n"
    body = yaml.safe_dump({"defaults": defaults, **({under: data} if under else data), **(beside or {})},
                          sort_keys=False)  # fmt: skip
    fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
    with os.fdopen(fd, "w") as fh:
        fh.write(header + body)
    os.replace(tmp, folder / f"{name}.yaml")


def suite_overrides(ref: str, episodes: int | None = None) -> list[str]:
    """The overrides that select suite `ref` (a shipped name or a lab's own file) in a config composed inside
    a running command (the search path keeps outside plugin packages)."""
    chosen, lab_conf = lab_file_overrides([f"suite={ref}"])
    sized = [f"suite.episodes={int(episodes)}"] if episodes else []
    return [*(search_path_overrides(lab_conf) if lab_conf else []), *chosen, *sized]
