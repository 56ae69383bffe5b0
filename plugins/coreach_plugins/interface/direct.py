"""`direct` interface: the stick drives two tool axes at a time and the user switches among axis pairs."""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
from torch import Tensor

from coreach.host.api import dls_step
from coreach.host.api import STICK_DIM, check_positive, episode_sticks

# Axis pairs per mode, as rows of the base-frame twist [vx, vy, vz, wx, wy, wz]: (x, y), (z, yaw),
# (roll, pitch). Stick axis 0 drives the first axis of the pair, stick axis 1 the second. Splitting the six
# tool axes into three pairs of two is common practice on joystick-driven assistive arms.
MODE_AXES = (("x", "y"), ("z", "yaw"), ("roll", "pitch"))
MODE_ROWS = ((0, 1), (2, 5), (3, 4))
# Until `reset` reports the loop's step, switch costs are counted in steps of the shipped scenario (0.1 s).
DEFAULT_DT = 0.1


def switch_steps(seconds: float, dt: float) -> int:
    """Whole loop steps a mode switch costs (rounded up: a partial step still costs the step)."""
    return max(0, math.ceil(seconds / dt - 1e-9))


class DirectControl:
    """Stick -> tool twist in the current mode's two axes (speed m/s and angular_speed rad/s at full
    deflection) -> joint velocity by damped least squares, in every episode and every mode at once."""

    def __init__(
        self,
        name: str = "direct",
        speed: float = 0.15,
        angular_speed: float = 0.6,
        switch_cost_s: float = 1.0,
        damping: float = 0.05,
    ):
        self.name = str(name)
        self.speed = check_positive("option interface.speed", speed)
        self.angular_speed = check_positive("option interface.angular_speed", angular_speed)
        self.switch_cost_s = check_positive("option interface.switch_cost_s", switch_cost_s, strict=False)
        self.damping = check_positive("option interface.damping", damping, strict=False)
        self.switch_cost_steps = switch_steps(self.switch_cost_s, DEFAULT_DT)

    @property
    def n_modes(self) -> int:
        return len(MODE_ROWS)

    def selection(self, dtype: torch.dtype) -> Tensor:
        """Twist per unit stick in each mode, S [M, 6, 2]."""
        S = torch.zeros(len(MODE_ROWS), 6, STICK_DIM, dtype=dtype)
        for m, rows in enumerate(MODE_ROWS):
            for j, row in enumerate(rows):
                S[m, row, j] = self.speed if row < 3 else self.angular_speed
        return S

    def mode_maps(self, state) -> Tensor:
        """Joint velocity per unit stick, J_dls @ S_m [E, M, n, 2] (linear in the stick, so act and
        stick_gain share it)."""
        J = state.jac  # [E, 6, n]
        E, _, n = J.shape
        M = len(MODE_ROWS)
        twists = self.selection(J.dtype).permute(0, 2, 1).reshape(M * STICK_DIM, 6)  # [M*2, 6] columns of S
        J_rep = J[:, None].expand(E, M * STICK_DIM, 6, n).reshape(-1, 6, n)  # [E*M*2, 6, n]
        qd = dls_step(J_rep, twists.expand(E, -1, -1).reshape(-1, 6), self.damping)  # [E*M*2, n]
        return qd.reshape(E, M, STICK_DIM, n).transpose(-1, -2)

    def reset(self, n_episodes: int, state) -> None:
        self.switch_cost_steps = switch_steps(self.switch_cost_s, float(state.dt))

    def act(self, stick: Tensor, state) -> Tensor:
        maps = self.mode_maps(state)  # [E, M, n, 2]
        sticks = episode_sticks(stick, maps.shape[0], f"interface {self.name}").to(maps.dtype)  # [E, K, 2]
        return torch.einsum("emnd,ekd->emkn", maps, sticks)

    def stick_gain(self, state) -> Tensor:
        maps = self.mode_maps(state)  # [E, M, n, 2]
        current = maps[torch.arange(maps.shape[0]), state.mode.long()]  # [E, n, 2]
        return torch.linalg.svdvals(current)[..., -1]


@dataclass
class DirectControlConfig:
    """Options of `direct` (conf/interface/direct.yaml)."""

    _target_: str = "coreach_plugins.interface.direct.DirectControl"
    name: str = "direct"
    speed: float = 0.15
    angular_speed: float = 0.6
    switch_cost_s: float = 1.0
    damping: float = 0.05
