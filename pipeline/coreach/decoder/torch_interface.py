"""A trained decoder as a vetting interface: the torch policy run over every (episode, candidate stick)."""

from __future__ import annotations

import torch
from torch import Tensor

from coreach.errors import ConfigError
from coreach.decoder.policy import DecoderPolicy
from coreach.host.interfaces import STICK_DIM, episode_sticks

class DecoderInterface:
    """stick [K, 2] (or [E, K, 2]) -> policy(stick, context) in every episode; one mode. `source`: where the
    policy came from (a training run id, a folder, or "memory"), as `coreach.decoder.load` reports it."""

    n_modes = 1

    def __init__(self, policy: DecoderPolicy, name: str = "decoder", source: str = "memory"):
        self.source_ = str(source)
        self._setup(policy, name)

    def _setup(self, policy: DecoderPolicy, name: str) -> None:
        if policy.latent_dim != STICK_DIM:
            raise ConfigError(
                f"interface {name}", f"decoder has a {policy.latent_dim}-D latent; a {STICK_DIM}-axis stick needs 2"
            )
        self.policy_ = policy.eval()
        self.name = str(name)
        self.dtype_ = next(policy.parameters()).dtype

    def _context(self, state) -> Tensor:
        width = self.policy_.spec.width
        if state.context.shape[-1] != width:
            spec = self.policy_.spec
            raise ConfigError(
                f"interface {self.name}",
                f"decoder was trained for {spec.dof} joints and {spec.n_goals} goals (context width {width}); "
                f"the suite gives context width {state.context.shape[-1]}",
            )
        return state.context.to(self.dtype_)

    def reset(self, n_episodes: int, state) -> None:
        self._context(state)

    def act(self, stick: Tensor, state) -> Tensor:
        ctx = self._context(state)  # [E, C]
        E, C = ctx.shape
        sticks = episode_sticks(stick, E, f"interface {self.name}").to(self.dtype_)  # [E, K, 2]
        with torch.no_grad():
            # One forward over all E*K (episode, candidate) pairs; expand is free, the policy flattens.
            qd = self.policy_(sticks, ctx[:, None].expand(E, sticks.shape[1], C))
        return qd[:, None].to(state.context.dtype)  # [E, 1, K, n]

    def stick_jacobian(self, context: Tensor, stick: Tensor | None = None) -> Tensor:
        """d qd / d stick [E, n, 2] at context [E, C] (raw), at the centre of the stick box by default."""
        ctx = context.to(self.dtype_)
        s = torch.zeros(ctx.shape[0], STICK_DIM, dtype=self.dtype_) if stick is None else stick.to(self.dtype_)
        s = s.detach().requires_grad_(True)
        with torch.enable_grad():
            qd = self.policy_(s, ctx)  # [E, n]
            # Episodes are independent rows, so the gradient of a column's sum is that column's row-wise
            # derivative: n backward passes over the whole batch. Plain autograd on purpose: torch.func's
            # first call costs seconds of set-up, and a per-episode vmap is slower on CPU.
            rows = [torch.autograd.grad(qd[:, i].sum(), s, retain_graph=i < qd.shape[1] - 1)[0]
                    for i in range(qd.shape[1])]  # fmt: skip
        return torch.stack(rows, dim=1)

    def stick_gain(self, state) -> Tensor:
        # At the stick's centre: for a nonlinear decoder the gain varies over the box, and the centre is where
        # every motion starts from.
        jac = self.stick_jacobian(self._context(state)).detach()
        return torch.linalg.svdvals(jac)[..., -1].to(state.context.dtype)
