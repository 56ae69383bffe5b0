"""`vae` decoder: a variational autoencoder of joint velocities conditioned on the robot state only."""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor, nn

from coreach.host.api import check_width, mlp
from coreach.host.api import Posterior
from coreach.host.api import integer, sizes


class StateVAE(nn.Module):
    """Gaussian encoder MLP(action ++ context) -> (mean, logvar) and decoder MLP(latent ++ context) -> action.

    Subclasses change only `context_blocks`; the trainer slices the context to those blocks.
    """

    context_blocks: tuple[str, ...] = ("state",)

    def __init__(
        self,
        action_dim: int,
        context_dim: int,
        latent_dim: int = 2,
        hidden: list[int] = [256, 256],  # noqa: B006 - copied, never mutated
        activation: str = "silu",
    ):
        super().__init__()
        self.action_dim = check_width("model.action_dim", action_dim)
        self.context_dim = check_width("model.context_dim", context_dim, minimum=0)
        self.latent_dim = check_width("model.latent_dim", latent_dim)
        self.hidden = list(hidden)  # a plain list also when Hydra hands over a ListConfig
        self.activation = activation
        # One head emits mean and log-variance side by side: [..., 2 * latent_dim].
        self.encoder = mlp(self.action_dim + self.context_dim, 2 * self.latent_dim, self.hidden, activation)
        self.decoder = mlp(self.latent_dim + self.context_dim, self.action_dim, self.hidden, activation)

    def encode(self, action: Tensor, context: Tensor) -> Posterior:
        mean, logvar = self.encoder(torch.cat([action, context], dim=-1)).chunk(2, dim=-1)
        return Posterior(mean, logvar)

    def decode(self, latent: Tensor, context: Tensor) -> Tensor:
        return self.decoder(torch.cat([latent, context], dim=-1))


@dataclass
class VAEConfig:
    """User-settable options of `vae`; action_dim and context_dim come from the trainer."""

    _target_: str = "coreach_plugins.model.vae.StateVAE"
    latent_dim: int = integer(2, 1, " (stick axes)")
    hidden: list[int] = sizes([256, 256])
    activation: str = "silu"
