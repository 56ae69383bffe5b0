"""Dataset plugin: scripted demonstrations in a scenario, generated once per setting and cached as Parquet."""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass
from typing import List, Optional
from pathlib import Path

from coreach.host.api import DEFAULT_MIN_ARRIVAL
from coreach.host.api import generate
from coreach.host.api import SCHEMA_VERSION, EpisodeSet, load_parquet, save_parquet
from coreach.host.api import ConfigError
from coreach.host.api import integer, number, sizes, text
from coreach.host.api import Robot
from coreach.host.api import TAG_URDF, robot_tags
from coreach.host.api import load_scenario

# Bump when the demonstrator's behaviour changes so stale caches are not reused.
GENERATOR_VERSION = 3  # 3: actions pass the shared safety filter (tool-speed cap, look-ahead before the caps)


@dataclass(kw_only=True)
class ScriptedShelfConfig:
    """The options of `dataset=scripted_shelf`, with their ranges (checked when the config is composed)."""

    _target_: str = "coreach_plugins.dataset.scripted_shelf.ScriptedShelf"
    scenario: str = text("bedside_shelf", "a scenario name or YAML path")
    episodes: int = integer(400, 1)
    seed: int = integer(0, 0)
    noise: float = number(0.02, 0.0, 10.0, "(fraction of the joint speed limits)")
    max_steps: int = integer(80, 2)
    cache_dir: str = text("data", "a folder")
    start_jitter: float = number(0.0, 0.0, 3.15, "rad")
    spread_share: float = number(0.0, 0.0, 1.0)
    start_spread: float = number(0.5, 0.0, 3.15, "rad")
    via_share: float = number(0.0, 0.0, 1.0)
    via_steps: list[int] = sizes([5, 30], "[min, max] steps")
    record_via: bool = True
    label_clean: bool = False
    min_arrival: float = number(DEFAULT_MIN_ARRIVAL, 0.0, 1.0)
    goal_weights: Optional[List[float]] = None  # relative share of episodes per goal; null = equal shares


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
        start_jitter: float = 0.0,
        spread_share: float = 0.0,
        start_spread: float = 0.5,
        via_share: float = 0.0,
        via_steps: list[int] | tuple[int, int] = (5, 30),
        record_via: bool = True,
        label_clean: bool = False,
        min_arrival: float = DEFAULT_MIN_ARRIVAL,
        goal_weights: list[float] | None = None,
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
        # where episodes start and whether some head for another goal first (coreach.demonstrator.generate)
        self.starts = {"start_jitter": float(start_jitter), "spread_share": float(spread_share),
                       "start_spread": float(start_spread), "via_share": float(via_share),
                       "via_steps": [int(v) for v in via_steps], "record_via": bool(record_via)}  # fmt: skip
        if label_clean:  # only when set, so the cache names of earlier settings stay as they were
            self.starts["label_clean"] = True
        if goal_weights is not None:  # likewise: equal shares keep their earlier cache names
            self.starts["goal_weights"] = [float(w) for w in goal_weights]
        self.min_arrival = float(min_arrival)

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
            "starts": self.starts,
            "robot": robot.name,
            "joints": list(robot.joint_names),
            # the kinematics too: a moved base or tool offset keeps name, joints and limits but not the motions
            "urdf_sha256": robot_tags(robot).get(TAG_URDF),
            # Limits and home pose shape the demonstrations, so an edited robot gets a fresh cache.
            "limits": [t.double().tolist() for t in (robot.q_lower, robot.q_upper, robot.qd_max, robot.q_home)],
        }
        digest = hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:16]
        return self.cache_dir / f"scripted_{scenario.name}_{robot.name}_{digest}.parquet"

    def load(self, robot: Robot) -> EpisodeSet:
        path = self.cache_path(robot)
        if not path.is_file():
            demos = generate(robot, load_scenario(self.scenario), self.episodes, self.seed, self.noise, self.max_steps,
                             min_arrival=self.min_arrival, **self.starts)  # fmt: skip
            save_parquet(demos, path)
            _write_arrival(path, demos.arrival)
        out = load_parquet(path, robot=robot)
        out.arrival = _read_arrival(path)
        return out


def _arrival_path(path: Path) -> Path:
    return path.with_suffix(".arrival.json")


def _write_arrival(path: Path, arrival: dict) -> None:
    """The demonstrator's per-goal arrival beside the cache (temp file, then rename)."""
    target = _arrival_path(path)
    tmp = target.with_name(f".{target.name}.tmp")
    tmp.write_text(json.dumps(arrival, indent=2, default=float))
    tmp.replace(target)


def _read_arrival(path: Path) -> dict | None:
    target = _arrival_path(path)
    return json.loads(target.read_text()) if target.is_file() else None
