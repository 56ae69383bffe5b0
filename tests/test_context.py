"""The decoder context: block layout and belief-weighted goal features, worked by hand."""

import numpy as np
import pytest
import torch

from coreach.context import ContextSpec, build_context


def test_layout_and_hand_worked_features():
    spec = ContextSpec(dof=2, n_goals=2)
    assert spec.widths == {"state": 11, "belief": 2, "goal": 12}
    assert spec.columns(("belief",)) == [11, 12]
    q = np.array([[0.1, 0.2]])
    ee = np.array([[0.0, 0.0, 0.0]])
    rot = np.eye(3)[None]
    belief = np.array([[0.25, 0.75]])
    targets = np.array([[[[1.0, 0, 0], [1.0, 0, 0.1]], [[0, 1.0, 0], [0, 1.0, 0]]]])
    goal_rot = np.stack([np.eye(3), np.eye(3)])[None]
    ctx = build_context(q, ee, rot, belief, targets, goal_rot)
    assert ctx.shape == (1, spec.width)
    # belief-weighted vector to the approach points: 0.25 * (1,0,0) + 0.75 * (0,1,0)
    np.testing.assert_allclose(ctx[0, 13:16], [0.25, 0.75, 0.0])
    # belief-weighted fine motion: 0.25 * (0,0,0.1)
    np.testing.assert_allclose(ctx[0, 16:19], [0.0, 0.0, 0.025])
    # orientation features vanish when the tool already has the goals' orientation
    np.testing.assert_allclose(ctx[0, 19:25], 0.0)


def test_numpy_and_torch_agree():
    rng = np.random.default_rng(0)
    args = (
        rng.normal(size=(4, 7)),
        rng.normal(size=(4, 3)),
        rng.normal(size=(4, 3, 3)),
        rng.dirichlet(np.ones(3), size=4),
        rng.normal(size=(4, 3, 2, 3)),
        rng.normal(size=(4, 3, 3, 3)),
    )
    a = build_context(*args)
    b = build_context(*(torch.as_tensor(x) for x in args))
    np.testing.assert_allclose(a, b.numpy(), rtol=1e-12)


def test_unknown_block_is_refused():
    with pytest.raises(ValueError, match="unknown context blocks"):
        ContextSpec(dof=7, n_goals=4).columns(("state", "vision"))
