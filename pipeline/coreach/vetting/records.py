"""The data that flows through closed-loop vetting: the loop's state and the record of a batch of rollouts."""

from __future__ import annotations

from dataclasses import dataclass, field

from torch import Tensor


@dataclass
class LoopState:
    """Everything an interface may look at, for E episodes stepped together (raw SI units)."""

    step: int
    q: Tensor  # [E, n]
    ee_pos: Tensor  # [E, 3]
    ee_rot: Tensor  # [E, 3, 3]
    jac: Tensor  # [E, 6, n] geometric Jacobian at q
    belief: Tensor  # [E, G]
    goal_targets: Tensor  # [E, G, 2, 3] approach point and end of fine motion
    goal_rot: Tensor  # [E, G, 3, 3] tool orientation on approach
    context: Tensor  # [E, C] full raw context (coreach.context.build_context)
    mode: Tensor  # [E] current interface mode (long)
    dt: float


@dataclass
class RolloutRecord:
    """Per-episode outcome of one interface on one suite, for metrics and reports."""

    interface: str
    suite: str
    goal_names: list[str]
    dt: float
    goal_initial: Tensor  # [E] long
    goal_final: Tensor  # [E] long: the goal the operator wants at the end (after any switch)
    switch_step: Tensor  # [E] long, -1 when the episode has no switch
    switch_fraction: Tensor  # [E] float, nan when no switch
    success: Tensor  # [E] bool: approach pose reached, then the final goal's fine motion completed
    success_step: Tensor  # [E] long, -1 if never
    ee_path: Tensor  # [E, T+1, 3]
    belief: Tensor  # [E, T+1, G]
    belief_at_switch: Tensor  # [E] belief on the ORIGINAL goal when the switch happened (nan if none)
    error: Tensor  # [E, T+1] position error (m) to the operator's current waypoint
    limit_scaled: Tensor  # [E, T] bool: a safety limit changed the command at that step
    reachable: Tensor  # [E, T] bool: for every goal some candidate stick made progress toward it
    stick_gain: Tensor  # [E, T] smallest singular value of d action / d stick (nan where not computed)
    mode_switches: Tensor  # [E] long
    extras: dict = field(default_factory=dict)

    @property
    def n_episodes(self) -> int:
        return int(self.success.shape[0])
