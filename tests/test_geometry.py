"""Rotation helpers checked against scipy.spatial.transform.Rotation (the reference for every value here)."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.spatial.transform import Rotation

from coreach.world.geometry import angle_between, matrix_to_quat, quat_to_matrix, rotation_error, rpy_to_matrix


def _wxyz(r: Rotation) -> np.ndarray:
    xyzw = r.as_quat()
    return np.concatenate([xyzw[..., 3:], xyzw[..., :3]], axis=-1)


def _same_quat(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """q and -q are the same rotation."""
    return np.minimum(np.abs(a - b).max(-1), np.abs(a + b).max(-1))


@pytest.fixture
def rotations() -> Rotation:
    """Random rotations plus the hard cases: identity, half turns about axes and near-half turns."""
    rng = np.random.default_rng(7)
    axes = rng.normal(size=(6, 3))
    axes /= np.linalg.norm(axes, axis=1, keepdims=True)
    special = np.concatenate(
        [
            np.zeros((1, 3)),
            np.pi * np.eye(3),  # exactly pi about x, y, z
            (np.pi - 1e-7) * axes[:3],
            (np.pi - 1e-3) * axes[3:],
            1e-9 * axes[:2],  # near identity
        ]
    )
    return Rotation.concatenate([Rotation.random(64, random_state=3), Rotation.from_rotvec(special)])


def test_rpy_matches_scipy_extrinsic_xyz():
    # URDF rpy is fixed-axis X, then Y, then Z: scipy's lowercase "xyz" (extrinsic) convention.
    rpy = np.random.default_rng(0).uniform(-np.pi, np.pi, size=(50, 3))
    ours = rpy_to_matrix(torch.tensor(rpy)).numpy()
    ref = Rotation.from_euler("xyz", rpy).as_matrix()
    np.testing.assert_allclose(ours, ref, atol=1e-12)


def test_rpy_keeps_batch_shape_and_float32():
    rpy = torch.zeros(2, 5, 3, dtype=torch.float32)
    R = rpy_to_matrix(rpy)
    assert R.shape == (2, 5, 3, 3) and R.dtype == torch.float32
    np.testing.assert_allclose(R.numpy(), np.broadcast_to(np.eye(3), (2, 5, 3, 3)))


def test_matrix_to_quat_matches_scipy(rotations):
    ours = matrix_to_quat(torch.tensor(rotations.as_matrix())).numpy()
    ref = _wxyz(rotations)
    assert _same_quat(ours, ref).max() < 1e-9
    assert (ours[:, 0] >= 0).all()
    np.testing.assert_allclose(np.linalg.norm(ours, axis=-1), 1.0, atol=1e-12)


def test_quat_to_matrix_matches_scipy(rotations):
    q = torch.tensor(_wxyz(rotations)) * 3.0  # not normalised on purpose
    np.testing.assert_allclose(quat_to_matrix(q).numpy(), rotations.as_matrix(), atol=1e-12)


def test_rotation_error_matches_scipy_rotvec(rotations):
    other = Rotation.random(len(rotations), random_state=11)
    R_target = torch.tensor((rotations * other).as_matrix())
    R = torch.tensor(other.as_matrix())
    ours = rotation_error(R_target, R).numpy()
    # R_target @ R^T is `rotations` itself, whose rotation vector scipy gives directly.
    ref = rotations.as_rotvec()
    angle = np.linalg.norm(ref, axis=-1)
    regular = angle < np.pi - 1e-6
    np.testing.assert_allclose(ours[regular], ref[regular], atol=1e-8)
    # At (nearly) pi the vector's sign is arbitrary: both must describe the same rotation.
    back = Rotation.from_rotvec(ours[~regular])
    assert (back * rotations[~regular].inv()).magnitude().max() < 1e-6
    np.testing.assert_allclose(np.linalg.norm(ours[~regular], axis=-1), angle[~regular], atol=1e-6)


def test_rotation_error_moves_R_onto_target():
    # Applying exp(error) to R must give R_target (checked with scipy's exponential map).
    a, b = Rotation.random(20, random_state=1), Rotation.random(20, random_state=2)
    err = rotation_error(torch.tensor(a.as_matrix()), torch.tensor(b.as_matrix())).numpy()
    np.testing.assert_allclose((Rotation.from_rotvec(err) * b).as_matrix(), a.as_matrix(), atol=1e-10)


def test_angle_between_matches_scipy_magnitude(rotations):
    other = Rotation.random(len(rotations), random_state=5)
    ours = angle_between(torch.tensor((rotations * other).as_matrix()), torch.tensor(other.as_matrix())).numpy()
    np.testing.assert_allclose(ours, rotations.magnitude(), atol=1e-7)
    assert ours.shape == (len(rotations),)


def test_numpy_and_torch_give_the_same_values(rotations):
    # one array-API implementation: numpy in, numpy out; torch in, torch out; values equal and equal to scipy
    other = Rotation.random(len(rotations), random_state=11)
    rpy = other.as_euler("xyz")
    R_np, R2_np = (rotations * other).as_matrix(), other.as_matrix()
    results = {}
    for name, conv in (("numpy", np.asarray), ("torch", torch.tensor)):
        out = (
            rpy_to_matrix(conv(rpy)),
            matrix_to_quat(conv(R_np)),
            quat_to_matrix(conv(_wxyz(rotations))),
            rotation_error(conv(R_np), conv(R2_np)),
            angle_between(conv(R_np), conv(R2_np)),
        )
        expected_type = np.ndarray if name == "numpy" else torch.Tensor
        assert all(isinstance(x, expected_type) for x in out)
        results[name] = [np.asarray(x) for x in out]
    for a, b in zip(results["numpy"], results["torch"]):
        np.testing.assert_allclose(a, b, atol=1e-12, rtol=0)
    ours_rpy, ours_quat, ours_mat, ours_err, ours_ang = results["numpy"]
    # scipy.spatial.transform.Rotation is the reference for each
    np.testing.assert_allclose(ours_rpy, R2_np, atol=1e-12, rtol=0)
    assert _same_quat(ours_quat, _wxyz(rotations * other)).max() < 1e-12
    np.testing.assert_allclose(ours_mat, rotations.as_matrix(), atol=1e-12, rtol=0)
    np.testing.assert_allclose(ours_ang, np.linalg.norm(rotations.as_rotvec(), axis=-1), atol=1e-6, rtol=0)
    assert np.isfinite(ours_err).all()


def test_torch_gradients_flow_through_rotation_error():
    rpy = torch.tensor([[0.3, -0.2, 1.1]], dtype=torch.float64, requires_grad=True)
    target = torch.tensor(Rotation.from_euler("xyz", [0.1, 0.4, -0.5]).as_matrix())[None]
    rotation_error(target, rpy_to_matrix(rpy)).norm().backward()
    assert rpy.grad is not None and torch.isfinite(rpy.grad).all() and rpy.grad.abs().sum() > 0


def test_geometry_does_not_import_torch():
    # the runtime imports coreach.world.geometry and must stay torch-free
    import subprocess
    import sys

    code = "import sys, coreach.world.geometry, coreach.runtime.kinematics; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
