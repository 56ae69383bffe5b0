"""Separation from furniture and from the person: the safety filter's last step, and what vetting measures.

The arm is a set of spheres (coreach.link_model), each attached to one link. For every pair of (sphere,
body) and every allowed pair of spheres on non-adjacent links (self-collision), the filter knows the distance
d (coreach.control.bodies) and its gradient with respect to the joint positions, g = n^T J_s (n: the unit
direction in which d grows, J_s [3, n]: the sphere centre's linear Jacobian). A command qd then closes the gap
at the rate a = -g . qd (m/s).

Rule (one line per pair): a <= max(d - d_p, 0) / tau, where
- furniture and self-collision pairs: d_p = `clearance` (m), tau = the filter's look-ahead (s): the linear
  prediction d - a tau stays at or above the clearance; a sphere already closer may only keep its distance
  or move away;
- the person's bodies: d_p = the protective separation distance at zero robot speed (the keep-out zone), and
  tau = max(look-ahead, T_r + T_s / 2), from speed and separation monitoring (ISO/TS 15066, clause 5.5.4; the
  formula as remembered, check it against the standard):

      S_p = S_h + S_r + S_s + C + Z_d + Z_r
      S_h = v_h (T_r + T_s)      the person's own motion while the robot reacts and stops
      S_r = v_r T_r              the robot's motion during its reaction time
      S_s = v_r T_s / 2          its stopping distance (constant deceleration from v_r over T_s)
      C, Z_d, Z_r                intrusion distance, position uncertainty of the person and of the robot

  With v_r the robot's speed toward the person, S >= S_p gives v_r <= (S - K) / (T_r + T_s / 2) with
  K = v_h (T_r + T_s) + C + Z_d + Z_r, the keep-out distance (v_r = 0). Between K and the distance at which
  that bound reaches the tool speed cap lies the reduced-speed zone, where every sphere's approach speed falls
  linearly with its separation.

Every pair's bound scales the whole command by one factor (as the speed caps do: the direction is kept), so
this step never increases a joint speed and keeps the earlier steps' guarantees. Array API: numpy on the
robot, torch in vetting; `qd` may carry extra leading candidate axes ([..., B, n] against g [..., P, n]).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from coreach.control.arrays import namespace
from coreach.control.bodies import PackedBodies, pack, point_distances, sphere_pair_distances, Primitive

__all__ = ["SeparationSettings", "World", "Geometry", "measure", "cutoff_for", "sphere_speeds", "scale_for_separation"]


@dataclass(frozen=True)
class SeparationSettings:
    """The numbers of the rule in the module docstring (m, s, m/s)."""

    clearance: float = 0.02  # m kept from furniture and between non-adjacent links
    person_speed: float = 0.5  # v_h, m/s
    reaction_time: float = 0.1  # T_r, s
    stopping_time: float = 0.2  # T_s, s
    intrusion: float = 0.0  # C, m
    person_uncertainty: float = 0.02  # Z_d, m
    robot_uncertainty: float = 0.01  # Z_r, m

    @property
    def keep_out(self) -> float:
        """K = v_h (T_r + T_s) + C + Z_d + Z_r: the protective separation distance at zero robot speed."""
        return (self.person_speed * (self.reaction_time + self.stopping_time) + self.intrusion
                + self.person_uncertainty + self.robot_uncertainty)  # fmt: skip

    @property
    def person_tau(self) -> float:
        """T_r + T_s / 2: separation above K divided by this is the allowed approach speed."""
        return self.reaction_time + self.stopping_time / 2

    def reduced_zone(self, speed_cap: float) -> float:
        """Outer edge of the reduced-speed zone: where the allowed approach speed reaches `speed_cap`."""
        return self.keep_out + speed_cap * self.person_tau


@dataclass
class World:
    """What the filter keeps the arm clear of: furniture and the person as primitives, the link spheres
    (centres in their link frames and radii, from coreach.link_model), the self-collision pairs, and the
    rule's settings. `set_poses` moves bodies at run time (e.g. the head from a lab's perception)."""

    furniture: list[Primitive]
    person: list[Primitive]
    radii: np.ndarray  # [S] link sphere radii (m)
    settings: SeparationSettings = field(default_factory=SeparationSettings)
    self_pairs: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), dtype=np.int64))  # [P, 2] sphere ids

    def __post_init__(self):
        self.radii = np.asarray(self.radii, dtype=np.float64)
        self.self_pairs = np.asarray(self.self_pairs, dtype=np.int64).reshape(-1, 2)
        self._first, self._second = self.self_pairs[:, 0].copy(), self.self_pairs[:, 1].copy()
        self._repack()

    def _repack(self) -> None:
        self.bodies: PackedBodies = pack(list(self.furniture) + list(self.person))
        self.is_person = np.arange(len(self.bodies)) >= len(self.furniture)  # [O]
        self._rows: dict = {}  # per (look-ahead, namespace, dtype): the rule's d_p and tau per pair row

    def rows(self, lookahead: float, xp, like):
        """(d_p [R], tau [R]) of the rule per pair row (R = S*O body rows, sphere-major, then the self pairs),
        as arrays of `like`'s kind; made once per look-ahead."""
        key = (float(lookahead), type(like), getattr(like, "dtype", None))
        if key not in self._rows:
            s = self.settings
            S = len(self.radii)
            d_body = np.where(self.is_person, s.keep_out, s.clearance)
            tau_body = np.where(self.is_person, max(lookahead, s.person_tau), lookahead)
            P = len(self.self_pairs)
            d_p = np.concatenate([np.tile(d_body, S), np.full(P, s.clearance)])
            tau = np.concatenate([np.tile(tau_body, S), np.full(P, float(lookahead))])
            if type(like) is not np.ndarray:
                d_p, tau = xp.asarray(d_p, dtype=like.dtype), xp.asarray(tau, dtype=like.dtype)
            self._rows[key] = (d_p, tau)
        return self._rows[key]

    @property
    def body_names(self) -> list[str]:
        return self.bodies.names

    def set_poses(self, poses: dict[str, tuple]) -> None:
        """Move named bodies: {name: (xyz, rpy)} in the world frame (rpy in rad)."""
        from dataclasses import replace

        index = {b.name: i for i, b in enumerate(self.furniture + self.person)}
        moved = list(self.furniture) + list(self.person)
        for name, (xyz, rpy) in poses.items():
            i = index[name]
            moved[i] = replace(moved[i], xyz=tuple(float(v) for v in xyz), rpy=tuple(float(v) for v in rpy))
        n_f = len(self.furniture)
        self.furniture, self.person = moved[:n_f], moved[n_f:]
        self._repack()


