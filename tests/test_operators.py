"""The Boltzmann operator: choice frequencies against scipy's softmax (chi-square), greedy and delayed choices,
bias, and the tremor's spectrum against the closed-form spectrum of a first-order low-pass (scipy welch)."""

from __future__ import annotations

import math
from pathlib import Path

import hydra
import numpy as np
import pytest
import torch
from omegaconf import OmegaConf
from scipy.signal import welch
from scipy.special import softmax
from scipy.stats import chisquare

from coreach.errors import ConfigError
from coreach_plugins.operator.boltzmann import NO_INPUT, BoltzmannOperator
from coreach.host.protocols import Operator

OPERATOR_DIR = Path(__file__).resolve().parents[1] / "conf" / "coreach_conf" / "operator"
# one-step progress (m) of M=2 modes x K=3 candidates: differences of a few mm, as in closed loop
VALUES = torch.tensor([[0.0, 0.002, 0.004], [-0.001, 0.003, 0.001]], dtype=torch.float64)


def _counts(op, n=20_000, seed=3):
    gen = torch.Generator().manual_seed(seed)
    op.reset(n, gen)
    pick = op.choose(VALUES.expand(n, 2, 3), 0, gen)
    return np.bincount(pick.numpy(), minlength=6)


def test_choice_frequencies_follow_the_boltzmann_distribution():
    counts = _counts(BoltzmannOperator(beta=500.0))
    # Boltzmann rationality: P(i) = exp(beta v_i) / Z, computed by scipy.special.softmax
    expected = softmax(500.0 * VALUES.reshape(-1).numpy()) * counts.sum()
    assert chisquare(counts, expected).pvalue > 1e-3  # fixed seed; a correct sampler passes
    # the same test has the power to reject a sampler with the wrong rationality
    wrong = softmax(250.0 * VALUES.reshape(-1).numpy()) * counts.sum()
    assert chisquare(counts, wrong).pvalue < 1e-6


def test_greedy_takes_the_best_candidate_and_draws_nothing():
    op = BoltzmannOperator(greedy=True)
    gen = torch.Generator().manual_seed(0)
    op.reset(4, gen)
    state = gen.get_state()
    values = torch.randn(4, 2, 5, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    pick = op.choose(values, 0, gen)
    assert torch.equal(pick, values.reshape(4, -1).argmax(-1))
    assert torch.equal(gen.get_state(), state)


def test_delay_applies_each_choice_later_and_gives_no_input_first():
    values = [torch.randn(3, 1, 4, generator=torch.Generator().manual_seed(s)) for s in range(6)]
    now, late = BoltzmannOperator(greedy=True), BoltzmannOperator(greedy=True, delay_steps=2)
    gen = torch.Generator().manual_seed(0)
    now.reset(3, gen)
    late.reset(3, gen)
    a = [now.choose(v, t, gen) for t, v in enumerate(values)]
    b = [late.choose(v, t, gen) for t, v in enumerate(values)]
    assert (b[0] == NO_INPUT).all() and (b[1] == NO_INPUT).all()
    for t in range(2, 6):
        assert torch.equal(b[t], a[t - 2])


def test_bias_is_added_and_the_stick_saturates():
    op = BoltzmannOperator(bias=[0.2, -0.1])
    op.reset(2, torch.Generator())
    stick = torch.tensor([[0.5, 0.5], [1.0, -1.0]], dtype=torch.float64)
    out = op.perturb(stick, 0, torch.Generator())
    torch.testing.assert_close(out, torch.tensor([[0.7, 0.4], [1.0, -1.0]], dtype=torch.float64))
    ideal = BoltzmannOperator()
    assert ideal.perturb(stick, 0, torch.Generator()) is stick
    with pytest.raises(ConfigError, match="operator.bias"):
        BoltzmannOperator(bias=[0.1, 0.1, 0.1]).perturb(stick, 0, torch.Generator())


def test_tremor_is_band_limited_noise_with_the_configured_std():
    dt, std, fc = 0.1, 0.3, 2.0
    op = BoltzmannOperator(tremor_std=std, tremor_cutoff_hz=fc)
    gen = torch.Generator().manual_seed(7)
    E, T = 64, 2048
    op.reset(E, gen, dt=dt)
    zero = torch.zeros(E, 2, dtype=torch.float64)
    x = torch.stack([op.perturb(zero, t, gen) for t in range(T)], dim=-1)[:, 0].numpy()  # [E, T]
    assert x.std() == pytest.approx(std, rel=0.05)
    f, psd = welch(x, fs=1 / dt, nperseg=256, axis=-1)
    psd = psd.mean(0)
    # Textbook spectrum of the AR(1) process x_t = a x_{t-1} + e_t, var(e) = (1 - a^2) std^2, one-sided:
    # S(f) = 2 dt var(e) / |1 - a exp(-i 2 pi f dt)|^2 (0 < f < Nyquist).
    a = math.exp(-2 * math.pi * fc * dt)
    theory = 2 * dt * (1 - a * a) * std**2 / np.abs(1 - a * np.exp(-2j * np.pi * f * dt)) ** 2
    inner = (f > 0.2) & (f < 4.8)
    np.testing.assert_allclose(psd[inner], theory[inner], rtol=0.2)
    # and, against white noise of the same variance, less power above the corner (theory: about 0.6 of it
    # at 3-5 Hz for a 2 Hz corner sampled at 10 Hz)
    white = np.random.default_rng(0).normal(0.0, std, size=(E, T))
    _, psd_white = welch(white, fs=1 / dt, nperseg=256, axis=-1)
    high = f > 3.0
    assert psd[high].sum() < 0.75 * psd_white.mean(0)[high].sum()


@pytest.mark.parametrize("key, value", [("beta", 0.0), ("tremor_std", -0.1), ("delay_steps", 1.5),
                                        ("tremor_cutoff_hz", 0.0), ("greedy", "yes")])  # fmt: skip
def test_bad_options_name_the_option(key, value):
    with pytest.raises(ConfigError, match=f"operator.{key}"):
        BoltzmannOperator(**{key: value})


@pytest.mark.parametrize("path", sorted(OPERATOR_DIR.glob("*.yaml")), ids=lambda p: p.stem)
def test_shipped_operators_build_and_follow_the_protocol(path):
    op = hydra.utils.instantiate(OmegaConf.load(path))
    assert isinstance(op, Operator) and op.name == path.stem
    gen = torch.Generator().manual_seed(0)
    op.reset(5, gen)
    pick = op.choose(torch.zeros(5, 1, 25, dtype=torch.float64), 0, gen)
    assert pick.shape == (5,) and ((pick >= -1) & (pick < 25)).all()
    assert op.perturb(torch.zeros(5, 2, dtype=torch.float64), 0, gen).shape == (5, 2)
