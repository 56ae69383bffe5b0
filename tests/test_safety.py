"""Shared speed caps and position look-ahead: limits hold and the direction of motion is kept."""

import numpy as np
import torch

from coreach.safety import SafetyLimits

LIMITS = SafetyLimits(qd_max=(1.0, 2.0, 0.5), tcp_speed_max=0.25, q_lower=(-1.0, -1.0, -1.0), q_upper=(1.0, 1.0, 1.0))


def test_cap_keeps_direction_and_meets_every_limit():
    rng = np.random.default_rng(0)
    qd = rng.normal(0, 3, size=(200, 3))
    jac = rng.normal(0, 0.5, size=(200, 3, 3))
    capped, hit = LIMITS.cap(qd, jac)
    assert np.all(np.abs(capped) <= np.array(LIMITS.qd_max) + 1e-12)
    tcp = np.linalg.norm(np.einsum("bij,bj->bi", jac, capped), axis=-1)
    assert np.all(tcp <= 0.25 + 1e-12)
    # uniform scaling: capped is a non-negative multiple of the command
    cos = np.sum(capped * qd, -1) / (np.linalg.norm(capped, axis=-1) * np.linalg.norm(qd, axis=-1))
    np.testing.assert_allclose(cos, 1.0, atol=1e-12)
    # commands already inside the limits pass unchanged
    small = qd * 1e-3
    out, hit_small = LIMITS.cap(small, jac)
    np.testing.assert_array_equal(out, small)
    assert not hit_small.any() and hit.any()


def test_cap_is_the_same_on_torch():
    rng = np.random.default_rng(1)
    qd, jac = rng.normal(0, 3, size=(50, 3)), rng.normal(size=(50, 3, 3))
    a, _ = LIMITS.cap(qd, jac)
    b, _ = LIMITS.cap(torch.as_tensor(qd), torch.as_tensor(jac))
    np.testing.assert_allclose(a, b.numpy(), rtol=1e-12)


def test_keep_inside_stops_at_the_position_limit():
    q = np.array([[0.95, -0.95, 0.0]])
    qd = np.array([[1.0, -1.0, 0.3]])
    out, hit = LIMITS.keep_inside(q, qd, dt=0.1)
    nxt = q + out * 0.1
    assert np.all(nxt <= 1.0 + 1e-12) and np.all(nxt >= -1.0 - 1e-12)
    np.testing.assert_allclose(out, [[0.5, -0.5, 0.3]])
    assert hit.all()


def test_keep_inside_with_unlimited_joint_has_no_nan():
    limits = SafetyLimits(qd_max=(1.0, 1.0), q_lower=(-np.inf, -1.0), q_upper=(np.inf, 1.0))
    out, _ = limits.keep_inside(np.array([[100.0, 0.99]]), np.array([[0.7, 1.0]]), dt=0.1)
    np.testing.assert_allclose(out, [[0.7, 0.1]])
