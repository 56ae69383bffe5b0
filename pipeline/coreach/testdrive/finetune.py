"""Recorded drives as aggregation data: each visited state relabelled with the demonstrator's action.

The closed-loop aggregation of `coreach aggregate` (DAgger) labels the states a decoder visited with the
labeller's action toward the goal the operator wanted. A person's drive gives the same kind of states:
the goal is the one the drive's episode names (the target the person named, or the goal reached), and
the label comes from the same labeller plugin. The result is a schema-v1 episode set to train on,
alone or merged with the demonstrations; the fine-tuned decoder is then vetted and released as usual.
"""

from __future__ import annotations

import numpy as np
import torch

from coreach.aggregation.visits import Visits
from coreach.episodes import Episode, EpisodeSet, load_parquet
from coreach.errors import DataError
from coreach.geometry import quat_to_matrix


def drive_visits(paths) -> tuple[Visits, list[tuple[Episode, np.ndarray]], EpisodeSet]:
    """Visits (every recorded step, in order) of the drives in `paths`; the episodes and their rows."""
    import pyarrow.parquet as pq

    parts, sets = [], None
    for path in paths:
        es = load_parquet(path)
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
