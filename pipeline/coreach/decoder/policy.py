"""A decoder packaged for use: raw context and stick in, raw joint velocity out, with its normalisation.

This module is what tracking saves (safetensors + JSON), vetting rolls out and release exports; the decoder
plugin inside it only ever sees normalised numbers.
"""

from __future__ import annotations

import json
from pathlib import Path

import hydra
import torch
from omegaconf import OmegaConf
from safetensors.torch import load_file, save_file
from torch import Tensor, nn

from coreach.context import ContextSpec

STD_FLOOR = 1e-3  # features that never vary in training (a one-goal layout's belief) must not blow up


class DecoderPolicy(nn.Module):
    """stick [..., d] in [-1, 1] and raw context [..., C] -> raw joint velocity [..., n] (rad/s)."""

    def __init__(self, decoder: nn.Module, decoder_cfg: dict, spec: ContextSpec, action_dim: int):
        super().__init__()
        self.decoder = decoder
        self.decoder_cfg = decoder_cfg
        self.spec = spec
        self.action_dim = action_dim
        cols = spec.columns(decoder.context_blocks)
        self.register_buffer("context_cols", torch.tensor(cols, dtype=torch.long))
        self.register_buffer("ctx_mean", torch.zeros(len(cols)))
        self.register_buffer("ctx_std", torch.ones(len(cols)))
        self.register_buffer("act_mean", torch.zeros(action_dim))
        self.register_buffer("act_std", torch.ones(action_dim))
        self.register_buffer("stick_scale", torch.ones(decoder.latent_dim))

    @property
    def latent_dim(self) -> int:
        return self.decoder.latent_dim

    def set_normalisation(self, raw_context: Tensor, action: Tensor) -> None:
        """Fit normalisation on the training split only: raw_context [N, C], action [N, n]."""
        ctx = raw_context[:, self.context_cols]
        if ctx.shape[1]:  # a context-free decoder (linear) has nothing to normalise
            self.ctx_mean.copy_(ctx.mean(0))
            self.ctx_std.copy_(ctx.std(0).clamp_min(STD_FLOOR))
        self.act_mean.copy_(action.mean(0))
        self.act_std.copy_(action.std(0).clamp_min(STD_FLOOR))

    @torch.no_grad()
    def set_stick_scale(self, raw_context: Tensor, action: Tensor) -> None:
        """Map the stick box onto +-2 standard deviations of the encoder's means on training data, so full
        deflection reaches the demonstrated range whatever scale a decoder's latent happens to have."""
        mean = self.decoder.encode(self.normalise_action(action), self.normalise_context(raw_context)).mean
        self.stick_scale.copy_(2.0 * mean.std(0).clamp_min(1e-6))

    def normalise_context(self, raw_context: Tensor) -> Tensor:
        return (raw_context[..., self.context_cols] - self.ctx_mean) / self.ctx_std

    def normalise_action(self, action: Tensor) -> Tensor:
        return (action - self.act_mean) / self.act_std

    def denormalise_action(self, action_n: Tensor) -> Tensor:
        return action_n * self.act_std + self.act_mean

    def forward(self, stick: Tensor, raw_context: Tensor) -> Tensor:
        lead = stick.shape[:-1]
        z = (stick * self.stick_scale).reshape(-1, stick.shape[-1])  # [prod(lead), d]
        ctx = self.normalise_context(raw_context).reshape(z.shape[0], -1)  # [prod(lead), C_dec]
        return self.denormalise_action(self.decoder.decode(z, ctx)).reshape(*lead, self.action_dim)

    # --- persistence: weights as safetensors, everything else as JSON (no pickles) ---
    def save(self, folder: Path) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        tensors = {k: v.detach().contiguous() for k, v in self.state_dict().items()}
        save_file(tensors, str(folder / "decoder.safetensors"))
        meta = {
            "decoder": self.decoder_cfg,
            "spec": self.spec.to_dict(),
            "action_dim": self.action_dim,
            "context_blocks": list(self.decoder.context_blocks),
        }
        (folder / "decoder.json").write_text(json.dumps(meta, indent=2))

    @classmethod
    def load(cls, folder: Path) -> DecoderPolicy:
        folder = Path(folder)
        meta = json.loads((folder / "decoder.json").read_text())
        spec = ContextSpec(**meta["spec"])
        policy = cls.build(meta["decoder"], spec, meta["action_dim"])
        policy.load_state_dict(load_file(str(folder / "decoder.safetensors")))
        return policy.eval()

    @classmethod
    def build(cls, decoder_cfg: dict, spec: ContextSpec, action_dim: int) -> DecoderPolicy:
        cfg = OmegaConf.create(decoder_cfg)
        probe = hydra.utils.get_class(cfg._target_)
        blocks = getattr(probe, "context_blocks", ())
        context_dim = len(spec.columns(blocks))
        decoder = hydra.utils.instantiate(cfg, action_dim=action_dim, context_dim=context_dim)
        return cls(decoder, OmegaConf.to_container(cfg, resolve=True), spec, action_dim)
