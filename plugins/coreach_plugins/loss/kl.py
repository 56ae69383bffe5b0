"""`kl` loss term: KL divergence of the encoder's Gaussian posterior from the standard normal prior."""

from __future__ import annotations

import math
from dataclasses import dataclass

from torch import Tensor

from coreach.host.api import ConfigError
from coreach.host.api import TermBatch
from coreach.host.api import integer, number


def gaussian_kl(mean: Tensor, logvar: Tensor) -> Tensor:
    """KL(N(mean, exp(logvar)) || N(0, I)) for diagonal Gaussians: [..., d] -> [...] (summed over d)."""
    return 0.5 * (mean.pow(2) + logvar.exp() - 1.0 - logvar).sum(dim=-1)


def gaussian_entropy(logvar: Tensor) -> Tensor:
    """Differential entropy (nats) of a diagonal Gaussian with log-variance logvar [..., d] -> [...]."""
    return 0.5 * (math.log(2.0 * math.pi * math.e) + logvar).sum(dim=-1)


class KLDivergence:
    """Mean over the batch of the posterior's KL from the prior; 0 for deterministic encoders.

    With `warmup_epochs` > 0 the value is multiplied by min(1, epoch / warmup_epochs), so reconstruction
    shapes the latent before the prior pulls it in. The returned (and therefore logged) value is this
    ramped one: during warm-up the logged curve rises even if the posterior does not change; divide by
    `ramp(epoch)` to recover the raw KL.
    """

    name: str = "kl"

    def __init__(self, weight: float = 1e-3, warmup_epochs: int = 0):
        if not (isinstance(weight, (int, float)) and math.isfinite(weight) and weight >= 0):
            raise ConfigError("loss.kl.weight", f"expected a finite number >= 0, got {weight!r}")
        if not isinstance(warmup_epochs, int) or isinstance(warmup_epochs, bool) or warmup_epochs < 0:
            raise ConfigError("loss.kl.warmup_epochs", f"expected an integer >= 0, got {warmup_epochs!r}")
        self.weight = float(weight)
        self.warmup_epochs = warmup_epochs

    def ramp(self, epoch: int) -> float:
        """Warm-up factor in [0, 1] at `epoch` (0-based): 0 at the first epoch, 1 from warmup_epochs on."""
        if self.warmup_epochs == 0:
            return 1.0
        return min(1.0, max(0, epoch) / self.warmup_epochs)

    def __call__(self, batch: TermBatch) -> Tensor:
        post = batch.posterior
        if post.logvar is None:
            return post.mean.new_zeros(())
        return self.ramp(batch.epoch) * gaussian_kl(post.mean, post.logvar).mean()


@dataclass
class KLConfig:
    """User-settable options of the `kl` term."""

    _target_: str = "coreach_plugins.loss.kl.KLDivergence"
    weight: float = number(1e-3, 0.0)
    warmup_epochs: int = integer(0, 0)
