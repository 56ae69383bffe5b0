"""The goal entropy term (`loss=goal_entropy`): make the stick box reach every goal by maximising the
information a stick position carries about which goal the decoded motion heads for: the entropy of the goals
over the whole stick box (every goal reached from somewhere) minus their mean entropy at one stick point
(each point heads for one goal)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Optional

import torch
from torch import Tensor

from coreach.host.api import ConfigError
from coreach.host.api import TermBatch
from coreach.host.api import integer, number

_DIST_EPS = 1e-6  # m; smooths |x| at 0 so a tool sitting on an approach point still has a gradient


def stratified_sticks(
    batch: int,
    samples: int,
    dim: int,
    generator: torch.Generator | None = None,
    dtype: torch.dtype = torch.float32,
    device: torch.device | str = "cpu",
) -> Tensor:
    """Jittered stratified points in [-1, 1]^dim: [batch, samples, dim].

    The box is cut into m^dim equal cells (smallest m with m^dim >= samples); each batch row takes
    `samples` distinct cells (all of them when samples == m^dim, e.g. 16 = 4x4 in 2-D) and one uniform
    point inside each, so even few samples spread over the whole box.
    """
    m = 1
    while m**dim < samples:
        m += 1
    cells = m**dim
    if cells == samples:
        # every row uses the same cells: one row of corners broadcasts, so the integer math is not per row
        idx = torch.arange(cells, device=device)[None]  # [1, K]
    else:
        idx = torch.rand(batch, cells, generator=generator, device=device).argsort(dim=-1)[:, :samples]
    place = m ** torch.arange(dim, device=device)  # [d]
    corner = (idx[..., None] // place) % m  # [B or 1, K, d] integer cell coordinates
    jitter = torch.rand(batch, samples, dim, generator=generator, dtype=dtype, device=device)
    return -1.0 + 2.0 * (corner.to(dtype) + jitter) / m


def goal_progress(ee_pos: Tensor, dx: Tensor, approach: Tensor) -> Tensor:
    """How much closer (m) each displacement brings the tool to each approach point.

    ee_pos [B, 3], dx [B, K, 3], approach [B, G, 3] -> [B, K, G] (distance now minus distance after).
    """

    def dist(v: Tensor) -> Tensor:
        return torch.sqrt(v.pow(2).sum(dim=-1) + _DIST_EPS**2)

    now = dist(ee_pos[:, None, :] - approach)  # [B, G]
    after = dist((ee_pos[:, None, :] + dx)[:, :, None, :] - approach[:, None, :, :])  # [B, K, G]
    return now[:, None, :] - after


def stick_goal_mutual_information(progress: Tensor, sharpness: float) -> Tensor:
    """Mutual information (nats) between a uniformly drawn stick point k and the goal g, with
    p(g|k) = softmax_g(sharpness * progress[b, k, g]): I = H(mean_k p(.|k)) - mean_k H(p(.|k)).

    progress [B, K, G] -> I [B], 0 <= I <= log G. Computed from log-probabilities so goals a point
    makes vanishingly unlikely contribute 0, not NaN, to value and gradient.
    """
    logp = torch.log_softmax(sharpness * progress, dim=-1)  # [B, K, G]
    point_entropy = -(logp.exp() * logp).sum(dim=-1).mean(dim=-1)  # [B]
    log_marginal = torch.logsumexp(logp, dim=1) - math.log(progress.shape[1])  # [B, G]
    marginal_entropy = -(log_marginal.exp() * log_marginal).sum(dim=-1)  # [B]
    return marginal_entropy - point_entropy


class GoalEntropy:
    """Minus the stick-goal mutual information, averaged over the batch.

    For every context, `samples` stratified stick points are decoded through the policy, passed through
    the shared speed cap (uncapped, the term would win by asking for ever larger velocities), and
    integrated over `horizon` seconds with the linear Jacobian to a tool displacement. Each point's
    progress toward every goal's approach point becomes a distribution over goals; the term is maximal
    (I = log G) when different stick regions lead to different goals and each region to one goal.

    A training step judges only `contexts` of the batch's contexts (null: all), drawn uniformly without
    replacement: the term decodes `samples` points per context, so judging all 256 of a batch makes a step
    about seven times as long as a plain cVAE step, while a uniform subset still gives an unbiased, only
    noisier, estimate of the whole-batch value and gradient (validation judges all of them: see `rows`).

    Stick and subset draws come from private generators seeded with torch's seed + `seed_offset` + the
    global step: reproducible under torch.manual_seed, and adding the term does not shift the random
    stream the rest of training draws from.
    """

    name: str = "goal_entropy"

    def __init__(
        self,
        weight: float = 0.1,
        samples: int = 16,
        sharpness: float = 200.0,
        horizon: float = 1.0,
        seed_offset: int = 17,
        contexts: int | None = 24,
    ):
        def positive(where: str, value, integer: bool = False):
            ok_type = isinstance(value, int) if integer else isinstance(value, (int, float))
            if isinstance(value, bool) or not ok_type or not math.isfinite(value) or value <= 0:
                kind = "an integer" if integer else "a finite number"
                raise ConfigError(f"loss.goal_entropy.{where}", f"expected {kind} > 0, got {value!r}")
            return value

        if not (isinstance(weight, (int, float)) and math.isfinite(weight) and weight >= 0):
            raise ConfigError("loss.goal_entropy.weight", f"expected a finite number >= 0, got {weight!r}")
        if not isinstance(seed_offset, int) or isinstance(seed_offset, bool):
            raise ConfigError("loss.goal_entropy.seed_offset", f"expected an integer, got {seed_offset!r}")
        self.weight = float(weight)
        self.samples = positive("samples", samples, integer=True)
        self.sharpness = float(positive("sharpness", sharpness))  # 1/m
        self.horizon = float(positive("horizon", horizon))  # s
        self.seed_offset = seed_offset
        if contexts is not None and (not isinstance(contexts, int) or isinstance(contexts, bool) or contexts <= 0):
            raise ConfigError("loss.goal_entropy.contexts", f"expected an integer > 0 or null, got {contexts!r}")
        self.contexts = contexts

    def _generator(self, device: torch.device, global_step: int, stream: int = 0) -> torch.Generator:
        # stream 1 (the context subset) is offset far beyond any step count, so it never replays the sticks
        seed = (torch.initial_seed() + self.seed_offset + int(global_step) + stream * 2**40) % (2**63)
        return torch.Generator(device=device).manual_seed(seed)

    def rows(self, batch: TermBatch) -> Tensor | None:
        """Which contexts of the batch the term judges this step (None: all of them).

        Only training steps subsample: a uniform draw without replacement keeps the value and gradient
        unbiased for the whole-batch mean, while validation reports the exact whole-batch value, so
        logged numbers stay comparable with runs that used every context.
        """
        B = batch.raw_context.shape[0]
        if self.contexts is None or self.contexts >= B or not batch.policy.training:
            return None
        gen = self._generator(batch.raw_context.device, batch.global_step, stream=1)
        return torch.randperm(B, generator=gen, device=batch.raw_context.device)[: self.contexts]

    def information(self, batch: TermBatch, rows: Tensor | None = None) -> Tensor:
        """Stick-goal information (nats) of every context ([B]), or of the contexts `rows` ([len(rows)]).

        Sticks are drawn for the whole batch before a subset is taken, so a context decodes the same points
        whether or not the others are left out.
        """
        raw = batch.raw_context  # [B, C]
        B = raw.shape[0]
        K, d = self.samples, batch.latent.shape[-1]
        gen = self._generator(raw.device, batch.global_step)
        stick = stratified_sticks(B, K, d, gen, dtype=raw.dtype, device=raw.device)  # [B, K, d]
        jac, ee_pos, approach = batch.jac_lin, batch.ee_pos, batch.goal_targets[:, :, 0, :]
        if rows is not None:
            stick, raw, jac, ee_pos, approach = stick[rows], raw[rows], jac[rows], ee_pos[rows], approach[rows]
        b, C = raw.shape
        qd = batch.policy(stick, raw[:, None, :].expand(b, K, C))  # [b, K, n]
        qd, _ = batch.limits.cap(qd, jac[:, None])  # [b, 1, 3, n] serves all K points
        dx = torch.einsum("bij,bkj->bki", jac, qd) * self.horizon  # [b, K, 3]
        progress = goal_progress(ee_pos, dx, approach)  # [b, K, G]
        return stick_goal_mutual_information(progress, self.sharpness)

    def __call__(self, batch: TermBatch) -> Tensor:
        return -self.information(batch, self.rows(batch)).mean()


@dataclass
class GoalEntropyConfig:
    """User-settable options of the `goal_entropy` term."""

    _target_: str = "coreach_plugins.loss.goal_entropy.GoalEntropy"
    weight: float = number(0.1, 0.0)
    samples: int = integer(16, 2, " (sticks decoded per context)")
    sharpness: float = number(200.0, 0.0, open_range=True)
    horizon: float = number(1.0, 0.0, unit="s", open_range=True)
    seed_offset: int = 17
    contexts: Optional[int] = 24
