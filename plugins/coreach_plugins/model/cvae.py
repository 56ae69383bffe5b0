"""`cvae` decoder: a conditional VAE that sees the robot state, the goal belief and goal-relative features."""

from __future__ import annotations

from dataclasses import dataclass

from coreach_plugins.model.vae import StateVAE
from coreach.host.api import integer, sizes


class BeliefCVAE(StateVAE):
    """StateVAE's networks conditioned on every context block, so one stick direction can mean
    different joint motions depending on which goal the user seems to be heading for."""

    context_blocks: tuple[str, ...] = ("state", "belief", "goal")


@dataclass
class CVAEConfig:
    """User-settable options of `cvae`; action_dim and context_dim come from the trainer."""

    _target_: str = "coreach_plugins.model.cvae.BeliefCVAE"
    latent_dim: int = integer(2, 1, " (stick axes)")
    hidden: list[int] = sizes([256, 256])
    activation: str = "silu"
