"""Dataset plugin: scripted demonstrations in a scenario, generated once per setting and cached as Parquet."""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict
from pathlib import Path

from coreach.demonstrator import generate
from coreach.episodes import SCHEMA_VERSION, EpisodeSet, load_parquet, save_parquet
from coreach.errors import ConfigError
from coreach.protocols import Robot
from coreach.scenario import load_scenario

# Bump when the demonstrator's behaviour changes so stale caches are not reused.
GENERATOR_VERSION = 1


class ScriptedShelf:
    """Damped-least-squares demonstrations of `episodes` episodes in `scenario` (a shipped name or YAML path).

    The result is written to `cache_dir` under a name derived from every setting, the scenario's content and
    the robot, and always returned through `load_parquet`, the loader used for recorded data too.
    """

    def __init__(
        self,
        scenario: str = "bedside_shelf",
        episodes: int = 400,
        seed: int = 0,
        noise: float = 0.02,
        max_steps: int = 80,
        cache_dir: str = "data",
    ):
        if int(episodes) < 1:
            raise ConfigError("dataset.episodes", f"expected at least 1 episode, got {episodes}")
        if int(max_steps) < 2:
            raise ConfigError("dataset.max_steps", f"expected at least 2 steps, got {max_steps}")
        if not 0.0 <= float(noise) <= 10.0:
            raise ConfigError("dataset.noise", f"expected a fraction of the joint speed limit in [0, 10], got {noise}")
        self.scenario = str(scenario)
        self.episodes, self.seed, self.noise = int(episodes), int(seed), float(noise)
        self.max_steps, self.cache_dir = int(max_steps), Path(cache_dir)

    def cache_path(self, robot: Robot) -> Path:
        """Where the demonstrations for `robot` are (or will be) cached."""
        scenario = load_scenario(self.scenario)
        key = {
            "generator": GENERATOR_VERSION,
            "schema": SCHEMA_VERSION,
            "scenario": asdict(scenario),
            "episodes": self.episodes,
            "seed": self.seed,
            "noise": self.noise,
            "max_steps": self.max_steps,
            "robot": robot.name,
            "joints": list(robot.joint_names),
            # Limits and home pose shape the demonstrations, so an edited robot gets a fresh cache.
            "limits": [t.double().tolist() for t in (robot.q_lower, robot.q_upper, robot.qd_max, robot.q_home)],
        }
        digest = hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:16]
        return self.cache_dir / f"scripted_{scenario.name}_{robot.name}_{digest}.parquet"

    def load(self, robot: Robot) -> EpisodeSet:
        path = self.cache_path(robot)
        if not path.is_file():
            demos = generate(robot, load_scenario(self.scenario), self.episodes, self.seed, self.noise, self.max_steps)
            save_parquet(demos, path)
        return load_parquet(path, robot=robot)
