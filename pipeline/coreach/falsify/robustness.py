"""A continuous robustness score per vetting episode: positive when it succeeded with room to spare,
negative when it failed, and by how much.

Two margins, the smaller wins:
- the task: an episode that succeeded scores the share of the horizon left when it did, (T - t_success) / T
  in (0, 1]; one that failed scores minus the share of its final goal's way still left at the horizon,
  -remaining / way in [-1, 0): remaining is the distance to the current waypoint plus, before the approach
  pose, the fine motion's length, and way is the same measure where the final goal began (the start, or the
  switch). Near the boundary the two sides meet at 0: finishing just in time and missing by a hair score about
  the same, which is what lets a search climb toward failures instead of sampling blindly;
- the separation: the closest any link came to furniture, to another link, or to the person's keep-out zone,
  over the world's clearance (the distance the safety filter is built to hold, 2 cm on the bedside shelf),
  capped at 1; contact or an intrusion into the keep-out zone is negative. Once the filter holds its clearance
  the episode counts as fully robust on this side. A cap at 5 cm made a self-distance of 3.7 cm, which the
  bedside shelf's arm shows in about half of all episodes whatever the operator does, the smaller margin of
  most successful episodes: the score then hid the task margin behind a plateau, and a search toward the
  lamp switch settled on that plateau in 2 of 5 seeds instead of descending to the failures (docs/falsify.md).
A pass/fail count would say only whether a failure was hit; the score also says how close each miss was.
"""

from __future__ import annotations

import torch
from torch import Tensor

from coreach.vetting.records import RolloutRecord

__all__ = ["robustness", "FLOOR"]

FLOOR = 1e-3  # the smallest magnitude of a failure's score, so that a failed episode is never scored 0


def robustness(record: RolloutRecord) -> dict[str, Tensor]:
    """{"score", "task", "separation"}: [E] float64 each (see the module docstring)."""
    E, T = record.limit_scaled.shape
    rows = torch.arange(E)
    ex = record.extras
    err = record.error.to(torch.float64)  # [E, T+1] distance to the current waypoint
    targets = ex["goal_targets"].to(torch.float64)[rows, record.goal_final]  # [E, 2, 3]
    fine = (targets[:, 1] - targets[:, 0]).norm(dim=-1)  # [E] m
    reached = ex["phase1_step"] >= 0  # the final goal's approach pose was reached
    remaining = err[:, T] + torch.where(reached, 0.0, fine)
    begin = record.switch_step.clamp_min(0)
    way = err[rows, begin] + fine
    failed = -(remaining / way.clamp_min(1e-6)).clamp(FLOOR, 1.0)
    left = (T - record.success_step).to(torch.float64) / T
    task = torch.where(record.success, left.clamp_min(FLOOR), failed)

    separation = torch.ones(E, dtype=torch.float64)
    world = ex.get("world")
    if world is not None:
        closest = torch.stack([ex["sep_furniture"].to(torch.float64).amin(-1),
                               ex["sep_self"].to(torch.float64).amin(-1),
                               ex["sep_person"].to(torch.float64).amin(-1) - float(world["keep_out"])]).amin(0)
        separation = (closest / float(world["clearance"])).clamp(max=1.0)  # inf (nothing measured) -> 1
    return {"score": torch.minimum(task, separation), "task": task, "separation": separation}
