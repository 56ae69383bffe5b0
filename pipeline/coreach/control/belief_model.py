"""Bayesian goal inference with a Boltzmann-rational likelihood of the tool's progress toward each goal.

P(motion | goal g) is proportional to exp(beta * progress_g), progress_g being how much closer the motion
brought the tool to goal g's path (its approach point and the segment of its fine motion). For motions of a
given length the normaliser is the same for every goal, so Bayes' rule needs only the exponent. Without a
floor the update telescopes: the belief depends on the start and the current tool position, not on jitter
along the way. Distances are to the goal's segment, not to its approach point, so carrying out the fine motion
(lifting the bottle) is not read as moving away from the goal. Motions shorter than `min_motion` are treated
as uninformative, so an arm waiting at a goal does not drift.

Array-API code: runs on numpy (the runtime) and torch (training, vetting) alike.
"""

from __future__ import annotations

from dataclasses import dataclass

from coreach.control.arrays import namespace as array_namespace


def distance_to_path(point, targets):
    """Distance [..., B, G] from point [..., B, 3] to each goal's polyline targets [B, G, S, 3] (S >= 1
    waypoints); leading axes of `point` (e.g. before and after a motion) share the targets."""
    xp = array_namespace(point, targets)
    p = point[..., None, None, :]  # [..., B, 1, 1, 3]
    if targets.shape[-2] == 1:
        return xp.linalg.vector_norm(p[..., 0, :] - targets[..., 0, :], axis=-1)
    a = targets[:, :, :-1, :]  # [B, G, S-1, 3] segment starts
    b = targets[:, :, 1:, :]
    ab = b - a
    denom = xp.maximum(xp.sum(ab * ab, axis=-1), 1e-12)
    t = xp.sum((p - a) * ab, axis=-1) / denom  # [..., B, G, S-1]
    t = xp.minimum(xp.maximum(t, 0.0), 1.0)  # clip to [0, 1]; cheaper than xp.clip on numpy
    gap = p - (a + t[..., None] * ab)
    d2 = xp.sum(gap * gap, axis=-1)  # [..., B, G, S-1] squared distances (vector_norm costs more on numpy)
    return xp.sqrt(xp.min(d2, axis=-1))


@dataclass
class BoltzmannGoalBelief:
    """beta: rationality (1/m); floor: share of the uniform distribution mixed in after every update;
    min_motion: tool displacement (m) below which a step carries no evidence."""

    beta: float = 40.0
    floor: float = 0.0
    min_motion: float = 1e-3

    def __post_init__(self):
        if not self.beta > 0:
            raise ValueError(f"belief.beta must be > 0, got {self.beta}")
        if not 0.0 <= self.floor < 1.0:
            raise ValueError(f"belief.floor must be in [0, 1), got {self.floor}")

    def initial(self, batch: int, n_goals: int, like):
        xp = array_namespace(like)
        return xp.ones((batch, n_goals), dtype=like.dtype) / n_goals

    def update(self, belief, ee_before, ee_after, goal_targets):
        xp = array_namespace(belief, ee_before, ee_after, goal_targets)
        d = distance_to_path(xp.stack([ee_before, ee_after]), goal_targets)  # [2, B, G], one pass for both
        progress = d[0] - d[1]
        tiny = 1e-300 if belief.dtype == xp.float64 else 1e-38
        logits = xp.log(xp.maximum(belief, tiny)) + self.beta * progress  # [B, G]
        logits = logits - xp.max(logits, axis=-1, keepdims=True)
        post = xp.exp(logits)
        post = post / xp.sum(post, axis=-1, keepdims=True)
        step = ee_after - ee_before
        moved = xp.sum(step * step, axis=-1) >= self.min_motion**2  # [B]
        post = xp.where(moved[:, None], post, belief)
        if self.floor > 0:
            post = (1.0 - self.floor) * post + self.floor / belief.shape[-1]
        return post

    # --- manifest round trip (a release bundle names this model "boltzmann" and stores its three numbers) ---
    MANIFEST_MODEL = "boltzmann"

    def to_manifest(self) -> dict:
        """The manifest's `belief` section: the model name and its parameters, plain JSON numbers."""
        return {"model": self.MANIFEST_MODEL, "beta": float(self.beta), "floor": float(self.floor),
                "min_motion": float(self.min_motion)}

    @classmethod
    def from_manifest(cls, params: dict) -> BoltzmannGoalBelief:
        """Rebuild from a manifest `belief` section without its "model" key; unknown keys are refused."""
        extra = sorted(set(params) - {"beta", "floor", "min_motion"})
        if extra:
            raise ValueError(f"unknown boltzmann belief parameters {extra}")
        return cls(**{k: float(v) for k, v in params.items()})