@dataclass
class Geometry:
    """Distances of one arm state (or a batch) to everything in the world, and their joint gradients.

    body_d [..., S, O] sphere-surface-to-body distances; self_d [..., P]; and the rule's rows: d [..., R],
    g [..., R, n] (R = S*O + P pair rows, flattened)."""

    body_d: object
    self_d: object
    d: object
    g: object


def measure(world: World, centres, jac=None, cutoff=None) -> Geometry:
    """Geometry at sphere centres [..., S, 3] with linear Jacobians jac [..., S, 3, n] (without jac: only the
    distances; d and g are None).

    cutoff (broadcastable to [..., S, O]): pairs whose distance provably exceeds it (the centre distance less
    the body's bounding radius and the sphere's radius, a lower bound) are not measured exactly; their entry
    is that lower bound, with a zero gradient. The filter passes a cutoff beyond which a pair cannot bind
    (`cutoff_for`), so the result of the rule is the same as with every pair measured."""
    xp = namespace(centres)
    radii = world.radii
    r = radii if type(centres) is np.ndarray else xp.asarray(radii, dtype=centres.dtype)
    bodies = world.bodies.as_namespace(xp, centres)
    if cutoff is None:
        d_c, normal = point_distances(centres, bodies, grad=jac is not None)  # [..., S, O], [..., S, O, 3]
        body_d = d_c - r[:, None]
        g_body = None if jac is None else normal @ jac  # n^T J_s: [..., S, O, 3] @ [..., S, 3, n] -> [..., S, O, n]
    else:
        reach = world.bodies.reach if type(centres) is np.ndarray else xp.asarray(world.bodies.reach, dtype=centres.dtype)
        rel = centres[..., :, None, :] - bodies.centre
        body_d = xp.sqrt(xp.sum(rel * rel, axis=-1)) - reach - r[:, None]  # lower bounds [..., S, O]
        near = xp.nonzero(body_d < cutoff)
        body_d = xp.asarray(body_d, copy=True)
        d_k, n_k = point_distances(centres[near[:-1]][:, None, :], bodies.take(near[-1]), grad=jac is not None)
        body_d[near] = d_k[:, 0, 0] - r[near[-2]]
        g_body = None
        if jac is not None:
            g_body = xp.zeros((*body_d.shape, jac.shape[-1]), dtype=centres.dtype)
            g_body[near] = (n_k[:, 0, 0, None, :] @ jac[near[:-1]])[:, 0, :]
    S, O = body_d.shape[-2], body_d.shape[-1]
    lead = body_d.shape[:-2]
    if len(world.self_pairs):
        self_d, u = sphere_pair_distances(centres, radii, world._first, world._second)
    else:
        self_d, u = xp.zeros((*lead, 0), dtype=centres.dtype), None
    if jac is None:
        return Geometry(body_d, self_d, None, None)
    n = jac.shape[-1]
    rows_d = [xp.reshape(body_d, (*lead, S * O))]
    rows_g = [xp.reshape(g_body, (*lead, S * O, n))]
    if u is not None:
        first, second = world._first, world._second
        if type(jac) is not np.ndarray:
            first, second = xp.asarray(first), xp.asarray(second)
        j_rel = jac[..., first, :, :] - jac[..., second, :, :]  # [..., P, 3, n]
        rows_d.append(self_d)
        rows_g.append((u[..., None, :] @ j_rel)[..., 0, :])
    return Geometry(body_d, self_d, xp.concat(rows_d, axis=-1), xp.concat(rows_g, axis=-2))


