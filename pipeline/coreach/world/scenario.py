"""Task scenes: named goals (approach pose + fine motion), read from YAML and sampled into jittered layouts."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import torch
from omegaconf import DictConfig, OmegaConf
from torch import Tensor

from coreach.control.bodies import Primitive
from coreach.control.separation import SeparationSettings
from coreach.config.schemas import ScenarioConfig
from coreach.errors import ConfigError
from coreach.config.compose import SUITE_CONFIG, compose_here, is_file_reference, on_schema, options, read_yaml_file
from coreach.world.geometry import matrix_to_quat, rpy_to_matrix
from coreach.world.scene_bodies import check_goals_clear, finite_list, named_entry, parse_obstacles, parse_person

__all__ = ["Goal", "Scenario", "Layout", "EpisodeLayout", "load_scenario", "builtin_scenarios", "scenario_from_config"]


@dataclass
class Goal:
    """One thing the user may want to do: reach `position` with the tool in `approach_rpy_deg`,
    then move it by `fine_motion` (m, base frame), e.g. +3 cm forward to press a switch."""

    name: str
    position: list[float]
    approach_rpy_deg: list[float] = field(default_factory=lambda: [0.0, 90.0, 0.0])
    fine_motion: list[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])


class EpisodeLayout(NamedTuple):
    """The goals of one episode as numpy arrays (views into the Layout tensors)."""

    goal_pos: np.ndarray  # [G, 3] approach points (m)
    goal_quat: np.ndarray  # [G, 4] approach orientations (w, x, y, z)
    goal_fine: np.ndarray  # [G, 3] fine-motion displacements (m)


@dataclass
class Layout:
    """Goal poses of E episodes (float64): each episode jitters the approach points of all G goals."""

    names: list[str]
    approach_pos: Tensor  # [E, G, 3]
    approach_rot: Tensor  # [E, G, 3, 3]
    fine: Tensor  # [E, G, 3]

    @property
    def targets(self) -> Tensor:
        """Waypoints [E, G, 2, 3]: approach point, then the end of the fine motion."""
        return torch.stack([self.approach_pos, self.approach_pos + self.fine], dim=-2)

    @property
    def approach_quat(self) -> Tensor:
        """Approach orientations [E, G, 4] (w, x, y, z)."""
        return matrix_to_quat(self.approach_rot)

    def __len__(self) -> int:
        return self.approach_pos.shape[0]

    def to_episode(self, i: int) -> EpisodeLayout:
        """Numpy views of episode i's goals (the quaternions are computed, so a fresh array)."""
        return EpisodeLayout(
            self.approach_pos[i].numpy(), matrix_to_quat(self.approach_rot[i]).numpy(), self.fine[i].numpy()
        )


def _vector(value: Any, where: str, what: str) -> list[float]:
    """Three finite numbers (the scene file's one check, coreach.world.scene_bodies); ConfigError naming `where`."""
    return list(finite_list(value, 3, where, what))


def _number(value: Any, where: str, lo: float, hi: float, what: str) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise ConfigError(where, f"expected a number ({what}), got {value!r}") from None
    if isinstance(value, bool) or not math.isfinite(out) or not lo <= out <= hi:
        raise ConfigError(where, f"expected a finite number in [{lo}, {hi}] ({what}), got {value!r}")
    return out


