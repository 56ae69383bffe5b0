"""`scripted` labeller: the demonstrator's own noise-free action toward the operator's goal at each visited state."""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from coreach.host.api import expert_action, expert_twist
from coreach.host.api import null_space_push
from coreach.host.api import ConfigError
from coreach.host.api import integer, number


class ScriptedLabeller:
    """Resolved-rate control with damped least squares, the velocity law of `coreach.demonstrator`, with the
    demonstrator's default gains: toward the approach pose of the goal, or along its fine motion once the
    approach pose was reached. Defaults equal the demonstrator's so labels and demonstrations agree."""

    name = "scripted"

    def __init__(self, k_p: float = 2.0, k_r: float = 2.0, v_max: float = 0.15, w_max: float = 1.0,
                 damping: float = 0.05, chunk: int = 20_000):  # fmt: skip
        for key, value in (("k_p", k_p), ("k_r", k_r), ("v_max", v_max), ("w_max", w_max)):
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
                raise ConfigError(f"labeller.{key}", f"expected a number > 0, got {value!r}")
        if isinstance(damping, bool) or not isinstance(damping, (int, float)) or damping < 0:
            raise ConfigError("labeller.damping", f"expected a number >= 0, got {damping!r}")
        if not isinstance(chunk, int) or chunk < 1:
            raise ConfigError("labeller.chunk", f"expected an integer >= 1, got {chunk!r}")
        self.k_p, self.k_r, self.v_max, self.w_max = float(k_p), float(k_r), float(v_max), float(w_max)
        self.damping, self.chunk = float(damping), chunk

    def label(self, robot, visits) -> Tensor:
        out = []
        for i in range(0, len(visits), self.chunk):  # bounds the Jacobian batch's memory
            sl = slice(i, i + self.chunk)
            q, goal = visits.q[sl], visits.goal[sl]
            rows = torch.arange(q.shape[0])
            wp = visits.targets[sl][rows, goal]  # [B, 2, 3]
            target = torch.where(visits.fine_phase[sl][:, None], wp[:, 1], wp[:, 0])
            twist = expert_twist(visits.ee_pos[sl], visits.ee_rot[sl], target, visits.goal_rot[sl][rows, goal],
                                 self.k_p, self.k_r, self.v_max, self.w_max)  # fmt: skip
            J = robot.jacobian(q).to(torch.float64)
            world = visits.world  # the scene's bodies: the demonstrator's separation step and null-space push
            sep = None if world is None else world.separation(q)
            push = None if world is None else null_space_push(world, q, J, self.damping)
            out.append(expert_action(robot, q, J, twist, visits.dt, self.damping, None, None, sep, push))
        return torch.cat(out) if out else torch.zeros(0, robot.dof, dtype=torch.float64)


@dataclass
class ScriptedLabellerConfig:
    """Options of the `scripted` labeller (conf/labeller/scripted.yaml)."""

    _target_: str = "coreach_plugins.labeller.scripted.ScriptedLabeller"
    k_p: float = number(2.0, 0.0, unit="1/s", open_range=True)
    k_r: float = number(2.0, 0.0, unit="1/s", open_range=True)
    v_max: float = number(0.15, 0.0, unit="m/s", open_range=True)
    w_max: float = number(1.0, 0.0, unit="rad/s", open_range=True)
    damping: float = number(0.05, 0.0)
    chunk: int = integer(20_000, 1)
