"""Batched rotation helpers for numpy and torch alike (array API): URDF roll-pitch-yaw, quaternions (wxyz), errors.

One implementation serves training and vetting (torch tensors, autograd) and the torch-free runtime (numpy):
the namespace comes from the input through array_api_compat, so this module never imports torch itself.
"""

from __future__ import annotations

import numpy as np
from array_api_compat import array_namespace, is_array_api_obj

__all__ = ["rpy_to_matrix", "matrix_to_quat", "quat_to_matrix", "rotation_error", "angle_between"]


def _float_array(x):
    """(x, namespace); lists and scalars become numpy float64, integer arrays become float64 of their kind."""
    if not is_array_api_obj(x):
        return np.asarray(x, dtype=np.float64), array_namespace(np.empty(0))
    xp = array_namespace(x)
    if not xp.isdtype(x.dtype, "real floating"):
        x = xp.astype(x, xp.float64)
    return x, xp


def _mat3(xp, entries, batch_shape):
    """Nine [...] arrays in row-major order -> [..., 3, 3]."""
    return xp.reshape(xp.stack(entries, axis=-1), (*batch_shape, 3, 3))


def rpy_to_matrix(rpy):
    """Roll, pitch, yaw (rad) [..., 3] -> rotation matrix [..., 3, 3].

    Extrinsic X-Y-Z (the URDF `rpy` convention): R = Rz(yaw) @ Ry(pitch) @ Rx(roll).
    """
    rpy, xp = _float_array(rpy)
    c, s = xp.cos(rpy), xp.sin(rpy)
    cr, cp, cy = c[..., 0], c[..., 1], c[..., 2]
    sr, sp, sy = s[..., 0], s[..., 1], s[..., 2]
    rows = [
        cy * cp, cy * sp * sr - sy * cr, cy * sp * cr + sy * sr,
        sy * cp, sy * sp * sr + cy * cr, sy * sp * cr - cy * sr,
        -sp, cp * sr, cp * cr,
    ]  # fmt: skip
    return _mat3(xp, rows, rpy.shape[:-1])


def matrix_to_quat(R):
    """Rotation matrix [..., 3, 3] -> unit quaternion [..., 4] (w, x, y, z) with w >= 0.

    Each of the four candidate formulas divides by one component; taking the largest one keeps the
    division well conditioned for every rotation, including half turns (Shepperd's method).
    """
    m, xp = _float_array(R)
    m00, m11, m22 = m[..., 0, 0], m[..., 1, 1], m[..., 2, 2]
    # 4*c^2 for c in (w, x, y, z); clipping guards tiny negatives from rounding.
    four_sq = xp.stack([1 + m00 + m11 + m22, 1 + m00 - m11 - m22, 1 - m00 + m11 - m22, 1 - m00 - m11 + m22], axis=-1)
    four_sq = xp.where(four_sq > 0, four_sq, xp.zeros_like(four_sq))
    d21, d02, d10 = m[..., 2, 1] - m[..., 1, 2], m[..., 0, 2] - m[..., 2, 0], m[..., 1, 0] - m[..., 0, 1]
    s21, s02, s10 = m[..., 2, 1] + m[..., 1, 2], m[..., 0, 2] + m[..., 2, 0], m[..., 1, 0] + m[..., 0, 1]
    # Candidate k holds 4*c_k*(w, x, y, z) for the formula whose pivot is component k.
    cand = [
        xp.stack([four_sq[..., 0], d21, d02, d10], axis=-1),
        xp.stack([d21, four_sq[..., 1], s10, s02], axis=-1),
        xp.stack([d02, s10, four_sq[..., 2], s21], axis=-1),
        xp.stack([d10, s02, s21, four_sq[..., 3]], axis=-1),
    ]  # 4 x [..., 4]
    best = xp.argmax(four_sq, axis=-1, keepdims=True)  # [..., 1]
    q = xp.where(best == 0, cand[0], xp.where(best == 1, cand[1], xp.where(best == 2, cand[2], cand[3])))
    q = q / (2 * xp.sqrt(xp.max(four_sq, axis=-1, keepdims=True)))  # sqrt(4 c_k^2) * 2 = 4|c_k|
    q = q / xp.linalg.vector_norm(q, axis=-1, keepdims=True)
    return xp.where(q[..., :1] < 0, -q, q)


def quat_to_matrix(q):
    """Quaternion [..., 4] (w, x, y, z; normalised here) -> rotation matrix [..., 3, 3]."""
    q, xp = _float_array(q)
    q = q / xp.linalg.vector_norm(q, axis=-1, keepdims=True)
    w, x, y, z = q[..., 0], q[..., 1], q[..., 2], q[..., 3]
    rows = [
        1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y),
        2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x),
        2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y),
    ]  # fmt: skip
    return _mat3(xp, rows, q.shape[:-1])


def _quat_to_rotvec(q, xp):
    """Unit quaternion [..., 4] with w >= 0 -> rotation vector [..., 3] (angle in [0, pi])."""
    w, v = q[..., :1], q[..., 1:]
    n = xp.linalg.vector_norm(v, axis=-1, keepdims=True)
    small = n <= 1e-8
    safe_n = xp.where(small, xp.ones_like(n), n)
    safe_w = xp.where(w > 1e-12, w, xp.full_like(w, 1e-12))
    # angle/sin(angle/2) = 2*atan2(n, w)/n -> 2/w as n -> 0; the limit avoids 0/0 near identity.
    factor = xp.where(small, 2 / safe_w, 2 * xp.atan2(n, w) / safe_n)
    return factor * v


def rotation_error(R_target, R):
    """Axis-angle vector [..., 3] of R_target @ R^T: the base-frame rotation taking R onto R_target."""
    R_target, xp = _float_array(R_target)
    return _quat_to_rotvec(matrix_to_quat(R_target @ xp.matrix_transpose(R)), xp)


def angle_between(R_a, R_b):
    """Geodesic angle [...] (rad, in [0, pi]) between two orientations."""
    R_a, xp = _float_array(R_a)
    q = matrix_to_quat(R_a @ xp.matrix_transpose(R_b))
    return 2 * xp.atan2(xp.linalg.vector_norm(q[..., 1:], axis=-1), q[..., 0])
