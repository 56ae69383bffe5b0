"""The decoder's context, built in one place for training, vetting and the runtime.

Blocks (in this order in the full context vector):
- state  [n + 9]: joint positions, tool position, tool orientation as the first two columns of its rotation.
- belief [G]:     the belief over the layout's goals.
- goal   [12]:    belief-weighted goal-relative features: vector to the approach point, the fine-motion
                  displacement, and the differences between goal and tool x- and z-axes. Being relative to
                  the tool, they let a decoder serve a layout it was not trained on.

Array-API code (numpy or torch).
"""

from __future__ import annotations

from dataclasses import dataclass

from coreach.control.arrays import namespace as array_namespace

BLOCKS = ("state", "belief", "goal")
GOAL_WIDTH = 12


@dataclass(frozen=True)
class ContextSpec:
    """Widths of the context blocks for a robot with `dof` joints and a scenario with `n_goals` goals."""

    dof: int
    n_goals: int

    @property
    def widths(self) -> dict[str, int]:
        return {"state": self.dof + 9, "belief": self.n_goals, "goal": GOAL_WIDTH}

    @property
    def width(self) -> int:
        return sum(self.widths.values())

    def columns(self, blocks) -> list[int]:
        """Indices into the full context of the given blocks, in canonical order."""
        unknown = set(blocks) - set(BLOCKS)
        if unknown:
            raise ValueError(f"unknown context blocks {sorted(unknown)}; known: {list(BLOCKS)}")
        cols, start = [], 0
        for name in BLOCKS:
            w = self.widths[name]
            if name in blocks:
                cols += list(range(start, start + w))
            start += w
        return cols

    def to_dict(self) -> dict:
        return {"dof": self.dof, "n_goals": self.n_goals}


def goal_features(goal_targets, goal_rot):
    """Per-goal features [B, G, 12]: approach point, fine-motion displacement, goal z- and x-axes. They depend
    only on the layout, so a caller with a fixed layout (the runtime) may compute them once."""
    xp = array_namespace(goal_targets, goal_rot)
    approach = goal_targets[..., 0, :]
    return xp.concat([approach, goal_targets[..., 1, :] - approach, goal_rot[..., :, 2], goal_rot[..., :, 0]], axis=-1)


def build_context(q, ee_pos, ee_rot, belief, goal_targets, goal_rot, features=None):
    """Full raw context [B, C].

    q [B, n]; ee_pos [B, 3]; ee_rot [B, 3, 3]; belief [B, G]; goal_targets [B, G, 2, 3] (approach point, end
    of fine motion); goal_rot [B, G, 3, 3] (tool orientation on approach); features: `goal_features` of the
    layout when already at hand.

    The goal block is sum_g b_g (f_g - tool), with tool = (ee_pos, 0, ee z-axis, ee x-axis): computed as
    b @ f - (sum_g b_g) tool, one matrix product instead of four weighted sums.
    """
    xp = array_namespace(q, ee_pos, ee_rot, belief)
    if features is None:
        features = goal_features(goal_targets, goal_rot)  # [B, G, 12]
    z, x = ee_rot[..., :, 2], ee_rot[..., :, 0]
    tool = xp.concat([ee_pos, xp.zeros_like(ee_pos), z, x], axis=-1)  # [B, 12]
    mass = xp.sum(belief, axis=-1, keepdims=True)  # [B, 1]; 1 for a normalised belief
    goal = (belief[..., None, :] @ features)[..., 0, :] - mass * tool  # [B, 12]
    return xp.concat([q, ee_pos, x, z, belief, goal], axis=-1)
