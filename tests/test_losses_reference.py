"""Loss terms checked against outside references: torch.distributions, scipy.stats, numpy, definitions."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.special
import scipy.stats
import torch
from torch import Tensor
from torch.distributions import Normal, kl_divergence

from coreach.context import ContextSpec
from coreach.errors import ConfigError
from coreach.decoder.policy import DecoderPolicy
from coreach.host.protocols import Posterior
from coreach.safety import SafetyLimits
from coreach.training.terms import TermBatch
from coreach_plugins.loss.goal_entropy import (
    GoalEntropy,
    goal_progress,
    stick_goal_mutual_information,
    stratified_sticks,
)
from coreach_plugins.loss.kl import KLDivergence, gaussian_entropy, gaussian_kl
from coreach_plugins.model.cvae import BeliefCVAE
from coreach_plugins.model.vae import StateVAE

N_JOINTS, N_GOALS = 7, 4


def make_batch(seed: int = 0, batch: int = 6, epoch: int = 0, scale_output: float = 1.0) -> TermBatch:
    """A small, physically plausible batch: a real DecoderPolicy around a small CVAE, real speed caps."""
    g = torch.Generator().manual_seed(seed)
    spec = ContextSpec(dof=N_JOINTS, n_goals=N_GOALS)
    torch.manual_seed(seed)
    decoder = BeliefCVAE(N_JOINTS, len(spec.columns(BeliefCVAE.context_blocks)), hidden=[32, 32])
    policy = DecoderPolicy(decoder, {}, spec, N_JOINTS)
    policy.act_std.fill_(scale_output)  # raw = normalised * std: lets a test push outputs past the caps
    raw_context = torch.randn(batch, spec.width, generator=g)
    context = policy.normalise_context(raw_context)
    action = torch.randn(batch, N_JOINTS, generator=g)
    post = decoder.encode(action, context)
    latent = post.mean + torch.exp(0.5 * post.logvar) * torch.randn(post.mean.shape, generator=g)
    ee_pos = torch.tensor([0.4, 0.0, 0.4]) + 0.05 * torch.randn(batch, 3, generator=g)
    approach = ee_pos[:, None, :] + 0.3 * torch.randn(batch, N_GOALS, 3, generator=g)  # [B, G, 3]
    goal_targets = torch.stack([approach, approach + 0.05], dim=2)  # [B, G, 2, 3]
    return TermBatch(
        action=action,
        context=context,
        posterior=post,
        latent=latent,
        reconstruction=decoder.decode(latent, context),
        policy=policy,
        raw_context=raw_context,
        jac_lin=0.3 * torch.randn(batch, 3, N_JOINTS, generator=g),
        ee_pos=ee_pos,
        goal_targets=goal_targets,
        belief=torch.full((batch, N_GOALS), 1.0 / N_GOALS),
        limits=SafetyLimits(qd_max=(1.5,) * N_JOINTS, tcp_speed_max=0.25),
        dt=0.05,
        epoch=epoch,
        global_step=3,
    )


# --- KL and entropy ------------------------------------------------------------------------------


def test_gaussian_kl_matches_torch_distributions():
    # Reference: torch.distributions.kl_divergence(Normal, Normal(0, 1)), summed over latent dims.
    g = torch.Generator().manual_seed(1)
    mean = torch.randn(64, 3, generator=g, dtype=torch.float64)
    logvar = 2.0 * torch.randn(64, 3, generator=g, dtype=torch.float64)
    ref = kl_divergence(Normal(mean, torch.exp(0.5 * logvar)), Normal(0.0, 1.0)).sum(-1)
    torch.testing.assert_close(gaussian_kl(mean, logvar), ref, rtol=1e-12, atol=1e-12)


def test_posterior_entropy_matches_scipy():
    # Reference: scipy.stats.norm(scale=sigma).entropy() = 0.5 * log(2 pi e sigma^2), summed over dims.
    torch.manual_seed(2)
    vae = StateVAE(N_JOINTS, 16, latent_dim=3, hidden=[16]).double()
    post = vae.encode(torch.randn(5, N_JOINTS, dtype=torch.float64), torch.randn(5, 16, dtype=torch.float64))
    sigma = torch.exp(0.5 * post.logvar).detach().numpy()
    ref = scipy.stats.norm(scale=sigma).entropy().sum(-1)
    np.testing.assert_allclose(gaussian_entropy(post.logvar).detach().numpy(), ref, rtol=1e-12)


@pytest.mark.parametrize("epoch,factor", [(0, 0.0), (1, 0.25), (2, 0.5), (3, 0.75), (4, 1.0), (9, 1.0)])
def test_kl_warmup_ramp(epoch, factor):
    # Linear KL warm-up (common practice): factor = min(1, epoch / warmup_epochs); values by hand.
    term = KLDivergence(weight=1e-3, warmup_epochs=4)
    assert term.ramp(epoch) == pytest.approx(factor, abs=1e-12)
    batch = make_batch(epoch=epoch)
    post = batch.posterior
    ref = kl_divergence(Normal(post.mean, torch.exp(0.5 * post.logvar)), Normal(0.0, 1.0)).sum(-1).mean()
    torch.testing.assert_close(term(batch), factor * ref)


def test_kl_without_warmup_and_for_deterministic_encoder():
    assert [KLDivergence(warmup_epochs=0).ramp(e) for e in (0, 5)] == [1.0, 1.0]
    batch = make_batch()
    batch.posterior = Posterior(batch.posterior.mean, None)
    assert KLDivergence()(batch).item() == 0.0


# --- stick-goal information ----------------------------------------------------------------------


def test_information_zero_when_every_point_agrees():
    # Mutual information of independent variables is 0 (definition): p(g|k) the same for all k.
    g = torch.Generator().manual_seed(3)
    progress = 0.01 * torch.randn(5, 1, 6, generator=g, dtype=torch.float64).expand(5, 16, 6)
    torch.testing.assert_close(stick_goal_mutual_information(progress, 200.0), torch.zeros(5, dtype=torch.float64))


@pytest.mark.parametrize("n_goals", [2, 3, 5])
def test_information_log_g_when_each_point_picks_its_own_goal(n_goals):
    # K = G points, each (numerically) one-hot on a different goal: I = H(uniform) - 0 = log G.
    progress = torch.eye(n_goals, dtype=torch.float64)[None]  # [1, G, G]: point k gains 1 m toward goal k
    info = stick_goal_mutual_information(progress, 200.0)
    torch.testing.assert_close(info, torch.tensor([math.log(n_goals)], dtype=torch.float64))


def test_information_matches_scipy_entropy():
    # Reference: scipy.special.softmax and scipy.stats.entropy, I = H(mean_k p) - mean_k H(p_k).
    rng = np.random.default_rng(4)
    progress = 0.02 * rng.standard_normal((3, 16, 5))
    sharpness = 150.0
    p = scipy.special.softmax(sharpness * progress, axis=-1)
    ref = scipy.stats.entropy(p.mean(1), axis=-1) - scipy.stats.entropy(p, axis=-1).mean(-1)
    got = stick_goal_mutual_information(torch.from_numpy(progress), sharpness).numpy()
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-12)
    assert np.all(got >= -1e-12) and np.all(got <= math.log(5) + 1e-12)


def test_goal_progress_matches_numpy():
    # Reference: numpy.linalg.norm distances before and after the displacement.
    rng = np.random.default_rng(5)
    ee, dx, ap = rng.standard_normal((2, 3)), rng.standard_normal((2, 4, 3)), rng.standard_normal((2, 3, 3))
    ref = np.linalg.norm(ee[:, None, None] - ap[:, None], axis=-1) - np.linalg.norm(
        (ee[:, None] + dx)[:, :, None] - ap[:, None], axis=-1
    )
    got = goal_progress(*(torch.from_numpy(a) for a in (ee, dx, ap))).numpy()
    np.testing.assert_allclose(got, ref, atol=1e-9)


# --- stick sampling ------------------------------------------------------------------------------


@pytest.mark.parametrize("samples,dim,m", [(16, 2, 4), (10, 2, 4), (8, 3, 2)])
def test_stratified_sticks_cover_the_box(samples, dim, m):
    sticks = stratified_sticks(7, samples, dim, torch.Generator().manual_seed(0))
    assert sticks.shape == (7, samples, dim)
    assert sticks.min() >= -1.0 and sticks.max() <= 1.0
    cell = ((sticks + 1.0) / 2.0 * m).floor().long().clamp(max=m - 1)  # [B, K, d]
    code = (cell * (m ** torch.arange(dim))).sum(-1)  # [B, K]
    for row in code:  # at most one point per grid cell; all cells used when samples == m^dim
        assert len(set(row.tolist())) == samples


def test_reachability_reproducible_and_leaves_global_rng_alone():
    term = GoalEntropy()
    batch = make_batch()
    torch.manual_seed(11)
    a = term(batch)
    after_term = torch.rand(3)
    torch.manual_seed(11)
    b = term(batch)
    torch.manual_seed(11)
    untouched = torch.rand(3)
    torch.manual_seed(12)
    c = term(batch)
    assert torch.equal(a, b)
    assert not torch.equal(a, c)  # the draw follows torch's seed
    assert torch.equal(after_term, untouched)


# --- the goal entropy term -----------------------------------------------------------------------


def test_reachability_gradient_reaches_decoder():
    batch = make_batch()
    value = GoalEntropy()(batch)
    assert value.dim() == 0 and torch.isfinite(value)
    assert -math.log(N_GOALS) - 1e-6 <= value.item() <= 1e-6  # -I with 0 <= I <= log G
    value.backward()
    grads = [p.grad for p in batch.policy.decoder.decoder.parameters()]
    assert all(g is not None and torch.isfinite(g).all() for g in grads)
    assert all(g.abs().sum() > 0 for g in grads)


def test_reachability_cannot_gain_from_speed():
    # Uniform down-scaling (SafetyLimits.cap) keeps only the direction of a command past the caps, so
    # making the decoder 10x faster again must not change the term once outputs are capped.
    term = GoalEntropy()
    fast, faster = make_batch(scale_output=1e3), make_batch(scale_output=1e4)
    torch.testing.assert_close(term(fast), term(faster))
    slow = make_batch(scale_output=1e-3)  # far below the caps: progress scales with speed
    assert not torch.allclose(term(slow), term(fast))


# --- the context subset and the cost-saving paths ------------------------------------------------


def _goal_entropy_decoding_every_copy(term: GoalEntropy, batch: TermBatch) -> Tensor:
    """The term as first written (before contexts existed, copies made explicit): what the current code
    must reproduce whenever it judges the whole batch."""
    raw = batch.raw_context
    B, C = raw.shape
    K, d, n = term.samples, batch.latent.shape[-1], batch.jac_lin.shape[-1]
    stick = stratified_sticks(B, K, d, term._generator(raw.device, batch.global_step), dtype=raw.dtype)
    qd = batch.policy(stick, raw[:, None, :].expand(B, K, C).contiguous())
    qd, _ = batch.limits.cap(qd, batch.jac_lin[:, None].expand(B, K, 3, n).contiguous())
    dx = torch.einsum("bij,bkj->bki", batch.jac_lin, qd) * term.horizon
    progress = goal_progress(batch.ee_pos, dx, batch.goal_targets[:, :, 0, :])
    return -stick_goal_mutual_information(progress, term.sharpness).mean()


@pytest.mark.parametrize("contexts", [None, 40, 500])
def test_reachability_on_every_context_matches_the_first_computation(contexts):
    # contexts >= batch or null: nothing is left out, so value and gradient must be the old ones (1e-6)
    batch = make_batch(batch=40)
    params = list(batch.policy.decoder.parameters())
    new = GoalEntropy(contexts=contexts)(batch)
    new_grad = torch.autograd.grad(new, params, allow_unused=True)
    old = _goal_entropy_decoding_every_copy(GoalEntropy(), batch)
    old_grad = torch.autograd.grad(old, params, allow_unused=True)
    torch.testing.assert_close(new, old, rtol=0, atol=1e-6)
    for a, b in zip(new_grad, old_grad):
        assert (a is None) == (b is None)
        if a is not None:
            torch.testing.assert_close(a, b, rtol=0, atol=1e-6)


def test_context_subset_is_a_mean_over_distinct_rows():
    term = GoalEntropy(contexts=8)
    batch = make_batch(batch=40)
    rows = term.rows(batch)
    assert rows is not None and rows.shape == (8,) and len(set(rows.tolist())) == 8
    assert 0 <= rows.min() and rows.max() < 40
    # a context decodes the same sticks whether or not the others are judged too
    params = list(batch.policy.decoder.decoder.parameters())
    value = term(batch)
    grad = torch.autograd.grad(value, params)
    every = term.information(batch)
    ref = -every[rows].mean()
    torch.testing.assert_close(value, ref, rtol=0, atol=1e-6)
    for a, b in zip(grad, torch.autograd.grad(ref, params)):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-6)


def test_context_subset_is_uniform_over_steps():
    # Reference: scipy.stats.chisquare against equal counts; over 400 steps each of 40 rows is drawn
    # 400 * 8 / 40 = 80 times on average when the draw is uniform.
    term = GoalEntropy(contexts=8)
    batch = make_batch(batch=40)
    counts = np.zeros(40)
    for step in range(400):
        batch.global_step = step
        counts[term.rows(batch).numpy()] += 1
    assert counts.sum() == 400 * 8
    assert scipy.stats.chisquare(counts).pvalue > 1e-3


def test_context_subset_reproducible_and_leaves_global_rng_alone():
    term = GoalEntropy(contexts=8)
    batch = make_batch(batch=40)
    torch.manual_seed(11)
    a, rows_a = term(batch), term.rows(batch)
    after_term = torch.rand(3)
    torch.manual_seed(11)
    b, rows_b = term(batch), term.rows(batch)
    torch.manual_seed(11)
    untouched = torch.rand(3)
    torch.manual_seed(12)
    rows_c = term.rows(batch)
    assert torch.equal(a, b) and torch.equal(rows_a, rows_b)
    assert not torch.equal(rows_a, rows_c)  # the subset follows torch's seed
    assert torch.equal(after_term, untouched)


def test_validation_judges_every_context():
    term = GoalEntropy(contexts=8)
    batch = make_batch(batch=40)
    batch.policy.eval()
    assert term.rows(batch) is None
    torch.testing.assert_close(term(batch), _goal_entropy_decoding_every_copy(term, batch), rtol=0, atol=1e-6)


@pytest.mark.parametrize("bad", [0, -3, 2.5, True, "64"])
def test_bad_contexts_raise_config_error(bad):
    with pytest.raises(ConfigError) as err:
        GoalEntropy(contexts=bad)
    assert err.value.where == "loss.goal_entropy.contexts"


def test_bad_options_raise_config_error():
    with pytest.raises(ConfigError) as err:
        GoalEntropy(samples=0)
    assert err.value.where == "loss.goal_entropy.samples"
    with pytest.raises(ConfigError):
        GoalEntropy(sharpness=-1.0)
    with pytest.raises(ConfigError) as err:
        KLDivergence(warmup_epochs=-2)
    assert err.value.where == "loss.kl.warmup_epochs"
