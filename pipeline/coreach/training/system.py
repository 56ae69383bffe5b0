"""The training system: one decoder policy plus a list of weighted loss terms, optimised with Adam."""

from __future__ import annotations

import lightning as L
import torch

from coreach.decoder.policy import DecoderPolicy
from coreach.safety import SafetyLimits
from coreach.training.terms import TermBatch


class DecoderSystem(L.LightningModule):
    """Combines a DecoderPolicy with loss terms; logs every term under `<stage>/<term name>`."""

    def __init__(
        self, policy: DecoderPolicy, terms: list, limits: SafetyLimits, dt: float, lr: float = 1e-3, seed: int = 0
    ):
        super().__init__()
        self.seed = seed
        self.policy = policy
        self.terms = terms
        self.limits = limits
        self.dt = dt
        self.lr = lr

    def term_batch(self, batch: dict) -> TermBatch:
        policy = self.policy
        action = policy.normalise_action(batch["action"])
        context = policy.normalise_context(batch["context"])
        posterior = policy.decoder.encode(action, context)
        latent = posterior.mean
        if posterior.logvar is not None and self.training:
            # noise drawn from (seed, step) alone, so a resumed run draws what an uninterrupted one would
            g = torch.Generator().manual_seed(self.seed * 1_000_003 + self.global_step)
            noise = torch.randn(latent.shape, generator=g, dtype=latent.dtype)
            latent = latent + noise * torch.exp(0.5 * posterior.logvar)
        return TermBatch(
            action=action,
            context=context,
            posterior=posterior,
            latent=latent,
            reconstruction=policy.decoder.decode(latent, context),
            policy=policy,
            raw_context=batch["context"],
            jac_lin=batch["jac_lin"],
            ee_pos=batch["ee_pos"],
            goal_targets=batch["goal_targets"],
            belief=batch["belief"],
            limits=self.limits,
            dt=self.dt,
            epoch=self.current_epoch,
            global_step=self.global_step,
        )

    def _step(self, batch: dict, stage: str) -> torch.Tensor:
        tb = self.term_batch(batch)
        n = batch["action"].shape[0]
        total = torch.zeros((), dtype=tb.action.dtype)
        for term in self.terms:
            value = term(tb)
            self.log(f"{stage}/{term.name}", value, on_step=False, on_epoch=True, batch_size=n)
            total = total + term.weight * value
        self.log(f"{stage}/loss", total, on_step=False, on_epoch=True, batch_size=n, prog_bar=stage == "val")
        return total

    def training_step(self, batch: dict, batch_idx: int) -> torch.Tensor:
        return self._step(batch, "train")

    def validation_step(self, batch: dict, batch_idx: int) -> None:
        self._step(batch, "val")

    def configure_optimizers(self):
        return torch.optim.Adam(self.policy.parameters(), lr=self.lr)
