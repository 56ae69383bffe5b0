"""`reconstruction` loss term: squared error between demonstrated and decoded joint velocities."""

from __future__ import annotations

import math
from dataclasses import dataclass

from torch import Tensor

from coreach.host.api import ConfigError
from coreach.host.api import TermBatch
from coreach.host.api import number


class Reconstruction:
    """Mean over the batch of the squared error summed over joints, in normalised units (so every joint
    counts by its demonstrated spread, not by its rad/s scale)."""

    name: str = "reconstruction"

    def __init__(self, weight: float = 1.0):
        if not (isinstance(weight, (int, float)) and math.isfinite(weight) and weight >= 0):
            raise ConfigError("loss.reconstruction.weight", f"expected a finite number >= 0, got {weight!r}")
        self.weight = float(weight)

    def __call__(self, batch: TermBatch) -> Tensor:
        return (batch.reconstruction - batch.action).pow(2).sum(dim=-1).mean()


@dataclass
class ReconstructionConfig:
    """User-settable options of the `reconstruction` term."""

    _target_: str = "coreach_plugins.loss.reconstruction.Reconstruction"
    weight: float = number(1.0, 0.0)
