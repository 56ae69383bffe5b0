"""`coreach import-recordings`: bag folders and CSV files -> one schema-v1 Parquet file and a short report."""

from __future__ import annotations

import shlex
from dataclasses import replace
from pathlib import Path

import numpy as np
import torch
from omegaconf import DictConfig

from coreach.config.command_line import command_line_options
from coreach.episodes import EpisodeSet
from coreach.errors import ConfigError, DataError
from coreach.host.registry import build_plugin
from coreach.recordings.bag_reader import read_bag
from coreach.recordings.csv_reader import read_csv
from coreach.recordings.options import WHERE, read_options
from coreach.recordings.stick_parquet import save_with_stick
from coreach.recordings.to_episodes import ArmLimits, build_episodes, recording_pieces
from coreach.world.scenario import load_scenario


def import_recordings(cfg: DictConfig) -> dict:
    """Read every input, check and resample it, cut it at goal-label changes, and write one Parquet file."""
    inputs, topics, checks, dt, min_steps = read_options(cfg)
    robot = build_plugin(cfg.robot, "robot")
    try:
        scenario = load_scenario(cfg.scene)
    except ConfigError as e:  # the scenario module names its own option; here it is `scene`
        raise (ConfigError(f"{WHERE}, option scene", e.problem) if e.where == "option scenario" else e) from None
    dt = scenario.dt if dt is None else dt
    arm = ArmLimits.of(robot)

    # the nominal scene: bags do not carry the layout, and a recording was made in one fixed scene
    layout = replace(scenario, jitter=0.0).sample_layouts(1, torch.Generator().manual_seed(0)).to_episode(0)
    episodes, sticks, reports = [], [], []
    for item in inputs:
        path = Path(item)
        if path.suffix.lower() == ".csv":
            rec = read_csv(path, arm.joint_names)
        else:
            rec = read_bag(path, arm.joint_names, topics)
        pieces, report = recording_pieces(rec, arm, dt, checks, min_steps)
        for p in pieces:
            if p.goal not in scenario.goal_names:
                raise DataError(f"{rec.source}: {rec.goal_origin}", f"unknown goal {p.goal!r}; scenario "
                                                                    f"{scenario.name} has {scenario.goal_names}")
        if pieces:
            episodes += build_episodes(pieces, robot, scenario.goal_names, layout, first_id=len(episodes))
            sticks += [p.stick for p in pieces]
        reports.append(report)
    if not episodes:
        raise DataError("inputs", f"no episode of at least {min_steps} steps in {len(inputs)} recording(s)")
    widths = {None if s is None else s.shape[1] for s in sticks}
    stick_note = None
    if len(widths) != 1 or None in widths:
        stick_note = f"stick column left out: recordings differ in stick axes ({sorted(widths, key=str)})"
        sticks = None
    out = Path(cfg.out)
    source = f"recordings: {len(inputs)} file(s)"
    episode_set = EpisodeSet(episodes, scenario.goal_names, arm.joint_names, dt, source=source)
    save_with_stick(episode_set, sticks, out)
    found = {k: sum(s[k] for r in reports for s in r["streams"]) for k in ("gaps", "duplicates", "backwards")}
    counts = np.bincount(episode_set.goals, minlength=len(scenario.goal_names))
    # the robot options the recordings were checked against, so the suggested training uses the same arm
    robot_override = "".join(f" {shlex.quote(o)}" for o, root in command_line_options().items() if root == "robot")
    return {
        "out": str(out), "episodes": len(episodes), "samples": episode_set.total_steps, "dt": dt,
        "robot": robot.name, "scenario": scenario.name, "fingerprint": episode_set.fingerprint(),
        "goals": {g: int(c) for g, c in zip(scenario.goal_names, counts)}, "found": found,
        "stick": None if sticks is None else int(sticks[0].shape[1]), "stick_note": stick_note,
        "recordings": reports,
        "train": f"coreach train dataset=parquet_file {shlex.quote(f'dataset.path={out}')}{robot_override}",
    }  # fmt: skip
