"""Separation from furniture and from the person: the safety filter's last step, and what vetting measures.

The arm is a set of spheres (coreach.world.link_model), each attached to one link. For every pair of (sphere,
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

import copy
import threading
from dataclasses import dataclass, field, replace

import numpy as np

from coreach.control.arrays import namespace
from coreach.control.bodies import PackedBodies, pack, point_distances, sphere_pair_distances, Primitive

__all__ = ["SeparationSettings", "World", "Geometry", "measure", "row_thresholds", "cutoff_for", "sphere_speeds",
           "scale_for_separation"]


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
    (centres in their link frames and radii, from coreach.world.link_model), the self-collision pairs, and the
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
        self._lock = threading.Lock()
        self._repack()

    def _repack(self) -> None:
        self.bodies: PackedBodies = pack(list(self.furniture) + list(self.person))
        self.is_person = np.arange(len(self.bodies)) >= len(self.furniture)  # [O]
        self._thresholds: dict = {}  # per (look-ahead, kind, dtype): the rule's d_p and tau per body

    def protective(self, furniture: float | None = None) -> np.ndarray:
        """[O] the distance each body must be kept at: the person's keep-out distance, and for furniture the
        clearance (or `furniture`, e.g. 0.0 to count contacts rather than clearance)."""
        s = self.settings
        return np.where(self.is_person, s.keep_out, s.clearance if furniture is None else furniture)

    def thresholds(self, lookahead: float, xp, like):
        """The rule's numbers as arrays of `like`'s kind, made once per look-ahead: (d_p [O], tau [O]) per
        body, then (d_p, tau) of every self pair (scalars)."""
        key = (float(lookahead), type(like), getattr(like, "dtype", None))
        if key not in self._thresholds:
            s = self.settings
            d_body = self.protective()
            tau_body = np.where(self.is_person, max(lookahead, s.person_tau), lookahead)
            if type(like) is not np.ndarray:
                d_body, tau_body = xp.asarray(d_body, dtype=like.dtype), xp.asarray(tau_body, dtype=like.dtype)
            self._thresholds[key] = (d_body, tau_body, s.clearance, float(lookahead))
        return self._thresholds[key]

    @property
    def body_names(self) -> list[str]:
        return self.bodies.names

    def shifted(self, offsets: dict) -> World:
        """This world with named bodies translated per episode, for a batch of E episodes (vetting):
        offsets {body name: [E, 3]} (m, world frame). The copy's bodies hold centres [E, O, 3]
        (PackedBodies.shifted), so `measure` takes sphere centres [E, S, 3], episode e against its own bodies;
        everything else (rule, settings, spheres) is shared. Unnamed bodies stay put, and a zero shift gives
        exactly the unshifted distances. Not for `set_poses` (that repacks the unshifted bodies)."""
        index = {name: i for i, name in enumerate(self.bodies.names)}
        unknown = sorted(set(offsets) - set(index))
        if unknown:
            raise ValueError(f"unknown bodies {unknown}; the world has {self.bodies.names}")
        E = len(np.asarray(next(iter(offsets.values()))))
        shift = np.zeros((E, len(self.bodies), 3))
        for name, value in offsets.items():
            shift[:, index[name]] = np.asarray(value, dtype=np.float64).reshape(E, 3)
        out = copy.copy(self)
        out._lock = threading.Lock()
        out.bodies = self.bodies.shifted(shift)
        return out

    def set_poses(self, poses: dict[str, tuple]) -> None:
        """Move named bodies: {name: (xyz, rpy)} in the world frame (rpy in rad). The new bodies are built
        aside and swapped in with one assignment (a control step reads either the old or the new set), and
        writers take a lock (two perception threads cannot lose each other's update)."""
        with self._lock:
            moved = list(self.furniture) + list(self.person)
            index = {b.name: i for i, b in enumerate(moved)}
            for name, (xyz, rpy) in poses.items():
                i = index[name]
                moved[i] = replace(moved[i], xyz=tuple(float(v) for v in xyz), rpy=tuple(float(v) for v in rpy))
            n_f = len(self.furniture)
            bodies = pack(moved)
            self.furniture, self.person = moved[:n_f], moved[n_f:]
            self.bodies = bodies  # the filter reads this one attribute


@dataclass
class Geometry:
    """Distances of one arm state (or a batch) to everything in the world, and the rule's rows.

    body_d [..., S, O] sphere-surface-to-body distances and self_d [..., P] (exact, every pair). The rows the
    rule reads (with a Jacobian): the (sphere, body) pairs sphere[C], body[C] and the self pairs pair[K] near
    enough to matter in at least one state of the batch: d [..., C + K], g [..., C + K, n] (the distance's
    gradient with respect to the joint positions)."""

    body_d: object
    self_d: object
    d: object = None
    g: object = None
    sphere: object = None  # [C] each body row's sphere
    body: object = None  # [C] each body row's body
    pair: object = None  # [K] each self row's pair (index into world.self_pairs)
    self_u: object = None  # [..., P, 3] unit vectors between the self pairs' centres (for their gradients)


def _any_state(mask, xp):
    """[..., X] -> [X]: true in at least one state of the batch."""
    lead = 1
    for n in mask.shape[:-1]:
        lead *= n
    return xp.any(xp.reshape(mask, (lead, mask.shape[-1])), axis=0) if mask.ndim > 1 else mask


def measure(world: World, centres, jac=None, cutoff=None, self_cutoff=None, known: Geometry | None = None) -> Geometry:
    """Geometry at sphere centres [..., S, 3]; with linear Jacobians jac [..., S, 3, n], the rule's rows too.

    Every distance is exact (one pass without gradients). Only the (sphere, body) pairs closer than `cutoff`
    (broadcastable to [..., S, O]) and the self pairs closer than `self_cutoff` ([..., P]) in at least one state
    become rows and get a gradient (`cutoff_for`: beyond them a pair cannot bind the commands at hand);
    without cutoffs every pair does. `known`: the distances of the same centres, measured before (the vetting
    loop measures each state once for its records and hands them on)."""
    xp = namespace(centres)
    radii = world.radii
    bodies = world.bodies.as_namespace(xp, centres)
    if known is not None:
        body_d, self_d, u = known.body_d, known.self_d, known.self_u
    else:
        r = radii if type(centres) is np.ndarray else xp.asarray(radii, dtype=centres.dtype)
        d_c, _ = point_distances(centres, bodies, grad=False)  # [..., S, O]
        body_d = d_c - r[:, None]
        if len(world.self_pairs):
            self_d, u = sphere_pair_distances(centres, radii, world._first, world._second)
        else:
            self_d, u = xp.zeros((*body_d.shape[:-2], 0), dtype=centres.dtype), None
    if jac is None:
        return Geometry(body_d, self_d, self_u=u)
    S, O, n = body_d.shape[-2], body_d.shape[-1], jac.shape[-1]
    near = body_d < cutoff if cutoff is not None else xp.ones(body_d.shape, dtype=xp.bool)
    sphere, body = xp.nonzero(xp.reshape(_any_state(xp.reshape(near, (*near.shape[:-2], S * O)), xp), (S, O)))
    rows_d, rows_g = [], []
    if sphere.shape[0]:
        # the near pairs' gradients: point k against body k only ([..., C, 1, 3] against [C, 1, 1, ...] arrays)
        _, normal = point_distances(centres[..., sphere, :][..., None, :], bodies.take(body), grad=True)
        rows_d.append(body_d[..., sphere, body])
        rows_g.append((normal[..., 0, 0, None, :] @ jac[..., sphere, :, :])[..., 0, :])  # n^T J_s: [..., C, n]
    pair = xp.nonzero(xp.ones(self_d.shape[-1:], dtype=xp.bool))[0]
    if u is not None and self_cutoff is not None:
        pair = xp.nonzero(_any_state(self_d < self_cutoff, xp))[0]
    if u is not None and pair.shape[0]:
        first, second = world._first, world._second
        if type(jac) is not np.ndarray:
            first, second = xp.asarray(first), xp.asarray(second)
        first, second = first[pair], second[pair]
        j_rel = jac[..., first, :, :] - jac[..., second, :, :]  # [..., K, 3, n]
        rows_d.append(self_d[..., pair])
        rows_g.append((u[..., pair, None, :] @ j_rel)[..., 0, :])
    if rows_d:
        d, g = xp.concat(rows_d, axis=-1), xp.concat(rows_g, axis=-2)
    else:
        d = xp.zeros((*body_d.shape[:-2], 0), dtype=centres.dtype)
        g = xp.zeros((*body_d.shape[:-2], 0, n), dtype=centres.dtype)
    return Geometry(body_d, self_d, d, g, sphere, body, pair, u)


def row_thresholds(world: World, geo: Geometry, lookahead: float, xp, like):
    """(d_p [C + K], tau [C + K]) of the rule for a Geometry's rows."""
    d_body, tau_body, d_self, tau_self = world.thresholds(lookahead, xp, like)
    K = geo.pair.shape[0]
    d_p = xp.concat([d_body[geo.body], xp.full((K,), d_self, dtype=like.dtype)])
    tau = xp.concat([tau_body[geo.body], xp.full((K,), tau_self, dtype=like.dtype)])
    return d_p, tau


def sphere_speeds(jac, qd):
    """Fastest speed of each sphere centre over the commands: jac [..., S, 3, n], qd [..., B, n] -> [..., S]."""
    xp = namespace(jac, qd)
    S, n = jac.shape[-3], jac.shape[-1]
    v = xp.reshape(jac, (*jac.shape[:-3], S * 3, n)) @ xp.matrix_transpose(qd)  # [..., S*3, B]: one product
    v = xp.reshape(v, (*jac.shape[:-3], S, 3, qd.shape[-2]))
    speed = xp.sqrt(v[..., 0, :] ** 2 + v[..., 1, :] ** 2 + v[..., 2, :] ** 2)  # [..., S, B] (bodies.sum3's reason)
    return speed[..., 0] if speed.shape[-1] == 1 else xp.max(speed, axis=-1)


def cutoff_for(world: World, vmax, lookahead: float):
    """(per (sphere, body) [..., S, O], per self pair [..., P]): the distance beyond which the pair cannot bind
    a command whose spheres move at most at vmax [..., S] (m/s, `sphere_speeds`): d_p + tau * the fastest the
    pair can close (vmax of its sphere; the sum of both spheres' for a self pair); a pair farther away closes
    at most at that speed, which its allowance already covers."""
    xp = namespace(vmax)
    d_body, tau_body, d_self, tau_self = world.thresholds(lookahead, xp, vmax)
    first, second = world._first, world._second
    if type(vmax) is not np.ndarray:
        first, second = xp.asarray(first), xp.asarray(second)
    return d_body + tau_body * vmax[..., None], d_self + tau_self * (vmax[..., first] + vmax[..., second])


def scale_for_separation(world: World, geo: Geometry, qd, lookahead: float):
    """The factor [..., B] in [0, 1] that makes every row meet a <= max(d - d_p, 0) / tau, for commands
    qd [..., B, n]. A pair that is not closing (a <= 0) never limits the command; a pair left out of the rows
    by `cutoff_for` cannot bind these commands, so the factor is the same as with every pair."""
    xp = namespace(qd)
    d_p, tau = row_thresholds(world, geo, lookahead, xp, qd)
    allowed = xp.maximum(geo.d - d_p, 0.0) / tau  # [..., R]
    a = -(qd @ xp.matrix_transpose(geo.g))  # [..., B, R] closing rates
    allowed = allowed[..., None, :]
    over = a > allowed
    pair = xp.where(over, allowed / xp.where(over, a, 1.0), 1.0)
    return xp.min(pair, axis=-1) if pair.shape[-1] else xp.ones(pair.shape[:-1], dtype=qd.dtype)
