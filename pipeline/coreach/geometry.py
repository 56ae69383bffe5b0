"""Batched rotation helpers in torch: URDF roll-pitch-yaw, quaternions (wxyz) and orientation errors."""

from __future__ import annotations

import torch
from torch import Tensor

__all__ = ["rpy_to_matrix", "matrix_to_quat", "quat_to_matrix", "rotation_error", "angle_between"]


def rpy_to_matrix(rpy: Tensor) -> Tensor:
    """Roll, pitch, yaw (rad) [..., 3] -> rotation matrix [..., 3, 3].

    Extrinsic X-Y-Z (the URDF `rpy` convention): R = Rz(yaw) @ Ry(pitch) @ Rx(roll).
    """
    rpy = torch.as_tensor(rpy)
    if not rpy.is_floating_point():
        rpy = rpy.to(torch.float64)
    cr, cp, cy = torch.cos(rpy).unbind(-1)
    sr, sp, sy = torch.sin(rpy).unbind(-1)
    rows = [
        cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr,
        sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr,
        -sp, cp * sr, cp * cr,
    ]  # fmt: skip
    return torch.stack(rows, dim=-1).reshape(*rpy.shape[:-1], 3, 3)


def matrix_to_quat(R: Tensor) -> Tensor:
    """Rotation matrix [..., 3, 3] -> unit quaternion [..., 4] (w, x, y, z) with w >= 0.

    Each of the four candidate formulas divides by one component; taking the largest one keeps the
    division well conditioned for every rotation, including half turns (Shepperd's method).
    """
    m = R
    m00, m11, m22 = m[..., 0, 0], m[..., 1, 1], m[..., 2, 2]
    # 4*c^2 for c in (w, x, y, z); clamp guards tiny negatives from rounding.
    four_sq = torch.stack(
        [1 + m00 + m11 + m22, 1 + m00 - m11 - m22, 1 - m00 + m11 - m22, 1 - m00 - m11 + m22], dim=-1
    ).clamp_min(0)
    d21, d02, d10 = m[..., 2, 1] - m[..., 1, 2], m[..., 0, 2] - m[..., 2, 0], m[..., 1, 0] - m[..., 0, 1]
    s21, s02, s10 = m[..., 2, 1] + m[..., 1, 2], m[..., 0, 2] + m[..., 2, 0], m[..., 1, 0] + m[..., 0, 1]
    # Row k holds 4*c_k*(w, x, y, z) for the candidate whose pivot is component k.
    cand = torch.stack(
        [
            torch.stack([four_sq[..., 0], d21, d02, d10], dim=-1),
            torch.stack([d21, four_sq[..., 1], s10, s02], dim=-1),
            torch.stack([d02, s10, four_sq[..., 2], s21], dim=-1),
            torch.stack([d10, s02, s21, four_sq[..., 3]], dim=-1),
        ],
        dim=-2,
    )  # [..., 4, 4]
    best = four_sq.argmax(dim=-1, keepdim=True)  # [..., 1]
    pivot = torch.gather(four_sq, -1, best).sqrt() * 2  # sqrt(4 c_k^2) * 2 = 4|c_k|
    q = torch.gather(cand, -2, best.unsqueeze(-1).expand(*best.shape[:-1], 1, 4)).squeeze(-2) / pivot
    q = q / q.norm(dim=-1, keepdim=True)
    return torch.where(q[..., :1] < 0, -q, q)


def quat_to_matrix(q: Tensor) -> Tensor:
    """Quaternion [..., 4] (w, x, y, z; normalised here) -> rotation matrix [..., 3, 3]."""
    q = q / q.norm(dim=-1, keepdim=True)
    w, x, y, z = q.unbind(-1)
    rows = [
        1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y),
        2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x),
        2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y),
    ]  # fmt: skip
    return torch.stack(rows, dim=-1).reshape(*q.shape[:-1], 3, 3)


def _quat_to_rotvec(q: Tensor) -> Tensor:
    """Unit quaternion [..., 4] with w >= 0 -> rotation vector [..., 3] (angle in [0, pi])."""
    w, v = q[..., :1], q[..., 1:]
    n = v.norm(dim=-1, keepdim=True)
    safe_n = torch.where(n > 1e-8, n, torch.ones_like(n))
    # angle/sin(angle/2) = 2*atan2(n, w)/n -> 2/w as n -> 0; the limit avoids 0/0 near identity.
    factor = torch.where(n > 1e-8, 2 * torch.atan2(n, w) / safe_n, 2 / w.clamp_min(1e-12))
    return factor * v


def rotation_error(R_target: Tensor, R: Tensor) -> Tensor:
    """Axis-angle vector [..., 3] of R_target @ R^T: the base-frame rotation taking R onto R_target."""
    return _quat_to_rotvec(matrix_to_quat(R_target @ R.transpose(-1, -2)))


def angle_between(R_a: Tensor, R_b: Tensor) -> Tensor:
    """Geodesic angle [...] (rad, in [0, pi]) between two orientations."""
    q = matrix_to_quat(R_a @ R_b.transpose(-1, -2))
    return 2 * torch.atan2(q[..., 1:].norm(dim=-1), q[..., 0])
