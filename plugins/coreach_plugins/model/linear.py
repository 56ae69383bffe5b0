"""`linear` decoder: a linear autoencoder of joint velocities that ignores the context (a PCA baseline)."""

from __future__ import annotations

from dataclasses import dataclass

from torch import Tensor, nn

from coreach.host.api import check_width, mlp
from coreach.host.api import Posterior
from coreach.host.api import integer


class LinearDecoder(nn.Module):
    """Deterministic affine encoder and decoder; trained on reconstruction alone it spans the top
    `latent_dim` principal components of the actions (the Eckart-Young optimum)."""

    context_blocks: tuple[str, ...] = ()

    def __init__(
        self,
        action_dim: int,
        context_dim: int,
        latent_dim: int = 2,
        hidden: list[int] = [256, 256],  # noqa: B006 - never mutated; kept for the shared signature
    ):
        super().__init__()
        self.action_dim = check_width("model.action_dim", action_dim)
        self.context_dim = check_width("model.context_dim", context_dim, minimum=0)
        self.latent_dim = check_width("model.latent_dim", latent_dim)
        # A linear map has no hidden layers: the argument exists so every decoder is built the same way.
        self.hidden: list[int] = []
        self.encoder = mlp(self.action_dim, self.latent_dim, [])
        self.decoder = mlp(self.latent_dim, self.action_dim, [])

    def encode(self, action: Tensor, context: Tensor) -> Posterior:
        return Posterior(self.encoder(action), None)

    def decode(self, latent: Tensor, context: Tensor) -> Tensor:
        return self.decoder(latent)


@dataclass
class LinearConfig:
    """User-settable options of `linear`; action_dim and context_dim come from the trainer."""

    _target_: str = "coreach_plugins.model.linear.LinearDecoder"
    latent_dim: int = integer(2, 1, " (stick axes)")
