"""What every loss term receives: one batch of training samples plus the pieces needed to judge them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from torch import Tensor

from coreach.host.protocols import Posterior

if TYPE_CHECKING:
    from coreach.decoder.policy import DecoderPolicy
    from coreach.safety import SafetyLimits


@dataclass
class TermBatch:
    """A batch seen by loss terms. Normalised tensors are what the decoder works on; raw ones are in SI
    units (m, rad, rad/s) for terms that reason about the robot."""

    action: Tensor  # [B, n] normalised demonstrated joint velocity
    context: Tensor  # [B, C_dec] normalised context, only the decoder's blocks
    posterior: Posterior  # encoder output for `action`
    latent: Tensor  # [B, d] latent used for the reconstruction (a sample, or the mean)
    reconstruction: Tensor  # [B, n] normalised decoded action
    policy: DecoderPolicy  # stick + raw context -> raw joint velocity, for terms that decode more
    raw_context: Tensor  # [B, C] full raw context (all blocks)
    jac_lin: Tensor  # [B, 3, n] linear tool Jacobian at each sample
    ee_pos: Tensor  # [B, 3] tool position
    goal_targets: Tensor  # [B, G, 2, 3] approach point and end of fine motion of every goal
    belief: Tensor  # [B, G]
    limits: SafetyLimits  # shared speed caps (the same ones vetting and the runtime apply)
    dt: float  # control period (s)
    epoch: int
    global_step: int
