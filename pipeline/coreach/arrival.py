"""The demonstrator's self-check: how often each goal was reached, and a refusal naming the likely cause."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import torch

from coreach.errors import DataError
from coreach.world.geometry import angle_between

__all__ = ["GoalArrival", "arrival_by_goal", "check_arrival", "DEFAULT_MIN_ARRIVAL"]

# A dataset in which a goal is reached less often than this is refused by default: the decoder would be
# trained on motions that stop short of that goal (common practice for a usable demonstration set, not a
# standard; the lab sets its own with the `min_arrival` option).
DEFAULT_MIN_ARRIVAL = 0.95
# A joint counts as pinned at a limit when it ends within this of it (rad).
LIMIT_MARGIN = 1e-3


@dataclass(frozen=True)
class GoalArrival:
    """Arrival of one goal's demonstrations, and where the misses ended (medians over the misses)."""

    goal: str
    episodes: int
    arrived: int
    miss_position_m: float  # distance from the approach point (nan: no miss)
    miss_orientation_deg: float  # angle from the approach orientation
    pinned_share: float  # share of misses ending with a joint at its position limit
    pinned_joint: str  # the joint most often pinned ("" when none)
    approach_reached_share: float  # share of misses that reached the approach pose (then failed the fine motion)

    @property
    def rate(self) -> float:
        return self.arrived / self.episodes if self.episodes else float("nan")

    def cause(self, position_tol: float, orientation_tol: float) -> str:
        """The likely reason this goal is missed, in words a lab can act on."""
        if self.pinned_share >= 0.5:
            return (f"joint limits: {self.pinned_joint} ends at its position limit in "
                    f"{self.pinned_share:.0%} of the misses")  # fmt: skip
        if self.approach_reached_share >= 0.5:
            return "fine motion not completed within max_steps (raise dataset.max_steps or check the fine motion)"
        if self.miss_position_m > position_tol:
            # the same symptom has two causes; the scene check tells them apart before any data is made
            return (f"out of reach or too slow: misses end a median {self.miss_position_m:.3f} m from the approach "
                    "point (coreach check-reach says whether the arm can reach it; if it can, raise "
                    "dataset.max_steps or lower dataset.noise, else move the goal or the arm's base)")  # fmt: skip
        if self.miss_orientation_deg > math.degrees(orientation_tol):
            return (f"orientation not reachable: misses end a median {self.miss_orientation_deg:.0f} deg from "
                    "the approach orientation")  # fmt: skip
        return "too slow: misses end near the approach pose (raise dataset.max_steps)"

    def to_dict(self) -> dict:
        return {**asdict(self), "rate": self.rate}


def _median(x: torch.Tensor) -> float:
    return float(x.median()) if x.numel() else float("nan")


def arrival_by_goal(run, robot, goal_names: list[str]) -> list[GoalArrival]:
    """Per-goal arrival of a demonstrator `Rollout` (coreach.demonstrator), with where its misses ended."""
    f64 = torch.float64
    rows = torch.arange(len(run.goals))
    pos, rot = robot.fk(run.q_end.to(f64))
    pos, rot = pos.to(f64), rot.to(f64)
    app = run.layout.approach_pos[rows, run.goals]
    miss_pos = (pos - app).norm(dim=-1)
    miss_ang = torch.rad2deg(angle_between(run.layout.approach_rot[rows, run.goals], rot))
    lo, hi = robot.q_lower.to(f64), robot.q_upper.to(f64)
    pinned = ((run.q_end - lo) < LIMIT_MARGIN) | ((hi - run.q_end) < LIMIT_MARGIN)  # [E, n]
    out = []
    for g, name in enumerate(goal_names):
        mine = run.goals == g
        miss = mine & ~run.completed
        k = int(miss.sum())
        counts = pinned[miss].sum(0)
        joint = robot.joint_names[int(counts.argmax())] if k and int(counts.max()) else ""
        out.append(GoalArrival(
            goal=name, episodes=int(mine.sum()), arrived=int((mine & run.completed).sum()),
            miss_position_m=_median(miss_pos[miss]), miss_orientation_deg=_median(miss_ang[miss]),
            pinned_share=float(pinned[miss].any(-1).float().mean()) if k else 0.0, pinned_joint=joint,
            approach_reached_share=float(run.fine_phase[miss].float().mean()) if k else 0.0,
        ))  # fmt: skip
    return out


def check_arrival(report: list[GoalArrival], min_rate: float, where: str, position_tol: float,
                  orientation_tol: float) -> None:  # fmt: skip
    """Raise one DataError for the worst goal below `min_rate` (its rate and likely cause)."""
    low = [a for a in report if a.episodes and a.rate < min_rate]
    if not low:
        return
    worst = min(low, key=lambda a: a.rate)
    others = [a.goal for a in low if a is not worst]
    more = f" (also below: {', '.join(others)})" if others else ""
    raise DataError(
        f"{where}, goal {worst.goal}",
        f"reached in {worst.arrived} of {worst.episodes} demonstrations ({worst.rate:.0%}), expected at least "
        f"{min_rate:.0%}; likely cause: {worst.cause(position_tol, orientation_tol)}{more}",
    )
