"""`blend` interface: policy blending of direct control with an autopilot toward the most likely goal.

Policy blending (Dragan & Srinivasa 2013): a = (1 - alpha) a_user + alpha a_robot. Here a_user is direct
control (`direct`), a_robot is the scripted demonstrator's servo law (same gains) toward the most likely
goal, and alpha grows linearly with how far the belief is from uniform, capped at `alpha_max` so the user
always keeps part of the stick_gain.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass

import torch
from torch import Tensor

from coreach.host.api import servo
from coreach.host.api import rollout
from coreach.host.api import ConfigError
from coreach.host.api import distance_to_path
from coreach.host.api import check_positive
from coreach_plugins.interface.direct import DirectControl

# The autopilot servoes like the demonstrations it was trained next to: read the demonstrator's defaults
# rather than copying the numbers, so the two cannot drift apart.
_DEMO = {p.name: p.default for p in inspect.signature(rollout).parameters.values()}
K_P, K_R, V_MAX, W_MAX = (float(_DEMO[k]) for k in ("k_p", "k_r", "v_max", "w_max"))


class PolicyBlending(DirectControl):
    """Direct control blended with a servo toward the most likely goal's current waypoint.

    aggressiveness: slope of alpha against confidence (max belief rescaled so uniform -> 0, certain -> 1);
    alpha_max: cap on alpha; fine_radius (m): within this distance of a goal's approach point the servo
    heads for the end of its fine motion, and keeps doing so while the tool stays this close to the
    fine-motion segment (deciding by the approach point alone would flip back as soon as the fine motion
    carried the tool away from it).
    """

    def __init__(
        self,
        name: str = "blend",
        aggressiveness: float = 1.0,
        alpha_max: float = 0.7,
        fine_radius: float = 0.02,
        speed: float = 0.15,
        angular_speed: float = 0.6,
        switch_cost_s: float = 1.0,
        damping: float = 0.05,
    ):
        super().__init__(name, speed, angular_speed, switch_cost_s, damping)
        self.aggressiveness = check_positive("option interface.aggressiveness", aggressiveness, strict=False)
        self.alpha_max = check_positive("option interface.alpha_max", alpha_max, strict=False)
        if self.alpha_max > 1.0:
            raise ConfigError("option interface.alpha_max", f"expected a number in [0, 1], got {alpha_max!r}")
        self.fine_radius = check_positive("option interface.fine_radius", fine_radius)
        self.fine_: Tensor | None = None  # [E, G] bool: episode is in goal g's fine motion

    def alpha(self, belief: Tensor) -> Tensor:
        """Blending weight [E] from the belief [E, G]."""
        G = belief.shape[-1]
        if G == 1:
            confidence = torch.ones_like(belief[:, 0])
        else:
            confidence = ((belief.max(dim=-1).values - 1.0 / G) / (1.0 - 1.0 / G)).clamp(0.0, 1.0)
        return (self.aggressiveness * confidence).clamp(max=self.alpha_max)

    def _fine_phase(self, state) -> Tensor:
        """[E, G] bool: which goals' fine motion each episode is in (see the class docstring)."""
        targets = state.goal_targets  # [E, G, 2, 3]
        near_approach = (targets[:, :, 0, :] - state.ee_pos[:, None, :]).norm(dim=-1) < self.fine_radius
        on_segment = distance_to_path(state.ee_pos, targets) < self.fine_radius
        latched = self.fine_ if self.fine_ is not None and self.fine_.shape == near_approach.shape else None
        fine = (near_approach | latched) & on_segment if latched is not None else near_approach
        if latched is not None:
            self.fine_ = fine
        return fine

    def robot_action(self, state) -> Tensor:
        """Joint velocity [E, n] of the servo toward the most likely goal (demonstrator gains)."""
        E = state.q.shape[0]
        rows = torch.arange(E)
        g = state.belief.argmax(dim=-1)  # [E]
        fine = self._fine_phase(state)[rows, g]
        targets = state.goal_targets[rows, g]  # [E, 2, 3]
        target = torch.where(fine[:, None], targets[:, 1], targets[:, 0])
        return servo(state.jac, state.ee_pos, state.ee_rot, target, state.goal_rot[rows, g], K_P, K_R, V_MAX, W_MAX,
                     self.damping)

    def reset(self, n_episodes: int, state) -> None:
        super().reset(n_episodes, state)
        self.fine_ = torch.zeros(state.goal_targets.shape[:2], dtype=torch.bool)

    def act(self, stick: Tensor, state) -> Tensor:
        user = super().act(stick, state)  # [E, M, K, n]
        a = self.alpha(state.belief).to(user.dtype)[:, None, None, None]
        robot = self.robot_action(state).to(user.dtype)[:, None, None, :]
        return (1.0 - a) * user + a * robot

    def stick_gain(self, state) -> Tensor:
        # The servo term does not depend on the stick, so blending only scales the user's share.
        return (1.0 - self.alpha(state.belief)).to(state.jac.dtype) * super().stick_gain(state)


@dataclass
class PolicyBlendingConfig:
    """Options of `blend` (conf/interface/blend.yaml)."""

    _target_: str = "coreach_plugins.interface.blend.PolicyBlending"
    name: str = "blend"
    aggressiveness: float = 1.0
    alpha_max: float = 0.7
    fine_radius: float = 0.02
    speed: float = 0.15
    angular_speed: float = 0.6
    switch_cost_s: float = 1.0
    damping: float = 0.05
