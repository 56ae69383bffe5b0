"""`coreach check-reach`: the arm against a scene, goal by goal, before any demonstration is made."""

from __future__ import annotations

from dataclasses import asdict

from omegaconf import DictConfig, OmegaConf

from coreach.errors import ConfigError
from coreach.host.registry import build_plugin
from coreach.world.reach_check import ReachOptions, check_reach, suggest_base_shift
from coreach.world.scenario import load_scenario


def run(cfg: DictConfig) -> dict:
    robot = build_plugin(cfg.robot, "robot")
    scene = load_scenario(str(cfg.scene))
    try:
        opt = ReachOptions(**OmegaConf.to_container(cfg.reach))
    except TypeError as exc:
        raise ConfigError("option reach", f"{exc}; expected the keys of {list(ReachOptions.__annotations__)}") from None
    rows = check_reach(robot, scene, opt)
    marginal = [r.goal for r in rows if r.reachable and (r.limit_margin_rad < cfg.min_limit_margin
                                                         or r.manipulability < cfg.min_manipulability)]  # fmt: skip
    unreachable = [r.goal for r in rows if not r.reachable]
    out = {"robot": robot.name, "scene": scene.name, "goals": [{**asdict(r), "reachable": r.reachable} for r in rows],
           "unreachable": unreachable, "marginal": marginal}  # fmt: skip
    if unreachable:
        found = suggest_base_shift(robot, scene, opt)
        out["suggestion"] = None if found is None else {"base_shift_m": found[0], "limit_margin_rad": found[1]}
        out["exit_code"] = 3  # a verdict, not bad input: the arm cannot do this scene where it stands
    return out
