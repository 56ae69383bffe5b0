"""The servo law toward a target pose, shared by the scripted demonstrator and policy blending.

Resolved-rate control (Whitney 1969) with damped least squares (Nakamura & Hanafusa 1986; Wampler 1986):
twist v = [k_p (p* - p) capped in norm at v_max, k_r rot_err(R*, R) capped in norm at w_max], then
qd = J^T (J J^T + damping^2 I)^-1 v. `dls_step` and `cap_norm` are array-API code (numpy or torch);
`servo_twist` uses coreach.world.geometry's rotation error (torch).
"""

from __future__ import annotations

import torch

from coreach.control.arrays import namespace
from coreach.world.geometry import rotation_error


def dls_step(J, twist, damping: float):
    """Damped least-squares joint velocity J^T (J J^T + damping^2 I)^-1 twist.

    J [B, m, n], twist [B, m] -> qd [B, n]. damping = 0 gives the minimum-norm solution (pseudo-inverse)
    for a full-row-rank J; damping > 0 bounds |qd| near singularities.
    """
    xp = namespace(J, twist)
    m = J.shape[-2]
    Jt = xp.matrix_transpose(J)
    A = J @ Jt + (damping**2) * xp.eye(m, dtype=J.dtype)  # [B, m, m]
    y = xp.linalg.solve(A, twist[..., None])  # [B, m, 1]
    return (Jt @ y)[..., 0]


def cap_norm(v, limit: float):
    """Shrink rows of v [..., k] whose norm exceeds `limit`, keeping their direction."""
    xp = namespace(v)
    norm = xp.linalg.vector_norm(v, axis=-1, keepdims=True)
    return v * xp.minimum(limit / xp.maximum(norm, xp.asarray(1e-12, dtype=v.dtype)), xp.asarray(1.0, dtype=v.dtype))


def servo_twist(pos, rot, target, target_rot, k_p: float, k_r: float, v_max: float, w_max: float):
    """Tool twist [B, 6] toward a target position [B, 3] and orientation [B, 3, 3]: proportional, each part
    capped in norm."""
    rot_err = rotation_error(target_rot, rot)
    return torch.cat([cap_norm(k_p * (target - pos), v_max), cap_norm(k_r * rot_err, w_max)], dim=-1)


def servo(J, pos, rot, target, target_rot, k_p: float, k_r: float, v_max: float, w_max: float, damping: float):
    """Joint velocity [B, n] of the servo law (before the safety filter)."""
    twist = servo_twist(pos, rot, target, target_rot, k_p, k_r, v_max, w_max)
    return dls_step(J, twist.to(J.dtype), damping)
