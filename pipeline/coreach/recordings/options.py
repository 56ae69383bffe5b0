"""The options of `coreach import-recordings`, each with its type and range (checked by coreach.config.option_specs)."""

from __future__ import annotations

import math
from dataclasses import dataclass

from omegaconf import DictConfig, OmegaConf

from coreach.errors import ConfigError
from coreach.config.option_specs import check_options, choice, integer, number, text
from coreach.recordings.timing import TimingLimits
from coreach.recordings.to_episodes import Checks
from coreach.recordings.topics import CLOCKS, TopicMap

WHERE = "import-recordings"


@dataclass
class TopicOptions:
    joint_states: str = text("/joint_states", "a topic name")
    stick: str | None = text("/joy", "a topic name or null", optional=True)
    goal: str | None = text("/goal", "a topic name or null", optional=True)
    command: str | None = text(None, "a topic name or null", optional=True)
    clock: str = choice("header", CLOCKS)
    sidecar_suffix: str = text(".goal.yaml", "a file name ending, e.g. .goal.yaml")


@dataclass
class CheckOptions:
    gap_s: float = number(0.5, 0.0, math.inf, "s", open_range=True)
    max_gaps: int = integer(0, 0)
    max_duplicates: int = integer(10, 0)
    max_backwards: int = integer(0, 0)
    velocity_factor: float = number(1.5, 0.0, math.inf, "x the URDF limit", open_range=True)
    position_margin: float = number(0.05, 0.0, math.pi, "rad")


@dataclass
class RunOptions:
    dt: float | None = number(None, 0.0, 10.0, "s", optional=True, open_range=True)
    min_steps: int = integer(2, 1)


def read_options(cfg: DictConfig) -> tuple[list[str], TopicMap, Checks, float | None, int]:
    """Inputs, topic map, checks, dt (None = the scenario's) and min_steps; ConfigError names the option."""
    inputs = cfg.get("inputs")
    inputs = OmegaConf.to_container(inputs) if OmegaConf.is_config(inputs) else inputs
    if isinstance(inputs, str):
        inputs = [inputs]
    if not isinstance(inputs, list) or not inputs or not all(isinstance(x, str) and x for x in inputs):
        raise ConfigError(f"{WHERE}, option inputs",
                          "expected a list of bag folders and .csv files, e.g. 'inputs=[bags/run1,run2.csv]'")
    topics = check_options(TopicOptions, OmegaConf.to_container(cfg.topics), WHERE, "topics.")
    checks = check_options(CheckOptions, OmegaConf.to_container(cfg.checks), WHERE, "checks.")
    run = check_options(RunOptions, {"dt": cfg.get("dt"), "min_steps": cfg.get("min_steps", 2)}, WHERE)
    timing = TimingLimits(**{k: checks.pop(k) for k in ("gap_s", "max_gaps", "max_duplicates", "max_backwards")})
    return inputs, TopicMap(**topics), Checks(timing, **checks), run["dt"], run["min_steps"]