@dataclass
class Scenario:
    """A scene of G goals; each episode picks one and jitters all approach points by up to +-jitter. The bodies
    the arm must keep clear of: furniture (`obstacles`) and the person, with the separation settings."""

    name: str
    goals: list[Goal]
    jitter: float = 0.02  # m, uniform per axis, per goal and episode
    dt: float = 0.1  # s between recorded steps
    obstacles: list[Primitive] = field(default_factory=list)
    person: list[Primitive] = field(default_factory=list)
    separation: SeparationSettings = field(default_factory=SeparationSettings)

    @property
    def has_bodies(self) -> bool:
        return bool(self.obstacles or self.person)

    @property
    def goal_names(self) -> list[str]:
        return [g.name for g in self.goals]

    @property
    def body_names(self) -> list[str]:
        """Furniture then the person's bodies, the order of the separation filter's World."""
        return [b.name for b in list(self.obstacles) + list(self.person)]

    def goal_index(self, name: str) -> int:
        """Position of goal `name` in `goals`."""
        for i, g in enumerate(self.goals):
            if g.name == name:
                return i
        raise ConfigError(f"scenario {self.name}, goal", f"unknown goal {name!r}; expected one of {self.goal_names}")

    @classmethod
    def from_dict(cls, d: Any, where: str = "scenario") -> Scenario:
        """Build from plain data (parsed YAML); `where` prefixes error locations (e.g. the file name)."""
        if not isinstance(d, dict):
            raise ConfigError(where, f"expected a mapping with keys name, goals, jitter, dt; got {type(d).__name__}")
        known = {"name", "goals", "jitter", "dt", "clearance", "obstacles", "person"}
        extra = sorted(set(d) - known)
        if extra:
            raise ConfigError(f"{where}, option {extra[0]}", f"unknown option; expected one of {sorted(known)}")
        name = d.get("name")
        if not isinstance(name, str) or not name:
            raise ConfigError(f"{where}, option name", f"expected a non-empty string, got {name!r}")
        raw_goals = d.get("goals")
        if not isinstance(raw_goals, list) or not raw_goals:
            raise ConfigError(f"{where}, option goals", "expected a non-empty list of goals")
        goals, seen = [], set()
        goal_keys = {"name", "position", "approach_rpy_deg", "fine_motion"}
        for i, g in enumerate(raw_goals):
            at = f"{where}, option goals[{i}]"
            gname = named_entry(g, at, goal_keys)
            if gname in seen:
                raise ConfigError(f"{at}.name", f"duplicate goal name {gname!r}; goal names must be unique")
            seen.add(gname)
            if "position" not in g:
                raise ConfigError(f"{at}.position", "missing; expected the approach point [x, y, z] in m")
            goals.append(
                Goal(
                    name=gname,
                    position=_vector(g["position"], f"{at}.position", "approach point, m"),
                    approach_rpy_deg=_vector(
                        g.get("approach_rpy_deg", [0.0, 90.0, 0.0]), f"{at}.approach_rpy_deg", "roll pitch yaw, deg"
                    ),
                    fine_motion=_vector(g.get("fine_motion", [0.0, 0.0, 0.0]), f"{at}.fine_motion", "displacement, m"),
                )
            )
        jitter = _number(d.get("jitter", 0.02), f"{where}, option jitter", 0.0, 1.0, "m")
        dt = _number(d.get("dt", 0.1), f"{where}, option dt", 1e-4, 10.0, "s")
        clearance = _number(d.get("clearance", SeparationSettings.clearance), f"{where}, option clearance", 0.0,
                            1.0, "m kept from furniture")
        taken = {g.name for g in goals}
        obstacles = parse_obstacles(d.get("obstacles"), where, taken)
        person, separation = parse_person(d.get("person"), where, taken)

        separation = replace(separation, clearance=clearance)
        points = [p for g in goals for p in (g.position, [a + b for a, b in zip(g.position, g.fine_motion)])]
        labels = [f"{g.name} ({what})" for g in goals for what in ("approach point", "end of fine motion")]
        check_goals_clear(np.array(points), labels, obstacles, person, separation.keep_out, where)
        return cls(name=name, goals=goals, jitter=jitter, dt=dt, obstacles=obstacles, person=person,
                   separation=separation)

    def sample_layouts(self, n_episodes: int, generator: torch.Generator) -> Layout:
        """E layouts: every approach point shifted by U(-jitter, jitter) per axis; orientations and
        fine motions kept as declared."""
        if n_episodes < 1:
            raise ConfigError(f"scenario {self.name}, episodes", f"expected at least 1 episode, got {n_episodes}")
        pos = torch.tensor([g.position for g in self.goals], dtype=torch.float64)  # [G, 3]
        rpy = torch.deg2rad(torch.tensor([g.approach_rpy_deg for g in self.goals], dtype=torch.float64))
        fine = torch.tensor([g.fine_motion for g in self.goals], dtype=torch.float64)
        E, G = n_episodes, len(self.goals)
        noise = torch.rand(E, G, 3, generator=generator, dtype=torch.float64) * 2 - 1
        return Layout(
            names=self.goal_names,
            approach_pos=pos.expand(E, G, 3) + self.jitter * noise,
            approach_rot=rpy_to_matrix(rpy).expand(E, G, 3, 3).clone(),
            fine=fine.expand(E, G, 3).clone(),
        )


def builtin_scenarios() -> list[str]:
    """Names of the scenarios shipped in the `scenario` config group."""
    return options("scenario")


def scenario_from_config(node: Any, where: str = "scenario") -> Scenario:
    """A Scenario from a composed `scenario` node (or plain data already on its schema)."""
    data = OmegaConf.to_container(node, resolve=True) if isinstance(node, DictConfig) else node
    return Scenario.from_dict(data, where)


def load_scenario(name_or_path: str | Path) -> Scenario:
    """A scenario by name (an option of the `scenario` config group, composed through Hydra) or a lab's own
    YAML file, merged onto the same schema (coreach.config.schemas.ScenarioConfig)."""
    if is_file_reference(name_or_path):
        where = str(name_or_path)
        return Scenario.from_dict(on_schema(ScenarioConfig, read_yaml_file(name_or_path, "scenario"), where), where)
    name = str(name_or_path)
    if name not in builtin_scenarios():
        raise ConfigError("option scenario", f"unknown scenario {name!r}; expected one of {builtin_scenarios()} or a "
                                             ".yaml path")  # fmt: skip
    cfg = compose_here(SUITE_CONFIG, [f"scenario={name}"], f"scenario/{name}.yaml")
    return scenario_from_config(cfg.scenario, f"scenario/{name}.yaml")