def sphere_speeds(jac, qd):
    """Fastest speed of each sphere centre over the commands: jac [..., S, 3, n], qd [..., B, n] -> [..., S]."""
    xp = namespace(jac, qd)
    S, n = jac.shape[-3], jac.shape[-1]
    v = xp.reshape(jac, (*jac.shape[:-3], S * 3, n)) @ xp.matrix_transpose(qd)  # [..., S*3, B]: one product
    v = xp.reshape(v, (*jac.shape[:-3], S, 3, qd.shape[-2]))
    return xp.max(xp.sqrt(xp.sum(v * v, axis=-2)), axis=-1)


def cutoff_for(world: World, vmax, lookahead: float, floor=None):
    """Per (sphere, body) [..., S, O]: the distance beyond which the pair cannot bind a command whose spheres
    move at most at vmax [..., S] (m/s, `sphere_speeds`): d_p + tau * vmax; a pair farther away closes at most
    at that speed, which its allowance already covers. `floor` [O] raises it (exact distances wanted up to
    there, e.g. for the reduced-speed zone's measurements)."""
    xp = namespace(vmax)
    d_p, tau = world.rows(lookahead, xp, vmax)
    O = len(world.bodies)
    cut = d_p[:O] + tau[:O] * vmax[..., None]
    if floor is not None:
        cut = xp.maximum(cut, floor if type(vmax) is np.ndarray else xp.asarray(floor, dtype=vmax.dtype))
    return cut


def scale_for_separation(world: World, geo: Geometry, qd, lookahead: float, vmax=None):
    """The factor [..., B] in [0, 1] that makes every pair meet a <= max(d - d_p, 0) / tau, for commands
    qd [..., B, n]. A pair that is not closing (a <= 0) never limits the command. With vmax [..., S] (the
    spheres' fastest speeds over the commands), rows that cannot bind any command (allowance >= the most the
    pair can close: vmax of its sphere, or the sum of both spheres' for a self pair) are left out of the
    product first; the factor is the same."""
    xp = namespace(qd)
    d_p, tau = world.rows(lookahead, xp, qd)
    allowed = xp.maximum(geo.d - d_p, 0.0) / tau  # [..., R]
    g = geo.g
    if vmax is not None:
        S, O = geo.body_d.shape[-2], geo.body_d.shape[-1]
        first, second = world._first, world._second
        if type(qd) is not np.ndarray:
            first, second = xp.asarray(first), xp.asarray(second)
        per_body = xp.reshape(xp.broadcast_to(vmax[..., None], (*vmax.shape, O)), (*vmax.shape[:-1], S * O))
        reach = xp.concat([per_body, vmax[..., first] + vmax[..., second]], axis=-1)  # [..., R] fastest closing
        live = allowed < reach
        cols = xp.nonzero(xp.any(xp.reshape(live, (-1, live.shape[-1])), axis=0))[0]
        allowed, g = allowed[..., cols], g[..., cols, :]
    a = -(qd @ xp.matrix_transpose(g))  # [..., B, R] closing rates
    allowed = allowed[..., None, :]
    over = a > allowed
    pair = xp.where(over, allowed / xp.where(over, a, 1.0), 1.0)
    return xp.min(pair, axis=-1) if pair.shape[-1] else xp.ones(pair.shape[:-1], dtype=qd.dtype)
