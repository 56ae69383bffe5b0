"""The safety filter every command passes through, in training, vetting and on the robot (read top to bottom).

Order of one control step (methods of SafetyLimits below, which the caller runs in this order):
1. `non_finite`: any non-finite stick, q or clock value -> the caller zeroes the command and latches a fault
   (the runtime Session holds the latch; it is cleared only by an operator).
2. `stale`: watchdog; a stick sample older than `watchdog_timeout_s`, or from the future -> zero.
3. `condition_stick`: stick clipped to the box [stick_low, stick_high]^d, then a per-axis deadband rescaled so
   the stick stays continuous; a stick inside the deadband on every axis -> zero (a released stick stops).
4. `limit`: on the decoder's joint velocities qd [..., n]
   a. joint position look-ahead: each joint clipped so q + qd * lookahead_s stays inside [q_lower, q_upper];
   b. joint speed and tool speed caps: the whole command scaled down uniformly (its direction is kept);
   c. workspace box: the command scaled down uniformly so the predicted tool position pos + J_lin qd *
      lookahead_s stays inside the box (an axis already outside may only move back).
   d. separation (with a scene's bodies, coreach.control.separation): the command scaled down uniformly so
      that no link sphere's look-ahead comes closer than the clearance to furniture or another link, nor
      closer than the keep-out distance to the person; a sphere already closer may only move away; and in
      the person's reduced-speed zone every sphere's speed toward the person obeys the ISO/TS 15066 bound.
   Scaling in b, c and d never increases any joint speed and keeps q + qd * lookahead_s on the segment between
   q and the look-ahead-clipped target, so each later step keeps the earlier guarantees.
   Returns the filtered command and flags saying which of a-d acted (JOINT_LIMIT | SPEED_CAP | WORKSPACE |
   SEPARATION).

Array-API code (numpy at runtime, torch in training and vetting), batched over any leading shape [...].
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from coreach.control.arrays import NUMPY, namespace
from coreach.control.separation import cutoff_for, measure, scale_for_separation, sphere_speeds

# Reduced speed for collaborative operation in ISO 10218-1 (from memory: 250 mm/s).
DEFAULT_TCP_SPEED_MAX = 0.25
# Which part of `limit` changed a command (bits; 0 = none).
JOINT_LIMIT, SPEED_CAP, WORKSPACE, SEPARATION = 1, 2, 4, 8


@dataclass(frozen=True)
class SafetyLimits:
    """Joint speed limits [n] (rad/s), tool speed cap (m/s), joint position limits [n] (rad), the workspace box
    (min, max corners [3], m, robot base frame; empty = no box), the look-ahead (s; None = the caller's step),
    and the stick conditioning and watchdog settings."""

    qd_max: tuple[float, ...]
    tcp_speed_max: float = DEFAULT_TCP_SPEED_MAX
    q_lower: tuple[float, ...] = field(default=())
    q_upper: tuple[float, ...] = field(default=())
    workspace_min: tuple[float, ...] = field(default=())
    workspace_max: tuple[float, ...] = field(default=())
    lookahead_s: float | None = None
    stick_low: float = -1.0
    stick_high: float = 1.0
    deadband: float = 0.0
    watchdog_timeout_s: float = math.inf

    def __post_init__(self):
        # the limits as float64 numpy arrays, made once: converting tuples at every control step costs more
        # than the filter's arithmetic on 7-element vectors
        for name in ("qd_max", "q_lower", "q_upper", "workspace_min", "workspace_max"):
            object.__setattr__(self, f"_{name}", np.asarray(getattr(self, name), dtype=np.float64))

    def _get(self, name: str, xp, like):
        """Limit `name` as an array of `like`'s namespace and dtype."""
        arr = getattr(self, f"_{name}")
        return arr if xp is NUMPY and like.dtype == np.float64 else xp.asarray(arr, dtype=like.dtype)

    # -------------------------------------------------------------------------------- 1-2: inputs
    @staticmethod
    def non_finite(**values) -> list[str]:
        """Names of the given numbers, sequences or arrays holding a non-finite (or non-numeric) value; the
        caller zeroes the command and latches a fault."""
        bad = []
        for name, v in values.items():
            try:
                if isinstance(v, (int, float)):
                    ok = math.isfinite(v)
                elif isinstance(v, (list, tuple)):
                    ok = all(map(math.isfinite, v))
                else:
                    xp = namespace(v)
                    ok = bool(xp.all(xp.isfinite(v)))
            except TypeError:
                ok = False
            if not ok:
                bad.append(name)
        return bad

    def stale(self, now_s: float, stick_time_s: float) -> bool:
        """Watchdog: the stick sample is older than watchdog_timeout_s, or claims to come from the future."""
        age = float(now_s) - float(stick_time_s)
        return not 0.0 <= age <= self.watchdog_timeout_s

    # -------------------------------------------------------------------------------- 3: the stick
    def condition_stick(self, stick):
        """Stick [..., d] -> (conditioned stick [..., d], clipped [...], released [...]).

        Box clip, then per axis |s| <= deadband -> 0, else sign(s) (|s| - deadband) / (1 - deadband): continuous
        and still in [-1, 1]. Per axis (not radial) so drift on one axis is removed while another is deflected.
        released: every axis inside the deadband -> the command is zero.
        """
        xp = namespace(stick)
        boxed = xp.minimum(xp.maximum(stick, self.stick_low), self.stick_high)
        clipped = xp.any(boxed != stick, axis=-1)
        mag = (xp.abs(boxed) - self.deadband) / (1.0 - self.deadband)
        out = xp.where(mag > 0.0, xp.sign(boxed) * mag, 0.0)
        released = xp.all(out == 0.0, axis=-1)
        return out, clipped, released

    # -------------------------------------------------------------------------------- 4: the command
    def limit(self, q, qd, jac_lin, pos=None, dt: float | None = None, separation=None):
        """Filter joint velocities qd [..., n] at joint positions q [..., n], tool Jacobian jac_lin [..., 3, n] and
        tool position pos [..., 3] (needed only with a workspace box). Look-ahead: `lookahead_s`, else dt.
        `separation`: (World, sphere centres [..., S, 3], their Jacobians [..., S, 3, n][, their distances
        measured before]) of the state(s), with a leading shape that is a prefix of qd's (e.g. [E] for candidate
        commands [E, M, K, n]).

        Returns (qd, flags [...] int: JOINT_LIMIT | SPEED_CAP | WORKSPACE | SEPARATION bits, workspace scale
        [...] or 1.0 without a box).
        """
        horizon = self.lookahead_s if self.lookahead_s is not None else dt
        qd, outside = self.keep_inside(q, qd, horizon)
        qd, fast = self.cap(qd, jac_lin)
        if self.workspace_min and pos is not None:
            qd, scale = self.inside_workspace(pos, jac_lin, qd, horizon)
            boxed = scale < 1.0
        else:
            scale, boxed = 1.0, False
        flags = outside * JOINT_LIMIT | fast * SPEED_CAP | boxed * WORKSPACE
        if separation is not None:
            qd, held = self.keep_apart(qd, *separation[:3], horizon, *separation[3:])
            flags = flags | held * SEPARATION
        return qd, flags, scale

    @staticmethod
    def keep_apart(qd, world, centres, jac, horizon: float, known=None):
        """4d. Scale qd [..., n] by the separation rule's factor (coreach.control.separation) at link spheres
        centres [..., S, 3] with Jacobians jac [..., S, 3, n], whose leading shape is a prefix of qd's (one
        state, many commands). Only pairs near enough to bind one of the commands are measured exactly.
        `known`: the state's distances measured before (coreach.control.separation.measure). Returns
        (qd, limited [...])."""
        xp = namespace(qd)
        lead = centres.shape[:-2]
        shape = qd.shape
        flat = xp.reshape(qd, (*lead, -1, shape[-1]))  # [..., B, n]: every command at one state
        vmax = sphere_speeds(jac, flat)  # [..., S]
        geo = measure(world, centres, jac, *cutoff_for(world, vmax, horizon), known=known)
        scale = scale_for_separation(world, geo, flat, horizon)  # [..., B]
        out = xp.reshape(flat * scale[..., None], shape)
        return out, xp.reshape(scale < 1.0, shape[:-1])

    def keep_inside(self, q, qd, dt: float):
        """4a. Clip qd [..., n] per joint so q + qd * dt stays within the position limits.

        Returns (clipped qd, limited [...]). With no position limits configured, qd passes through.
        """
        xp = namespace(q, qd)
        if not self.q_lower:
            return qd, xp.zeros(qd.shape[:-1], dtype=xp.bool)
        # 0.0, not 0 * lo: continuous joints have infinite limits, and 0 * inf is NaN
        lo = xp.minimum((self._get("q_lower", xp, qd) - q) / dt, 0.0)  # a joint past its limit may only go back
        hi = xp.maximum((self._get("q_upper", xp, qd) - q) / dt, 0.0)
        clipped = xp.minimum(xp.maximum(qd, lo), hi)
        return clipped, xp.any(clipped != qd, axis=-1)

    def cap(self, qd, jac_lin):
        """4b. Scale qd [..., n] down uniformly so every joint and the tool (jac_lin [..., 3, n]) obey the caps.

        Uniform scaling keeps the direction of motion, so a capped command still heads the same way; a term
        that rewards progress cannot gain by asking for more speed. Returns (capped qd, limited [...]).
        """
        xp = namespace(qd, jac_lin)
        joint_ratio = xp.max(xp.abs(qd) / self._get("qd_max", xp, qd), axis=-1)  # [...]
        v = (jac_lin @ qd[..., None])[..., 0]  # [..., 3] tool velocity
        tcp = xp.sqrt(xp.sum(v * v, axis=-1))  # [...]
        ratio = xp.maximum(joint_ratio, tcp / self.tcp_speed_max)
        limited = ratio > 1.0
        scale = xp.where(limited, 1.0 / xp.maximum(ratio, 1e-12), 1.0)
        return qd * scale[..., None], limited

    def inside_workspace(self, pos, jac_lin, qd, horizon: float):
        """4c. Scale qd so pos + J_lin qd * horizon stays in the box; axes already outside may only move back.

        Returns (qd, scale [...]), scale in [0, 1]: the largest uniform factor meeting every axis.
        """
        xp = namespace(pos, jac_lin, qd)
        move = (jac_lin @ qd[..., None])[..., 0] * horizon  # [..., 3] predicted tool displacement
        room_hi = xp.maximum(self._get("workspace_max", xp, qd) - pos, 0.0)  # >= 0: room left on each axis
        room_lo = xp.minimum(self._get("workspace_min", xp, qd) - pos, 0.0)  # <= 0
        room = xp.where(move > 0.0, room_hi, room_lo)  # the side the tool is heading for
        beyond = xp.abs(move) > xp.abs(room)
        axis_scale = xp.where(beyond, room / xp.where(beyond, move, 1.0), 1.0)  # no division by a zero move
        scale = xp.min(axis_scale, axis=-1)
        return qd * scale[..., None], scale

    @classmethod
    def for_robot(cls, robot, tcp_speed_max: float = DEFAULT_TCP_SPEED_MAX, speed_fraction: float = 1.0, **extra):
        """Limits taken from a robot plugin; `speed_fraction` scales its joint speed limits down; `extra` sets
        the workspace box, look-ahead and stick settings."""
        return cls(
            qd_max=tuple(float(v) * speed_fraction for v in robot.qd_max),
            tcp_speed_max=float(tcp_speed_max),
            q_lower=tuple(float(v) for v in robot.q_lower),
            q_upper=tuple(float(v) for v in robot.q_upper),
            **extra,
        )

    def with_workspace(self, workspace_min, workspace_max, lookahead_s: float | None = None) -> SafetyLimits:
        """The same limits with a workspace box (and look-ahead)."""
        return replace(self, workspace_min=tuple(float(v) for v in workspace_min),
                       workspace_max=tuple(float(v) for v in workspace_max),
                       lookahead_s=self.lookahead_s if lookahead_s is None else float(lookahead_s))
