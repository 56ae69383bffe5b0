"""The states a closed-loop rollout visited, with the goal the operator wanted at each, and their episodes."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import Tensor

from coreach.episodes import Episode
from coreach.world.geometry import matrix_to_quat, rotation_error
from coreach.vetting.records import RolloutRecord
from coreach.vetting.suite import EpisodePlan

__all__ = ["Visits", "visits_from_record", "visit_episodes"]


@dataclass
class Visits:
    """N visited states, flattened over episodes and steps (float64, SI units)."""

    q: Tensor  # [N, n] joint positions
    ee_pos: Tensor  # [N, 3]
    ee_rot: Tensor  # [N, 3, 3]
    goal: Tensor  # [N] long: the goal the operator wanted at that step
    fine_phase: Tensor  # [N] bool: that goal's approach pose was reached since the operator chose it
    targets: Tensor  # [N, G, 2, 3] approach point and end of fine motion of every goal
    goal_rot: Tensor  # [N, G, 3, 3] approach orientation of every goal
    episode: Tensor  # [N] long: index of the rollout episode
    step: Tensor  # [N] long: step within that episode
    dt: float
    world: Any = None  # the suite scene's ArmWorld (coreach.world.scene_arm.arm_world), None without bodies: labels
    # then go through the same separation step and null-space push as the demonstrator's

    def __len__(self) -> int:
        return int(self.q.shape[0])


def visited_mask(record: RolloutRecord) -> Tensor:
    """[E, T] bool: steps at which the operator was still working on a goal. Excluded: steps after success,
    and steps an arm that completed its initial goal spent holding still before a pending switch."""
    T = record.limit_scaled.shape[1]
    t = torch.arange(T)[None, :]
    end = torch.where(record.success, record.success_step.clamp(0, T), torch.full_like(record.success_step, T))
    live = t < end[:, None]
    done = record.extras["initial_done_step"]  # [E] -1 if never
    switch = record.switch_step
    holding = (done[:, None] >= 0) & (t >= done[:, None]) & (t < switch[:, None])
    return live & ~holding


def visits_from_record(record: RolloutRecord, plan: EpisodePlan, robot, position_tol: float,
                       orientation_tol: float) -> Visits:  # fmt: skip
    """Flatten the visited steps of `record` (rolled out on `plan`) with the operator's goal at each step.

    The fine phase is replayed with the suite's own arrival rule (position within `position_tol` and
    orientation within `orientation_tol` of the goal's approach pose), restarted at a goal switch, so a label
    asks for the fine motion exactly where the simulated operator had moved on to it.
    """
    q_all = record.extras["q"][:, :-1].to(torch.float64)  # [E, T, n] state before each step
    E, T, n = q_all.shape
    t = torch.arange(T)[None, :]
    switched = (record.switch_step[:, None] >= 0) & (t >= record.switch_step[:, None])  # [E, T]
    goal = torch.where(switched, record.goal_final[:, None], record.goal_initial[:, None])  # [E, T]
    pos, rot = robot.fk(q_all.reshape(-1, n))
    pos, rot = pos.to(torch.float64).reshape(E, T, 3), rot.to(torch.float64).reshape(E, T, 3, 3)
    rows = torch.arange(E)[:, None].expand(E, T)
    targets = plan.layout.targets.to(torch.float64)  # [E, G, 2, 3]
    approach_rot = plan.layout.approach_rot.to(torch.float64)  # [E, G, 3, 3]
    app = targets[rows, goal, 0]  # [E, T, 3]
    ang = rotation_error(approach_rot[rows, goal], rot).norm(dim=-1)  # [E, T]
    at = ((app - pos).norm(dim=-1) < position_tol) & (ang < orientation_tol)
    # Reached since the last change of goal: a running "any" that restarts at the switch step.
    segment = switched.long()  # 0 before the switch, 1 after
    reached = torch.zeros(E, T, dtype=torch.bool)
    for s in (0, 1):
        in_seg = segment == s
        reached |= in_seg & (torch.cummax((at & in_seg).long(), dim=1).values > 0)
    keep = visited_mask(record)
    per_step = lambda x: x[:, None].expand(E, T, *x.shape[1:])[keep]  # noqa: E731
    return Visits(
        q=q_all[keep], ee_pos=pos[keep], ee_rot=rot[keep], goal=goal[keep], fine_phase=reached[keep],
        targets=per_step(targets), goal_rot=per_step(approach_rot),
        episode=rows[keep], step=t.expand(E, T)[keep], dt=float(record.dt),
    )  # fmt: skip


def visit_episodes(visits: Visits, labels: Tensor, record: RolloutRecord, plan: EpisodePlan,
                   id_offset: int, min_steps: int = 2) -> list[Episode]:  # fmt: skip
    """One schema-v1 episode per rollout episode: its visited states in order, labelled with `labels` [N, n].

    The episode's `goal` is the operator's final goal; before a switch the labels head for the initial goal.
    Replaying the belief over the visited tool path reproduces the belief closed loop had (same model, same
    positions, held steps carry no motion), so the decoder learns at the very contexts it met.
    """
    quat = matrix_to_quat(visits.ee_rot).numpy()
    layout_quat = plan.layout.approach_quat.numpy()  # [E, G, 4]
    out = []
    ep_idx = visits.episode.numpy()
    for e in np.unique(ep_idx):
        rows = np.nonzero(ep_idx == e)[0]
        if len(rows) < min_steps:
            continue
        out.append(Episode(
            episode_id=int(id_offset + e), goal=int(record.goal_final[e]),
            q=visits.q[rows].numpy(), qd=labels[rows].numpy(), ee_pos=visits.ee_pos[rows].numpy(),
            ee_quat=quat[rows], goal_pos=plan.layout.approach_pos[e].numpy(), goal_quat=layout_quat[e],
            goal_fine=plan.layout.fine[e].numpy(),
        ))  # fmt: skip
    return out
