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
        # per stage: term name -> (batch-size weighted sum, samples) over the epoch so far
        self._sums: dict[str, dict[str, list]] = {}

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
        sums = self._sums.setdefault(stage, {})
        for term in self.terms:
            value = term(tb)
            _add(sums, term.name, value, n)
            total = total + term.weight * value
        _add(sums, "loss", total, n)
        return total

    # The epoch means are summed here and logged once per epoch: `self.log` on every step cost about a third
    # of a Lightning step at the default batch size (its result collection is moved and updated per call;
    # cProfile of `coreach bench train`: 1.4 s of 4.4 s), for the same batch-size weighted epoch means.
    def _log_epoch(self, stage: str) -> None:
        for name, (total, n) in self._sums.pop(stage, {}).items():
            self.log(f"{stage}/{name}", total / n, on_step=False, on_epoch=True, batch_size=n,
                     prog_bar=stage == "val" and name == "loss")  # fmt: skip

    def on_train_epoch_start(self) -> None:
        self._sums.pop("train", None)

    def on_train_batch_end(self, outputs, batch, batch_idx: int) -> None:
        # after the epoch's last batch, before validation and before any callback's on_train_epoch_end reads
        # the epoch's metrics (coreach.training.callbacks)
        if batch_idx + 1 >= self.trainer.num_training_batches:
            self._log_epoch("train")

    def on_validation_epoch_start(self) -> None:
        self._sums.pop("val", None)

    def on_validation_epoch_end(self) -> None:
        self._log_epoch("val")

    def training_step(self, batch: dict, batch_idx: int) -> torch.Tensor:
        return self._step(batch, "train")

    def validation_step(self, batch: dict, batch_idx: int) -> None:
        self._step(batch, "val")

    def configure_optimizers(self):
        return torch.optim.Adam(self.policy.parameters(), lr=self.lr)


def _add(sums: dict, name: str, value: torch.Tensor, n: int) -> None:
    """Add a batch's mean `value` over `n` samples to the epoch's running (sum, count); detached, so the sum
    holds no graph."""
    entry = sums.setdefault(name, [torch.zeros((), dtype=torch.float64), 0])
    entry[0] = entry[0] + value.detach().to(torch.float64) * n
    entry[1] += n
