"""The Boltzmann goal belief against Bayes' rule worked out by hand, on numpy and torch alike."""

import math

import numpy as np
import pytest
import torch

from coreach.control.belief_model import BoltzmannGoalBelief, distance_to_path


def _two_goals():
    # goal A at (1, 0, 0), goal B at (0, 1, 0); each "path" is a single point (approach == end)
    a = [[1.0, 0.0, 0.0], [1.0, 0.0, 0.0]]
    b = [[0.0, 1.0, 0.0], [0.0, 1.0, 0.0]]
    return np.array([[a, b]])  # [1, G=2, S=2, 3]


def test_update_matches_hand_worked_bayes_rule():
    # Worked by hand (Bayes' rule with a Boltzmann likelihood exp(beta * progress)):
    # the tool moves 0.1 m from the origin toward A. Progress toward A = 1 - 0.9 = 0.1;
    # toward B = 1 - sqrt(1 + 0.01) = -0.0049876. With beta = 10 and a uniform prior:
    # P(A) = e^1.0 / (e^1.0 + e^-0.049876) = 2.718282 / (2.718282 + 0.951348) = 0.740751.
    model = BoltzmannGoalBelief(beta=10.0)
    post = model.update(np.array([[0.5, 0.5]]), np.zeros((1, 3)), np.array([[0.1, 0.0, 0.0]]), _two_goals())
    expected_a = math.exp(1.0) / (math.exp(1.0) + math.exp(10 * (1 - math.sqrt(1.01))))
    assert expected_a == pytest.approx(0.740751, abs=1e-6)
    assert post[0, 0] == pytest.approx(expected_a, abs=1e-12)
    assert post.sum() == pytest.approx(1.0)


def test_floor_mixes_uniform_after_update():
    model = BoltzmannGoalBelief(beta=10.0, floor=0.1)
    post = model.update(np.array([[0.5, 0.5]]), np.zeros((1, 3)), np.array([[0.1, 0.0, 0.0]]), _two_goals())
    # (1 - 0.1) * 0.740751 + 0.1 / 2, by hand
    assert post[0, 0] == pytest.approx(0.9 * 0.740751 + 0.05, abs=1e-6)


def test_tiny_motion_is_uninformative():
    model = BoltzmannGoalBelief(beta=10.0, min_motion=1e-3)
    prior = np.array([[0.3, 0.7]])
    post = model.update(prior, np.zeros((1, 3)), np.array([[5e-4, 0.0, 0.0]]), _two_goals())
    np.testing.assert_array_equal(post, prior)


def test_without_floor_the_update_telescopes():
    # Bayes' rule with exp(beta * progress) likelihoods: the product over steps depends only on the start and
    # end positions, so jitter along the way cannot make the belief drift.
    model = BoltzmannGoalBelief(beta=20.0, min_motion=0.0)
    rng = np.random.default_rng(0)
    path = np.cumsum(rng.normal(0, 0.02, size=(30, 1, 3)), axis=0)
    b = np.array([[0.5, 0.5]])
    for t in range(1, len(path)):
        b = model.update(b, path[t - 1], path[t], _two_goals())
    direct = model.update(np.array([[0.5, 0.5]]), path[0], path[-1], _two_goals())
    np.testing.assert_allclose(b, direct, rtol=1e-9)


def test_fine_motion_along_goal_segment_is_not_moving_away():
    # distance to the segment approach->end stays 0 while the tool carries out the fine motion
    targets = np.array([[[[0.5, 0.0, 0.0], [0.5, 0.0, 0.1]]]])
    d = distance_to_path(np.array([[0.5, 0.0, 0.05]]), targets)
    assert d[0, 0] == pytest.approx(0.0, abs=1e-12)
    d_beyond = distance_to_path(np.array([[0.5, 0.0, 0.2]]), targets)
    assert d_beyond[0, 0] == pytest.approx(0.1, abs=1e-12)


def test_numpy_and_torch_agree():
    model = BoltzmannGoalBelief(beta=40.0, floor=0.02)
    rng = np.random.default_rng(1)
    targets = rng.normal(size=(5, 4, 2, 3))
    before, after = rng.normal(size=(5, 3)), rng.normal(size=(5, 3)) * 0.05
    prior = rng.dirichlet(np.ones(4), size=5)
    out_np = model.update(prior, before, before + after, targets)
    out_t = model.update(*(torch.as_tensor(x) for x in (prior, before, before + after, targets)))
    np.testing.assert_allclose(out_np, out_t.numpy(), rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("kwargs", [{"beta": 0.0}, {"floor": 1.0}, {"floor": -0.1}])
def test_bad_parameters_are_refused(kwargs):
    with pytest.raises(ValueError):
        BoltzmannGoalBelief(**kwargs)
