"""Recorded drives as aggregation data: each visited state relabelled with the demonstrator's action.

The closed-loop aggregation of `coreach aggregate` (DAgger) labels the states a decoder visited with the
labeller's action toward the goal the operator wanted. A person's drive gives the same kind of states:
the goal is the one the drive's episode names (the target the person named, or the goal reached), and
the label comes from the same labeller plugin. The result is a schema-v1 episode set to train on,
alone or merged with the demonstrations; the fine-tuned decoder is then vetted and released as usual.
"""

from __future__ import annotations
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import torch

from coreach.aggregation.visits import Visits
from coreach.episodes import Episode, EpisodeSet, load_parquet, save_parquet
from coreach.episodes.drive_files import check_drive_file, drive_files
from coreach.errors import ConfigError, DataError
from coreach.host.registry import build_plugin
from coreach.world.geometry import quat_to_matrix


def drive_visits(paths) -> tuple[Visits, list[tuple[Episode, np.ndarray]], EpisodeSet]:
    """Visits (every recorded step, in order) of the drives in `paths`; the episodes and their rows."""
    parts, sets = [], None
    for path in paths:
        es = load_parquet(path)
        check_drive_file(path)
        table = pq.read_table(path, columns=["episode", "step", "phase"])
        if sets is not None and (es.goal_names != sets.goal_names or es.joint_names != sets.joint_names
                                 or abs(es.dt - sets.dt) > 1e-12):  # fmt: skip
            raise DataError(str(path), "drives of another bundle layout (goals, joints or dt differ)")
        sets = sets or es
        ep_col, step_col = np.asarray(table.column("episode")), np.asarray(table.column("step"))
        phase = np.asarray(table.column("phase").to_pylist())  # [rows, G]
        for ep in es:
            rows = np.flatnonzero(ep_col == ep.episode_id)
            parts.append((ep, phase[rows[np.argsort(step_col[rows])], ep.goal]))
    if sets is None:
        raise DataError("recorded drives", "no drive files given")
    cat = lambda name: torch.as_tensor(np.concatenate([getattr(e, name) for e, _ in parts]))  # noqa: E731
    lengths = [len(e) for e, _ in parts]
    goal_rot = [quat_to_matrix(torch.as_tensor(e.goal_quat)) for e, _ in parts]  # [G, 3, 3] each
    visits = Visits(
        q=cat("q"), ee_pos=cat("ee_pos"), ee_rot=quat_to_matrix(cat("ee_quat")),
        goal=torch.as_tensor(np.repeat([e.goal for e, _ in parts], lengths)),
        fine_phase=torch.as_tensor(np.concatenate([ph >= 1 for _, ph in parts])),
        targets=torch.cat([torch.as_tensor(e.goal_targets)[None].expand(len(e), -1, -1, -1) for e, _ in parts]),
        goal_rot=torch.cat([r[None].expand(len(e), -1, -1, -1) for (e, _), r in zip(parts, goal_rot)]),
        episode=torch.as_tensor(np.repeat(np.arange(len(parts)), lengths)),
        step=torch.as_tensor(np.concatenate([np.arange(t) for t in lengths])), dt=float(sets.dt),
    )  # fmt: skip
    return visits, parts, sets


def relabel_drives(paths, robot, labeller, id_offset: int = 9_000_000) -> EpisodeSet:
    """Recorded drives with qd replaced by `labeller`'s action toward each drive's goal (schema v1)."""
    visits, parts, sets = drive_visits(paths)
    labels = labeller.label(robot, visits).to(torch.float64).numpy()  # [N, n]
    if labels.shape != (len(visits), robot.dof) or not np.isfinite(labels).all():
        raise DataError(f"labeller {getattr(labeller, 'name', labeller)}",
                        f"expected finite labels of shape [{len(visits)}, {robot.dof}], got {list(labels.shape)}")
    out, start = [], 0
    for i, (ep, _) in enumerate(parts):
        sl = slice(start, start + len(ep))
        start += len(ep)
        out.append(Episode(episode_id=id_offset + i, goal=ep.goal, q=ep.q, qd=labels[sl], ee_pos=ep.ee_pos,
                           ee_quat=ep.ee_quat, goal_pos=ep.goal_pos, goal_quat=ep.goal_quat,
                           goal_fine=ep.goal_fine))  # fmt: skip
    return EpisodeSet(out, list(sets.goal_names), list(sets.joint_names), sets.dt, source="relabelled test drives")


def relabel_command(cfg) -> dict:
    """`coreach relabel-drives`: recorded drives -> one Parquet file of relabelled episodes, optionally merged
    with a demonstrations file, ready for `coreach train dataset=parquet_file` (one fine-tuning round)."""
    robot = build_plugin(cfg.robot, "robot")
    labeller = build_plugin(cfg.labeller, "labeller")
    paths = drive_files(cfg.drives, "drives")
    relabelled = relabel_drives(paths, robot, labeller)
    if list(relabelled.joint_names) != list(robot.joint_names):
        raise ConfigError("option robot", f"drives were recorded on joints {relabelled.joint_names}, the robot has "
                                          f"{list(robot.joint_names)}; give the robot options of the bundle's arm")
    episodes, merged_with = relabelled, None
    if cfg.get("merge"):
        base = load_parquet(cfg.merge)
        for what in ("goal_names", "joint_names"):
            if list(getattr(base, what)) != list(getattr(relabelled, what)):
                raise ConfigError("option merge", f"{cfg.merge} has {what} {list(getattr(base, what))}, the drives "
                                                  f"{list(getattr(relabelled, what))}")  # fmt: skip
        if abs(base.dt - relabelled.dt) > 1e-9:
            raise ConfigError("option merge", f"{cfg.merge} has a time step of {base.dt} s, the drives {relabelled.dt} "
                                              f"s; record drives at the scene's rate (coreach test-drive --rate "
                                              f"{1.0 / base.dt:g})")  # fmt: skip
        taken = {ep.episode_id for ep in base}
        if taken & {ep.episode_id for ep in relabelled}:
            raise ConfigError("option merge", f"{cfg.merge} already holds episode ids of relabelled drives")
        episodes = EpisodeSet(list(base) + list(relabelled), list(base.goal_names), list(base.joint_names), base.dt,
                              source=f"{base.source} + relabelled test drives")  # fmt: skip
        merged_with = str(cfg.merge)
    out = save_parquet(episodes, Path(str(cfg.out)).expanduser())
    return {"out": str(out), "drives": len(paths), "relabelled_states": relabelled.total_steps,
            "episodes": len(episodes), "merged_with": merged_with,
            "train": f"coreach train dataset=parquet_file dataset.path={out}"}  # fmt: skip
