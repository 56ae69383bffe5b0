"""Compose a config before running it, so bad overrides and unknown plugins fail with one clear line."""

from __future__ import annotations

import re

from hydra import compose, initialize_config_module
from hydra.core.global_hydra import GlobalHydra
from hydra.core.override_parser.overrides_parser import OverridesParser
from hydra.errors import HydraException
from omegaconf.errors import OmegaConfBaseException

from coreach.config.command_line import override_key
from coreach.config.schemas import register
from coreach.errors import ConfigError
from coreach.config.compose import lab_file_overrides, one_line, search_path_overrides
from coreach.config.plugin_options import check_command_options, check_groups, check_plugins


def compose_config(config_name: str, overrides: list[str]):
    """Compose `config_name` with overrides (outside any Hydra run); ConfigError on failure."""
    overrides, lab_conf = lab_file_overrides(overrides)  # suite=./mine.yaml: a lab's own file as an option
    overrides = [*search_path_overrides(lab_conf), *overrides] if lab_conf else overrides
    GlobalHydra.instance().clear()
    register()
    try:
        with initialize_config_module("coreach_conf", version_base="1.3"):
            cfg = compose(config_name=config_name, overrides=overrides)
    except (HydraException, OmegaConfBaseException, ValueError) as exc:
        bad = _culprit(exc, overrides)
        problem = one_line(exc)
        if bad and re.search(r"=\[[^\]\"']*=", bad):  # key=[a.b=1]: Hydra reads a list item, not an override
            problem += ' (overrides inside a list need quotes: key=["a.b=1","c=2"])'
        raise ConfigError(f"option {bad}" if bad else f"config {config_name}", problem) from None
    finally:
        GlobalHydra.instance().clear()
    check_plugins(cfg)
    check_command_options(cfg)
    check_groups(cfg)
    return cfg


def _culprit(exc: Exception, overrides: list[str]) -> str | None:
    """The override to blame: the first that does not parse on its own, else the first whose key the
    message names as a whole word (a bare substring test blamed `out=...` for a typo in `rollout_seeds`)."""
    parser = OverridesParser.create()
    for o in overrides:
        try:
            parser.parse_overrides([o])
        except Exception:  # noqa: BLE001 - any parse failure marks this override
            return o
    text = str(exc)
    for o in overrides:
        key = override_key(o)
        if key and re.search(rf"(?<![\w.]){re.escape(key)}(?![\w])", text):
            return o
    return None


def preflight(config_name: str, overrides: list[str], multirun: bool) -> None:
    """Compose every value a sweep would use, one override at a time, before any job starts."""
    if not multirun:
        compose_config(config_name, overrides)
        return
    parser = OverridesParser.create()
    try:
        parsed = parser.parse_overrides(overrides)
    except HydraException as exc:
        raise ConfigError("overrides", one_line(exc)) from None
    base = []
    sweeps = []
    for raw, ov in zip(overrides, parsed):
        if ov.is_sweep_override():
            values = [str(v) for v in ov.sweep_string_iterator()]
            base.append(f"{ov.get_key_element()}={values[0]}")
            sweeps.append((len(base) - 1, ov.get_key_element(), values))
        else:
            base.append(raw)
    compose_config(config_name, base)
    for index, key, values in sweeps:
        for v in values[1:]:
            trial = list(base)
            trial[index] = f"{key}={v}"
            compose_config(config_name, trial)

