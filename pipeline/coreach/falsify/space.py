"""The scenario space `coreach falsify` searches: which parameters, their bounds, and one case per point."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable

from omegaconf import DictConfig, OmegaConf

from coreach.config.compose import compose_here, is_file_reference, on_schema, options, read_yaml_file
from coreach.config.option_specs import is_number
from coreach.config.schemas import FalsifySpaceConfig
from coreach.errors import ConfigError

__all__ = ["PARAMETERS", "Space", "space_from_config", "space_node", "Suggest"]

AXES = ("x", "y", "z")


@dataclass(frozen=True)
class Parameter:
    """One searchable parameter: its kind, unit, the values that make sense at all, and what it does."""

    kind: str  # "float" or "int"
    unit: str
    lo: float  # hard limits: a bound outside them is refused
    hi: float
    about: str


# name in the space file -> what it sets in a case (coreach.config.schemas.CaseConfig)
PARAMETERS: dict[str, Parameter] = {
    "switch_at": Parameter("float", "of the horizon", 0.0, 1.0, "when the operator changes goal"),
    "beta": Parameter("float", "per m", 0.0, math.inf, "operator rationality (Boltzmann beta; low = erratic)"),
    "noise_std": Parameter("float", "stick units", 0.0, 2.0, "white noise on the stick"),
    "tremor_std": Parameter("float", "stick units", 0.0, 2.0, "band-limited tremor on the stick"),
    "tremor_cutoff_hz": Parameter("float", "Hz", 0.0, 50.0, "tremor corner frequency"),
    "delay_steps": Parameter("int", "control steps", 0, 100, "reaction delay"),
    "layout_shift_m": Parameter("float", "m", -0.2, 0.2, "per goal and axis, added to the approach point"),
    "start_offset_rad": Parameter("float", "rad", -math.pi, math.pi, "per joint, added to the start pose"),
    "head_shift_m": Parameter("float", "m", -0.2, 0.2, "per axis, moves the person's head body (`head_body`)"),
}

# A point of the space is drawn through this: (name, low, high, kind) -> value. optuna's trial.suggest_float /
# suggest_int fit it, and so does a plain random draw (tests, the constructed problem).
Suggest = Callable[[str, float, float, str], float]


@dataclass
class Space:
    """A checked space: goals a case starts at and switches to, and [low, high] per parameter."""

    name: str
    suite: str
    goals_from: list[str]
    goals_to: list[str]
    switch: bool
    bounds: dict[str, tuple[float, float]]
    head_body: str = "head"  # the scene body head_shift_m moves

    def case(self, pick: Callable[[str, list[str]], str], suggest: Suggest, dof: int) -> dict:
        """One case (CaseConfig as plain data) from a point of the space. A switch to the start goal itself
        becomes a switch to the next goal in `goals_to`, so every case with a switch changes goal."""
        goal = pick("goal_from", self.goals_from)
        case: dict[str, Any] = {"goal": goal, "switch_to": None, "switch_at": None, "layout_shift": {},
                                "start_offset": [], "body_shift": {}, "operator": {}}  # fmt: skip
        if self.switch:
            to = pick("goal_to", self.goals_to)
            if to == goal:
                to = self.goals_to[(self.goals_to.index(to) + 1) % len(self.goals_to)]
            case["switch_to"] = to
            lo, hi = self.bounds.get("switch_at", (0.2, 0.8))
            case["switch_at"] = suggest("switch_at", lo, hi, "float")
        for key in ("beta", "noise_std", "tremor_std", "tremor_cutoff_hz", "delay_steps"):
            if key in self.bounds:
                lo, hi = self.bounds[key]
                v = suggest(key, lo, hi, PARAMETERS[key].kind)
                case["operator"][key] = int(v) if PARAMETERS[key].kind == "int" else float(v)
        if "layout_shift_m" in self.bounds:
            lo, hi = self.bounds["layout_shift_m"]
            for g in sorted(set(self.goals_from) | set(self.goals_to)):
                case["layout_shift"][g] = [suggest(f"shift_{g}_{a}", lo, hi, "float") for a in AXES]
        if "start_offset_rad" in self.bounds:
            lo, hi = self.bounds["start_offset_rad"]
            case["start_offset"] = [suggest(f"start_{j}", lo, hi, "float") for j in range(dof)]
        if "head_shift_m" in self.bounds:
            lo, hi = self.bounds["head_shift_m"]
            case["body_shift"][self.head_body] = [suggest(f"head_{a}", lo, hi, "float") for a in AXES]
        return case

    def to_dict(self) -> dict:
        return {"name": self.name, "suite": self.suite, "goals_from": self.goals_from, "goals_to": self.goals_to,
                "switch": self.switch, "bounds": {k: list(v) for k, v in self.bounds.items()},
                "head_body": self.head_body}  # fmt: skip


def space_from_config(node: Any, goal_names: list[str], where: str, body_names: list[str] | None = None) -> Space:
    """A Space from the composed `falsify` node (or plain data), checked: known parameters, bounds [low, high]
    with low < high inside each parameter's hard limits, goals of the scene, and with head_shift_m a
    `head_body` among the scene's `body_names` (checked when given). One ConfigError per problem."""
    data = OmegaConf.to_container(node, resolve=True) if isinstance(node, DictConfig) else node
    o = on_schema(FalsifySpaceConfig, data, where)
    bounds = {}
    for key, value in o["bounds"].items():
        spec = PARAMETERS.get(key)
        if spec is None:
            raise ConfigError(f"{where}.bounds.{key}", f"unknown parameter; expected one of {sorted(PARAMETERS)}")
        if not (isinstance(value, list) and len(value) == 2 and all(is_number(v) for v in value)):
            raise ConfigError(f"{where}.bounds.{key}", f"expected [low, high] ({spec.unit}), got {value!r}")
        lo, hi = float(value[0]), float(value[1])
        if lo > hi:
            raise ConfigError(f"{where}.bounds.{key}", f"inverted bounds [{lo:g}, {hi:g}]; expected low < high")
        if lo == hi:
            raise ConfigError(f"{where}.bounds.{key}", f"empty interval [{lo:g}, {hi:g}]; expected low < high (leave "
                                                       "the parameter out to keep the base suite's value)")  # fmt: skip
        if lo < spec.lo or hi > spec.hi or (key in ("beta", "tremor_cutoff_hz") and lo <= 0) or (
                key == "switch_at" and (lo <= 0.0 or hi >= 1.0)):  # fmt: skip
            raise ConfigError(f"{where}.bounds.{key}", f"[{lo:g}, {hi:g}] leaves the parameter's range "
                                                       f"[{spec.lo:g}, {spec.hi:g}] {spec.unit}")  # fmt: skip
        if spec.kind == "int" and not (lo.is_integer() and hi.is_integer()):
            raise ConfigError(f"{where}.bounds.{key}", f"expected integer bounds, got [{lo:g}, {hi:g}]")
        bounds[key] = (lo, hi)
    goals = {}
    for key in ("goals_from", "goals_to"):
        chosen = o[key] if o[key] is not None else list(goal_names)
        unknown = [g for g in chosen if g not in goal_names]
        if not chosen or unknown:
            raise ConfigError(f"{where}.{key}", f"expected null or goal names of the scene {goal_names}, got {o[key]!r}")
        goals[key] = list(chosen)
    if o["switch"] and len(goals["goals_to"]) < 2:
        # a switch always changes goal: from any start there must be another goal to switch to
        raise ConfigError(f"{where}.goals_to", "a space with switches needs at least 2 goals to switch to")
    if not o["switch"] and "switch_at" in bounds:
        raise ConfigError(f"{where}.bounds.switch_at", "the space has switch: false; leave switch_at out")
    head = o["head_body"]
    if "head_shift_m" in bounds and body_names is not None and head not in body_names:
        raise ConfigError(f"{where}.head_body", f"unknown body {head!r}; the scene has {list(body_names)}")
    return Space(o["name"], o["suite"], goals["goals_from"], goals["goals_to"], bool(o["switch"]), bounds, str(head))


def space_node(ref: str, where: str) -> tuple[dict, str]:
    """(the space's options as plain data, where they came from) for a name of the `falsify` config group
    (composed with its schema) or a lab's own YAML file; `space_from_config` checks them against the scene."""
    if is_file_reference(ref):
        return read_yaml_file(ref, "falsify space"), f"{where} ({ref})"
    if ref not in options("falsify"):
        raise ConfigError(where, f"unknown falsify space {ref!r}; expected one of {options('falsify')} or a .yaml path")
    cfg = compose_here("falsify", [f"falsify={ref}"], f"falsify/{ref}.yaml")
    return OmegaConf.to_container(cfg.falsify, resolve=True), f"falsify/{ref}.yaml"
