"""Shared safety limits: the speed caps and position look-ahead applied by training, vetting and runtime.

Written against the array API (numpy arrays or torch tensors) so the torch-free runtime runs the very same
code as training and vetting.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from array_api_compat import array_namespace

# Reduced speed for collaborative operation in ISO 10218-1 (from memory: 250 mm/s).
DEFAULT_TCP_SPEED_MAX = 0.25


@dataclass(frozen=True)
class SafetyLimits:
    """Joint speed limits [n] (rad/s), a tool-centre-point speed cap (m/s) and joint position limits."""

    qd_max: tuple[float, ...]
    tcp_speed_max: float = DEFAULT_TCP_SPEED_MAX
    q_lower: tuple[float, ...] = field(default=())
    q_upper: tuple[float, ...] = field(default=())

    def cap(self, qd, jac_lin):
        """Scale qd [..., n] down uniformly so every joint and the tool (jac_lin [..., 3, n]) obey the caps.

        Uniform scaling keeps the direction of motion, so a capped command still heads the same way; a term
        that rewards progress cannot gain by asking for more speed. Returns (capped qd, intervened [...]).
        """
        xp = array_namespace(qd, jac_lin)
        qd_max = xp.asarray(self.qd_max, dtype=qd.dtype)
        joint_ratio = xp.max(xp.abs(qd) / qd_max, axis=-1)  # [...]
        tcp = xp.linalg.vector_norm(xp.sum(jac_lin * qd[..., None, :], axis=-1), axis=-1)  # [...]
        tcp_ratio = tcp / self.tcp_speed_max
        ratio = xp.maximum(joint_ratio, tcp_ratio)
        intervened = ratio > 1.0
        scale = xp.where(intervened, 1.0 / xp.maximum(ratio, xp.asarray(1e-12, dtype=qd.dtype)), 1.0)
        return qd * scale[..., None], intervened

    def keep_inside(self, q, qd, dt: float):
        """Clip qd [..., n] per joint so q + qd * dt stays within the position limits (one-step look-ahead).

        Returns (clipped qd, intervened [...]). With no position limits configured, qd passes through.
        """
        if not self.q_lower:
            xp = array_namespace(qd)
            return qd, xp.zeros(qd.shape[:-1], dtype=xp.bool)
        xp = array_namespace(q, qd)
        lower = xp.asarray(self.q_lower, dtype=qd.dtype)
        upper = xp.asarray(self.q_upper, dtype=qd.dtype)
        lo = (lower - q) / dt
        hi = (upper - q) / dt
        zero = xp.zeros_like(lo)  # not 0 * lo: continuous joints have infinite limits, and 0 * inf is NaN
        clipped = xp.minimum(xp.maximum(qd, xp.minimum(lo, zero)), xp.maximum(hi, zero))
        intervened = xp.any(clipped != qd, axis=-1)
        return clipped, intervened

    @classmethod
    def for_robot(cls, robot, tcp_speed_max: float = DEFAULT_TCP_SPEED_MAX, speed_fraction: float = 1.0):
        """Limits taken from a robot plugin; `speed_fraction` scales its joint speed limits down."""
        return cls(
            qd_max=tuple(float(v) * speed_fraction for v in robot.qd_max),
            tcp_speed_max=float(tcp_speed_max),
            q_lower=tuple(float(v) for v in robot.q_lower),
            q_upper=tuple(float(v) for v in robot.q_upper),
        )
